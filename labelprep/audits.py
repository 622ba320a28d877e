"""Audit of an existing split: what crosses from one split into another, and the class balance.

A split leaks when the same picture, or nearly the same, sits in two splits (a model is then
tested on what it trained on), or when one user group (subject, session, source) is spread over
two splits. :func:`audit` finds every near-duplicate pair (linked as :func:`labelprep.group`
links them, :func:`labelprep.clusters.near_links`), every byte-identical pair (same ``sha256``, also for files without a hash)
and every group that crosses splits, and adds the class balance per split from
:func:`labelprep.balance.by_split`. :func:`render` turns the result into terminal text.
"""

from __future__ import annotations

from . import defaults
from .errors import ParameterError
from .validation import check_manifest

SPLIT_ORDER = ("train", "val", "test")
# how the audit's header names the split it looked at
_SPLIT_SOURCES = {"split": "the split labelprep made (split column)",
                  "given_split": "the split given by the train/val/test folders"}
_HEX_DIGITS = frozenset("0123456789abcdef")


def audit(manifest, *, max_distance=defaults.MAX_DISTANCE, flips=True, split_column=None,
          decisions=None) -> dict:
    """Every near-duplicate pair and user group that crosses splits, and the class balance.

    Parameters
    ----------
    manifest : pandas.DataFrame
        Needs ``path``, ``label`` and the split column; reads ``phash``, ``sha256`` and
        ``group`` when present. Rows whose split is ``""`` take no part in the leaks.
    max_distance : int
        Largest Hamming distance (bits of a 64-bit perceptual hash) at which two files count as
        near-duplicates, 0 to 64, as in :func:`labelprep.group` (whose verification the pairs
        go through: centre check, low-detail rule).
    flips : bool, default True
        Also count mirrored copies, as :func:`labelprep.group` does unless told not to.
    split_column : str, optional
        The column holding each row's split. By default ``split`` when any row has one, else
        ``given_split`` (the train/val/test folder the scanner found).
    decisions : pandas.DataFrame, optional
        A decisions table (:func:`labelprep.decisions.load`): pairs it separates are not copies,
        so they are no leak; they are counted in ``separated``.

    Returns
    -------
    dict
        JSON-able:

        - ``split_column``, ``max_distance``; ``rows``: rows in a split; ``groups_known``:
          whether any row has a user group (without one, group leaks cannot be checked).
        - ``near_leaks``: one dict per pair of files in different splits that are byte-identical
          or near-duplicates: ``path_a``, ``path_b`` (``path_a`` sorts first), ``label_a``,
          ``label_b``, ``split_a``, ``split_b``, ``distance`` (bits between the whole-image
          pHashes; 0 for byte-identical files) and ``exact`` (same ``sha256``); sorted by the
          two paths.
        - ``group_leaks``: one dict per user group found in more than one split: ``group``,
          ``splits`` (``{split: rows}``) and ``paths`` (``{split: [paths]}``); sorted by group.
        - ``leaking_files``: how many files are in at least one leaking pair or group.
        - ``separated``: pairs across splits left out because a decision separates them.
        - ``balance``: :func:`labelprep.balance.by_split` of the split column.

    Examples
    --------
    >>> import pandas as pd
    >>> m = pd.DataFrame({"path": ["a.png", "b.png", "c.png"], "label": ["cat", "cat", "dog"],
    ...                   "split": ["train", "test", "test"], "group": ["", "", ""],
    ...                   "phash": ["ff00ff00ff00ff00", "ff00ff00ff00ff01", "0123456789abcdef"],
    ...                   "sha256": ["1" * 64, "2" * 64, "3" * 64]})
    >>> result = audit(m, max_distance=4)
    >>> [(p["path_a"], p["path_b"], p["distance"]) for p in result["near_leaks"]]
    [('a.png', 'b.png', 1)]
    >>> result["balance"]["splits"]["test"]["counts"]
    {'cat': 1, 'dog': 1}
    """
    from .balance import by_split

    check_manifest(manifest, ["path", "label"])
    if isinstance(max_distance, bool) or not isinstance(max_distance, int):
        raise TypeError(f"max_distance must be an int, got {type(max_distance).__name__}")
    if not 0 <= max_distance <= 64:
        raise ParameterError(f"max_distance must be 0 to 64 bits, got max_distance={max_distance!r}")
    if not isinstance(flips, bool):
        raise TypeError(f"flips must be True or False, got {type(flips).__name__}")
    column = _split_column(manifest, split_column)

    frame = manifest.assign(_split=manifest[column].fillna("").astype(str),
                            path=manifest["path"].astype(str),
                            label=manifest["label"].fillna("").astype(str))
    frame = frame[frame["_split"] != ""].sort_values("path", kind="stable").reset_index(drop=True)
    pairs = _leaking_pairs(frame, max_distance, flips)
    from .decisions import separated_mask

    apart = separated_mask(frame["path"], pairs["a"].to_numpy(), pairs["b"].to_numpy(), decisions)
    pairs = pairs[~apart]
    groups = _leaking_groups(frame)
    path, label, split = (frame[c].to_numpy(dtype=object) for c in ("path", "label", "_split"))
    a, b = pairs["a"].to_numpy(), pairs["b"].to_numpy()
    near = [
        {"path_a": pa, "path_b": pb, "label_a": la, "label_b": lb, "split_a": sa, "split_b": sb,
         "distance": int(d), "exact": bool(x)}
        for pa, pb, la, lb, sa, sb, d, x in zip(path[a], path[b], label[a], label[b], split[a],
                                                split[b], pairs["distance"], pairs["exact"])
    ]
    in_groups = {p for g in groups for paths in g["paths"].values() for p in paths}
    known = "group" in frame.columns and bool((frame["group"].fillna("").astype(str) != "").any())
    return {"split_column": column, "max_distance": max_distance, "rows": int(len(frame)),
            "groups_known": known,
            "near_leaks": near, "group_leaks": groups,
            "leaking_files": len(set(path[a]) | set(path[b]) | in_groups), "separated": int(apart.sum()),
            "balance": by_split(manifest, split_column=column)}


