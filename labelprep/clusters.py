"""Exact and near-duplicate clusters, label conflicts, one keeper per cluster, split bundles.

Candidates: two rows are proposed when their files are byte-identical (same ``sha256``) or when
any of the perceptual hashes of one (:data:`labelprep.hashing.HASH_COLUMNS`: whole image and two
centred boxes, and the mirrored hash unless ``flips=False``) is within ``max_distance`` bits of
any of the other's. Verification: every proposed pair is then decided on the pixels of both
files' sketches (:mod:`labelprep.likeness`: aligned for shift, crop and mirror, gain and offset
fitted, the local residual judged), so two different pictures of the same kind (two writers'
"3", an "E" and an "F", two icons) are told from an edited copy. A row without a sketch (a
manifest from before 0.3.0) falls back to the hash rule of :func:`_hash_verified`.
:func:`verified_links` returns the verified pairs with their evidence; the audit uses it too.

Clusters are stars, never chains: a row that has links becomes an anchor (most links first,
then path order) and every not yet placed row verified against it joins it; each member is
linked to its anchor directly, so two members of a cluster are at most two verified links
apart and a cluster of many different pictures cannot grow through a chain of look-alikes.
Byte-identical files join as one. ``linked_to``, ``link_kind``, ``link_likeness`` and
``link_blemish`` record each member's link to its anchor; the weakest link of a cluster is its
member with the largest blemish.
"""

from __future__ import annotations

from . import codes
from .defaults import MAX_DISTANCE
from .errors import ParameterError
from .validation import check_manifest
from .hashing import HASH_COLUMNS, INNER_COLUMN, MIRROR_COLUMN

DEFAULT_MAX_DISTANCE = MAX_DISTANCE
"""Default radius of the candidate search, in bits (see defaults.MAX_DISTANCE)."""

LOW_DETAIL = 0.05
"""``detail`` below this marks a low-detail image, for the hash-only fallback (rows without a
sketch). Measured by benchmarks/dup_accuracy.py: the bilinearly upsampled digits score at most
0.034, the bundled photographs and their edited copies at least 0.065."""

LOW_DETAIL_DISTANCE = 2
"""Radius on the whole-image hash for fallback links that involve a low-detail image."""

LINK_KINDS = ("exact", "near", "mirror", "given")
"""``link_kind`` values: byte-identical, verified near copy, verified mirrored copy, a link
given by another stage or a decision (``links=`` of :func:`group`)."""

_STAGE = "group"


