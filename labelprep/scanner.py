"""The scan stage: walk a folder, label every file by its layout, probe it, build the manifest.

The walk is sorted and never follows symbolic links; junk (hidden names and a few system files,
see :data:`JUNK_NAMES`) is skipped and counted, never dropped silently.
"""

from __future__ import annotations

import functools
import os
from pathlib import Path

from . import layout as layout_mod
from .errors import InputError
from .parallel import map_ordered
from .probe import DEFAULT_MAX_PIXELS, blank_facts, probe
from .progress import resolve

# names skipped unless include_hidden: anything starting with "." plus these system files/folders
JUNK_NAMES = frozenset({"Thumbs.db", "desktop.ini", "__MACOSX", "$RECYCLE.BIN", "System Volume Information"})
# facts a rescan may reuse from an earlier manifest when path, size and mtime are unchanged
_REUSED = tuple(blank_facts())


def is_junk(name: str) -> bool:
    """True for a hidden or system file name the scanner skips by default."""
    return name.startswith(".") or name in JUNK_NAMES


def walk(root, *, include_hidden: bool = False):
    """Every regular file below ``root``: ``(files, links, skipped)``, all sorted POSIX paths.

    ``links`` are symbolic links (never followed); ``skipped`` are junk names left out.
    """
    root = os.fspath(root)
    files, links, skipped = [], [], []
    stack = [""]
    while stack:
        rel_dir = stack.pop()
        try:
            with os.scandir(os.path.join(root, rel_dir) if rel_dir else root) as it:
                entries = sorted(it, key=lambda e: e.name)
        except OSError as exc:
            if not rel_dir:
                raise InputError(f"cannot read folder {root}: {exc.strerror}") from exc
            files.append(rel_dir)  # probed later, where the unreadable folder becomes a row
            continue
        subdirs = []
        for entry in entries:
            rel = f"{rel_dir}/{entry.name}" if rel_dir else entry.name
            if not include_hidden and is_junk(entry.name):
                skipped.append(rel)
            elif entry.is_symlink():
                links.append(rel)
            elif entry.is_dir(follow_symlinks=False):
                subdirs.append(rel)
            else:
                files.append(rel)
        stack.extend(reversed(subdirs))
    return sorted(files), sorted(links), sorted(skipped)


def scan(root, *, layout: str = "auto", labels=None, group_pattern=None,
         include_hidden: bool = False, jobs=None, max_pixels: int = DEFAULT_MAX_PIXELS,
         previous=None, progress=None):
    """Index every file below ``root`` into a new manifest.

    Parameters
    ----------
    root : path-like
        The folder to scan.
    layout : {"auto", "folders", "split-folders", "table"}
        Where labels come from (see :mod:`labelprep.layout`); ``auto`` detects it.
    labels : path-like, optional
        A label table CSV (``path,label[,group]``), relative paths below ``root``.
    group_pattern : str, optional
        Regular expression whose first capture group in each path is the row's group.
    include_hidden : bool
        Index hidden and system files too.
    jobs : int, optional
        Worker processes (None: every core).
    max_pixels : int
        Pixel budget per image; larger images are not decoded.
    previous : DataFrame, optional
        An earlier manifest of the same root: rows whose path, size and mtime are unchanged are
        reused instead of probed again.
    progress : callable, optional
        See :mod:`labelprep.progress`.

    Returns
    -------
    DataFrame
        One row per file, sorted by path. ``df.attrs["scan"]`` holds counts (probed, reused,
        skipped junk, links, layout).

    Examples
    --------
    >>> m = scan("photos/", jobs=1)               # doctest: +SKIP
    >>> m[["path", "label", "format", "width", "height"]].head()  # doctest: +SKIP
    """
    import pandas as pd

    from . import manifest

    root_path = Path(root)
    if not root_path.is_dir():
        raise InputError(f"{root} is not a folder")
    if not isinstance(max_pixels, int) or max_pixels <= 0:
        raise layout_mod.ParameterError(f"max_pixels must be a positive int; got max_pixels={max_pixels!r}")
    files, links, skipped = walk(root_path, include_hidden=include_hidden)
    chosen = layout if layout != "auto" else layout_mod.detect(files, labels_table=labels)
    assigned = layout_mod.assign(files + links, chosen, root=root_path, labels_table=labels,
                                 group_pattern=group_pattern)

    reusable = _reusable_rows(previous)
    facts: list = [None] * len(files)
    todo = []
    for i, rel in enumerate(files):
        old = reusable.get(rel)
        if old is not None and _unchanged(root_path / rel, old):
            facts[i] = old
        else:
            todo.append(i)
    work = functools.partial(probe, max_pixels=max_pixels)
    results = map_ordered(work, (os.path.join(root_path, files[i]) for i in todo), jobs=jobs)
    for i, result in zip(todo, resolve(progress)(results, total=len(todo), label="scan")):
        facts[i] = result
    for rel in links:
        facts.append({**blank_facts(), "fault": "symlink",
                      "fault_detail": f"symbolic link to {_readlink(root_path / rel)}; not followed"})

    df = pd.DataFrame(facts, columns=list(_REUSED))
    # object columns: names that are not UTF-8 arrive surrogate-escaped, which Arrow strings refuse
    df.insert(0, "path", pd.Series(files + links, dtype=object))
    for name in ("label", "group", "given_split"):
        df[name] = pd.Series(assigned[name], dtype=object)
    df["issues"] = ""
    df = manifest.coerce(df).sort_values("path", kind="stable").reset_index(drop=True)
    df.attrs["scan"] = {"layout": chosen, "probed": len(todo), "reused": len(files) - len(todo),
                        "links": len(links), "skipped_junk": len(skipped),
                        "skipped_examples": skipped[:5]}
    return df


def _reusable_rows(previous) -> dict:
    if previous is None or len(previous) == 0:
        return {}
    cols = [c for c in _REUSED if c in previous.columns]
    rows = previous[["path"] + cols].to_dict("records")
    return {r["path"]: {c: _plain(r.get(c)) for c in _REUSED} for r in rows
            if r.get("sha256") and not _plain(r.get("fault")) in ("unreadable",)}


def _plain(value):
    """A pandas scalar as a plain Python value (NA -> None)."""
    try:
        import pandas as pd

        if value is pd.NA or (isinstance(value, float) and value != value):
            return None
    except ImportError:
        pass
    return value.item() if hasattr(value, "item") else value


def _unchanged(path: Path, old: dict) -> bool:
    try:
        st = os.stat(path, follow_symlinks=False)
    except OSError:
        return False
    return st.st_size == old.get("bytes") and st.st_mtime_ns == old.get("mtime_ns")


def _readlink(path: Path) -> str:
    try:
        return os.readlink(path)
    except OSError:
        return "?"