def audit_path(target, *, max_distance=None, flips=None, split_column=None, progress=None,
               decisions=None, **scan_options) -> dict:
    """:func:`audit` of a manifest file, or of a folder laid out ``ROOT/<train|val|test>/<label>/``.

    A folder is scanned first, in memory only (nothing is written beside it), with
    ``scan_options`` (those of :func:`labelprep.scan`: ``jobs``, ``include_hidden``, ...); a
    manifest (a file, or a folder of Parquet part files) is read, and they do not apply.
    ``max_distance`` and ``flips`` left as None are those the manifest was grouped with (its
    sidecar's group or prepare record), else the defaults: the audit then links exactly the
    pairs the group stage linked, so a split labelprep made never fails it. ``decisions`` is
    passed on to :func:`audit`.

    Examples
    --------
    >>> result = audit_path("dataset/")                       # doctest: +SKIP
    >>> leak_gate(result, "leaks")                            # doctest: +SKIP
    """
    from pathlib import Path

    from .manifest import read, read_sidecar
    from .scanner import scan

    target = Path(target)
    recorded = {}
    if target.is_dir() and not _is_part_folder(target):
        m = scan(target, progress=progress, **scan_options)
    else:
        m = read(target)
        recorded = _grouped_with(read_sidecar(target))
    chosen = {"max_distance": max_distance, "flips": flips}
    chosen = {k: v if v is not None else recorded.get(k, _GROUP_DEFAULTS[k]) for k, v in chosen.items()}
    return audit(m, split_column=split_column, decisions=decisions, **chosen)


_GROUP_DEFAULTS = {"max_distance": defaults.MAX_DISTANCE, "flips": True}


def _grouped_with(meta: dict) -> dict:
    """The link options a manifest's sidecar records for its group stage (or its prepare run)."""
    stages = meta.get("stages", {}) if isinstance(meta, dict) else {}
    for stage in ("group", "prepare"):
        recorded = stages.get(stage, {}).get("options", {})
        if isinstance(recorded, dict) and any(k in recorded for k in _GROUP_DEFAULTS):
            return {k: recorded[k] for k in _GROUP_DEFAULTS if k in recorded}
    return {}


def _is_part_folder(folder) -> bool:
    from .manifest import part_files

    return bool(part_files(folder))


