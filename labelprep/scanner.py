"""The scan stage: walk a folder, label every file by its layout, probe it, build the manifest.

The walk is sorted and never follows symbolic links; junk (hidden names and a few system files,
see :data:`JUNK_NAMES`) is skipped and counted, never dropped silently.

Rescans are incremental. A file whose path, size and modification time match a row of an earlier
manifest (``previous``) or of the scan journal is not decoded again. The journal is an append-only
file of JSON lines beside the manifest, one per probed file, flushed to disk in batches while the
scan runs: when a scan is killed, the next one resumes from what the journal holds. A line torn by
the crash fails to parse and is ignored. The caller deletes the journal once the manifest is
safely written (the manifest is then the cache).
"""

from __future__ import annotations

import contextlib
import functools
import json
import os
import posixpath
import time
from pathlib import Path
from typing import NamedTuple

from . import layout as layout_mod, sources
from .errors import InputError, ParameterError
from .parallel import map_ordered, resolve_jobs
from .probe import DEFAULT_MAX_PIXELS, blank_facts, preload, probe
from .progress import resolve

# names skipped unless include_hidden: anything starting with "." plus these system files/folders
JUNK_NAMES = frozenset({"Thumbs.db", "desktop.ini", "__MACOSX", "$RECYCLE.BIN", "System Volume Information"})
# facts a rescan may reuse from an earlier manifest when path, size and mtime are unchanged
FACTS = tuple(blank_facts())
JOURNAL_SUFFIX = ".scan-journal"
_JOURNAL_TAG = "labelprep-scan-journal/1"
# journal lines are written to disk every this many rows or seconds, whichever comes first: a
# crash loses at most that much work, and the cost of fsync stays far below that of decoding
_FLUSH_ROWS = 256
_FLUSH_SECONDS = 2.0
# probed rows are turned into a DataFrame piece this many at a time, so that a million-file scan
# holds compact columns rather than a million dicts
_PIECE_ROWS = 4096


def is_junk(name: str) -> bool:
    """True for a hidden or system file name the scanner skips by default."""
    return name.startswith(".") or name in JUNK_NAMES


def journal_path(manifest_path) -> Path:
    """Where the scan journal of ``manifest_path`` lives: beside it, same name plus a suffix.

    Examples
    --------
    >>> journal_path("out/manifest.csv").name
    'manifest.csv.scan-journal'
    """
    manifest_path = Path(manifest_path)
    return manifest_path.with_name(manifest_path.name + JOURNAL_SUFFIX)


class Listing(NamedTuple):
    """What :func:`walk` found below one root, every path POSIX and relative to it, sorted.

    ``files`` are the regular files and archive members to probe; ``links`` symbolic links (never
    followed); ``misnamed`` names that are not UTF-8, with ``\\xNN`` escapes (not read: no manifest
    format holds such a name exactly, and pandas' string columns refuse it); ``skipped`` junk names
    left out; ``refused`` ``{path: reason}`` for archive members refused unread and archives that
    cannot be read; ``members`` ``{path: sources.Member}`` for the members among ``files``;
    ``inside`` ``{path: archive path}`` for every entry found inside an archive; ``excluded``
    the entries left out because the caller named them (labelprep's own outputs); ``empty`` the
    folders with nothing indexed below them (the outermost of them only).
    """

    files: list
    links: list
    misnamed: list
    skipped: list
    refused: dict
    members: dict
    inside: dict
    excluded: list = []
    empty: list = []


