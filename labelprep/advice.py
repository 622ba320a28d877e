"""What the commands tell a user beyond the figures: empty splits and classes, the file a copy
matches, what kept and lost members of an earlier split, folds thinner than a class, notes of a
scan (what it skipped and why) and what to do after an audit.

Every function takes library results (a manifest, a :func:`labelprep.split_summary`, scan facts,
an :func:`labelprep.audit` result) and returns plain lines; the command line prints them. The
wording names the option a user would change, since these lines are read at a terminal.
"""

from __future__ import annotations

from . import codes

SPLIT_NAMES = ("train", "val", "test")


def empty_parts(manifest, *, ratios=None, folds=None) -> list[str]:
    """Warnings for a split or a class that ends up empty, ``[]`` when none does.

    Parameters
    ----------
    manifest : pandas.DataFrame
        A split manifest (``path``, ``label``, ``split``, ``issues``).
    ratios : sequence of float, optional
        The ratios the split ran with (two or three): a split with a share and no file is named.
    folds : int, optional
        With folds the split holds only train and test (the val share joins train).

    Examples
    --------
    >>> import pandas as pd
    >>> m = pd.DataFrame({"path": ["a.png", "b.png"], "label": ["cat", "dog"],
    ...                   "split": ["train", ""], "issues": ["", "too-small"]})
    >>> print(empty_parts(m)[0])
    class dog has no file in any split: all 1 of its files are left out (too-small 1); lower --min-side to keep small images
    """
    split = manifest["split"].fillna("").astype(str)
    labels = manifest["label"].fillna("").astype(str)
    issues = manifest["issues"].fillna("").astype(str) if "issues" in manifest.columns else split.map(lambda _: "")
    lines = []
    if not (split != "").any():
        return [f"no file reached a split: all {len(manifest)} files are left out{why_left_out(issues)}"]
    for name in _expected_splits(ratios, folds):
        if not (split == name).any():
            lines.append(f"split {name} is empty: it has a share in the ratios but no file "
                         "(too few groups or clusters to reach it)")
    for label in sorted(set(labels[labels != ""])):
        mine = labels == label
        if not (split[mine] != "").any():
            lines.append(f"class {label} has no file in any split: all {int(mine.sum())} of its "
                         f"files are left out{why_left_out(issues[mine])}")
    return lines


def _expected_splits(ratios, folds) -> list[str]:
    if ratios is None:
        return []
    values = list(ratios)
    if folds is not None:
        return ["train", "test"] if values[-1] > 0 else ["train"]
    if len(values) == 2:
        values = [values[0], 0.0, values[1]]
    return [name for name, share in zip(SPLIT_NAMES, values) if share > 0]


def why_left_out(issues) -> str:
    """`` (too-small 28, ...)``: the error codes that kept the rows out, with their counts, and
    the option that would keep them; ``""`` when no row has an error code.

    Examples
    --------
    >>> import pandas as pd
    >>> why_left_out(pd.Series(["too-small", "too-small;exact-copy", ""]))
    ' (too-small 2); lower --min-side to keep small images'
    """
    flagged = issues[issues != ""]
    tally = {code: n for code, n in codes.counts(flagged).items()
             if code in codes.CODES and codes.CODES[code].severity == codes.ERROR}
    if not tally:
        return ""
    hints = {code: HINTS[code] for code in tally if code in HINTS}
    listed = ", ".join(f"{code} {n}" for code, n in list(tally.items())[:4])
    return f" ({listed})" + "".join(f"; {hint}" for hint in hints.values())


# what to change when a code keeps files out of the split
HINTS = {"too-small": "lower --min-side to keep small images",
         "label-conflict": "--keep-conflicts keeps clusters that span labels",
         "no-label": "give labels with class folders or --labels TABLE"}


def copy_match(manifest, row, code: str) -> str:
    """One line naming the file that ``row`` matches, for the group stage's codes.

    ``exact-copy`` names another file with the same bytes, ``near-copy`` another member of its
    cluster (preferring one with different bytes), ``label-conflict`` a member with another label.

    Examples
    --------
    >>> import pandas as pd
    >>> m = pd.DataFrame({"path": ["a.png", "b.png"], "label": ["cat", "cat"],
    ...                   "sha256": ["1", "2"], "dup_group": [0, 0]})
    >>> copy_match(m, m.iloc[1], "near-copy")
    'looks like a.png'
    """
    import pandas as pd

    members = manifest
    if "dup_group" in manifest.columns and not pd.isna(row.get("dup_group")):
        members = manifest[manifest["dup_group"] == row["dup_group"]]
    others = members[members["path"] != row["path"]].sort_values("path", kind="stable")
    if code == "exact-copy" and "sha256" in others.columns:
        same = others[others["sha256"] == row["sha256"]]
        return f"same bytes as {same['path'].iloc[0]}" if len(same) else codes.CODES[code].meaning
    if code == "label-conflict":
        other = others[others["label"].fillna("").astype(str) != str(row["label"])]
        if len(other):
            return (f"in one near-duplicate cluster with {other['path'].iloc[0]}, labelled "
                    f"{other['label'].iloc[0]!r} (this one {row['label']!r})")
    if code == "near-copy" and len(others):
        distinct = others[others["sha256"] != row["sha256"]] if "sha256" in others.columns else others
        mate = (distinct if len(distinct) else others)["path"].iloc[0]
        more = len(others) - 1
        return f"looks like {mate}" + (f" (and {more} more in its cluster)" if more else "")
    return codes.CODES[code].meaning


