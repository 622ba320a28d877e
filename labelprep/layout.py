"""Where labels, groups and existing splits come from: folder names or a label table.

Three layouts:

``folders``
    ``ROOT/<label>/.../file``: the first folder below the root is the label.
``split-folders``
    ``ROOT/<train|val|test>/<label>/.../file``: the existing split goes to ``given_split`` (kept for
    auditing), the next folder is the label.
``table``
    a CSV with columns ``path,label`` and optionally ``group``; paths are relative to ROOT.

A label table may go with split folders: the table gives the labels, ``ROOT/<train|val|test>/``
the given split (``--layout split-folders --labels TABLE``, or ``auto`` with a table on such a
tree).
"""

from __future__ import annotations

import csv
import io
import posixpath
import re
from pathlib import Path

from .errors import InputError, ParameterError

LAYOUTS = ("auto", "folders", "split-folders", "table")
# folder names read as a split, and the split they mean (common practice in public datasets)
SPLIT_FOLDERS = {"train": "train", "training": "train", "val": "val", "valid": "val",
                 "validation": "val", "dev": "val", "test": "test", "testing": "test"}
TABLE_COLUMNS = ("path", "label", "group")


def detect(paths: list[str], *, labels_table=None) -> str:
    """The layout a list of relative paths follows.

    Split folders are chosen when every top-level folder is a split name; otherwise class folders.
    """
    if labels_table is not None:
        return "table"
    tops = {p.split("/", 1)[0] for p in paths if "/" in p}
    if tops and all(t.lower() in SPLIT_FOLDERS for t in tops):
        return "split-folders"
    return "folders"


def assign(paths: list[str], layout: str, *, root=None, labels_table=None, group_pattern=None,
           folders=None):
    """Columns ``label``, ``group`` and ``given_split`` for each relative path.

    Parameters
    ----------
    paths : list of str
        POSIX paths relative to the root, as the scanner found them.
    layout : {"auto", "folders", "split-folders", "table"}
    root : path-like, optional
        Needed with a label table, to report listed files that do not exist.
    labels_table : path-like, optional
        CSV with ``path,label[,group]``.
    group_pattern : str, optional
        Regular expression searched in each path; its first capture group (or the whole match)
        is the row's group. Table groups win where both are given.
    folders : list of str, optional
        Aligned with ``paths``: the paths the folder layouts read, where they differ (an archive
        member's path without the archive's own name, see :mod:`labelprep.sources`); a label
        table and the group pattern always see ``paths``.

    Returns
    -------
    dict of lists
        ``{"label": [...], "group": [...], "given_split": [...]}`` aligned with ``paths``.
    """
    if layout not in LAYOUTS:
        raise ParameterError(f"layout must be one of {', '.join(LAYOUTS)}; got layout={layout!r}")
    folders = paths if folders is None else folders
    if layout == "auto":
        layout = detect(folders, labels_table=labels_table)
    if layout == "table" and labels_table is None:
        raise ParameterError("layout='table' needs a label table (--labels TABLE.csv)")
    n = len(paths)
    label, group, given = [""] * n, [""] * n, [""] * n
    # a label table gives the labels; train/val/test folders still give the split, with or
    # without a table (ROOT/train/img1.jpg labelled by the table)
    splits_from_folders = layout == "split-folders" or (layout == "table" and detect(folders) == "split-folders")
    for i, p in enumerate(folders):
        parts = p.split("/")
        if splits_from_folders and len(parts) > 1 and parts[0].lower() in SPLIT_FOLDERS:
            given[i] = SPLIT_FOLDERS[parts[0].lower()]
            parts = parts[1:]
        if len(parts) > 1 and labels_table is None:
            label[i] = parts[0]
    if labels_table is not None:
        table = read_table(labels_table, root=root, known=set(paths))
        for i, p in enumerate(paths):
            label[i], group[i] = table.get(p, ("", ""))
    if group_pattern:
        regex = _compile(group_pattern)
        for i, p in enumerate(paths):
            if not group[i]:
                m = regex.search(p)
                if m:
                    group[i] = m.group(1) if regex.groups else m.group(0)
    return {"label": label, "group": group, "given_split": given}


def _compile(pattern: str):
    try:
        return re.compile(pattern)
    except re.error as exc:
        raise ParameterError(f"group pattern {pattern!r} is not a valid regular expression: {exc}") from exc