def walk(root, *, include_hidden: bool = False, exclude=frozenset()) -> Listing:
    """Every regular file below ``root`` (a folder or an archive), archives listed member by member.

    ``exclude`` holds relative POSIX paths of files and folders to leave out (a folder with
    everything below it). See :class:`Listing` for what comes back.
    """
    root = os.fspath(root)
    files, links, misnamed, skipped, excluded = [], [], [], [], []
    refused, members, inside = {}, {}, {}
    folders, filled = [], {""}
    if os.path.isfile(root) and sources.is_archive(root):
        _expand(root, "", files, misnamed, skipped, refused, members, inside, include_hidden)
        return Listing(sorted(files), [], sorted(misnamed), sorted(skipped), refused, members, inside)
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
        before = len(files) + len(links) + len(misnamed) + len(refused)
        for entry in entries:
            rel = f"{rel_dir}/{entry.name}" if rel_dir else entry.name
            if rel in exclude:
                excluded.append(rel)
            elif not include_hidden and is_junk(entry.name):
                skipped.append(rel)
            elif not _is_utf8(entry.name):
                misnamed.append(_escaped(rel))
            elif entry.is_symlink():
                links.append(rel)
            elif entry.is_dir(follow_symlinks=False):
                subdirs.append(rel)
            elif sources.is_archive(entry.name):
                _expand(entry.path, rel, files, misnamed, skipped, refused, members, inside, include_hidden)
            else:
                files.append(rel)
        folders += subdirs
        if len(files) + len(links) + len(misnamed) + len(refused) > before:
            folder = rel_dir
            while folder not in filled:  # mark the folder and its parents as holding something
                filled.add(folder)
                folder = posixpath.dirname(folder)
        stack.extend(reversed(subdirs))
    empty = [d for d in folders if d not in filled and posixpath.dirname(d) in filled]
    return Listing(sorted(files), sorted(links), sorted(misnamed), sorted(skipped), refused, members,
                   inside, sorted(excluded), sorted(empty))


def _expand(path: str, rel: str, files, misnamed, skipped, refused, members, inside, include_hidden) -> None:
    """Add the members of the archive at ``path`` (``rel`` below the root, ``""`` when it is the root)."""
    junk = (lambda name: False) if include_hidden else is_junk
    found = sources.list_archive(path, is_junk=junk, escape=_escaped)
    prefix = f"{rel}/" if rel else ""
    for name, member in found.members.items():
        files.append(prefix + name)
        members[prefix + name] = member
        inside[prefix + name] = rel
    for name, why in found.refused.items():
        refused[prefix + name] = why
        inside[prefix + name] = rel
    misnamed.extend(prefix + name for name in found.misnamed)
    skipped.extend(prefix + name for name in found.skipped)
    if found.error:
        refused[rel or os.path.basename(path)] = found.error


def _is_utf8(name: str) -> bool:
    try:
        name.encode("utf-8")  # undecodable bytes arrive as lone surrogates (PEP 383)
    except UnicodeEncodeError:
        return False
    return True


def _escaped(text: str) -> str:
    """``text`` with the bytes that are not UTF-8 written as ``\\xNN``: valid text everywhere."""
    return os.fsencode(text).decode("utf-8", errors="backslashreplace")