def leak_gate(result: dict, fail_on: str) -> None:
    """Raise :class:`~labelprep.errors.GateFailed` when ``fail_on`` is ``"leaks"`` and the
    :func:`audit` ``result`` holds a pair or a group across splits; ``"never"`` never raises."""
    from .errors import GateFailed

    if fail_on not in ("leaks", "never"):
        raise ParameterError(f"fail_on must be 'leaks' or 'never', got fail_on={fail_on!r}")
    if fail_on == "leaks" and (result["near_leaks"] or result["group_leaks"]):
        raise GateFailed(f"{len(result['near_leaks'])} near-duplicate pairs and "
                         f"{len(result['group_leaks'])} groups cross splits")


def render(result: dict, *, limit: int = 20) -> str:
    """Terminal text for an :func:`audit` result, listing at most ``limit`` pairs and groups.

    Examples
    --------
    >>> import pandas as pd
    >>> m = pd.DataFrame({"path": ["a.png", "b.png"], "label": ["cat", "cat"],
    ...                   "split": ["train", "test"], "sha256": ["1" * 64] * 2})
    >>> print(render(audit(m)).splitlines()[1])
    near-duplicate pairs across splits: 1 (1 byte-identical), radius 8 bits
    """
    from .advice import audit_advice

    if isinstance(limit, bool) or not isinstance(limit, int):
        raise TypeError(f"limit must be an int, got {type(limit).__name__}")
    if limit < 0:
        raise ParameterError(f"limit must be 0 or more, got limit={limit!r}")
    near, groups = result["near_leaks"], result["group_leaks"]
    lines = [f"audit of {_SPLIT_SOURCES.get(result['split_column'], 'the column ' + result['split_column'])}: "
             f"{result['rows']} files in a split, {result['leaking_files']} of them leaking",
             f"near-duplicate pairs across splits: {len(near)} "
             f"({sum(p['exact'] for p in near)} byte-identical), radius {result['max_distance']} bits"]
    if result.get("separated"):
        lines.append(f"  not counted: {result['separated']} across splits that the decisions file separates (not copies)")
    for p in near[:limit]:
        kind = "same bytes" if p["exact"] else f"{p['distance']:>2} bits"
        lines.append(f"  {kind:>10}  {p['split_a']}:{p['path_a']} [{p['label_a']}]"
                     f"  ~  {p['split_b']}:{p['path_b']} [{p['label_b']}]")
    lines += _more(len(near), limit)
    if result.get("groups_known", True):
        lines.append(f"groups across splits: {len(groups)}")
    else:
        lines.append("groups across splits: no groups known (no row has a group)")
    for g in groups[:limit]:
        spread = ", ".join(f"{name} {count}" for name, count in g["splits"].items())
        lines.append(f"  {g['group']}: {spread}")
    lines += _more(len(groups), limit)
    lines += _balance_lines(result["balance"])
    lines += audit_advice(result)
    return "\n".join(lines)


def _more(count, limit):
    return [f"  ... and {count - limit} more (write them all with --json)"] if count > limit else []


def _balance_lines(balance: dict) -> list[str]:
    """A class-by-split table of counts and shares, then the chi-square p-value per split."""
    names = [n for n in balance["splits"]]
    classes = balance["classes"]
    width = max([len(c) for c in classes] + [5])
    lines = ["class balance (rows, share of the split):",
             "  " + "class".ljust(width) + "".join(f"{n:>20}" for n in names)]
    for c in classes:
        cells = "".join(f"{balance['splits'][n]['counts'][c]:>11} ({balance['splits'][n]['shares'][c]:6.1%})"
                        for n in names)
        lines.append("  " + c.ljust(width) + cells)
    lines.append("  " + "rows".ljust(width) + "".join(f"{balance['splits'][n]['rows']:>20}" for n in names))
    tests = []
    for n in names:
        chi = balance["splits"][n]["chi_square"]
        if chi is not None:
            tests.append(f"{n} p={chi['p_value']:.3g}")
    if tests:
        lines.append("  chi-square of class counts against the overall shares: " + ", ".join(tests))
    return lines


def _split_column(manifest, split_column):
    """The column to audit: the one asked for, else ``split`` when filled, else ``given_split``."""
    if split_column is not None:
        if not isinstance(split_column, str):
            raise TypeError(f"split_column must be a column name (str), got {type(split_column).__name__}")
        check_manifest(manifest, [split_column])
        return split_column
    for column in ("split", "given_split"):
        if column in manifest.columns and (manifest[column].fillna("").astype(str) != "").any():
            return column
    raise ParameterError("nothing to audit: no row has a 'split' or a 'given_split' "
                         "(run labelprep split, or scan a ROOT/<train|val|test>/<label> folder)")