def group(manifest, *, max_distance=DEFAULT_MAX_DISTANCE, keep_conflicts=False, flips=True,
          links=None, progress=None, cluster=None, decisions=None):
    """Cluster exact and near-duplicates and mark them in a new manifest.

    Parameters
    ----------
    manifest : pandas.DataFrame
        Needs ``path`` and ``sha256``; uses ``phash`` (and ``phash_c80``, ``phash_c70``,
        ``phash_mirror``, ``sketch``, ``detail`` when present), ``label``, ``group``,
        ``width``, ``height`` and ``bytes``. Rows with an empty ``phash`` (undecodable files)
        are matched by ``sha256`` only.
    max_distance : int, default 8
        Largest Hamming distance, in bits out of 64, between two hashes of a candidate pair;
        candidates are then verified on their sketches.
    keep_conflicts : bool, default False
        When False, every member of a cluster whose rows carry more than one label (mirrored
        members aside, see ``mirrored-label``) gets the error code ``label-conflict`` and is
        left out of the split; when True they stay in (``mixed_labels`` still shows them).
    flips : bool, default True
        Also match left-right mirrored copies (a mirrored copy in test of a training image is a
        leak: mirroring is the commonest augmentation). Turn off for label sets where mirroring
        changes the class (left/right signs).
    links : pandas.DataFrame, optional
        Decisions of other stages, one row per pair: ``path`` and ``other`` (two manifest
        paths) and ``action``, ``"join"`` (a link verified elsewhere: same scene, a reviewer)
        or ``"separate"`` (not copies: any link between the two is removed and they never share
        a cluster). Joins go through the same star rule as every other link (``link_kind``
        ``given``; an optional ``likeness`` column gives their score). A path not in the
        manifest raises ``ParameterError``.
    progress : callable, optional
        ``progress(iterable, total=int, label=str)`` returning an iterable, to show the passes.
    cluster : str, optional
        Address of a Dask scheduler: the near-pair search runs as tasks on its workers
        (:func:`labelprep.neighbors.radius_pairs`); the same result.
    decisions : pandas.DataFrame, optional
        A decisions table (:func:`labelprep.decisions.load`): its ``join`` and ``separate``
        pairs (``path`` and ``value``) are applied as ``links`` are; pairs naming a path not in
        the manifest are skipped (:func:`labelprep.decisions.findings` reports them). The row
        decisions are applied around this stage by :func:`labelprep.decisions.apply`.

    Returns
    -------
    pandas.DataFrame
        A copy with ``dup_group`` (cluster id, empty for files with no copy), ``bundle``
        (rows that must share one split: clusters joined with user groups), ``keeper`` (one
        per cluster: highest resolution, then largest file, then first path),
        ``mixed_labels``, the link evidence (``linked_to``: the path of the cluster's anchor a
        member was verified against, empty for the anchor; ``link_kind``; ``link_likeness``;
        ``link_blemish``), and the codes ``exact-copy``, ``near-copy``, ``mirrored-label`` and
        ``label-conflict`` in ``issues``. Ids are numbered 0, 1, ... in order of each set's
        first path, so they do not depend on row order.

    Examples
    --------
    >>> import pandas as pd
    >>> m = pd.DataFrame({"path": ["a.png", "b.png", "c.png"], "label": ["cat", "cat", "dog"],
    ...                   "sha256": ["11", "11", "22"], "phash": ["", "", "ff00ff00ff00ff00"]})
    >>> out = group(m)
    >>> out["dup_group"].tolist(), out["issues"].tolist(), out["linked_to"].tolist()
    ([0, 0, <NA>], ['exact-copy', 'exact-copy', ''], ['', 'a.png', ''])
    """
    import numpy as np
    import pandas as pd

    _check_options(manifest, max_distance, flips, progress, keep_conflicts=keep_conflicts)

    from .manifest import coerce

    # work in path order so that every id and keeper is independent of the input row order
    order = np.argsort(manifest["path"].astype(str).to_numpy(), kind="stable")
    rows = coerce(manifest.iloc[order].reset_index(drop=True))
    n = len(rows)
    sha = _text(rows, "sha256")
    evidence = _evidence(rows, int(max_distance), flips, progress, cluster)
    joins, separate = _decisions(rows, _with_decisions(rows, links, decisions))
    star = _stars(rows, sha, pd.concat([evidence, joins], ignore_index=True), separate)
    cluster_id = star["cluster"]
    size = np.bincount(cluster_id, minlength=n)[cluster_id]
    in_cluster = size > 1

    sha_count = pd.Series(sha).map(pd.Series(sha).value_counts()).to_numpy()
    is_exact = (sha != "") & (sha_count > 1)
    # a near copy has a cluster mate that is not byte-identical to it
    distinct_sha = pd.Series(sha).groupby(cluster_id).transform("nunique").to_numpy()
    is_near = in_cluster & ((distinct_sha > 1) | (sha == ""))
    labels = _text(rows, "label")
    named = pd.Series(np.where(labels == "", None, labels))
    mixed = named.groupby(cluster_id).transform("nunique").to_numpy() > 1
    # a mirrored member under another label than its anchor is reported as such: the labels may
    # be right (left/right classes, then run with flips=False) or one of them wrong
    mirror_member = star["kind"] == "mirror"
    anchor_label = labels[star["anchor"]]
    mirrored_label = mirror_member & (labels != anchor_label) & (labels != "") & (anchor_label != "")
    plain = np.where(mirror_member, None, named.to_numpy(dtype=object))
    conflict = pd.Series(plain).groupby(cluster_id).transform("nunique").to_numpy() > 1

    user_group = _text(rows, "group")
    same_cluster = np.vstack([np.arange(n), star["anchor"]])
    bundle = _components(n, np.concatenate([same_cluster, _same_value_links(user_group)], axis=1))

    out = rows.copy()
    dup_group = pd.array(np.zeros(n, dtype=np.int64), dtype="Int64")
    dup_group[in_cluster] = _renumber(cluster_id[in_cluster])
    dup_group[~in_cluster] = pd.NA
    out["dup_group"] = dup_group
    out["bundle"] = pd.array(_renumber(bundle), dtype="Int64")
    out["keeper"] = pd.array(_keepers(rows, cluster_id), dtype="boolean")
    out["mixed_labels"] = pd.array(mixed, dtype="boolean")
    has_link = star["anchor"] != np.arange(n)
    out["linked_to"] = np.where(has_link, rows["path"].to_numpy(dtype=object)[star["anchor"]], "")
    out["link_kind"] = np.where(has_link, star["kind"], "")
    out["link_likeness"] = pd.array(np.where(has_link, star["likeness"], np.nan), dtype="Float64")
    out["link_blemish"] = pd.array(np.where(has_link, star["blemish"], np.nan), dtype="Float64")
    issues = out["issues"] if "issues" in out.columns else pd.Series([""] * n, dtype=str)
    found = {"exact-copy": is_exact, "near-copy": is_near, "mirrored-label": mirrored_label,
             "label-conflict": conflict & (not keep_conflicts)}
    out["issues"] = codes.replace_stage_codes(issues.astype(str), _STAGE, found)
    # back to the caller's row order and index
    restored = out.iloc[np.argsort(order, kind="stable")]
    restored.index = manifest.index
    return coerce(restored)