def scan(root, *, layout: str = "auto", labels=None, group_pattern=None, group_by_source: bool = False,
         include_hidden: bool = False, jobs=None, max_pixels: int = DEFAULT_MAX_PIXELS,
         previous=None, journal=None, progress=None, cluster=None, exclude=(),
         return_facts: bool = False):
    """Index every file below ``root`` into a new manifest, in memory.

    :func:`scan_to` scans into a manifest file instead, reusing that file's rows on a rescan and
    resuming an interrupted scan.

    Parameters
    ----------
    root : path-like or list of path-like
        The folder to scan, an archive, or several of them: each is then a source, its paths
        prefixed with the source's name, which the ``source`` column holds (see
        :mod:`labelprep.sources`). Archives below a root are read member by member, in place.
    layout : {"auto", "folders", "split-folders", "table"}
        Where labels come from (see :mod:`labelprep.layout`); ``auto`` detects it for each root.
    labels : path-like, list or dict, optional
        A label table (``path,label[,group]``, paths relative to the root) for a single root; with
        several roots ``NAME=TABLE`` items or ``{NAME: TABLE}``, NAME a source name or the root as
        given (:func:`labelprep.sources.label_tables`).
    group_pattern : str, optional
        Regular expression whose first capture group in each path is the row's group.
    group_by_source : bool
        A row without a group of its own gets its source as group, so no source spans two splits.
    include_hidden : bool
        Index hidden and system files too.
    jobs : int, optional
        Worker processes (None or 0: every core).
    cluster : str, optional
        Address of a Dask scheduler: the files are decoded on its workers (see
        :func:`labelprep.parallel.map_ordered`), which must see ``root`` at the same absolute path.
    max_pixels : int
        Pixel budget per image; larger images are not decoded.
    previous : DataFrame, optional
        An earlier manifest of the same roots made with the same ``max_pixels`` (see
        :func:`previous_manifest`): rows whose path, size and mtime are unchanged are reused
        instead of probed again (for an archive member: its size and the archive's mtime). Rows
        lacking any fact column are probed again.
    journal : path-like, optional
        Scan journal file (see :func:`journal_path`): rows it holds from an interrupted scan of the
        same roots and options are reused like ``previous`` rows, and every file probed now is
        appended to it. The caller removes it once the manifest is written.
    progress : callable, optional
        See :mod:`labelprep.progress`; called around the comparison with earlier rows (label
        ``"rescan"``, when there are any) and around the files that are decoded (``"scan files"``).
    exclude : sequence of path-like
        Files and folders to leave out where they lie inside a root: the caller's outputs (an
        output folder, a manifest and its companions, see :func:`own_files`). The journal and
        the label tables are always left out.
    return_facts : bool, default False
        Also return what the scan did, as scikit-learn's loaders return ``(X, y)`` on request.

    Returns
    -------
    DataFrame, or (DataFrame, dict) with ``return_facts``
        One row per file, sorted by path; the dict holds counts (probed, reused, skipped junk,
        links, misnamed, refused), the layout of each root, ``excluded`` (paths left out as
        labelprep's own files) and ``empty_folders`` (folders with nothing indexed below them).

    Examples
    --------
    >>> m = scan("photos/", jobs=1)               # doctest: +SKIP
    >>> m[["path", "label", "format", "width", "height"]].head()  # doctest: +SKIP
    >>> both = scan(["old/", "new/"], labels={"new": "new/labels.csv"}, jobs=1)  # doctest: +SKIP
    """
    import pandas as pd

    from . import manifest

    named = sources.name_roots(root)
    tables = sources.label_tables(labels, named)
    if not isinstance(max_pixels, int) or isinstance(max_pixels, bool) or max_pixels <= 0:
        raise ParameterError(f"max_pixels must be a positive int; got max_pixels={max_pixels!r}")
    files, links, misnamed, refused, skipped, layouts, order = [], [], [], {}, [], {}, []
    members, bases, columns = {}, {}, {"label": [], "group": [], "given_split": [], "source": []}
    own = [*exclude, *tables.values(), *([journal] if journal is not None else [])]
    excluded, empty = [], []
    for name, root_path in named:
        found = walk(root_path, include_hidden=include_hidden, exclude=_inside(root_path, own))
        prefix = f"{name}/" if name else ""
        excluded += [prefix + rel for rel in found.excluded]
        empty += [prefix + rel for rel in found.empty]
        entries = found.files + found.links + found.misnamed + list(found.refused)
        order += [prefix + rel for rel in entries]
        # labels come from the folders around and inside an archive; its own name is no class
        folders = [_without_archive(rel, found.inside.get(rel)) for rel in entries]
        table = tables.get(name)
        chosen = layout if layout != "auto" else layout_mod.detect(folders[:len(found.files)], labels_table=table)
        layouts[name] = chosen
        assigned = layout_mod.assign(entries, chosen, root=root_path, labels_table=table,
                                     group_pattern=group_pattern, folders=folders)
        for key in ("label", "group", "given_split"):
            columns[key] += assigned[key]
        columns["source"] += [name or root_path.resolve().name] * len(entries)
        # a worker on another machine has another working folder: send it absolute paths
        bases[name] = os.fspath(root_path.resolve() if cluster is not None else root_path)
        members.update({prefix + rel: member for rel, member in found.members.items()})
        files += [prefix + rel for rel in found.files]
        links += [(prefix + rel, root_path / rel) for rel in found.links]
        misnamed += [prefix + rel for rel in found.misnamed]
        refused.update({prefix + rel: why for rel, why in found.refused.items()})
        skipped += [prefix + rel for rel in found.skipped]

    header = {"journal": _JOURNAL_TAG, **sources.describe(named), "max_pixels": max_pixels,
              "version": _version(), "facts": list(FACTS)}
    logged = _read_journal(journal, header) if journal is not None else []
    known = _known_facts(previous, logged)
    where = functools.partial(_location, members, bases)
    reused, todo = _split_unchanged(where, files, known, resolve(progress))

    pieces = [reused]
    if todo and cluster is None:
        preload()  # before the pool forks, so that workers do not each import Pillow and scipy
    work = functools.partial(sources.probe_unit, max_pixels=max_pixels, probe=probe)
    tasks = sources.tasks(where(rel) for rel in todo)
    # isolated: even one job probes in a worker process, where the per-file time limit may arm
    # SIGALRM without touching the caller's signal handling
    results = map_ordered(work, tasks, jobs=jobs, chunksize=_chunksize(len(todo), jobs), cluster=cluster,
                          isolated=bool(todo))
    facts_each = (facts for task_facts in results for facts in task_facts)
    # zip stops on ``todo`` and leaves ``results`` suspended: close it here, not when it is
    # collected, so that a signal arriving while the pool shuts down is raised, not swallowed
    with contextlib.closing(results), _JournalWriter(journal, header, fresh=not logged) as log:
        batch = []
        for rel, facts in zip(todo, resolve(progress)(facts_each, total=len(todo), label="scan files")):
            row = {"path": rel, **facts}
            log.append(row)
            batch.append(row)
            if len(batch) == _PIECE_ROWS:
                pieces.append(_piece(batch))
                batch = []
        pieces.append(_piece(batch))
    pieces.append(_piece([{"path": rel, **blank_facts(), "fault": "symlink",
                           "fault_detail": f"symbolic link to {_escaped(_readlink(target))}; not followed"}
                          for rel, target in links]))
    pieces.append(_piece([{"path": rel, **blank_facts(), "fault": "bad-name",
                           "fault_detail": "name is not valid UTF-8 (shown with \\x escapes); not read"}
                          for rel in misnamed]))
    pieces.append(_piece([{"path": rel, **blank_facts(), "fault": "unsafe-member", "fault_detail": why}
                          for rel, why in refused.items()]))

    df = pd.concat([p for p in pieces if len(p)] or [_piece([])], ignore_index=True)
    df = df.set_index("path").reindex(order).reset_index()
    for key in ("label", "group", "given_split"):
        df[key] = columns[key]
    if group_by_source:
        df["group"] = df["group"].where(df["group"] != "", pd.Series(columns["source"], index=df.index))
    if len(named) > 1:
        df["source"] = columns["source"]
    df["issues"] = ""
    df = manifest.coerce(df).sort_values("path", kind="stable").reset_index(drop=True)
    chosen = layouts[named[0][0]] if len(named) == 1 else layouts
    facts = {"layout": chosen, "probed": len(todo), "reused": len(files) - len(todo),
                        "links": len(links), "misnamed": len(misnamed), "refused": len(refused),
                        "skipped_junk": len(skipped), "skipped_examples": skipped[:5],
                        "excluded": excluded, "empty_folders": empty}
    return (df, facts) if return_facts else df


