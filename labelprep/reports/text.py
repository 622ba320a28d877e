"""Plain-text and Markdown views of a report summary; both read the summary dict only."""

from __future__ import annotations

UNASSIGNED = "unassigned"


def terminal(summary: dict, *, issues: bool = True) -> str:
    """Aligned plain-text tables for a terminal (see :func:`labelprep.reports.terminal_table`)."""
    parts = [_headline(summary), "", _table(*_class_rows(summary), markdown=False)]
    if "sources" in summary:
        parts += ["", _table(*source_rows(summary), markdown=False)]
    parts += ["", _table(*_balance_rows(summary), markdown=False)]
    if issues and summary["issues"]:
        parts += ["", _table(*_issue_rows(summary), markdown=False)]
    parts += ["", _duplicates_line(summary)]
    parts += [f"warning: {line}" for line in _warning_lines(summary)]
    parts += _split_warnings(summary)
    return "\n".join(parts) + "\n"


def markdown(summary: dict) -> str:
    """A Markdown document of the summary: headline, tables, warnings, options."""
    parts = ["# labelprep report", "", _headline(summary), "", "## Classes per split", "",
             _table(*_class_rows(summary), markdown=True), "",
             *(["## Sources", "", _table(*source_rows(summary), markdown=True), ""] if "sources" in summary else []),
             "## Balance", "",
             _table(*_balance_rows(summary), markdown=True)]
    warnings = _warning_lines(summary)
    if warnings:
        parts += ["", "## Thin classes", ""] + [f"- {line}" for line in warnings]
    shortfall = _split_warnings(summary, markdown=True)
    if shortfall:
        parts += ["", "## Why the split misses its targets", ""] + shortfall
    parts += ["", "## Issues", ""]
    parts += [_table(*_issue_rows(summary), markdown=True)] if summary["issues"] else ["No issues found."]
    parts += ["", "## Near-duplicates", "", _duplicates_line(summary), "", "## Made with", ""]
    parts += [f"- seed: {_cell(summary['seed'])}"]
    parts += [f"- {stage}.{name}: {value}" for stage, options in summary["options"].items()
              for name, value in flatten(options)]
    return "\n".join(parts) + "\n"


def _split_warnings(summary: dict, *, markdown: bool = False) -> list[str]:
    """The split diagnosis as terminal warnings, or as Markdown bullets (bundle lines nested)."""
    from .split_findings import split_lines, warning_lines

    found = summary.get("split_diagnosis")
    if not markdown:
        return warning_lines(found)
    return [f"  - {line.strip()}" if line.startswith(" ") else f"- {line}" for line in split_lines(found)]


def _headline(summary: dict) -> str:
    return (f"{plural(summary['files'], 'file')}: {summary['in_split']} in a split, "
            f"{summary['left_out']} left out; {plural(len(summary['classes']), 'class')}")


def _split_names(summary: dict) -> list[str]:
    return [name for name in summary["balance"]["splits"] if name != UNASSIGNED]


def _class_rows(summary: dict):
    splits = summary["balance"]["splits"]
    names = _split_names(summary)
    header = ["class", *names, "in split", "left out"]
    overall = summary["balance"]["overall"]["counts"]
    left = splits.get(UNASSIGNED, {}).get("counts", {})
    rows = [[c, *(splits[n]["counts"][c] for n in names), overall[c], left.get(c, 0)]
            for c in summary["classes"]]
    rows.append(["all", *(splits[n]["rows"] for n in names), summary["in_split"], summary["left_out"]])
    return header, rows


def source_rows(summary: dict):
    """``(header, rows)``: per source its files, how many are in each split, its files per class
    and its issues (``code n``), for a summary of several sources."""
    names = _split_names(summary)
    header = ["source", "files", *names, "left out", *summary["classes"], "issues"]
    rows = [[s["source"], s["files"], *(s["splits"].get(n, 0) for n in names), s["left_out"],
             *(s["classes"][c] for c in summary["classes"]),
             ", ".join(f"{code} {n}" for code, n in s["issues"].items()) or "-"]
            for s in summary["sources"]]
    return header, rows


def _balance_rows(summary: dict):
    balance = summary["balance"]
    header = ["split", "files", "max/min", "evenness", "chi² p"]
    rows = []
    for name, stats in [*((n, balance["splits"][n]) for n in _split_names(summary)),
                        ("overall", balance["overall"])]:
        chi = stats["chi_square"]
        rows.append([name, stats["n"], _number(stats["imbalance_ratio"]), _number(stats["entropy"]),
                     _number(chi["p_value"]) if chi else "-"])
    return header, rows


def _issue_rows(summary: dict):
    return (["issue", "severity", "files"],
            [[i["code"], i["severity"], i["rows"]] for i in summary["issues"]])


def _duplicates_line(summary: dict) -> str:
    d = summary["near_duplicates"]
    if not d["clusters"]:
        return "No near-duplicate clusters."
    line = (f"{plural(d['clusters'], 'near-duplicate cluster')} hold {d['files']} files; "
            f"{d['label_conflicts']} mix labels, {d['across_splits']} straddle splits.")
    weakest = [w for w in d.get("weakest_links", []) if w["blemish"] is not None]
    if weakest:
        w = weakest[0]
        line += (f" Weakest link: {w['path']} to {w['linked_to']} (cluster {w['cluster']}, {w['kind']}, "
                 f"blemish {w['blemish']:.3f}).")
    return line


def _warning_lines(summary: dict) -> list[str]:
    return [f"{w['split']}: class {w['label']!r} has {plural(w['count'], 'file')} (fewer than {w['min_count']})"
            for w in summary["balance"]["warnings"]]


def plural(n: int, noun: str) -> str:
    """``n`` and ``noun``, with an English plural ending unless n is 1 (class -> classes)."""
    if n == 1:
        return f"1 {noun}"
    return f"{n} {noun}es" if noun.endswith(("s", "x")) else f"{n} {noun}s"


def flatten(value, prefix="") -> list:
    """Nested options as ``(dotted.name, text)`` pairs."""
    if not isinstance(value, dict):
        return [(prefix or "value", _cell(value))]
    pairs = []
    for key, item in value.items():
        name = f"{prefix}.{key}" if prefix else str(key)
        pairs += flatten(item, name) if isinstance(item, dict) else [(name, _cell(item))]
    return pairs


def _number(value) -> str:
    if value is None:
        return "-"
    return f"{value:.3g}"


def _cell(value) -> str:
    """One table cell: a compact one-line form, ``|`` escaped for Markdown."""
    if isinstance(value, dict):
        text = ", ".join(f"{k}={_cell(v)}" for k, v in value.items())
    elif isinstance(value, list):
        text = "[" + ", ".join(_cell(v) for v in value) + "]"
    else:
        text = "-" if value is None else str(value)
    return text.replace("\n", " ")


def _table(header, rows, *, markdown: bool) -> str:
    """Rows under a header: a pipe table for Markdown, else columns padded to line up."""
    cells = [[_cell(v) for v in row] for row in [header, *rows]]
    if markdown:
        cells = [[c.replace("|", "\\|") for c in row] for row in cells]
        lines = ["| " + " | ".join(row) + " |" for row in cells]
        lines.insert(1, "|" + "|".join("---" if i == 0 else "---:" for i in range(len(header))) + "|")
        return "\n".join(lines)
    widths = [max(len(row[i]) for row in cells) for i in range(len(header))]
    return "\n".join(
        "  ".join(c.ljust(w) if i == 0 else c.rjust(w) for i, (c, w) in enumerate(zip(row, widths))).rstrip()
        for row in cells)