def verified_links(manifest, *, max_distance=DEFAULT_MAX_DISTANCE, flips=True, progress=None, cluster=None):
    """Pairs of rows the hash search proposes and the pixels confirm, with their evidence.

    The one definition of a near-copy link: :func:`group` clusters these, the audit looks for
    them across splits. Byte-identical files are not listed (compare ``sha256`` for those).

    Parameters
    ----------
    manifest : pandas.DataFrame
        As for :func:`group`.
    max_distance, flips, progress, cluster
        As for :func:`group`.

    Returns
    -------
    pandas.DataFrame
        One row per verified pair: ``first`` and ``second`` (row positions in ``manifest``,
        ``first < second``), ``bits`` (smallest Hamming distance between their hashes),
        ``kind`` (``near`` or ``mirror``), ``likeness`` and ``blemish`` (see
        :mod:`labelprep.likeness`; empty for a pair verified on hashes only, when a sketch is
        missing).

    Examples
    --------
    >>> import pandas as pd
    >>> m = pd.DataFrame({"path": ["a.png", "b.png"], "sha256": ["1", "2"],
    ...                   "phash": ["ff00ff00ff00ff00", "ff00ff00ff00ff01"]})
    >>> verified_links(m)[["first", "second", "bits", "kind"]].values.tolist()
    [[0, 1, 1, 'near']]
    """
    _check_options(manifest, max_distance, flips, progress)
    from .manifest import coerce

    return _evidence(coerce(manifest.reset_index(drop=True)), int(max_distance), flips, progress, cluster)


def near_links(manifest, *, max_distance=DEFAULT_MAX_DISTANCE, flips=True, progress=None, cluster=None):
    """:func:`verified_links` as a (2, k) array of row positions ``a < b``, for the audit.

    :func:`labelprep.audits.audit` calls it, so an audit of a split made from these clusters
    finds no near-duplicate pair across splits. The caller validates the arguments, as
    :func:`group` does; ``path`` and ``sha256`` may be missing.

    Examples
    --------
    >>> import pandas as pd
    >>> m = pd.DataFrame({"phash": ["ff00ff00ff00ff00", "ff00ff00ff00ff01", "0123456789abcdef"]})
    >>> near_links(m, max_distance=4).tolist()
    [[0], [1]]
    """
    import numpy as np

    links = _evidence(manifest.reset_index(drop=True), int(max_distance), flips, progress, cluster)
    return np.vstack([links["first"].to_numpy(), links["second"].to_numpy()]).astype(np.int64)


def _check_options(manifest, max_distance, flips, progress, **flags):
    import numpy as np

    check_manifest(manifest, ["path", "sha256"], hint="make it with labelprep scan")
    if isinstance(max_distance, bool) or not isinstance(max_distance, (int, np.integer)):
        raise TypeError(f"max_distance must be an int, got {type(max_distance).__name__}")
    if not 0 <= max_distance <= 64:
        raise ParameterError(f"max_distance must be between 0 and 64 bits, got max_distance={max_distance}")
    for name, value in (("flips", flips), *flags.items()):
        if not isinstance(value, bool):
            raise TypeError(f"{name} must be True or False, got {value!r}")
    if progress is not None and not callable(progress):
        raise TypeError(f"progress must be callable or None, got {type(progress).__name__}")


