"""The decisions file: what a person decided about files, honoured by every later run.

``decisions.csv`` (in the output folder, or any file given with ``--decisions``) is plain CSV
with the header ``path,action,value,note``, one decision per row:

========== ============================ =====================================================
action     value                        effect
========== ============================ =====================================================
drop       (empty)                      the error code ``dropped``: the file is left out of the split
relabel    the new label                ``label`` becomes the value; ``label_original`` keeps the old one
separate   another path                 the two are not copies: their direct link is removed before clustering
join       another path                 the two are kept together: a link is added before clustering
keep       (empty) or one warning code  the file is confirmed fine: its warnings (or that one) move to ``muted``
========== ============================ =====================================================

Applying is a pure function of the manifest and the set of decisions (:func:`apply`): row order
in the file does not matter, applying twice gives what applying once gives, and an earlier
application is undone first, so a decision removed from the file stops taking effect. Each row's
``decided`` column names the actions that applied to it. A decision naming a path the manifest
lacks is not applied and is listed by :func:`findings`, never silently ignored.
"""

from __future__ import annotations

import csv
import hashlib
import io
from pathlib import Path

from . import codes
from .errors import InputError, ParameterError

FILE_NAME = "decisions.csv"
HEADER = ("path", "action", "value", "note")
ACTIONS = ("drop", "relabel", "separate", "join", "keep")
PAIR_ACTIONS = ("separate", "join")
DROP_CODE = "dropped"
# the columns apply() owns; absent from a manifest no decision ever touched
COLUMNS = ("decided", "decision_note", "label_original", "muted")
_STAGE = "decisions"


def empty():
    """A decisions table with no rows (the columns of :data:`HEADER`, plus ``line``)."""
    import pandas as pd

    return pd.DataFrame({name: pd.Series([], dtype=object) for name in HEADER}).assign(
        line=pd.Series([], dtype="int64"))


def load(path, *, required: bool = True):
    """Read and validate a decisions file.

    Parameters
    ----------
    path : str or Path
        The CSV file (UTF-8, with or without a byte-order mark, any line ends).
    required : bool, default True
        When False a missing file is an empty table (the default ``decisions.csv`` of a folder
        that has none); when True it is an error.

    Returns
    -------
    pandas.DataFrame
        Columns ``path, action, value, note`` and ``line`` (the row's line in the file);
        ``attrs`` holds ``file`` and ``sha256`` (the digest of the file's bytes; None when
        there is no file).

    Raises
    ------
    InputError
        The file is missing (when required), not CSV with the header above, or a row breaks a
        rule (unknown action, missing value, a path paired with itself, two labels for one
        file, a pair both separated and joined, a keep naming an error code); the message
        names the line.

    Examples
    --------
    >>> import tempfile, pathlib
    >>> f = pathlib.Path(tempfile.mkdtemp()) / "decisions.csv"
    >>> _ = f.write_text("path,action,value,note\\ncat/1.jpg,relabel,dog,looks like a dog\\n")
    >>> load(f)[["path", "action", "value"]].values.tolist()
    [['cat/1.jpg', 'relabel', 'dog']]
    """
    path = Path(path)
    if not path.is_file():
        if required:
            raise InputError(f"decisions file {path} does not exist")
        table = empty()
        table.attrs.update(file=str(path), sha256=None)
        return table
    try:
        data = path.read_bytes()
    except OSError as exc:
        raise InputError(f"cannot read decisions file {path}: {exc.strerror or exc}") from exc
    table = parse(data, name=str(path))
    table.attrs.update(file=str(path), sha256=hashlib.sha256(data).hexdigest())
    return table


