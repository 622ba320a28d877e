"""Exact and near-duplicate clusters, label conflicts, one keeper per cluster, split bundles.

Two rows are linked when their files are byte-identical (same ``sha256``) or when any of the
perceptual hashes of one (:data:`labelprep.hashing.HASH_COLUMNS`: whole image and two centred
boxes) is within ``max_distance`` bits of any of the other's. Each candidate pair is verified
(:func:`_verified`): a match between the same box of both images must also agree in the centre
box, and a link involving a low-detail image (``detail`` below :data:`LOW_DETAIL`) needs the
whole-image hashes within :data:`LOW_DETAIL_DISTANCE` bits. Smooth images have strongly
correlated hash bits and distinct ones sit a few bits apart: on scikit-learn's digits upsampled
to 64x64, plain pHash at 8 bits links 45% of them. Clusters are the connected components of the
links (union-find), so a chain of copies stays together.
"""

from __future__ import annotations

from . import codes
from .defaults import MAX_DISTANCE
from .errors import ParameterError
from .validation import check_manifest
from .hashing import HASH_COLUMNS, INNER_COLUMN, MIRROR_COLUMN

DEFAULT_MAX_DISTANCE = MAX_DISTANCE
"""Default radius, 8 bits: on benchmarks/dup_accuracy.py pair precision and mild-edit recall
are both 1.0 from 6 to 10 bits; 8 sits in the middle of that plateau."""

LOW_DETAIL = 0.05
"""``detail`` below this marks a low-detail image. Measured by benchmarks/dup_accuracy.py: the
upsampled digits score at most 0.034, the bundled photographs and their edited copies at least
0.065."""

LOW_DETAIL_DISTANCE = 2
"""Radius on the whole-image hash for links that involve a low-detail image (at most
``max_distance``). Their box hashes are not used: on the upsampled digits they add false links
(benchmarks/dup_accuracy.py)."""

_STAGE = "group"


def group(manifest, *, max_distance=DEFAULT_MAX_DISTANCE, keep_conflicts=False, flips=False,
          progress=None, cluster=None, decisions=None):
    """Cluster exact and near-duplicates and mark them in a new manifest.

    Parameters
    ----------
    manifest : pandas.DataFrame
        Needs ``path`` and ``sha256``; uses ``phash`` (and ``phash_c80``, ``phash_c70``,
        ``phash_mirror``, ``detail`` when present), ``label``, ``group``, ``width``,
        ``height`` and ``bytes``. Rows with an empty ``phash`` (undecodable files) are matched
        by ``sha256`` only.
    max_distance : int, default 8
        Largest Hamming distance, in bits out of 64, between two hashes of near copies.
    keep_conflicts : bool, default False
        When False, every member of a cluster whose rows carry more than one label gets the
        error code ``label-conflict`` and is left out of the split; when True they stay in
        (``mixed_labels`` still shows them).
    flips : bool, default False
        Also match each image's mirrored hash, so that left-right flipped copies join.
    progress : callable, optional
        ``progress(iterable, total=int, label=str)`` returning an iterable, to show the passes.
    cluster : str, optional
        Address of a Dask scheduler: the near-pair search runs as tasks on its workers
        (:func:`labelprep.neighbors.radius_pairs`); the same result.
    decisions : pandas.DataFrame, optional
        A decisions table (:func:`labelprep.decisions.load`): its ``separate`` pairs lose their
        direct link and its ``join`` pairs gain one before clustering
        (:func:`labelprep.decisions.edit_links`). The row decisions are applied around this
        stage by :func:`labelprep.decisions.apply`.

    Returns
    -------
    pandas.DataFrame
        A copy with ``dup_group`` (cluster id, empty for files with no copy), ``bundle``
        (rows that must share one split: clusters joined with user groups), ``keeper`` (one
        per cluster: highest resolution, then largest file, then first path),
        ``mixed_labels``, and the codes ``exact-copy``, ``near-copy`` and ``label-conflict``
        in ``issues``. Ids are numbered 0, 1, ... in order of each set's first path, so they
        do not depend on row order.

    Examples
    --------
    >>> import pandas as pd
    >>> m = pd.DataFrame({"path": ["a.png", "b.png", "c.png"], "label": ["cat", "cat", "dog"],
    ...                   "sha256": ["11", "11", "22"], "phash": ["", "", "ff00ff00ff00ff00"]})
    >>> out = group(m)
    >>> out["dup_group"].tolist(), out["issues"].tolist()
    ([0, 0, <NA>], ['exact-copy', 'exact-copy', ''])
    """
    import numpy as np
    import pandas as pd

    check_manifest(manifest, ["path", "sha256"], hint="make it with labelprep scan")
    if isinstance(max_distance, bool) or not isinstance(max_distance, (int, np.integer)):
        raise TypeError(f"max_distance must be an int, got {type(max_distance).__name__}")
    if not 0 <= max_distance <= 64:
        raise ParameterError(f"max_distance must be between 0 and 64 bits, got max_distance={max_distance}")
    for name, value in (("keep_conflicts", keep_conflicts), ("flips", flips)):
        if not isinstance(value, bool):
            raise TypeError(f"{name} must be True or False, got {value!r}")
    if progress is not None and not callable(progress):
        raise TypeError(f"progress must be callable or None, got {type(progress).__name__}")

    from .manifest import coerce

    # work in path order so that every id and keeper is independent of the input row order
    order = np.argsort(manifest["path"].astype(str).to_numpy(), kind="stable")
    rows = coerce(manifest.iloc[order].reset_index(drop=True))
    n = len(rows)
    sha = _text(rows, "sha256")
    exact = _same_value_links(sha)
    near = near_links(rows, max_distance=int(max_distance), flips=flips, progress=progress, cluster=cluster)
    from .decisions import edit_links

    links = edit_links(rows["path"], np.concatenate([exact, near], axis=1), decisions)
    cluster = _components(n, links)
    size = np.bincount(cluster, minlength=n)[cluster]
    in_cluster = size > 1

    sha_count = pd.Series(sha).map(pd.Series(sha).value_counts()).to_numpy()
    is_exact = (sha != "") & (sha_count > 1)
    # a near copy has a cluster mate that is not byte-identical to it
    distinct_sha = pd.Series(sha).groupby(cluster).transform("nunique").to_numpy()
    is_near = in_cluster & ((distinct_sha > 1) | (sha == ""))
    labels = _text(rows, "label")
    named = pd.Series(np.where(labels == "", None, labels))
    mixed = named.groupby(cluster).transform("nunique").to_numpy() > 1

    user_group = _text(rows, "group")
    bundle = _components(n, np.concatenate([links, _same_value_links(user_group)], axis=1))

    out = rows.copy()
    dup_group = pd.array(np.zeros(n, dtype=np.int64), dtype="Int64")
    dup_group[in_cluster] = _renumber(cluster[in_cluster])
    dup_group[~in_cluster] = pd.NA
    out["dup_group"] = dup_group
    out["bundle"] = pd.array(_renumber(bundle), dtype="Int64")
    out["keeper"] = pd.array(_keepers(rows, cluster), dtype="boolean")
    out["mixed_labels"] = pd.array(mixed, dtype="boolean")
    issues = out["issues"] if "issues" in out.columns else pd.Series([""] * n, dtype=str)
    found = {"exact-copy": is_exact, "near-copy": is_near,
             "label-conflict": mixed & (not keep_conflicts)}
    out["issues"] = codes.replace_stage_codes(issues.astype(str), _STAGE, found)
    # back to the caller's row order and index
    restored = out.iloc[np.argsort(order, kind="stable")]
    restored.index = manifest.index
    return coerce(restored)