def _text(rows, column):
    """A column as a numpy array of str, empty strings where absent. The str objects are the
    column's own, not copies (``astype(str)`` would copy every one: 1.4 GB for a million
    sketches)."""
    import numpy as np
    import pandas as pd

    if column not in rows.columns:
        return np.full(len(rows), "", dtype=object)
    values = rows[column].to_numpy(dtype=object, copy=True)
    values[pd.isna(values)] = ""
    other = np.fromiter((type(v) is not str for v in values), dtype=bool, count=len(values))
    if other.any():  # numbers or bytes from a manifest written elsewhere
        values[other] = [str(v) for v in values[other]]
    return values


def _same_value_links(values):
    """Links (2, k) joining every row to the first row holding the same non-empty value."""
    import numpy as np
    import pandas as pd

    value_codes = pd.factorize(values)[0]
    _, first, inverse = np.unique(value_codes, return_index=True, return_inverse=True)
    keep = np.flatnonzero(np.asarray(values) != "")
    return np.vstack([keep, first[inverse[keep]]]).astype(np.int64)


def _candidates(rows, max_distance, flips, progress, cluster):
    """Candidate pairs (2, k) of rows with near hashes, the hash table and which hashes exist."""
    import numpy as np

    from .neighbors import hex_to_uint64, radius_pairs

    columns = [c for c in HASH_COLUMNS if c in rows.columns]
    if flips and MIRROR_COLUMN in rows.columns:
        columns.append(MIRROR_COLUMN)
    n = len(rows)
    table = np.zeros((n, len(columns)), dtype=np.uint64)
    present = np.zeros((n, len(columns)), dtype=bool)
    for k, column in enumerate(columns):
        cells = _text(rows, column)
        present[:, k] = cells != ""
        table[present[:, k], k] = hex_to_uint64(cells[present[:, k]])
    if "sketch" in rows.columns:
        table, present = _with_shifted(rows, table, present)
    owner = np.nonzero(present)[0]
    values = table[present]
    # each distinct value is searched once; rows sharing one are joined to its first owner
    uniques, first, inverse = np.unique(values, return_index=True, return_inverse=True)
    i, j, _ = radius_pairs(uniques, max_distance, progress=progress, cluster=cluster)
    pairs = np.concatenate([np.vstack([owner, owner[first[inverse]]]),
                            np.vstack([owner[first[i]], owner[first[j]]])], axis=1)
    pairs = np.unique(np.sort(pairs, axis=0), axis=1)
    sha = _text(rows, "sha256")
    # byte-identical pairs are linked by their digest; no need to look at their pixels
    keep = (pairs[0] != pairs[1]) & ~((sha[pairs[0]] == sha[pairs[1]]) & (sha[pairs[0]] != ""))
    return pairs[:, keep], table, present, columns


SHIFTED_MAX_SIDE = 128
"""Images up to this shorter side (px) get shifted hashes: there a shift of a few pixels is a
sketch pixel or more. On larger images it is a fraction of one, which pHash absorbs; leaving
them out keeps the search at four hashes per photo (benchmarks/pipeline_scale.py)."""

SHIFT_CHUNK = 65_536
"""Sketches decoded at a time for the shifted hashes (64 MB of pixels)."""


def _shorter_side(rows):
    """Each row's shorter side in pixels; NaN where unknown."""
    import numpy as np

    if "width" not in rows.columns or "height" not in rows.columns:
        return np.full(len(rows), np.nan)
    return np.fmin(rows["width"].astype("Float64").to_numpy(dtype=float, na_value=np.nan),
                   rows["height"].astype("Float64").to_numpy(dtype=float, na_value=np.nan))