def own_files(manifest_path) -> list:
    """The files labelprep writes for manifest ``manifest_path``: itself, its sidecar, its scan
    cache, its journal and the ledger of outputs in its folder (what a scan of a root holding
    them must not index)."""
    from .manifest import LEDGER_NAME, cache_path, sidecar_path

    path = Path(manifest_path)
    return [path, sidecar_path(path), cache_path(path), journal_path(path), path.parent / LEDGER_NAME]


def _inside(root, paths) -> frozenset:
    """``paths`` that lie inside folder ``root``, as POSIX paths relative to it."""
    if not os.path.isdir(root):
        return frozenset()
    base = os.path.realpath(root)
    found = set()
    for path in paths:
        full = os.path.realpath(os.fspath(path))
        if full != base and full.startswith(base.rstrip(os.sep) + os.sep):
            found.add(Path(os.path.relpath(full, base)).as_posix())
    return frozenset(found)


def _location(members: dict, bases: dict, rel: str):
    """Where manifest path ``rel`` is read from: its :class:`sources.Member`, or the file's path
    (joined when asked for, so that a million-file scan holds no second copy of every path)."""
    member = members.get(rel)
    if member is not None:
        return member
    if "" in bases:  # one root: paths are relative to it
        return os.path.join(bases[""], rel)
    name, inner = rel.split("/", 1)
    return os.path.join(bases[name], inner)


def _without_archive(rel: str, archive) -> str:
    """``rel`` with the archive's own name left out (``things/more.zip/a.jpg`` -> ``things/a.jpg``),
    for the layout: the folders around and inside the archive give the label."""
    if archive is None:
        return rel
    inner = rel[len(archive) + 1:] if archive else rel
    folder = posixpath.dirname(archive)
    return f"{folder}/{inner}" if folder else inner


