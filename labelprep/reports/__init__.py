"""The report of a manifest: one summary dict, written as JSON, Markdown and a self-contained HTML page.

:func:`report` builds the summary (exactly what ``report.json`` holds; its keys are documented in
``manifests/README.md``) and writes the files asked for. :func:`terminal_table` is the plain-text
view the command line prints. The HTML page is rendered in :mod:`labelprep.reports.page` from the
templates beside this file.
"""

from __future__ import annotations

import json as _json
import os

from .. import codes
from ..validation import check_manifest

FORMAT_TAG = "labelprep-report/1"


def report(manifest, *, json=None, html=None, markdown=None, root=None, meta=None,
           force: bool = False, decisions=None, review=None) -> dict:
    """Summarise ``manifest`` and write the report files that are asked for.

    Parameters
    ----------
    manifest : pandas.DataFrame
        Any labelprep manifest; it needs ``path`` and ``label``. Columns a stage has not written
        yet (``issues``, ``dup_group``, ``split``, ...) count as empty.
    json, html, markdown : str or Path, optional
        Files to write (atomically); each is left alone when not given.
    root : str, Path or dict, optional
        The scanned folder (or archive), which ``path`` is relative to, or ``{source: folder}``
        for a manifest of several sources (:func:`labelprep.sources.roots_of`). Only the HTML
        page uses it, to embed thumbnails of near-duplicates; without it the page shows paths only.
    meta : dict, optional
        The manifest's sidecar (:func:`labelprep.manifest.read_sidecar`): the seed, root and stage
        options it records are shown.
    force : bool
        Replace output files that labelprep did not write (see
        :func:`labelprep.manifest.guard_output`).
    decisions : dict, optional
        What applying the decisions file gave (:func:`labelprep.decisions.digest_of` merged with
        :func:`labelprep.decisions.findings`); recorded as ``summary["decisions"]`` and shown.
    review : str or Path, optional
        The output folder to name in ``labelprep review DIR`` where the HTML page leaves
        thumbnails out to stay within its size budget.

    Returns
    -------
    dict
        The summary, JSON-able: ``format``, ``version``, ``files``, ``in_split``, ``left_out``,
        ``splits``, ``classes``, ``balance`` (:func:`labelprep.balance.by_split`), ``issues``,
        ``near_duplicates``, ``split_diagnosis`` (:func:`labelprep.split_diagnosis.diagnose_split`,
        None before a split), ``seed``, ``root``, ``options``.

    Examples
    --------
    >>> import pandas as pd
    >>> m = pd.DataFrame({"path": ["a.png", "b.png", "c.png"], "label": ["cat", "dog", "cat"],
    ...                   "split": ["train", "train", ""], "issues": ["", "", "too-small"]})
    >>> s = report(m)
    >>> s["files"], s["in_split"], s["splits"]["train"]["count"]
    (3, 2, 2)
    >>> s["issues"][0]["code"], s["issues"][0]["rows"]
    ('too-small', 1)
    """
    for name, value in (("json", json), ("html", html), ("markdown", markdown)):
        if value is not None and not isinstance(value, (str, os.PathLike)):
            raise TypeError(f"{name} must be a path (str or Path), got {type(value).__name__}")
    if meta is not None and not isinstance(meta, dict):
        raise TypeError(f"meta must be a dict (the manifest's sidecar), got {type(meta).__name__}")
    if root is not None:
        from ..sources import check_root

        check_root(root)
    check_manifest(manifest, ["path"])

    from ..manifest import guard_output, write_text

    for target in (json, markdown, html):
        if target is not None:
            guard_output(target, force=force)  # all of them before the work
    m = _complete(manifest)
    summary = _summary(m, meta or {})
    if decisions is not None:
        summary["decisions"] = _jsonable(decisions)

    if json is not None:
        write_text(json, to_json(summary), force=force)
    if markdown is not None:
        from .text import markdown as render_markdown

        write_text(markdown, render_markdown(summary), force=force)
    if html is not None:
        from .page import render

        write_text(html, render(m, summary, root=root, review=review), force=force)
    return summary