def _with_shifted(rows, table, present):
    """The hash table with the eight shifted whole-image hashes of each sketch appended
    (:func:`labelprep.hashing.shifted_phashes`) where the image is small (SHIFTED_MAX_SIDE): a
    copy moved by a few percent of its side is a candidate through them. The step is 2 sketch pixels (pHash itself absorbs about one), or 4
    for images of 12 px or less, where one source pixel spans 3-4 sketch pixels."""
    import numpy as np

    from .hashing import SHIFTS, shifted_phashes, sketch_pixels

    sketch = _text(rows, "sketch")
    side = _shorter_side(rows)
    have = np.flatnonzero((sketch != "") & (side <= SHIFTED_MAX_SIDE))
    extra = np.zeros((len(rows), len(SHIFTS)), dtype=np.uint64)
    for start in range(0, len(have), SHIFT_CHUNK):
        part = have[start:start + SHIFT_CHUNK]
        extra[part] = shifted_phashes(sketch_pixels(sketch[part]), np.where(side[part] <= 12, 4, 2))
    shown = np.zeros(extra.shape, dtype=bool)
    shown[have] = True
    return np.hstack([table, extra]), np.hstack([present, shown])


def _evidence(rows, max_distance, flips, progress, cluster):
    """verified_links() on rows in their given order."""
    import numpy as np
    import pandas as pd

    from .hashing import sketch_pixels
    from .likeness import accepted, compare

    pairs, table, present, columns = _candidates(rows, max_distance, flips, progress, cluster)
    a, b = pairs
    dist = _distances(table, present, pairs)
    sketch = _text(rows, "sketch")
    seen = (sketch[a] != "") & (sketch[b] != "")
    ok = np.zeros(len(a), dtype=bool)
    likeness = np.full(len(a), np.nan)
    blemish = np.full(len(a), np.nan)
    mirrored = np.zeros(len(a), dtype=bool)
    if seen.any():
        used, where = np.unique(np.concatenate([a[seen], b[seen]]), return_inverse=True)
        pixels = sketch_pixels(sketch[used])
        k = int(seen.sum())
        side = _shorter_side(rows)
        found = compare(pixels[where[:k]], pixels[where[k:]], mirror=flips,
                        side=np.fmin(side[a[seen]], side[b[seen]]))
        low = _low_detail(rows)
        ok[seen] = accepted(found, smooth=low[a[seen]] | low[b[seen]])
        likeness[seen], blemish[seen], mirrored[seen] = found["likeness"], found["blemish"], found["mirrored"]
    if (~seen).any():
        own = dist[~seen][:, :len(columns), :len(columns)]  # the hashes a scan stores, not the shifted ones
        ok[~seen] = _hash_verified(rows, own, columns, max_distance, pairs[:, ~seen])
        mirror = columns.index(MIRROR_COLUMN) if MIRROR_COLUMN in columns else None
        if mirror is not None:
            # only the mirrored hash within the radius: a mirrored copy
            plain = np.delete(np.delete(own, mirror, axis=1), mirror, axis=2).min(axis=(1, 2), initial=65)
            mirrored[~seen] = plain > max_distance
    return pd.DataFrame({"first": a[ok], "second": b[ok],
                         "bits": dist[ok].min(axis=(1, 2), initial=65).astype(np.int64),
                         "kind": np.where(mirrored[ok], "mirror", "near"),
                         "likeness": likeness[ok], "blemish": blemish[ok]})


def _distances(table, present, pairs):
    """(k, c, c) Hamming distances between every hash of one row and every hash of the other."""
    import numpy as np

    a, b = pairs
    dist = np.bitwise_count(table[a][:, :, None] ^ table[b][:, None, :]).astype(np.int16)
    dist[~(present[a][:, :, None] & present[b][:, None, :])] = 65
    return dist


def _hash_verified(rows, dist, columns, max_distance, pairs):
    """The hash-only rule for pairs whose sketches are missing.

    Among the distances between every hash of one row and every hash of the other, one must be
    within ``max_distance``. A match between the same box of both (whole image against whole
    image, say) counts only if their innermost boxes are also within twice ``max_distance``:
    the pictures must agree in the centre, not only in a shared corner (on textures with a
    caption pasted in a corner, the caption alone brings unrelated images within 6 bits). A pair
    with a low-detail row needs its whole-image hashes within :data:`LOW_DETAIL_DISTANCE`.
    """
    import numpy as np

    low = _low_detail(rows)
    a, b = pairs
    k = len(columns)
    same_box = np.eye(k, dtype=bool)
    best_same = dist[:, same_box].min(axis=1, initial=65)
    best_cross = dist[:, ~same_box].min(axis=1, initial=65)
    if INNER_COLUMN in columns:
        inner = columns.index(INNER_COLUMN)
        centre_agrees = dist[:, inner, inner] <= 2 * max_distance
    else:
        centre_agrees = np.ones(len(a), dtype=bool)
    detailed = (best_cross <= max_distance) | ((best_same <= max_distance) & centre_agrees)
    whole = columns.index("phash") if "phash" in columns else None
    if whole is None:
        return detailed & ~(low[a] | low[b])
    smooth = dist[:, whole, whole] <= min(max_distance, LOW_DETAIL_DISTANCE)
    return np.where(low[a] | low[b], smooth, detailed)


