"""Why a split misses its ratios or leaves a class out of a split: the diagnosis of a split manifest.

The split keeps every *bundle* (near-duplicate clusters joined with user groups, see
:mod:`labelprep.clusters`) in one split. When bundles are coarse, no placement reaches the
ratios, and a class whose files sit in fewer bundles than there are splits cannot reach them all.
:func:`diagnose_split` measures the split that was made and names the cause of each shortfall:

- ``chaining``: near-duplicate clusters tie user groups (or ungrouped files) together, so the
  bundle is far larger than any group in it. The files of those clusters are the *bridges*;
  each is listed with the number of groups its cluster joins and, when its link is the only one
  between two parts of the bundle, how many files that link alone holds to the rest.
- ``large-group`` / ``large-cluster``: one user group, or one near-duplicate cluster with no
  group, is itself too large.
- ``few-groups``: a class's files lie in fewer user groups than there are splits, before any
  near-duplicate link (the user's own grouping).
- ``few-files``: a class has fewer files than there are splits.
- ``placement``: the bundles would allow it, yet the split missed (rows kept with
  ``keep_from``, or the search fell short).

Only the split itself, ``label``, ``group``, ``dup_group`` and ``bundle`` are read, so the
diagnosis can be made again from a manifest on disk.
"""

from __future__ import annotations

import numpy as np

from .defaults import SPLIT_TOLERANCE
from .errors import ParameterError
from .splits import SPLIT_NAMES, _check_folds, _check_ratios, _components, _link_keys
from .validation import check_manifest

SIZE_TOLERANCE = SPLIT_TOLERANCE
"""Largest ``|share of rows in a split - its ratio|`` that counts as reaching the ratio (the
size-deviation target of the project's split benchmark, benchmarks/split_quality.py)."""

BUNDLES_LISTED = 3
"""The largest bundles described in the findings."""

BRIDGES_LISTED = 10
"""Bridging files listed per bundle (the total is given too)."""

BRIDGES_PER_CLUSTER = 3
"""Of those, at most this many from one cluster, so the list names several clusters."""

CAUSES = ("chaining", "large-group", "large-cluster", "few-groups", "few-files", "placement")
"""The causes, in the order the headline cause is chosen from those found."""


def diagnose_split(manifest, *, ratios=(0.8, 0.1, 0.1), folds=None, tolerance=SIZE_TOLERANCE) -> dict:
    """Whether a split reached its ratios and class coverage, and if not, why.

    Parameters
    ----------
    manifest : pandas.DataFrame
        A manifest returned by :func:`labelprep.split` (needs ``path``, ``label``, ``split``);
        reads ``bundle`` (or else ``group`` and ``dup_group``), ``group`` and ``dup_group``.
    ratios : sequence of float
        The ratios the split was asked for (as :func:`labelprep.split` takes them).
    folds : int, optional
        The ``folds`` the split was asked for: the split then holds train and test only.
    tolerance : float
        Largest size deviation (share of the placed rows) that counts as reached.

    Returns
    -------
    dict
        JSON-able findings: ``reached`` (bool), ``rows`` (placed rows), ``tolerance``,
        ``splits`` (``{name: {rows, share, target, deviation}}``), ``off_ratio`` (splits whose
        deviation exceeds ``tolerance``), ``missing`` (``[{label, splits, files, groups,
        bundles, cause}]``: classes absent from a split), ``cause`` (the first of
        :data:`CAUSES` found, None when reached) and ``bundles`` (the largest, when something
        was missed: ``{bundle, rows, share, splits, classes, groups, parts, clusters,
        joining_clusters, links, largest_part, kind, bridge_files, bridges}``).

    Examples
    --------
    >>> import pandas as pd
    >>> m = pd.DataFrame({"path": ["a.png", "b.png", "c.png", "d.png"], "label": ["cat"] * 4,
    ...                   "group": ["g1", "g1", "g2", "g2"], "dup_group": [0, pd.NA, 0, pd.NA],
    ...                   "split": ["train"] * 4})
    >>> found = diagnose_split(m, ratios=(0.5, 0.5))
    >>> found["reached"], found["cause"], found["bundles"][0]["groups"]
    (False, 'chaining', 2)
    >>> [b["path"] for b in found["bundles"][0]["bridges"]]
    ['a.png', 'c.png']
    """
    import pandas as pd

    check_manifest(manifest, ("path", "label", "split"), hint="run labelprep split first")
    shares = _check_ratios(ratios)
    folds = _check_folds(folds)
    if isinstance(tolerance, bool) or not isinstance(tolerance, (int, float, np.floating)):
        raise TypeError(f"tolerance must be a number, got {type(tolerance).__name__}")
    if not 0 <= tolerance < 1:
        raise ParameterError(f"tolerance must be from 0 to below 1, got tolerance={tolerance!r}")
    if folds is not None:  # as the split does: the val share joins train
        shares = np.array([1.0 - shares[-1], 0.0, shares[-1]])
    targets = {name: float(r) for name, r in zip(SPLIT_NAMES, shares) if r > 0}

    frame = manifest.iloc[np.argsort(manifest["path"].astype(str).to_numpy(), kind="stable")]
    frame = frame.reset_index(drop=True)
    rows = pd.DataFrame({
        "path": frame["path"].astype(str),
        "label": frame["label"].fillna("").astype(str),
        "split": frame["split"].fillna("").astype(str),
        "group": (frame["group"].fillna("").astype(str) if "group" in frame.columns else ""),
        "cluster": (pd.to_numeric(frame["dup_group"]).astype("Int64").fillna(-1).to_numpy(np.int64)
                    if "dup_group" in frame.columns else -1),
    })
    rows["bundle"] = _components(_link_keys(frame), len(frame))
    # a file's part without near-duplicate links: its user group, or the file alone
    grouped = rows["group"] != ""
    rows["part"] = np.where(grouped, "g:" + rows["group"], "f:" + rows["path"])
    placed = rows[rows["split"] != ""]
    n = len(placed)

    per_split = placed["split"].value_counts()
    splits = {}
    for name, target in targets.items():
        count = int(per_split.get(name, 0))
        share = count / n if n else 0.0
        splits[name] = {"rows": count, "share": share, "target": target, "deviation": share - target}
    off_ratio = [name for name, s in splits.items() if n and abs(s["deviation"]) > tolerance]
    missing = _missing(placed, list(targets))
    coarse = n > 0 and placed["bundle"].value_counts().iloc[0] > tolerance * n
    bundles = _largest_bundles(rows, placed, tolerance) if off_ratio or missing else []

    found = {m["cause"] for m in missing}
    if off_ratio:
        found.add(_kind_cause(bundles[0]["kind"]) if coarse else "placement")
    return {
        "reached": not (off_ratio or missing),
        "rows": n,
        "tolerance": float(tolerance),
        "splits": splits,
        "off_ratio": off_ratio,
        "missing": missing,
        "cause": next((c for c in CAUSES if c in found), None),
        "bundles": bundles,
    }