def to_json(summary: dict) -> str:
    """The text of ``report.json``: keys in summary order, two-space indent, a final newline."""
    return _json.dumps(summary, indent=2, ensure_ascii=False, allow_nan=False) + "\n"


def terminal_table(summary: dict, *, issues: bool = True) -> str:
    """A plain-text view of ``summary`` for a terminal: totals, classes per split, issues.

    ``issues=False`` leaves out the table of issue counts, for a caller that lists the issues
    with their files instead.

    Examples
    --------
    >>> import pandas as pd
    >>> m = pd.DataFrame({"path": ["a.png", "b.png"], "label": ["cat", "dog"], "split": ["train", "val"]})
    >>> print(terminal_table(report(m)).splitlines()[0])
    2 files: 2 in a split, 0 left out; 2 classes
    """
    from .text import terminal

    return terminal(summary, issues=issues)


def _complete(manifest):
    """``manifest`` with the columns the report reads, missing ones added empty."""
    import pandas as pd

    m = manifest.copy()
    for name in ("label", "split", "issues", "phash", "fault"):
        m[name] = m[name].fillna("").astype(str) if name in m.columns else ""
    if "source" in m.columns:
        m["source"] = m["source"].fillna("").astype(str)
    m["dup_group"] = (pd.to_numeric(m["dup_group"]).astype("Int64") if "dup_group" in m.columns
                      else pd.array([pd.NA] * len(m), dtype="Int64"))
    if "keeper" not in m.columns:
        m["keeper"] = pd.array([pd.NA] * len(m), dtype="boolean")
    for name in ("linked_to", "link_kind"):
        m[name] = m[name].fillna("").astype(str) if name in m.columns else ""
    for name in ("link_likeness", "link_blemish"):
        m[name] = (pd.to_numeric(m[name]).astype("Float64") if name in m.columns
                   else pd.array([pd.NA] * len(m), dtype="Float64"))
    return m.sort_values("path", kind="stable").reset_index(drop=True)


def _summary(m, meta: dict) -> dict:
    from .. import __version__
    from ..balance import by_split

    balance = by_split(m)
    in_split = int((m["split"] != "").sum())
    splits = {name: {"count": stats["rows"], "share": stats["rows"] / in_split if in_split else 0.0}
              for name, stats in balance["splits"].items() if name != "unassigned"}
    summary = {
        "format": FORMAT_TAG,
        "version": __version__,
        "files": len(m),
        "in_split": in_split,
        "left_out": len(m) - in_split,
        "splits": splits,
        "classes": balance["classes"],
        "balance": balance,
        "issues": _issues(m),
        "near_duplicates": _near_duplicates(m),
        "split_diagnosis": _split_diagnosis(m, meta) if in_split else None,
        "seed": _seed(meta),
        "root": meta.get("root"),
        "options": _jsonable(meta.get("stages", {})),
    }
    if "source" in m.columns:  # a manifest of several sources (one root has no such column)
        summary["sources"] = _by_source(m, balance["classes"])
    return summary


def _by_source(m, classes: list) -> list:
    """Per source, in name order: files, in_split, left_out, per split and per class counts (every
    row with a label), and ``issues`` ``{code: rows}`` in registry order."""
    out = []
    for name, rows in m.groupby("source", sort=True):
        in_split = rows[rows["split"] != ""]
        counts = rows["label"].value_counts()
        out.append({
            "source": name, "files": len(rows), "in_split": len(in_split),
            "left_out": len(rows) - len(in_split),
            "splits": {split: int(n) for split, n in in_split["split"].value_counts().sort_index().items()},
            "classes": {c: int(counts.get(c, 0)) for c in classes},
            "issues": codes.counts(rows["issues"]),
        })
    return out


def _issues(m) -> list:
    """One entry per code found: code, severity, meaning, rows (registry order)."""
    found = []
    for code, rows in codes.counts(m["issues"]).items():
        known = codes.CODES.get(code)
        found.append({"code": code, "severity": known.severity if known else "unknown",
                      "meaning": known.meaning if known else "not a code this version knows",
                      "rows": rows})
    return found