def _low_detail(rows):
    """Rows whose ``detail`` is under LOW_DETAIL; unknown detail (a manifest from elsewhere)
    counts as detailed."""
    import numpy as np

    if "detail" not in rows.columns:
        return np.zeros(len(rows), dtype=bool)
    return rows["detail"].astype("Float64").fillna(1.0).to_numpy(dtype=float) < LOW_DETAIL


def _with_decisions(rows, links, decisions):
    """``links`` with the pair decisions of a decisions table added (known paths only)."""
    import pandas as pd

    if decisions is None or decisions.empty:
        return links
    pairs = decisions[decisions["action"].isin(("join", "separate"))]
    known = set(rows["path"].astype(str))
    pairs = pairs[pairs["path"].astype(str).isin(known) & pairs["value"].astype(str).isin(known)]
    given = pd.DataFrame({"path": pairs["path"].astype(str).to_numpy(), "other": pairs["value"].astype(str).to_numpy(),
                          "action": pairs["action"].to_numpy()})
    return given if links is None else pd.concat([links[["path", "other", "action"]], given], ignore_index=True)


def _decisions(rows, links):
    """``links=`` of group() as joins (a DataFrame like verified_links') and separations (2, k)."""
    import numpy as np
    import pandas as pd

    empty = pd.DataFrame({"first": np.zeros(0, np.int64), "second": np.zeros(0, np.int64),
                          "bits": np.zeros(0, np.int64), "kind": np.zeros(0, dtype=object),
                          "likeness": np.zeros(0), "blemish": np.zeros(0)})
    if links is None:
        return empty, np.zeros((2, 0), dtype=np.int64)
    if not isinstance(links, pd.DataFrame):
        raise TypeError(f"links must be a pandas DataFrame or None, got {type(links).__name__}")
    missing = [c for c in ("path", "other", "action") if c not in links.columns]
    if missing:
        raise ParameterError(f"links lacks column(s) {', '.join(missing)}")
    actions = links["action"].astype(str)
    wrong = sorted(set(actions) - {"join", "separate"})
    if wrong:
        raise ParameterError(f"links action must be 'join' or 'separate', got {wrong[0]!r}")
    index = pd.Series(np.arange(len(rows)), index=rows["path"].astype(str).to_numpy())
    ends = []
    for column in ("path", "other"):
        named = links[column].astype(str)
        unknown = named[~named.isin(index.index)]
        if len(unknown):
            raise ParameterError(f"links names a path not in the manifest: {unknown.iloc[0]!r}")
        ends.append(index.loc[named.to_numpy()].to_numpy())
    first, second = np.minimum(*ends), np.maximum(*ends)
    join = (actions == "join").to_numpy() & (first != second)
    score = (links["likeness"].astype(float).to_numpy() if "likeness" in links.columns
             else np.full(len(links), np.nan))
    joins = pd.DataFrame({"first": first[join], "second": second[join], "bits": -1, "kind": "given",
                          "likeness": score[join], "blemish": np.nan})
    return (joins if len(joins) else empty), np.vstack([first[~join], second[~join]])


