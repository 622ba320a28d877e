"""Input sources: several roots in one run, and archives read in place.

**Several roots.** ``scan``/``prepare`` accept several roots. Each becomes a *source* named after
its folder (or archive) name, made unique in argument order by ``-2``, ``-3``, ... (:func:`name_roots`);
a manifest path is then ``<source>/<path inside it>`` and the ``source`` column names it. With one
root nothing changes: paths are relative to it and there is no ``source`` column.

**Archives.** A ``.zip``, ``.tar``, ``.tar.gz`` or ``.tgz`` file under a root (or given as a root)
stands for the files inside it: a member's manifest path is the archive's path followed by the
member's name (``things/more.zip/rocket.jpg``). Nothing is extracted to disk; members are read
into memory one at a time, as a file would be. A member is refused unread, as a row with fault
``unsafe-member`` and the reason, when its name is absolute or climbs out with ``..``, when it is a
link or a device, when its declared size exceeds :data:`labelprep.defaults.MEMBER_BYTES`, or when
its compression ratio exceeds :data:`labelprep.defaults.MAX_RATIO` (and it is over
:data:`labelprep.defaults.RATIO_GRACE`). A gzip-compressed tar gives no member its own compressed
size, so there the whole stream is bounded instead: the listing stops after decompressing
``MAX_RATIO`` times the archive's size. Archives inside archives are members like any other file
(they are not images, so ``not-image``).

:func:`list_archive` lists one archive (called by :func:`labelprep.scanner.walk`, the only
lister); :func:`probe_unit` is the per-task work of the scan; :func:`locate` and :func:`read_bytes`
find a manifest path's bytes again for the report and the export.
"""

from __future__ import annotations

import contextlib
import gzip
import os
import stat
import tarfile
import zipfile
from dataclasses import dataclass, field
from pathlib import Path, PurePosixPath

from . import defaults
from .errors import InputError, ParameterError

ARCHIVE_SUFFIXES = (".zip", ".tar", ".tar.gz", ".tgz")
# members per scan task for archives with random access (zip, plain tar): each task opens the
# archive once; a gzip-compressed tar is one task, read front to back once
_MEMBERS_PER_TASK = 32


def is_archive(name: str) -> bool:
    """True for a file name labelprep reads as an archive (by its suffix, case ignored).

    Examples
    --------
    >>> is_archive("shots/More.ZIP"), is_archive("a.tar.gz"), is_archive("a.gz")
    (True, True, False)
    """
    return name.lower().endswith(ARCHIVE_SUFFIXES)


def _kind(name: str) -> str:
    low = name.lower()
    return "zip" if low.endswith(".zip") else "tar" if low.endswith(".tar") else "tgz"


@dataclass(frozen=True)
class Member:
    """Where one archive member is: the archive on disk, its kind, the name inside, its size, the
    archive's modification time (a rescan reuses the row while both hold), and for tar members
    the offset of its data."""

    archive: str
    kind: str
    name: str
    size: int
    mtime_ns: int
    offset: int = 0


@dataclass
class ArchiveListing:
    """What :func:`list_archive` found: usable ``members`` by name, ``refused`` ``{name: reason}``,
    ``misnamed`` (not UTF-8, ``\\x`` escaped), ``skipped`` (junk names) and ``error`` (the archive
    itself cannot be read, or its listing was stopped)."""

    members: dict = field(default_factory=dict)
    refused: dict = field(default_factory=dict)
    misnamed: list = field(default_factory=list)
    skipped: list = field(default_factory=list)
    error: str = ""