def parse(data: bytes, *, name: str = "decisions"):
    """The validated decisions table of the bytes of a decisions file (see :func:`load`)."""
    import pandas as pd

    try:
        text = data.decode("utf-8-sig")
    except UnicodeDecodeError as exc:
        raise InputError(f"{name} is not UTF-8 text (byte {exc.start})") from exc
    reader = csv.reader(io.StringIO(text, newline=""))
    header = next(reader, None)
    if header is None:
        return empty()
    header = [h.strip() for h in header]
    if header[:2] != ["path", "action"] or not set(header) <= set(HEADER) or len(set(header)) != len(header):
        raise InputError(f"{name}: the header must be {','.join(HEADER)}; got {','.join(header)}")
    rows = []
    for values in reader:
        if not any(v.strip() for v in values):
            continue  # blank line
        line = reader.line_num
        if len(values) > len(header):
            raise InputError(f"{name} line {line}: {len(values)} fields, the header has {len(header)}")
        cells = dict(zip(header, (v.strip() for v in values)))
        rows.append({**{c: cells.get(c, "") for c in HEADER}, "line": line})
    table = pd.DataFrame(rows, columns=[*HEADER, "line"]) if rows else empty()
    _validate(table, name)
    return table.astype({c: object for c in HEADER}).astype({"line": "int64"})


def _validate(table, name: str) -> None:
    """Raise InputError, naming the line, for the first row that breaks a rule."""
    labels: dict[str, tuple[str, int]] = {}
    pairs: dict[tuple, tuple[str, int]] = {}
    for path, action, value, line in zip(table["path"], table["action"], table["value"], table["line"]):
        where = f"{name} line {line}"
        if not path:
            raise InputError(f"{where}: the path is empty")
        if action not in ACTIONS:
            raise InputError(f"{where}: action {action!r} is not one of {', '.join(ACTIONS)}")
        if action in ("relabel", *PAIR_ACTIONS) and not value:
            what = "the new label" if action == "relabel" else "the other file's path"
            raise InputError(f"{where}: {action} needs a value ({what})")
        if action == "drop" and value:
            raise InputError(f"{where}: drop takes no value; got {value!r}")
        if action in PAIR_ACTIONS and value == path:
            raise InputError(f"{where}: {action} pairs {path!r} with itself")
        if action == "keep" and value:
            known = codes.CODES.get(value)
            if known is None:
                raise InputError(f"{where}: keep names {value!r}, which is not an issue code")
            if known.severity != codes.WARNING:
                raise InputError(f"{where}: keep mutes warnings; {value!r} is an error "
                                 "(drop or relabel the file instead)")
        if action == "relabel":
            seen = labels.setdefault(path, (value, line))
            if seen[0] != value:
                raise InputError(f"{where}: {path!r} is relabelled {value!r} here and "
                                 f"{seen[0]!r} on line {seen[1]}")
        if action in PAIR_ACTIONS:
            seen = pairs.setdefault(tuple(sorted((path, value))), (action, line))
            if seen[0] != action:
                raise InputError(f"{where}: {path!r} and {value!r} are both separated and joined "
                                 f"(line {seen[1]})")


def digest_of(table) -> dict:
    """What a sidecar records of the decisions applied: the file and its sha256 (None when the
    file does not exist)."""
    return {"file": table.attrs.get("file"), "sha256": table.attrs.get("sha256"), "rows": len(table)}


# ---------------------------------------------------------------- applying