def _missing(placed, names):
    """Classes absent from an active split, with their files, groups, bundles and the cause."""
    import pandas as pd

    need = len(names)
    label_codes, labels = pd.factorize(placed["label"], sort=True)
    split_codes = pd.Categorical(placed["split"], categories=names).codes
    counts = np.zeros((len(labels), need + 1), dtype=np.int64)  # the last column: other names
    np.add.at(counts, (label_codes, np.where(split_codes >= 0, split_codes, need)), 1)
    out = []
    for k in np.flatnonzero((counts[:, :need] == 0).any(axis=1)):
        rows = placed[label_codes == k]
        files, parts, bundles = len(rows), rows["part"].nunique(), rows["bundle"].nunique()
        if files < need:
            cause = "few-files"
        elif parts < need:
            cause = "few-groups"
        elif bundles < need:
            cause = "chaining"
        else:
            cause = "placement"
        out.append({"label": labels[k], "splits": [n for j, n in enumerate(names) if not counts[k, j]],
                    "files": files, "groups": parts, "bundles": bundles, "cause": cause})
    return out


def _kind_cause(kind):
    return {"chain": "chaining", "group": "large-group"}.get(kind, "large-cluster")


def _largest_bundles(rows, placed, tolerance):
    """The largest bundle and the next ones of more than ``tolerance`` of the placed rows (up to
    :data:`BUNDLES_LISTED`), described."""
    n = len(placed)
    # rows are in path order, so a tie in size goes to the bundle of the first path
    ids, first, sizes = np.unique(placed["bundle"].to_numpy(), return_index=True, return_counts=True)
    top = np.lexsort((first, -sizes))[:BUNDLES_LISTED]
    # the largest always; the next ones only when they are too large as well
    order = [ids[k] for i, k in enumerate(top) if i == 0 or sizes[k] > tolerance * n]
    out = []
    for bundle in order:
        members = rows[rows["bundle"] == bundle]
        kept = members[members["split"] != ""]
        part_rows = kept["part"].value_counts()
        clusters = members[members["cluster"] >= 0]
        parts_per_cluster = clusters.groupby("cluster")["part"].nunique()
        joining = parts_per_cluster[parts_per_cluster > 1]
        if part_rows.size > 1 and part_rows.iloc[0] * 2 <= len(kept):
            kind = "chain"  # most of the bundle comes from joining its parts
        elif (members["group"] != "").any():
            kind = "group"
        else:
            kind = "cluster"
        bridges = _bridges(members, joining, tolerance * n) if joining.size else []
        out.append({
            "bundle": int(bundle), "rows": int(len(kept)), "share": len(kept) / n,
            "splits": sorted(set(kept["split"])),
            "classes": int(kept["label"].nunique()),
            "groups": int(members.loc[members["group"] != "", "group"].nunique()),
            "parts": int(members["part"].nunique()),
            "clusters": int(clusters["cluster"].nunique()),
            "joining_clusters": int(joining.size),
            "links": int(joining.sum()),
            "largest_part": int(part_rows.iloc[0]) if part_rows.size else 0,
            "kind": kind,
            "bridge_files": len(bridges),
            "bridges": _first_per_cluster(bridges),
        })
    return out