def list_archive(path, *, is_junk, escape) -> ArchiveListing:
    """The members of the archive at ``path``, each judged safe to read or refused with a reason.

    ``is_junk(name)`` says which names to skip (hidden and system files), ``escape(name)`` writes
    a name that is not UTF-8 with ``\\x`` escapes. Never raises for the archive's content: a file
    that is no readable archive comes back with ``error`` set.

    Examples
    --------
    >>> found = list_archive("more.zip", is_junk=lambda n: n.startswith("."), escape=str)  # doctest: +SKIP
    >>> sorted(found.members), found.refused                                                # doctest: +SKIP
    (['rocket.jpg'], {'%2e%2e/evil.jpg': "a member name climbing out with '..' ('../evil.jpg'); not read"})
    """
    path = os.fspath(path)
    out = ArchiveListing()
    try:
        mtime_ns = os.stat(path).st_mtime_ns
        if _kind(path) == "zip":
            _list_zip(path, mtime_ns, out, is_junk, escape)
        else:
            _list_tar(path, mtime_ns, out, is_junk, escape)
    except (OSError, EOFError, zipfile.BadZipFile, tarfile.TarError, UnicodeError) as exc:
        what = "zip" if _kind(path) == "zip" else "tar"
        out.error = f"not a readable {what} archive ({_reason(exc)}); its members were not read"
    return out


def _reason(exc: BaseException) -> str:
    return getattr(exc, "strerror", None) or " ".join(str(exc).split()) or type(exc).__name__


def _list_zip(path: str, mtime_ns: int, out: ArchiveListing, is_junk, escape) -> None:
    with zipfile.ZipFile(path) as zf:
        for info in zf.infolist():
            name = info.filename
            # APPNOTE.TXT 4.4.2/4.4.15: the upper 16 bits of the external attributes hold the
            # Unix mode when the entry was made on Unix
            mode = info.external_attr >> 16
            if info.is_dir() or (mode and stat.S_ISDIR(mode)):
                continue
            why = _unsafe_name(name)
            if not why and stat.S_IFMT(mode) and not stat.S_ISREG(mode):
                why = "a link or special file inside the archive; not followed"
            if not why:
                why = _over_limits(info.file_size, info.compress_size)
            _add(out, name, why, lambda n=name, s=info.file_size: Member(path, "zip", n, s, mtime_ns),
                 is_junk, escape)


def _list_tar(path: str, mtime_ns: int, out: ArchiveListing, is_junk, escape) -> None:
    kind = _kind(path)
    with _tar_entries(path) as entries:
        for info, within in entries:
            if info.isdir():
                continue
            name = info.name
            why = _unsafe_name(name)
            if not why and (info.issym() or info.islnk()):
                why = f"a link to {escape(info.linkname)!r} inside the archive; not followed"
            elif not why and not info.isreg():
                why = "a device, pipe or other special entry; not a file"
            elif not why and info.size > defaults.MEMBER_BYTES:
                why = _over_limits(info.size, info.size)
            elif not why and not within:
                why = (f"the archive expands past {defaults.MAX_RATIO}x its size here (a compression "
                       f"bomb?); not read")
            _add(out, name, why, lambda n=name, i=info: Member(path, kind, n, i.size, mtime_ns, i.offset_data),
                 is_junk, escape)
            if not within:
                out.error = (f"expands past {defaults.MAX_RATIO}x its size (a compression bomb?); listing "
                             f"stopped at member {escape(name)!r}, the members after it were not read")
                return


@contextlib.contextmanager
def _tar_entries(path: str):
    """``(header, within)`` for each tar header of ``path`` in order. For a gzip-compressed tar,
    ``within`` turns False at the first member whose data ends past ``MAX_RATIO`` times the
    archive's size, and nothing follows it: the next header lies past that data, and skipping
    data means decompressing it."""
    limit = defaults.MAX_RATIO * os.path.getsize(path) + defaults.RATIO_GRACE
    with open(path, "rb") as raw:
        compressed = _kind(path) == "tgz"
        stream = gzip.GzipFile(fileobj=raw, mode="rb") if compressed else raw
        with tarfile.open(fileobj=stream, mode="r:") as tf:
            def entries():
                while (info := tf.next()) is not None:
                    within = not compressed or info.offset_data + info.size <= limit
                    yield info, within
                    if not within:
                        return
            yield entries()