def read_table(path, *, root=None, known=None) -> dict[str, tuple[str, str]]:
    r"""Read a label table into ``{relative path: (label, group)}``.

    The table is CSV as any desktop writes it (UTF-8 with or without a byte-order mark, ``\n`` or
    ``\r\n`` line ends, ``,``, ``;`` or tab between fields, quoted fields holding the delimiter,
    ``\`` or ``/`` between folders) or Parquet (by the ``PAR1`` magic, Apache Parquet format
    specification). Every problem is an :class:`InputError` naming the table's line (a Parquet
    row counts as line 2 onwards, after the header): a missing column, an unknown column, an
    absolute path or one that escapes the root, a path listed twice, a listed file that is not
    under the root (when ``known``, the set of paths found there, is given), and a file that is
    no table at all (a spreadsheet workbook, UTF-16 text).

    Examples
    --------
    >>> read_table("labels.csv", known={"a.jpg"})   # doctest: +SKIP
    {'a.jpg': ('cat', '')}
    """
    path = Path(path)
    try:
        data = path.read_bytes()
    except OSError as exc:
        raise InputError(f"cannot read label table {path}: {exc.strerror}") from exc
    header, rows = _parquet_rows(path, data) if data[:4] == _PARQUET_MAGIC else _csv_rows(path, data)
    if not header:
        raise InputError(f"label table {path} is empty")
    header = [h.strip() for h in header]
    missing = [c for c in ("path", "label") if c not in header]
    if missing:
        raise InputError(f"label table {path} line 1: missing column(s) {', '.join(missing)}; "
                         f"expected path,label[,group]")
    unknown = [c for c in header if c not in TABLE_COLUMNS]
    if unknown:
        raise InputError(f"label table {path} line 1: unknown column(s) {', '.join(unknown)}; "
                         f"expected path,label[,group]")
    col = {name: header.index(name) for name in header}
    out: dict[str, tuple[str, str]] = {}
    for lineno, row in rows:
        if not any(cell.strip() for cell in row):
            continue
        if len(row) != len(header):
            raise InputError(f"label table {path} line {lineno}: {len(row)} fields, header has {len(header)}")
        rel = _safe_relative(row[col["path"]], path, lineno)
        if rel in out:
            raise InputError(f"label table {path} line {lineno}: {rel!r} is listed twice")
        if known is not None and rel not in known:
            where = f" under {root}" if root is not None else ""
            raise InputError(f"label table {path} line {lineno}: {rel!r} does not exist{where}")
        group = row[col["group"]].strip() if "group" in col else ""
        out[rel] = (row[col["label"]].strip(), group)
    return out


_PARQUET_MAGIC = b"PAR1"  # Apache Parquet file format: the 4-byte magic opens and closes the file
# what a file that is no text table starts with, and what to say (the magic numbers from memory)
_NOT_TEXT = [(b"PK\x03\x04", "a zip container such as an Excel or LibreOffice workbook; save it as CSV (UTF-8) or Parquet"),
             (b"\xd0\xcf\x11\xe0", "an old Office workbook; save it as CSV (UTF-8) or Parquet"),
             (b"\xff\xfe", "UTF-16 text; save the table as UTF-8"),
             (b"\xfe\xff", "UTF-16 text; save the table as UTF-8")]
_DELIMITERS = (",", ";", "\t")


def _csv_rows(path: Path, data: bytes):
    """``(header, rows)`` of a CSV table; rows yields ``(line number, fields)``."""
    for magic, what in _NOT_TEXT:
        if data.startswith(magic):
            raise InputError(f"label table {path} line 1: not a CSV table but {what}")
    try:
        text = data.decode("utf-8-sig")
    except UnicodeDecodeError as exc:
        lineno = data.count(b"\n", 0, exc.start) + 1
        raise InputError(f"label table {path} line {lineno}: not UTF-8 text (byte {exc.start} is "
                         f"0x{data[exc.start]:02x}); save the table as UTF-8") from exc
    if "\x00" in text:
        lineno = text.count("\n", 0, text.index("\x00")) + 1
        raise InputError(f"label table {path} line {lineno}: holds a NUL character; not a text table")
    # the delimiter is the one that makes the header name both needed columns: a spreadsheet
    # set to a decimal comma writes ";" between fields
    first = text.split("\n", 1)[0]
    delimiter = next((d for d in _DELIMITERS
                      if {"path", "label"} <= {h.strip() for h in next(csv.reader([first], delimiter=d), [])}), ",")
    reader = csv.reader(io.StringIO(text, newline=""), delimiter=delimiter, strict=True)
    try:
        header = next(reader, None)
    except csv.Error as exc:
        raise InputError(f"label table {path} line {reader.line_num}: {exc}") from exc
    return header, _numbered(reader, path)


def _numbered(reader, path: Path):
    start = reader.line_num + 1
    try:
        for row in reader:
            yield start, row
            start = reader.line_num + 1
    except csv.Error as exc:  # named by the line its record starts on: where a stray quote is
        raise InputError(f"label table {path} line {start}: {exc}") from exc


def _parquet_rows(path: Path, data: bytes):
    """``(header, rows)`` of a Parquet table, every cell as text (empty for a missing value)."""
    try:
        import pyarrow.parquet as pq
    except ImportError as exc:
        raise InputError(f"reading the Parquet label table {path} needs pyarrow: "
                         "pip install 'labelprep[parquet]'") from exc
    try:
        table = pq.read_table(io.BytesIO(data))
    except Exception as exc:  # pyarrow raises its own ArrowInvalid and OSError for a damaged file
        raise InputError(f"label table {path} line 1: not a readable Parquet file ({exc})") from exc
    header = table.column_names
    columns = [["" if v is None else str(v) for v in table.column(name).to_pylist()] for name in header]
    return header, ((k + 2, list(cells)) for k, cells in enumerate(zip(*columns)))


def _safe_relative(raw: str, table, lineno: int) -> str:
    p = raw.strip().replace("\\", "/")
    if not p:
        raise InputError(f"label table {table} line {lineno}: empty path")
    if p.startswith("/") or re.match(r"^[A-Za-z]:/", p):
        raise InputError(f"label table {table} line {lineno}: {raw!r} is absolute; paths must be relative to the root")
    norm = posixpath.normpath(p)
    if norm == ".." or norm.startswith("../"):
        raise InputError(f"label table {table} line {lineno}: {raw!r} escapes the root")
    return norm