def near_links(manifest, *, max_distance=DEFAULT_MAX_DISTANCE, flips=False, progress=None, cluster=None):
    """The near-duplicate links :func:`group` clusters by: the one definition of a near-duplicate.

    :func:`labelprep.audits.audit` calls it too, so an audit of a split made from these clusters
    finds no near-duplicate pair across splits. Byte-identical files are not part of it (they
    are linked by ``sha256``). The caller validates the arguments, as :func:`group` does.

    Returns
    -------
    numpy.ndarray
        Shape (2, k): row positions ``a < b`` of every verified pair, each pair once.

    Examples
    --------
    >>> import pandas as pd
    >>> m = pd.DataFrame({"phash": ["ff00ff00ff00ff00", "ff00ff00ff00ff01", "0123456789abcdef"]})
    >>> near_links(m, max_distance=4).tolist()
    [[0], [1]]
    """
    return _near_links(manifest.reset_index(drop=True), max_distance, flips, progress, cluster)


def _text(rows, column):
    """A column as a numpy array of str, empty strings where absent."""
    import numpy as np

    if column not in rows.columns:
        return np.full(len(rows), "", dtype=object)
    return rows[column].fillna("").astype(str).to_numpy(dtype=object)


def _same_value_links(values):
    """Links (2, k) joining every row to the first row holding the same non-empty value."""
    import numpy as np
    import pandas as pd

    value_codes = pd.factorize(values)[0]
    _, first, inverse = np.unique(value_codes, return_index=True, return_inverse=True)
    keep = np.flatnonzero(np.asarray(values) != "")
    return np.vstack([keep, first[inverse[keep]]]).astype(np.int64)


def _near_links(rows, max_distance, flips, progress, cluster=None):
    """Links (2, k) between rows with near hashes, each candidate pair verified (see _verified)."""
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
    owner = np.nonzero(present)[0]
    values = table[present]
    # each distinct value is searched once; rows sharing one are joined to its first owner
    uniques, first, inverse = np.unique(values, return_index=True, return_inverse=True)
    i, j, _ = radius_pairs(uniques, max_distance, progress=progress, cluster=cluster)
    pairs = np.concatenate([np.vstack([owner, owner[first[inverse]]]),
                            np.vstack([owner[first[i]], owner[first[j]]])], axis=1)
    pairs = np.unique(np.sort(pairs, axis=0), axis=1)
    pairs = pairs[:, pairs[0] != pairs[1]]
    if "detail" in rows.columns:
        # unknown detail (a manifest from elsewhere) counts as detailed: plain pHash behaviour
        low = rows["detail"].astype("Float64").fillna(1.0).to_numpy(dtype=float) < LOW_DETAIL
    else:
        low = np.zeros(n, dtype=bool)
    return pairs[:, _verified(table, present, pairs, columns, max_distance, low)]


def _verified(table, present, pairs, columns, max_distance, low):
    """Which candidate pairs (2, k) of rows are near copies.

    Among the distances between every hash of one row and every hash of the other, one must be
    within ``max_distance``. A match between the same box of both (whole image against whole
    image, say) counts only if their innermost boxes are also within twice ``max_distance``:
    the pictures must agree in the centre, not only in a shared corner (on textures with a
    caption pasted in a corner, the caption alone brings unrelated images within 6 bits). A pair
    with a low-detail row needs its whole-image hashes within :data:`LOW_DETAIL_DISTANCE`.
    """
    import numpy as np

    a, b = pairs
    k = len(columns)
    dist = np.bitwise_count(table[a][:, :, None] ^ table[b][:, None, :]).astype(np.int16)
    dist[~(present[a][:, :, None] & present[b][:, None, :])] = 65
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


def _components(n, links):
    """Connected components (union-find over the links): one label per row, 0..k-1."""
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