def _add(out: ArchiveListing, name: str, why: str, member, is_junk, escape) -> None:
    clean = name.replace("\\", "/").strip("/")
    if why:  # before the junk test: "../x" starts with a dot, but must be reported, not skipped
        # the row's path keeps the name recognisable but harmless: ".." becomes "%2e%2e" (RFC 3986
        # percent-encoding), so no manifest path climbs out of its archive
        key = "/".join("%2e%2e" if part == ".." else part for part in clean.split("/"))
        key = escape(key) or "(empty name)"
        out.members.pop(key, None)  # a safe member of the same name gives way: paths stay unique
        out.refused[key] = why
    elif any(is_junk(part) for part in clean.split("/")):
        out.skipped.append(clean)
    elif not _is_utf8(clean):
        out.misnamed.append(escape(clean))
    elif clean in out.members or clean in out.refused:
        out.refused[clean] = "listed twice in the archive; neither copy is read"
        out.members.pop(clean, None)
    else:
        out.members[clean] = member()


def _is_utf8(name: str) -> bool:
    try:
        name.encode("utf-8")
    except UnicodeEncodeError:
        return False
    return True


def _unsafe_name(name: str) -> str:
    """Why a member name may not be used as a path, or ``""``: absolute, a drive, ``..``, empty."""
    p = name.replace("\\", "/")
    if not p.strip("/"):
        return "an empty member name"
    if p.startswith("/") or (len(p) > 1 and p[1] == ":"):
        return f"an absolute member name ({name!r}); not read"
    if ".." in PurePosixPath(p).parts:
        return f"a member name climbing out with '..' ({name!r}); not read"
    return ""


def _over_limits(size: int, packed: int) -> str:
    """Why a member's declared sizes are refused, or ``""``."""
    if size > defaults.MEMBER_BYTES:
        return f"declares {size:,} bytes, over the {defaults.MEMBER_BYTES:,}-byte budget per member"
    if size > defaults.RATIO_GRACE and size > defaults.MAX_RATIO * max(packed, 1):
        return (f"expands {size / max(packed, 1):,.0f}x ({packed:,} to {size:,} bytes), over the "
                f"{defaults.MAX_RATIO}x ratio of a compression bomb")
    return ""


# ------------------------------------------------------------------ the scan's tasks

def tasks(entries):
    """Group the locations of files to probe (a path, or a :class:`Member`) into scan tasks.

    Members of one archive share a task, so the archive is opened once per task; ``entries`` come
    in path order, in which every archive's members are consecutive.

    A generator, so that a million paths are never held twice.

    Examples
    --------
    >>> list(tasks(["a.jpg", "b.jpg"]))
    [['a.jpg'], ['b.jpg']]
    """
    run = []
    for entry in entries:
        if run and (not isinstance(entry, Member) or entry.archive != run[0].archive
                    or (entry.kind != "tgz" and len(run) == _MEMBERS_PER_TASK)):
            yield run
            run = []
        if isinstance(entry, Member):
            run.append(entry)
        else:
            yield [entry]
    if run:
        yield run


def probe_unit(task: list, *, max_pixels: int, probe) -> list:
    """The facts ``probe`` (:func:`labelprep.probe.probe`, passed in by the scanner) gives for every
    entry of one task (see :func:`tasks`), in the task's order.

    Examples
    --------
    >>> from labelprep.probe import probe
    >>> [facts["format"] for facts in probe_unit(["photo.jpg"], max_pixels=10**8, probe=probe)]  # doctest: +SKIP
    ['jpeg']
    """
    if not isinstance(task[0], Member):
        return [probe(task[0], max_pixels=max_pixels)]
    first = task[0]
    try:
        handle = zipfile.ZipFile(first.archive) if first.kind == "zip" else _tar_stream(first)
    except (OSError, EOFError, zipfile.BadZipFile) as exc:
        why = f"the archive cannot be read now ({_reason(exc)})"
        return [probe(_failing(why), max_pixels=max_pixels) for _ in task]
    with handle:
        # tar members in the order of their data, so that a compressed stream is read once
        order = sorted(range(len(task)), key=lambda k: task[k].offset)
        facts = [None] * len(task)
        for k in order:
            member = task[k]
            facts[k] = probe(lambda m=member: (_read_member(handle, m), m.mtime_ns), max_pixels=max_pixels)
    return facts