def apply(manifest, decisions):
    """Return ``manifest`` with the row decisions applied (drop, relabel, keep).

    An earlier application is undone first (labels back from ``label_original``, muted codes
    back into ``issues``, ``dropped`` removed), so the result depends only on the manifest's
    own facts and the set of decisions; with no decisions the decision columns are removed.
    ``separate`` and ``join`` change clusters, so they act inside the group stage
    (:func:`edit_links`); here they are only named in ``decided``.

    Parameters
    ----------
    manifest : pandas.DataFrame
        Needs ``path``; uses ``label`` and ``issues``.
    decisions : pandas.DataFrame
        A table from :func:`load` (or :func:`parse`).

    Returns
    -------
    pandas.DataFrame
        ``manifest`` itself when there is nothing to apply or take back; else a copy with ``decided`` (the actions that applied to the row, ``;``-separated),
        ``decision_note`` (their notes, ``" | "``-separated), ``label_original`` (the label
        before a relabel; empty otherwise) and ``muted`` (warning codes a keep removed from
        ``issues``), and the error code ``dropped`` in ``issues``.

    Examples
    --------
    >>> import pandas as pd
    >>> m = pd.DataFrame({"path": ["a.png", "b.png"], "label": ["cat", "cat"],
    ...                   "issues": ["near-blank", ""]})
    >>> d = parse(b"path,action,value,note\\na.png,keep,,sky only\\nb.png,relabel,dog,\\n")
    >>> out = apply(m, d)
    >>> out[["label", "issues", "decided", "muted"]].values.tolist()
    [['cat', '', 'keep', 'near-blank'], ['dog', '', 'relabel', '']]
    """
    import numpy as np
    import pandas as pd

    from .manifest import order_columns

    if not isinstance(manifest, pd.DataFrame):
        raise TypeError(f"manifest must be a pandas DataFrame, got {type(manifest).__name__}")
    if "path" not in manifest.columns:
        raise ParameterError("manifest lacks column path")
    _check_table(decisions)
    if decisions.empty and not _touched(manifest):
        return manifest  # nothing to apply and nothing to take back: no copy of a big manifest
    out = _undone(manifest)
    if decisions.empty:
        return order_columns(out)
    n = len(out)
    index = pd.Index(out["path"].astype(str))
    labels = _text(out, "label")
    issues = _text(out, "issues")
    original = np.full(n, "", dtype=object)
    # only the rows a decision names are visited, so a big manifest costs vectorised copies only
    decided: dict[int, set] = {}
    notes: dict[int, list] = {}
    keeps: dict[int, set] = {}
    table = _sorted(decisions)
    rows = index.get_indexer(table["path"])
    others = index.get_indexer(table["value"].where(table["action"].isin(PAIR_ACTIONS), ""))
    for row, other, action, value, note in zip(rows, others, table["action"], table["value"], table["note"]):
        if row < 0 or (action in PAIR_ACTIONS and other < 0):
            continue  # unknown path: findings() reports it
        for r in (row, other) if action in PAIR_ACTIONS else (row,):
            decided.setdefault(r, set()).add(action)
            if note and note not in notes.setdefault(r, []):
                notes[r].append(note)
        if action == "drop":
            issues[row] = codes.join(codes.parse(issues[row]) + [DROP_CODE])
        elif action == "relabel":
            original[row], labels[row] = labels[row], value
        elif action == "keep":
            keeps.setdefault(row, set()).add(value)
    muted = np.full(n, "", dtype=object)
    for row, named in keeps.items():
        warnings = [c for c in codes.parse(issues[row])
                    if c in codes.CODES and codes.CODES[c].severity == codes.WARNING]
        silenced = warnings if "" in named else [c for c in warnings if c in named]
        muted[row] = codes.join(silenced)
        issues[row] = codes.join(c for c in codes.parse(issues[row]) if c not in silenced)

    order = {a: i for i, a in enumerate(ACTIONS)}
    decided_cells = np.full(n, "", dtype=object)
    note_cells = np.full(n, "", dtype=object)
    for row, actions in decided.items():
        decided_cells[row] = ";".join(sorted(actions, key=order.get))
        note_cells[row] = " | ".join(notes.get(row, []))
    for name, cells in (("label", labels), ("issues", issues), ("decided", decided_cells),
                        ("decision_note", note_cells), ("label_original", original), ("muted", muted)):
        out[name] = pd.Series(cells, index=out.index, dtype=object)
    return order_columns(out)


def _text(frame, column: str):
    """A writable object array of ``frame[column]`` as text, empty strings for missing cells."""
    import numpy as np

    if column not in frame.columns:
        return np.full(len(frame), "", dtype=object)
    return frame[column].fillna("").astype(str).to_numpy(dtype=object).copy()


def _touched(manifest) -> bool:
    """Whether an earlier :func:`apply` left anything in ``manifest``."""
    if any(c in manifest.columns for c in COLUMNS):
        return True
    return "issues" in manifest.columns and bool(
        manifest["issues"].astype(str).str.contains(DROP_CODE, regex=False).any())