def keep_lines(summary: dict, manifest) -> list[str]:
    """What keeping an earlier split did, and a warning for old test or val files now left out.

    ``summary`` is :func:`labelprep.split_summary` with ``keep_from``.
    """
    lines = [f"kept {summary['kept']} files where they were, placed {summary['placed']} new, "
             f"moved {summary['moved']}, dropped {summary['dropped']} (now with an error)"]
    issues = manifest["issues"].fillna("").astype(str)
    for name in ("test", "val"):
        lost = summary.get("dropped_from", {}).get(name, [])
        if lost:
            rows = manifest["path"].astype(str).isin(lost)
            lines.append(f"warning: the old {name} split lost {len(lost)} files, now left out"
                         f"{why_left_out(issues[rows])}: {', '.join(lost[:3])}" + (" ..." if len(lost) > 3 else ""))
    return lines


def fold_warnings(summary: dict, folds) -> list[str]:
    """Warnings when ``folds`` exceeds the units in train (empty folds) or of one class there.

    Examples
    --------
    >>> fold_warnings({"fold_units": 9, "units_per_class": {"cat": 4, "dog": 5}}, 5)[0]
    'warning: --folds 5 is more than the 4 groups, clusters or single files of class cat in train, so 1 folds have no cat file'
    """
    if folds is None or "fold_units" not in summary:
        return []
    lines = []
    if summary["fold_units"] < folds:
        lines.append(f"warning: --folds {folds} is more than the {summary['fold_units']} groups, "
                     f"clusters or single files in train, so {folds - summary['fold_units']} folds "
                     "are empty; ask for fewer folds")
    return lines + [f"warning: --folds {folds} is more than the {n} groups, clusters or single "
                    f"files of class {label} in train, so {folds - n} folds have no {label} file"
                    for label, n in summary["units_per_class"].items() if n < folds]


def scan_notes(facts: dict) -> list[str]:
    """Lines for what a scan left out on purpose (its own outputs, junk) and empty folders.

    Examples
    --------
    >>> scan_notes({"excluded": ["prep"], "empty_folders": ["eel"]})
    ["left out labelprep's own files inside the root: prep", 'warning: 1 empty folders, so no class or file from them: eel']
    """
    lines = []
    if facts.get("excluded"):
        lines.append(f"left out labelprep's own files inside the root: {', '.join(facts['excluded'][:5])}")
    if facts.get("skipped_junk"):
        lines.append(f"skipped {facts['skipped_junk']} hidden or system files "
                     f"(e.g. {', '.join(facts['skipped_examples'][:3])}); --include-hidden indexes them")
    empty = facts.get("empty_folders") or []
    if empty:
        lines.append(f"warning: {len(empty)} empty folders, so no class or file from them: "
                     + ", ".join(empty[:5]) + (" ..." if len(empty) > 5 else ""))
    return lines


def audit_advice(result: dict) -> list[str]:
    """What to do next after an :func:`labelprep.audit`, one line per kind of finding."""
    near, groups = result["near_leaks"], result["group_leaks"]
    lines = []
    if near:
        lines.append("next: run `labelprep prepare ROOT --out DIR` (or group, then split) to re-split "
                     "so each near-duplicate cluster sits in one split; `--keep-from OLD_MANIFEST` "
                     "keeps every other file where it is")
        if any(p["label_a"] != p["label_b"] for p in near):
            lines.append("next: pairs with two labels are the same picture filed twice; check their "
                         "labels before training")
    if groups:
        lines.append("next: a group in several splits lets a model see a subject at test time; "
                     "re-split with the groups given (--group-pattern or a group column in --labels)")
    if not result.get("groups_known", True):
        lines.append("note: no groups are known, so leaks of one subject, session or source are not "
                     "checked; give them with --group-pattern REGEX or a group column in --labels")
    if not lines:
        lines.append("no leaks found: nothing to do")
    return lines