def _tar_stream(member: Member):
    """The tar's bytes as one seekable stream (decompressed for a .tar.gz), closing the file with it."""
    return gzip.open(member.archive, "rb") if member.kind == "tgz" else open(member.archive, "rb")


def _failing(why: str):
    def read():
        raise OSError(0, why)
    return read


def _read_member(handle, member: Member) -> bytes:
    if member.kind == "zip":
        with handle.open(member.name) as fh:  # the decompressor stops at the declared size
            data = fh.read(member.size)
    else:
        handle.seek(member.offset)
        data = handle.read(member.size)
    if len(data) != member.size:
        raise OSError(0, f"the archive holds {len(data):,} bytes for a member declared as {member.size:,}")
    return data


# ------------------------------------------------------------------ finding bytes again

def name_roots(roots) -> list:
    """``[(source name, Path)]`` for the roots of one run; the name is ``""`` for a single root.

    Raises ParameterError for no root or a root given twice, InputError for one that is neither a
    folder nor an archive.

    Examples
    --------
    >>> [name for name, _ in name_roots(["a/photos", "b/photos", "c/more.zip"])]  # doctest: +SKIP
    ['photos', 'photos-2', 'more.zip']
    """
    if isinstance(roots, (str, os.PathLike)):
        roots = [roots]
    roots = [Path(r) for r in roots]
    if not roots:
        raise ParameterError("at least one ROOT is needed")
    seen = {}
    for r in roots:
        if not (r.is_dir() or (r.is_file() and is_archive(r.name))):
            raise InputError(f"{r} is neither a folder nor a .zip, .tar, .tar.gz or .tgz archive")
        real = os.path.realpath(r)
        if real in seen:
            raise ParameterError(f"ROOT {r} is given twice (also as {seen[real]})")
        seen[real] = r
    if len(roots) == 1:
        return [("", roots[0])]
    names, out = set(), []
    for r in roots:
        base = r.resolve().name or "root"
        name, k = base, 1
        while name in names:
            k += 1
            name = f"{base}-{k}"
        names.add(name)
        out.append((name, r))
    return out


def label_tables(labels, named: list) -> dict:
    """``{source name: table}`` from ``labels``: None, one table (one root only), or a mapping or
    list of ``NAME=TABLE`` items, NAME being a source name or the root as given.

    Examples
    --------
    >>> label_tables(["old=old.csv"], [("old", Path("data/old")), ("new", Path("new"))])
    {'old': 'old.csv'}
    """
    if labels is None or labels == () or labels == []:
        return {}
    if isinstance(labels, (str, os.PathLike)):
        labels = [labels]
    if isinstance(labels, dict):
        labels = [f"{k}={v}" for k, v in labels.items()]
    by_name = {name: name for name, _ in named}
    by_name.update({str(root): name for name, root in named})
    out = {}
    for item in labels:
        text = os.fspath(item)
        key, sep, table = text.partition("=")
        key = key if key in by_name else os.path.normpath(key) if key else key  # "new/" is "new"
        if sep and key in by_name:
            out[by_name[key]] = table
        elif len(named) == 1:
            out[named[0][0]] = text
        else:
            raise ParameterError(f"--labels {text!r} does not say which root it is for; with several "
                                 f"roots write --labels SOURCE=TABLE, SOURCE one of "
                                 f"{', '.join(n for n, _ in named)}")
    return out


def describe(named: list) -> dict:
    """What the sidecar records of the roots: ``{"root": abs}`` for one, ``{"sources": {name: abs}}``.

    Examples
    --------
    >>> describe([("", Path("/data/photos"))])
    {'root': '/data/photos'}
    """
    if len(named) == 1:
        return {"root": str(named[0][1].resolve())}
    return {"sources": {name: str(root.resolve()) for name, root in named}}


def roots_of(meta: dict):
    """The root a sidecar names (a Path), its sources (``{name: Path}``), or None when they are gone.

    Examples
    --------
    >>> roots_of({"root": "/no/such/folder"}) is None
    True
    """
    if meta.get("sources"):
        found = {name: Path(p) for name, p in meta["sources"].items()}
        return found if all(p.exists() for p in found.values()) else None
    root = meta.get("root")
    return Path(root) if root and Path(root).exists() else None