def _stars(rows, sha, links, separate):
    """Star clusters over verified links (see the module docstring).

    Returns a dict of arrays over rows: ``anchor`` (the row it is linked to, itself for an
    anchor or a row with no copy), ``cluster`` (its anchor's anchor: one id per cluster),
    ``kind``, ``likeness``, ``blemish`` (of its link).
    """
    import numpy as np
    import pandas as pd

    n = len(rows)
    # byte-identical rows act as one: the first of them (path order) stands for the others
    _, first, inverse = np.unique(pd.factorize(sha)[0], return_index=True, return_inverse=True)
    rep = np.where(sha == "", np.arange(n), first[inverse])
    # each copy is linked to the first of its bytes: separating a copy from that first one cuts
    # it off (separating two later copies cuts no link, and they stay together through the first)
    for x, y in zip(separate[0].tolist(), separate[1].tolist()):
        if rep[x] == rep[y] and x != y and rep[x] in (x, y):
            other = y if rep[x] == x else x
            rep[other] = other
    a = rep[links["first"].to_numpy(dtype=np.int64)]
    b = rep[links["second"].to_numpy(dtype=np.int64)]
    apart = set()
    for x, y in zip(rep[separate[0]].tolist(), rep[separate[1]].tolist()):
        apart.update({(x, y), (y, x)})
    keep = (a != b) & np.array([(x, y) not in apart for x, y in zip(a.tolist(), b.tolist())], dtype=bool)
    # strongest evidence first: given links, then the smallest blemish
    strength = np.where(links["kind"].to_numpy() == "given", -1.0,
                        links["blemish"].astype(float).fillna(0.0).to_numpy())
    edges = pd.DataFrame({"u": np.r_[a, b], "v": np.r_[b, a], "link": np.r_[np.arange(len(a)), np.arange(len(a))],
                          "strength": np.r_[strength, strength]})[np.r_[keep, keep]]
    edges = edges.sort_values(["u", "strength", "v"], kind="stable")
    degree = np.bincount(edges["u"].to_numpy(), minlength=n)
    starts = np.r_[0, np.cumsum(degree)]
    neighbour = edges["v"].to_numpy()
    via = edges["link"].to_numpy()

    anchor = np.arange(n)
    chosen = np.full(n, -1)  # the link joining a member to its anchor
    placed = np.zeros(n, dtype=bool)
    order = np.lexsort((np.arange(n), -degree))
    for u in order[degree[order] > 0].tolist():
        if placed[u]:
            continue
        placed[u] = True
        members = {u}
        for k in range(starts[u], starts[u + 1]):
            v = int(neighbour[k])
            if placed[v] or any((v, m) in apart for m in members):
                continue
            placed[v] = True
            anchor[v] = u
            chosen[v] = via[k]
            members.add(v)
    pick = np.where(chosen >= 0, chosen, len(links))  # rows with no link read a blank past the end
    kind = np.append(links["kind"].to_numpy(dtype=object), "")[pick]
    likeness = np.append(links["likeness"].astype(float).to_numpy(), np.nan)[pick]
    blemish = np.append(links["blemish"].astype(float).to_numpy(), np.nan)[pick]
    # a copy of a representative is linked to it (exact); the representative carries the star link
    copy = rep != np.arange(n)
    row_anchor = np.where(copy, rep, anchor[rep])
    kind = np.where(copy, "exact", kind[rep])
    likeness = np.where(copy, 1.0, likeness[rep])
    blemish = np.where(copy, 0.0, blemish[rep])
    return {"anchor": row_anchor, "cluster": anchor[rep], "kind": kind, "likeness": likeness, "blemish": blemish}


def _components(n, links):
    """Connected components of the links (scipy.sparse.csgraph): one label per row, 0..k-1."""
    import numpy as np
    from scipy.sparse import coo_matrix
    from scipy.sparse.csgraph import connected_components

    graph = coo_matrix((np.ones(links.shape[1], dtype=np.int8), (links[0], links[1])), shape=(n, n))
    return connected_components(graph, directed=False)[1]


def _renumber(labels):
    """Component labels renumbered 0, 1, ... in order of each component's first row."""
    import numpy as np

    _, first, inverse = np.unique(labels, return_index=True, return_inverse=True)
    rank = np.empty(len(first), dtype=np.int64)
    rank[np.argsort(first, kind="stable")] = np.arange(len(first))
    return rank[inverse]


def _keepers(rows, cluster):
    """True for the best row of each cluster: most pixels, then most bytes, then first path."""
    import numpy as np

    def number(column):
        if column not in rows.columns:
            return np.zeros(len(rows))
        return rows[column].astype("Float64").fillna(0).to_numpy(dtype=float)

    pixels = number("width") * number("height")
    # rows are in path order, so position breaks the last tie in favour of the first path
    best = np.lexsort((np.arange(len(rows)), -number("bytes"), -pixels, cluster))
    keeper = np.zeros(len(rows), dtype=bool)
    starts = np.r_[True, cluster[best][1:] != cluster[best][:-1]] if len(rows) else np.zeros(0, bool)
    keeper[best[starts]] = True
    return keeper