def cluster_table(m):
    """The near-duplicate clusters of a completed manifest, ranked most urgent first.

    Returns a DataFrame indexed by ``dup_group`` with ``size``, ``conflict`` (its labels
    disagree), ``leak`` (its files sit in more than one split) and its weakest link (the member
    whose link to the anchor has the largest ``link_blemish``: ``weakest_path``,
    ``weakest_to``, ``weakest_kind``, ``weakest_likeness``, ``weakest_blemish``; empty for a
    cluster of byte-identical files only). Conflicts come first, then leaks, then larger
    clusters, then lower ids.
    """
    import pandas as pd

    d = m[m["dup_group"].notna()]
    size = d.groupby("dup_group").size()
    assigned = d[d["split"] != ""]
    linked = d[d["link_kind"] != ""].assign(_weak=lambda x: x["link_blemish"].astype(float).fillna(-1.0))
    weakest = (linked.sort_values(["dup_group", "_weak", "path"], ascending=[True, False, True], kind="stable")
               .drop_duplicates("dup_group").set_index("dup_group").reindex(size.index))
    table = pd.DataFrame({
        "size": size,
        "conflict": d.groupby("dup_group")["label"].nunique() > 1,
        "leak": assigned.groupby("dup_group")["split"].nunique().reindex(size.index, fill_value=0) > 1,
        "weakest_path": weakest["path"].fillna(""), "weakest_to": weakest["linked_to"].fillna(""),
        "weakest_kind": weakest["link_kind"].fillna(""),
        "weakest_likeness": weakest["link_likeness"], "weakest_blemish": weakest["link_blemish"],
    })
    table.index = table.index.astype("int64")
    rank = table.assign(_calm=~table["conflict"], _kept=~table["leak"], _small=-table["size"],
                        _id=table.index)
    order = rank.sort_values(["_calm", "_kept", "_small", "_id"], kind="stable").index
    return table.loc[order]


WEAKEST_LISTED = 50
"""Clusters listed in ``near_duplicates.weakest_links`` of the summary: the least certain first."""


def _near_duplicates(m) -> dict:
    table = cluster_table(m)
    blemish = table["weakest_blemish"].astype(float)
    least_certain = table.assign(_b=blemish.fillna(-1.0), _id=table.index)[table["weakest_kind"] != ""].sort_values(
        ["_b", "_id"], ascending=[False, True], kind="stable").head(WEAKEST_LISTED)
    return {
        "clusters": len(table),
        "files": int(table["size"].sum()),
        "label_conflicts": int(table["conflict"].sum()),
        "across_splits": int(table["leak"].sum()),
        "weakest_links": [_weakest(gid, row) for gid, row in least_certain.iterrows()],
    }


def _weakest(gid, row) -> dict:
    """One cluster's weakest link as JSON-able values."""
    import pandas as pd

    def number(value):
        return None if pd.isna(value) else round(float(value), 4)

    return {"cluster": int(gid), "size": int(row["size"]), "path": row["weakest_path"],
            "linked_to": row["weakest_to"], "kind": row["weakest_kind"],
            "likeness": number(row["weakest_likeness"]), "blemish": number(row["weakest_blemish"])}


def _split_diagnosis(m, meta: dict) -> dict:
    """The split's diagnosis, against the ratios and folds the sidecar records (else the defaults)."""
    from ..defaults import RATIOS
    from ..split_diagnosis import diagnose_split

    options = {}
    for stage in ("prepare", "split"):  # the split stage, when run last, wrote the split
        recorded = meta.get("stages", {}).get(stage, {})
        recorded = recorded.get("options", recorded) if isinstance(recorded, dict) else {}
        if isinstance(recorded, dict) and recorded.get("ratios"):
            options = recorded
    return diagnose_split(m, ratios=tuple(options.get("ratios", RATIOS)), folds=options.get("folds"))


def _seed(meta: dict):
    """The seed recorded in the sidecar: at its top level, else the first stage that has one."""
    if "seed" in meta:
        return meta["seed"]
    for options in meta.get("stages", {}).values():
        if isinstance(options, dict) and "seed" in options:
            return options["seed"]
    return None


def _jsonable(value):
    """``value`` with anything json cannot write turned into its string form."""
    return _json.loads(_json.dumps(value, default=str))