def check_root(root) -> None:
    """Raise unless ``root`` is a folder, an archive, or a dict of them (what :func:`locate` takes).

    Raises TypeError for another type and ParameterError for a path that is neither.

    Examples
    --------
    >>> check_root("/no/such/folder")
    Traceback (most recent call last):
    ...
    labelprep.errors.ParameterError: root='/no/such/folder' is neither a folder nor an archive
    """
    if isinstance(root, dict):
        for value in root.values():
            check_root(value)
        return
    if not isinstance(root, (str, os.PathLike)):
        raise TypeError(f"root must be a path (str or Path) or a dict of them, got {type(root).__name__}")
    if not (os.path.isdir(root) or (os.path.isfile(root) and is_archive(os.fspath(root)))):
        raise ParameterError(f"root={os.fspath(root)!r} is neither a folder nor an archive")


def locate(root, rel: str):
    """``(file on disk, member name or None)`` holding manifest path ``rel``.

    ``root`` is what the paths are relative to: a folder, an archive, or ``{source: folder}``.
    Raises InputError for a path that leaves its root or names an unknown source.

    Examples
    --------
    >>> locate("photos", "things/more.zip/rocket.jpg")   # doctest: +SKIP
    (PosixPath('photos/things/more.zip'), 'rocket.jpg')
    >>> locate({"old": "data/old"}, "old/cat/1.jpg")     # doctest: +SKIP
    (PosixPath('data/old/cat/1.jpg'), None)
    """
    parts = PurePosixPath(rel).parts
    if PurePosixPath(rel).is_absolute() or ".." in parts or not parts:
        raise InputError(f"{rel!r} leaves the scanned folder")
    if isinstance(root, dict):
        if parts[0] not in root or len(parts) < 2:
            raise InputError(f"{rel!r} names no source of this manifest ({', '.join(root)})")
        return locate(root[parts[0]], "/".join(parts[1:]))
    root = Path(root)
    if root.is_file():
        return root, rel
    for k, part in enumerate(parts[:-1]):
        if is_archive(part) and (candidate := root.joinpath(*parts[:k + 1])).is_file():
            return candidate, "/".join(parts[k + 1:])
    return root.joinpath(*parts), None


def read_bytes(root, rel: str) -> bytes:
    """The bytes of manifest path ``rel`` (a file, or an archive member read in memory).

    Raises OSError when the file or member is gone or the archive cannot be read; the member's
    declared size is held to the same budget as in the scan.

    Examples
    --------
    >>> read_bytes("photos", "things/more.zip/rocket.jpg")[:3]   # doctest: +SKIP
    b'\\xff\\xd8\\xff'
    """
    where, name = locate(root, rel)
    if name is None:
        return Path(where).read_bytes()
    kind = _kind(str(where))
    try:
        if kind == "zip":
            with zipfile.ZipFile(where) as zf:
                info = zf.getinfo(name)
                if _over_limits(info.file_size, info.compress_size):
                    raise OSError(0, _over_limits(info.file_size, info.compress_size))
                return _read_member(zf, Member(str(where), kind, name, info.file_size, 0))
        with _tar_entries(str(where)) as entries:
            for info, within in entries:
                if within and info.isreg() and info.name.replace("\\", "/").strip("/") == name:
                    if info.size > defaults.MEMBER_BYTES:
                        raise OSError(0, _over_limits(info.size, info.size))
                    with _tar_stream(Member(str(where), kind, name, info.size, 0)) as fh:
                        return _read_member(fh, Member(str(where), kind, name, info.size, 0, info.offset_data))
        raise KeyError(name)
    except KeyError as exc:
        raise OSError(0, f"no member {name!r} in {where}") from exc
    except (zipfile.BadZipFile, tarfile.TarError, EOFError) as exc:
        raise OSError(0, f"{where} cannot be read ({_reason(exc)})") from exc