def _leaking_pairs(frame, max_distance, flips):
    """Row pairs ``a < b`` in different splits: near (phash) or exact (sha256) copies.

    Returns a DataFrame with columns ``a``, ``b``, ``distance`` and ``exact``.
    """
    import numpy as np
    import pandas as pd

    from .clusters import near_links

    parts = []
    if "phash" in frame.columns:
        # the links group clusters by (one definition of a near-duplicate), so an audit of a
        # split made from those clusters finds no near pair across splits
        a, b = near_links(frame, max_distance=max_distance, flips=flips)
        parts.append(pd.DataFrame({"a": a, "b": b, "distance": _whole_distance(frame, a, b)}))
    if "sha256" in frame.columns:
        sha = pd.DataFrame({"sha": frame["sha256"].fillna("").astype(str), "row": np.arange(len(frame))})
        sha = sha[sha["sha"] != ""]
        sha = sha[sha.duplicated("sha", keep=False)]
        both = sha.merge(sha, on="sha", suffixes=("_a", "_b"))
        both = both[both["row_a"] < both["row_b"]]
        parts.append(pd.DataFrame({"a": both["row_a"].to_numpy(), "b": both["row_b"].to_numpy(),
                                   "distance": 0}))
    if not parts:
        return pd.DataFrame({"a": [], "b": [], "distance": [], "exact": []}, dtype=np.int64)
    pairs = pd.concat(parts, ignore_index=True).astype(np.int64)
    pairs = pairs.sort_values(["a", "b", "distance"], kind="stable").drop_duplicates(["a", "b"])
    split = frame["_split"].to_numpy(dtype=object)
    pairs = pairs[split[pairs["a"].to_numpy()] != split[pairs["b"].to_numpy()]]
    if "sha256" in frame.columns:
        sha = frame["sha256"].fillna("").astype(str).to_numpy(dtype=object)
        a, b = pairs["a"].to_numpy(), pairs["b"].to_numpy()
        exact = (sha[a] == sha[b]) & (sha[a] != "")
    else:
        exact = np.zeros(len(pairs), dtype=bool)
    # byte-identical files have identical hashes: distance 0 even where no hash was computed
    return pairs.assign(exact=exact, distance=np.where(exact, 0, pairs["distance"])).reset_index(drop=True)


def _whole_distance(frame, a, b):
    """Bits between the whole-image pHashes of rows ``a`` and ``b``; 64 where one has none
    (the link then came from a centred-box hash, see :mod:`labelprep.clusters`)."""
    import numpy as np

    from .neighbors import hex_to_uint64

    phash = frame["phash"].fillna("").astype(str).str.lower()
    valid = phash.map(lambda h: len(h) == 16 and set(h) <= _HEX_DIGITS).to_numpy(dtype=bool)
    hashes = np.zeros(len(frame), dtype=np.uint64)
    hashes[valid] = hex_to_uint64(phash[valid])
    dist = np.bitwise_count(hashes[a] ^ hashes[b]).astype(np.int64)
    return np.where(valid[a] & valid[b], dist, 64)


def _leaking_groups(frame) -> list[dict]:
    """One dict per user group whose rows sit in more than one split."""
    if "group" not in frame.columns:
        return []
    grouped = frame.assign(group=frame["group"].fillna("").astype(str))
    grouped = grouped[grouped["group"] != ""]
    spread = grouped.groupby("group")["_split"].nunique()
    leaking = grouped[grouped["group"].isin(spread.index[spread > 1])]
    rank = {name: i for i, name in enumerate(SPLIT_ORDER)}
    leaking = leaking.assign(_rank=leaking["_split"].map(rank).fillna(len(rank)))
    leaking = leaking.sort_values(["group", "_rank", "_split", "path"], kind="stable")
    out: list[dict] = []
    # one pass over the sorted rows (a pandas operation per group is far slower with many groups)
    for group, split, path in zip(leaking["group"], leaking["_split"], leaking["path"]):
        if not out or out[-1]["group"] != group:
            out.append({"group": group, "splits": {}, "paths": {}})
        entry = out[-1]
        entry["paths"].setdefault(split, []).append(path)
        entry["splits"][split] = entry["splits"].get(split, 0) + 1
    return out