def _undone(manifest):
    """A copy of ``manifest`` with an earlier :func:`apply` taken back."""
    import numpy as np
    import pandas as pd

    out = manifest.copy()
    if "label_original" in out.columns:
        before = _text(out, "label_original")
        labels = _text(out, "label")
        out["label"] = pd.Series(np.where(before != "", before, labels), index=out.index, dtype=object)
    if "issues" in out.columns:
        issues = _text(out, "issues")
        back = _text(out, "muted") if "muted" in out.columns else np.full(len(out), "", dtype=object)
        for i in np.flatnonzero((back != "") | pd.Series(issues).str.contains(DROP_CODE, regex=False).to_numpy()):
            issues[i] = codes.join([c for c in codes.parse(issues[i]) if c != DROP_CODE] + codes.parse(back[i]))
        out["issues"] = pd.Series(issues, index=out.index, dtype=object)
    return out.drop(columns=[c for c in COLUMNS if c in out.columns])


def _check_table(decisions) -> None:
    import pandas as pd

    if not isinstance(decisions, pd.DataFrame) or not set(HEADER) <= set(decisions.columns):
        raise TypeError("decisions must be a table from labelprep.decisions.load, got "
                        f"{type(decisions).__name__}")


def _sorted(decisions):
    """The decisions in one canonical order (path, action, value), duplicates removed, so that
    the row order of the file never changes a result."""
    order = {a: i for i, a in enumerate(ACTIONS)}
    table = decisions.assign(_rank=decisions["action"].map(order))
    table = table.sort_values(["path", "_rank", "value", "note"], kind="stable")
    return table.drop_duplicates(["path", "action", "value"]).drop(columns="_rank")


def edit_links(paths, links, decisions):
    """The group stage's hook: ``links`` (2, k) between rows with separated pairs removed and
    joined pairs added.

    Parameters
    ----------
    paths : sequence of str
        The path of each row the links index.
    links : numpy.ndarray
        Row index pairs (2, k), in any orientation.
    decisions : pandas.DataFrame or None
        A table from :func:`load`; None (or no pair decisions) returns ``links`` unchanged.
        Pairs naming a path not in ``paths`` are skipped (:func:`findings` reports them).
    """
    import numpy as np
    import pandas as pd

    if decisions is None or decisions.empty:
        return links
    _check_table(decisions)
    index = pd.Index(pd.Series(paths, dtype=object).astype(str))
    pairs = {}
    for action in PAIR_ACTIONS:
        chosen = decisions[decisions["action"] == action]
        a, b = index.get_indexer(chosen["path"]), index.get_indexer(chosen["value"])
        known = (a >= 0) & (b >= 0)
        pairs[action] = np.sort(np.vstack([a[known], b[known]]), axis=0).astype(np.int64)
    links = np.asarray(links, dtype=np.int64).reshape(2, -1)
    if pairs["separate"].size:
        n = max(len(index), 1)
        ordered = np.sort(links, axis=0)
        cut = np.isin(ordered[0] * n + ordered[1], pairs["separate"][0] * n + pairs["separate"][1])
        links = links[:, ~cut]
    return np.concatenate([links, pairs["join"]], axis=1)


def separated_mask(paths, a, b, decisions):
    """Which row pairs ``(a[k], b[k])`` (indices into ``paths``) ``decisions`` separates."""
    import numpy as np

    a, b = np.asarray(a, dtype=np.int64), np.asarray(b, dtype=np.int64)
    if decisions is None or decisions.empty or not len(a):
        return np.zeros(len(a), dtype=bool)
    _check_table(decisions)
    chosen = decisions[decisions["action"] == "separate"]
    apart = {tuple(sorted(pair)) for pair in zip(chosen["path"], chosen["value"])}
    names = np.asarray(paths, dtype=object)
    return np.array([tuple(sorted((x, y))) in apart for x, y in zip(names[a], names[b])], dtype=bool)


