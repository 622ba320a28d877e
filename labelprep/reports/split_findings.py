"""The words for a split's diagnosis (:func:`labelprep.split_diagnosis.diagnose_split`).

One list of plain lines serves the terminal (``split`` and ``prepare``), the Markdown report and
the HTML page, so every view says the same thing.
"""

from __future__ import annotations

from .text import plural

CLASSES_NAMED = 8  # classes named per line; the rest are counted

_MISSING_WHY = {
    "chaining": "near-duplicate clusters join their user groups into fewer bundles than there are "
                "splits",
    "few-groups": "too few user groups to reach every split (each group stays in one split)",
    "few-files": "fewer files than there are splits",
    "placement": "they have enough bundles, but the placement left them out (kept rows or a "
                 "large bundle filling the split)",
}
_CAUSE_LINE = {
    "chaining": "cause: near-duplicate clusters chain user groups and files into bundles too "
                "large to place; the largest bundles:",
    "large-group": "cause: a user group too large for the ratios; the largest bundles:",
    "large-cluster": "cause: a near-duplicate cluster too large for the ratios; the largest "
                     "bundles:",
    "placement": "cause: no bundle is too large; the placement fell short (rows kept from an "
                 "older split can do this); the largest bundles:",
}


def split_lines(found, *, bundles: bool = True) -> list[str]:
    """Plain lines telling how the split missed its targets and why; ``[]`` when it reached them.

    ``bundles=False`` leaves out the indented lines describing each bundle and its bridging
    files (for a view that draws them itself, as the HTML page does).

    Examples
    --------
    >>> found = {"reached": False, "rows": 10, "off_ratio": [], "cause": "few-groups", "bundles": [],
    ...          "splits": {}, "missing": [{"label": "cat", "splits": ["test"], "files": 3,
    ...                                     "groups": 1, "bundles": 1, "cause": "few-groups"}]}
    >>> split_lines(found)[0]
    "1 class missing from a split ('cat' from test): too few user groups to reach every split (each group stays in one split); 'cat': 3 files in 1 group"
    """
    if not found or found["reached"]:
        return []
    lines = []
    if found["off_ratio"]:
        parts = [f"{name} {plural(s['rows'], 'file')} ({_pct(s['share'])}, target {_pct(s['target'])})"
                 for name, s in found["splits"].items() if name in found["off_ratio"]]
        lines.append(f"the split misses its ratios by more than {_pct(found['tolerance'])} of "
                     f"{found['rows']} files: " + ", ".join(parts))
    for cause, why in _MISSING_WHY.items():
        entries = [m for m in found["missing"] if m["cause"] == cause]
        if entries:
            lines.append(_missing_line(entries, why))
    if found["bundles"] and (found["off_ratio"] or found["cause"] in _CAUSE_LINE):
        lines.append(_CAUSE_LINE.get(found["cause"], _CAUSE_LINE["placement"]))
        for bundle in found["bundles"] if bundles else []:
            lines += bundle_lines(bundle)
    return lines


def warning_lines(found) -> list[str]:
    """:func:`split_lines` for a terminal: each headline line marked as a warning."""
    return [line if line.startswith(" ") else f"warning: {line}" for line in split_lines(found)]


def _missing_line(entries, why) -> str:
    named = entries[:CLASSES_NAMED]
    more = f"; {len(entries) - len(named)} more" if len(entries) > len(named) else ""
    where = "; ".join(f"{m['label']!r} from {', '.join(m['splits'])}" for m in named) + more
    detail = "; ".join(f"{m['label']!r}: {plural(m['files'], 'file')} in {plural(m['groups'], 'group')}"
                       + (f", {plural(m['bundles'], 'bundle')}" if m["bundles"] != m["groups"] else "")
                       for m in named)
    return f"{plural(len(entries), 'class')} missing from a split ({where}): {why}; {detail}"


def bundle_lines(bundle) -> list[str]:
    """One bundle's description and its first bridging files (indented for the terminal)."""
    where = ", ".join(bundle["splits"]) or "no split"
    lone = bundle["parts"] - bundle["groups"]
    parts = plural(bundle["groups"], "user group") + (f" and {plural(lone, 'file')} with no group"
                                                       if lone else "")
    joined = (f"{parts}, joined by {plural(bundle['joining_clusters'], 'near-duplicate cluster')} "
              f"({plural(bundle['links'], 'cluster-group link')})" if bundle["joining_clusters"]
              else f"{parts}, no near-duplicate cluster joining them")
    lines = [f"  bundle {bundle['bundle']}: {plural(bundle['rows'], 'file')} ({_pct(bundle['share'])} "
             f"of the rows) in {where}, {plural(bundle['classes'], 'class')}; {joined}; without "
             f"those links its largest part would hold {plural(bundle['largest_part'], 'file')}"]
    if bundle["bridges"]:
        shown = len(bundle["bridges"])
        lines.append(f"    files that bridge it ({shown} of {bundle['bridge_files']}; each is in a "
                     "near-duplicate cluster that spans several groups):")
        lines += [f"      {b['path']}  group {b['group'] or '(none)'}, cluster {b['cluster']} spans "
                  f"{plural(b['joins'], 'group')} or lone files" + (f", alone ties {plural(b['holds'], 'file')} to the rest"
                                                      if b["holds"] else "")
                  for b in bundle["bridges"]]
    return lines


def _pct(share) -> str:
    return f"{100 * share:.1f}%"