def _first_per_cluster(bridges):
    """The first :data:`BRIDGES_LISTED` bridges, at most :data:`BRIDGES_PER_CLUSTER` per cluster."""
    taken, out = {}, []
    for bridge in bridges:
        if taken.get(bridge["cluster"], 0) < BRIDGES_PER_CLUSTER:
            taken[bridge["cluster"]] = taken.get(bridge["cluster"], 0) + 1
            out.append(bridge)
            if len(out) == BRIDGES_LISTED:
                break
    return out


def _bridges(members, joining, significant):
    """The files of clusters that join parts, most binding first.

    Graph: a node per part (user group or lone file) and per cluster, an edge per distinct
    (part, cluster) pair; a node weighs its placed files. An edge whose removal disconnects the
    bundle (a graph bridge) ``holds`` the placed files of the smaller side; other edges hold 0.
    Order: ``holds`` when it reaches ``significant`` files (a part worth placing on its own),
    then the groups the file's cluster joins, then cluster and path.
    """
    import pandas as pd

    part_codes, part_names = pd.factorize(members["part"])
    cluster_ids = members["cluster"].to_numpy()
    cluster_codes, cluster_names = pd.factorize(pd.Series(cluster_ids).where(cluster_ids >= 0))
    n_parts = len(part_names)
    weight = np.bincount(part_codes, (members["split"] != "").to_numpy(float),
                         minlength=n_parts + len(cluster_names))
    has = cluster_codes >= 0
    pair = pd.DataFrame({"a": part_codes[has], "b": n_parts + cluster_codes[has]}).drop_duplicates()
    holds = _bridge_holds(n_parts + len(cluster_names), pair["a"].to_numpy(), pair["b"].to_numpy(), weight)
    held = dict(zip(zip(pair["a"], pair["b"]), holds))
    joins = members["cluster"].map(joining)
    out = []
    for i in np.flatnonzero(members["cluster"].isin(joining.index).to_numpy()):
        row = members.iloc[i]
        out.append({"path": row["path"], "label": row["label"], "group": row["group"],
                    "cluster": int(row["cluster"]), "split": row["split"],
                    "joins": int(joins.iloc[i]),
                    "holds": int(held[(part_codes[i], n_parts + cluster_codes[i])])})
    out.sort(key=lambda b: (-b["holds"] if b["holds"] >= significant else 0, -b["joins"], b["cluster"], b["path"]))
    return out


def _bridge_holds(n, a, b, weight):
    """Per edge ``(a[i], b[i])`` of an undirected graph: the weight of the smaller side it alone
    keeps connected (0 when the edge is not a bridge). Iterative DFS with low-links (Tarjan)."""
    m = len(a)
    ends = np.concatenate([a, b])
    order = np.argsort(ends, kind="stable")
    ptr = np.searchsorted(ends[order], np.arange(n + 1)).tolist()
    other = np.concatenate([b, a])[order].tolist()
    edge = np.concatenate([np.arange(m), np.arange(m)])[order].tolist()
    disc, low = [-1] * n, [0] * n
    below = [float(w) for w in weight]  # weight of each DFS subtree, filled on the way back
    holds = [0.0] * m
    clock = 0
    for root in range(n):
        if disc[root] >= 0:
            continue
        disc[root] = low[root] = clock
        clock += 1
        stack, found = [[root, -1, ptr[root]]], []
        while stack:
            top = stack[-1]
            v, via, i = top
            if i < ptr[v + 1]:
                top[2] += 1
                w, e = other[i], edge[i]
                if e == via:
                    continue
                if disc[w] < 0:
                    disc[w] = low[w] = clock
                    clock += 1
                    stack.append([w, e, ptr[w]])
                else:
                    low[v] = min(low[v], disc[w])
                continue
            stack.pop()
            if stack:
                parent = stack[-1][0]
                low[parent] = min(low[parent], low[v])
                below[parent] += below[v]
                if low[v] > disc[parent]:
                    found.append((via, v))
        total = below[root]
        for e, child in found:
            holds[e] = min(below[child], total - below[child])
    return holds