def findings(manifest, decisions) -> dict:
    """What a person must hear about applying ``decisions`` to ``manifest``.

    Returns
    -------
    dict
        ``rows`` (decisions in the table), ``applied`` (``{action: decisions applied}``),
        ``unknown`` (decisions naming a path the manifest lacks, each ``{line, path, action,
        value}``) and ``still_joined`` (separated pairs that other links still hold in one
        cluster, ``[path, other]``; only when the manifest has ``dup_group``).
    """
    import pandas as pd

    _check_table(decisions)
    known = pd.Index(manifest["path"].astype(str))
    is_pair = decisions["action"].isin(PAIR_ACTIONS)
    found = known.get_indexer(decisions["path"]) >= 0
    found &= ~is_pair | (known.get_indexer(decisions["value"].where(is_pair, "")) >= 0)
    unknown = decisions[~found]
    applied = decisions[found].drop_duplicates(["path", "action", "value"])
    still = []
    if "dup_group" in manifest.columns:
        group_of = pd.Series(manifest["dup_group"].to_numpy(), index=known)
        for a, b in zip(applied.loc[applied["action"] == "separate", "path"],
                        applied.loc[applied["action"] == "separate", "value"]):
            ga, gb = group_of.get(a), group_of.get(b)
            if ga is not None and gb is not None and not pd.isna(ga) and ga == gb:
                still.append(sorted([a, b]))
    return {
        "rows": len(decisions),
        "applied": {a: int((applied["action"] == a).sum()) for a in ACTIONS},
        "unknown": [{"line": int(line), "path": p, "action": a, "value": v}
                    for line, p, a, v in zip(unknown["line"], unknown["path"], unknown["action"],
                                             unknown["value"])],
        "still_joined": sorted(still),
    }


# ---------------------------------------------------------------- writing (the review page)

def to_csv_bytes(decisions) -> bytes:
    """The bytes :func:`save` writes: the header, then the rows in canonical order."""
    buffer = io.StringIO(newline="")
    writer = csv.writer(buffer, lineterminator="\n")
    writer.writerow(HEADER)
    for row in _sorted(decisions)[list(HEADER)].itertuples(index=False):
        writer.writerow(row)
    return buffer.getvalue().encode("utf-8")


def save(decisions, path) -> Path:
    """Write ``decisions`` to ``path`` atomically (temporary file + rename)."""
    from .manifest import atomic_path

    data = to_csv_bytes(decisions)
    path = Path(path)
    with atomic_path(path) as tmp:
        Path(tmp).write_bytes(data)
    return path


def key_of(path: str, action: str, value: str) -> tuple:
    """The identity of a decision: a file has one drop and one relabel at most, any number of
    keeps (one per code) and pairs."""
    if action == "relabel" or action == "drop":
        return (path, action)
    if action in PAIR_ACTIONS:
        return (action, *sorted((path, value)))
    return (path, action, value)


def put(decisions, row: dict, *, remove: bool = False):
    """``decisions`` with ``row`` (``path, action, value, note``) set, replacing the decision of
    the same :func:`key_of`, or with that decision removed when ``remove``.

    Returns
    -------
    (DataFrame, dict or None)
        The new table (validated) and the decision it replaced or removed, if any.
    """
    import pandas as pd

    cells = {c: str(row.get(c, "") or "").strip() for c in HEADER}
    key = key_of(cells["path"], cells["action"], cells["value"])
    keys = [key_of(p, a, v) for p, a, v in zip(decisions["path"], decisions["action"], decisions["value"])]
    same = pd.Series([k == key for k in keys], index=decisions.index, dtype=bool)
    previous = decisions.loc[same, list(HEADER)].to_dict("records")
    kept = decisions.loc[~same, list(HEADER)]
    if not remove:
        kept = pd.concat([kept, pd.DataFrame([cells])], ignore_index=True)
    table = parse(to_csv_bytes(kept.assign(line=0)), name="the decision")
    return table, (previous[-1] if previous else None)