def _chunksize(n: int, jobs) -> int:
    """Files per task: up to 16 to amortise the round trip to a worker (about a millisecond), but
    few enough that every worker gets 32 tasks or more: at the end of a scan one worker may still
    be busy with its last task while the others idle, so a task must be a small share of the run."""
    return max(1, min(16, n // (32 * resolve_jobs(jobs))))


def scan_to(root, output, *, partitions=None, force: bool = False, progress=None, **options):
    """Scan ``root`` into the manifest file ``output``: what ``labelprep scan`` does.

    A manifest already at ``output`` (of the same roots, budget and version) is the rescan cache:
    only new and changed files are decoded. The journal beside ``output`` makes an interrupted
    scan resume where it stopped; it is removed once the manifest is written. The sidecar
    records the roots, the options and what the scan did. ``output`` and the files beside it
    (:func:`own_files`) are not indexed when they lie inside a root.

    Parameters
    ----------
    root : path-like or list of path-like
        As for :func:`scan`.
    output : path-like
        The manifest to write (``.csv``, or ``.parquet`` with pyarrow).
    partitions : int, optional
        Write ``output`` (a ``.parquet`` name) as a folder of this many part files.
    force : bool, default False
        Replace an ``output`` that labelprep did not write.
    progress : callable, optional
        As for :func:`scan`.
    **options
        The scan options of :data:`labelprep.options.SPEC` (``layout``, ``labels``, ``jobs``,
        ...); one left out takes its default, an unknown one raises ``TypeError``.

    Returns
    -------
    (DataFrame, dict)
        The manifest written and what the scan did (see :func:`scan`'s ``return_facts``).

    Examples
    --------
    >>> m, facts = scan_to("photos/", "manifest.csv", jobs=1)   # doctest: +SKIP
    >>> m, facts = scan_to("photos/", "manifest.csv", jobs=1)   # doctest: +SKIP
    >>> facts["probed"], facts["reused"]                        # doctest: +SKIP
    (0, 1204)
    """
    from . import manifest, options as spec

    chosen = spec.resolve(options, "scan")
    manifest.guard_output(output, force=force)
    if partitions is not None:
        manifest.check_partitions(partitions, output)
    with resuming(output, root=root, max_pixels=chosen["max_pixels"]) as (previous, journal):
        df, facts = scan(root, previous=previous, journal=journal, progress=progress, return_facts=True,
                         exclude=own_files(output), **spec.for_stage("scan", chosen))
        meta = {**sources.describe(sources.name_roots(root)),
                **spec.sidecar("scan", spec.record(chosen, "scan"), result=facts)}
        manifest.write(df, output, meta=meta, force=True, partitions=partitions, new_sidecar=True)
    return df, facts


@contextlib.contextmanager
def resuming(output, *, root, max_pixels: int = DEFAULT_MAX_PIXELS):
    """The rescan cache and the journal of a scan whose manifest goes to ``output``.

    Yields ``(previous, journal)`` for :func:`scan`: the reusable earlier manifest at ``output``
    (see :func:`previous_manifest`) and the journal path. When the block ends normally (the
    manifest is written by then) the journal is removed; when it raises (an interrupt, a full
    disk) the journal stays, so that the next scan resumes from it.

    Examples
    --------
    >>> with resuming("out/manifest.csv", root="photos/") as (previous, journal):  # doctest: +SKIP
    ...     m = scan("photos/", previous=previous, journal=journal)
    ...     write(m, "out/manifest.csv")
    """
    journal = journal_path(output)
    yield previous_manifest(output, root=root, max_pixels=max_pixels), journal
    journal.unlink(missing_ok=True)  # the manifest now holds every row the journal held


def previous_manifest(path, *, root, max_pixels: int = DEFAULT_MAX_PIXELS):
    """The manifest at ``path`` if a rescan of ``root`` (one root or several) may reuse its rows,
    else None.

    Rows may be reused only when the manifest's sidecar says it was made from the same roots,
    with the same pixel budget and the same labelprep version (a newer probe may compute facts
    differently). A missing or unreadable manifest gives None.
    """
    from . import manifest
    from .errors import LabelprepError

    path = Path(path)
    if not path.is_file() and not manifest.part_files(path):
        return None
    meta = manifest.read_sidecar(path)
    stages = meta.get("stages", {})
    budgets = {stages.get(name, {}).get("options", {}).get("max_pixels") for name in ("scan", "prepare")}
    same_roots = all(meta.get(key) == value for key, value in sources.describe(sources.name_roots(root)).items())
    if not same_roots or meta.get("version") != _version() or max_pixels not in budgets:
        return None
    try:
        return manifest.read(path)
    except LabelprepError:
        return None


def _version() -> str:
    from . import __version__

    return __version__


def _piece(rows: list):
    """Probed rows as a DataFrame with manifest dtypes (compact columns instead of dicts)."""
    import pandas as pd

    from . import manifest

    return manifest.coerce(pd.DataFrame(rows, columns=["path", *FACTS]))


def _known_facts(previous, logged: list):
    """Facts that may be reused, indexed by path: journal rows win over ``previous`` (newer)."""
    import pandas as pd

    frames = []
    if previous is not None and len(previous) and all(c in previous.columns for c in FACTS):
        frames.append(previous[["path", *FACTS]])
    if logged:
        frames.append(_piece(logged))
    if not frames:
        return None
    known = pd.concat(frames, ignore_index=True).drop_duplicates("path", keep="last")
    # a row without a digest was never read; "unreadable" may be a passing I/O error: retry both
    usable = (known["sha256"] != "") & (known["fault"] != "unreadable")
    return known[usable].set_index("path")


def _split_unchanged(where, files: list, known, progress):
    """``(reused rows, paths to probe)``: a row is reused when the file's size and mtime match (for
    an archive member, the size the archive declares and the archive's mtime)."""
    if known is None or not len(known):
        return _piece([]), list(files)
    size = known["bytes"].to_dict()
    mtime = known["mtime_ns"].to_dict()
    unchanged, todo = [], []
    for rel in progress(files, total=len(files), label="rescan"):
        if rel in size and _stat_matches(where(rel), size[rel], mtime[rel]):
            unchanged.append(rel)
        else:
            todo.append(rel)
    return known.loc[unchanged].reset_index(), todo


def _stat_matches(location, size, mtime_ns) -> bool:
    if isinstance(location, sources.Member):
        return location.size == size and location.mtime_ns == mtime_ns
    try:
        st = os.stat(location, follow_symlinks=False)
    except OSError:
        return False
    return st.st_size == size and st.st_mtime_ns == mtime_ns


def _read_journal(path, header: dict) -> list:
    """Rows of a journal written for the same ``header``; unparsable (torn) lines are skipped."""
    try:
        with open(path, "rb") as fh:
            lines = fh.read().split(b"\n")
    except OSError:
        return []
    try:
        if json.loads(lines[0]) != header:
            return []  # another root, budget or version: its facts may not hold now
    except ValueError:
        return []
    rows = []
    for line in lines[1:]:
        try:
            row = json.loads(line)
        except ValueError:
            continue  # a line torn by a crash mid-write
        if isinstance(row, dict) and row.keys() == {"path", *FACTS}:
            rows.append(row)
    return rows


class _JournalWriter:
    """Appends probed rows to the journal, flushed and fsynced in batches; a no-op without a path."""

    def __init__(self, path, header: dict, *, fresh: bool):
        self._path, self._header, self._fresh = path, header, fresh
        self._fh = None
        self._lines: list = []
        self._flushed = time.monotonic()

    def __enter__(self):
        if self._path is None:
            return self
        try:
            self._fh = open(self._path, "wb" if self._fresh else "ab")
        except OSError as exc:
            raise InputError(f"cannot write scan journal {self._path}: {exc.strerror}") from exc
        if self._fresh:
            self._lines.append(json.dumps(self._header))
        elif self._fh.tell() and not _ends_with_newline(self._path):
            self._lines.append("")  # end a torn last line, so the next row starts on its own line
        return self

    def append(self, row: dict) -> None:
        if self._fh is None:
            return
        self._lines.append(json.dumps(row))
        if len(self._lines) >= _FLUSH_ROWS or time.monotonic() - self._flushed >= _FLUSH_SECONDS:
            self._flush()

    def _flush(self) -> None:
        if self._lines:
            try:
                self._fh.write(("\n".join(self._lines) + "\n").encode("utf-8", errors="surrogateescape"))
                self._fh.flush()
                os.fsync(self._fh.fileno())
            except OSError as exc:  # a full disk: a torn last line is skipped by the next reader
                raise InputError(f"cannot write scan journal {self._path}: {exc.strerror or exc}") from exc
            self._lines = []
        self._flushed = time.monotonic()

    def __exit__(self, *exc_info):
        if self._fh is not None:
            try:
                self._flush()  # also on an interrupt: what was probed is kept
            finally:
                self._fh.close()
        return False


def _ends_with_newline(path) -> bool:
    with open(path, "rb") as fh:
        fh.seek(-1, os.SEEK_END)
        return fh.read(1) == b"\n"


def _readlink(path: Path) -> str:
    try:
        return os.readlink(path)
    except OSError:
        return "?"
