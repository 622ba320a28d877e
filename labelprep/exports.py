"""Export a split manifest as class-per-folder trees: ``DEST/<split>/<label>/<file>`` plus lists.

Training frameworks read this layout directly (one folder per class under each split). A
folder-per-class loader numbers the classes by the folders it finds (torchvision's ``ImageFolder``
sorts the folder names and refuses an empty class folder, so empty folders are no remedy), and a
class with too few files is missing from some split: ``DEST/classes.txt`` lists every class
folder once, in that sorted order, so that each split can be read with the same class index
(``class_names=`` in Keras' ``image_dataset_from_directory``, ``find_classes`` in torchvision).
Every file
is checked against the manifest's ``sha256`` before it is placed, so the export holds exactly the
bytes the split was computed on. Sources are only ever read; outputs appear under their final name
only once verified (written to a temporary name and renamed).
"""

from __future__ import annotations

import errno
import hashlib
import io
import os
import shutil
import tempfile
import zlib
from pathlib import Path, PurePosixPath

from . import sources
from .errors import InputError, OutputExistsError, ParameterError
from .validation import check_manifest

MODES = ("hardlink", "symlink", "copy")
CLASS_LIST = "classes.txt"
SPLIT_ORDER = ("train", "val", "test")
RESULT_COLUMNS = ("split", "label", "target", "path", "method", "renamed", "gps_removed", "bytes", "sha256")
_CHUNK = 1 << 20
# hardlinks cannot cross filesystems (EXDEV) and some filesystems refuse them altogether
_NO_LINK = {errno.EXDEV, errno.EPERM, errno.EMLINK, errno.ENOTSUP, errno.EOPNOTSUPP}
_GPS_IFD = 0x8825
_XMP_GPS = b"exif:GPS"
_VP8X_XMP_FLAG = 0x04  # "X" bit of the VP8X flags byte (RFC 9649, section 2.7)


def export(manifest, dest, *, root=None, mode="hardlink", force=False, strip_metadata=False, progress=None):
    """Write every file that is in a split to ``dest/<split>/<label>/<name>``, with per-split lists.

    Parameters
    ----------
    manifest : pandas.DataFrame, str or Path
        Needs ``path``, ``label``, ``split`` and ``sha256``. Rows whose split is ``""`` are not
        exported. A path is read with :func:`labelprep.read_manifest`, and its sidecar gives
        ``root`` when it is not passed.
    dest : str or Path
        The export folder; created when missing. It must be empty unless ``force``.
    root : str, Path or dict, optional
        The scanned folder (or archive) that ``path`` is relative to, or ``{source: folder}`` for
        a manifest of several sources; by default the roots recorded in the sidecar of a
        manifest given as a path. Archive members are always copied out (read from the
        archive in memory, verified like any copy): a link would need a file of their own.
    mode : {"hardlink", "symlink", "copy"}
        How each file is placed. ``hardlink`` falls back to a copy where a link is impossible
        (another filesystem); ``symlink`` links to the absolute source path.
    force : bool
        Accept a non-empty ``dest``: the entries an export writes (``train``, ``val``, ``test``,
        the split folders and their ``.csv`` lists) are removed first; nothing else in ``dest``
        and nothing outside it is touched.
    strip_metadata : bool
        Remove location data (the EXIF GPS block, and XMP packets carrying ``exif:GPS`` tags)
        from the copies, without re-encoding the pixels (JPEG, PNG and WebP). Needs
        ``mode="copy"``: a link shares its source's bytes.
    progress : callable, optional
        ``progress(iterable, total=N, label=...)`` wrapping the file loop (see
        :mod:`labelprep.progress`).

    Returns
    -------
    pandas.DataFrame
        One row per file written, in split then target order: ``split``, ``label``, ``target``
        (POSIX path relative to ``dest``), ``path`` (source, relative to ``root``), ``method``
        (``hardlink``, ``symlink`` or ``copy``: what was done, which is ``copy`` where a hardlink
        was impossible), ``renamed`` (the file name differs from the source's, to resolve a
        collision), ``gps_removed``, ``bytes`` and ``sha256`` (of the exported file).
        Each ``dest/<split>.csv`` lists that split's files as ``path,label,source`` with
        ``path`` relative to ``dest`` and ``source`` the manifest's path of the file;
        ``dest/classes.txt`` holds every class folder name, one a line, sorted: a class's index
        is its line number (from 0) in every split, also where a split lacks the class. A file
        in subfolders of its class folder (``cat/2019/a.jpg``) keeps them below the class folder
        (``train/cat/2019/a.jpg``).

    Raises
    ------
    OutputExistsError
        ``dest`` is not empty and ``force`` is off.
    InputError
        A source is missing or differs from its ``sha256`` (changed since the scan), or its GPS
        data cannot be removed; the other files are exported and listed first, then the error
        names how many failed and the first of them.

    Examples
    --------
    >>> table = export("prepared/manifest.csv", "export/", mode="copy")   # doctest: +SKIP
    >>> table[["target", "method"]].head(1)                         # doctest: +SKIP
                  target method
    0  test/cat/0001.jpg   copy
    """
    from . import progress as progress_module

    if mode not in MODES:
        raise ParameterError(f"mode must be one of {', '.join(MODES)}; got mode={mode!r}")
    for name, flag in (("force", force), ("strip_metadata", strip_metadata)):
        if not isinstance(flag, bool):
            raise TypeError(f"{name} must be True or False, got {type(flag).__name__}")
    if strip_metadata and mode != "copy":
        raise ParameterError(f"strip_metadata needs mode='copy' (a {mode} shares the source's bytes, "
                             f"so its metadata cannot change without changing the source); got mode={mode!r}")
    if not isinstance(dest, (str, os.PathLike)):
        raise TypeError(f"dest must be a path (str or Path), got {type(dest).__name__}")
    manifest, root = _manifest_and_root(manifest, root)
    sources.check_root(root)
    check_manifest(manifest, ["path", "label", "split", "sha256"], hint="run scan and split first")
    dest = Path(dest)

    plan = plan_targets(manifest)
    if plan.empty:
        raise InputError(_nothing_in_a_split(manifest))
    _refuse_overlap(plan, root, dest)
    _prepare_dest(dest, plan, force=force)

    written, failed = [], []
    wrap = progress_module.resolve(progress)
    for row in wrap(plan.itertuples(index=False), total=len(plan), label="export"):
        try:
            written.append(_place(row, root, dest, mode, strip_metadata))
        except _Skip as why:
            failed.append((row.path, str(why)))
        except OSError as exc:
            raise InputError(f"cannot export {row.path} to {dest / row.target}: {exc.strerror or exc}") from exc
    import pandas as pd

    table = pd.DataFrame(written, columns=list(RESULT_COLUMNS))
    _write_lists(table, dest, force=force)
    _write_class_list(plan, dest, force=force)
    if failed:
        path, why = failed[0]
        raise InputError(f"{len(failed)} of {len(plan)} files were not exported; first: {path}: {why}")
    return table


def _manifest_and_root(manifest, root):
    """The manifest as a DataFrame and the root its paths are relative to (from its sidecar)."""
    if isinstance(manifest, (str, os.PathLike)):
        from .manifest import read, read_sidecar

        path = manifest
        manifest = read(path)
        if root is None:
            root = sources.roots_of(read_sidecar(path))
            if root is None:
                raise InputError(f"cannot tell which folder {path}'s paths are relative to: its "
                                 "sidecar records no root; pass --root")
    if root is None:
        raise ParameterError("root is needed with a manifest given as a DataFrame (or give the "
                             "manifest's path: its sidecar records the root)")
    return manifest, root


def _nothing_in_a_split(manifest) -> str:
    """Why nothing can be exported: no row has a split, with the codes that kept them out."""
    from .advice import why_left_out

    issues = manifest["issues"].fillna("").astype(str) if "issues" in manifest.columns else None
    why = why_left_out(issues) if issues is not None and len(issues) else ""
    if not why:
        return "no file of the manifest is in a split; run split first"
    return f"no file of the manifest is in a split: all {len(manifest)} are left out{why}"


def plan_targets(manifest):
    """Where each file in a split goes: ``split``, ``label``, ``target``, ``path``, ``sha256``, ``renamed``.

    File names are kept unless two files of one folder would share a name (compared without case,
    so the tree also unpacks on case-insensitive filesystems); then each of them gets ``~`` and
    the first 8 hex digits of the SHA-256 of its source path before the extension, which depends
    on nothing but that path, so a re-export names it the same.

    Parameters
    ----------
    manifest : pandas.DataFrame
        Needs ``path``, ``label``, ``split`` and ``sha256``; rows with an empty split are skipped.

    Returns
    -------
    pandas.DataFrame
        One row per file to export, in split then target order.

    Raises
    ------
    InputError
        A split or label cannot be a folder name (empty, ``.`` or ``..``), or two labels would
        share one folder once ``/`` and ``\\`` are replaced by ``_``.

    Examples
    --------
    >>> import pandas as pd
    >>> m = pd.DataFrame({"path": ["a/x.jpg", "b/x.jpg", "b/y.jpg"], "label": ["cat"] * 3,
    ...                   "split": ["train"] * 3, "sha256": [""] * 3})
    >>> plan_targets(m)["target"].tolist()
    ['train/cat/x~7ec9164c.jpg', 'train/cat/x~c5d163b0.jpg', 'train/cat/y.jpg']
    """
    rows = manifest[manifest["split"].fillna("").astype(str) != ""]
    plan = rows[["split", "label", "path", "sha256"]].astype(str).copy()
    if plan.empty:
        return plan.assign(target=[], renamed=[])[["split", "label", "target", "path", "sha256", "renamed"]]
    if not plan["path"].is_unique:
        raise InputError(f"path {plan['path'][plan['path'].duplicated()].iloc[0]!r} is in the manifest twice")
    plan["split_dir"] = _folder_names(plan["split"], "split")
    plan["label_dir"] = _folder_names(plan["label"], "label")
    plan["inner"] = [_below_class(p, label) for p, label in zip(plan["path"], plan["label"])]
    plan["name"] = plan["inner"]
    plan["renamed"] = False
    key = _folder_key(plan)
    # distinct paths have distinct digests, so a longer tag always ends a (vanishingly rare)
    # clash between a tagged name and another file's own name
    for length in (8, 16, 64):
        if key.is_unique:
            break
        plan["renamed"] |= key.duplicated(keep=False)
        clashing = plan.loc[plan["renamed"]]
        plan.loc[plan["renamed"], "name"] = [_tagged(p, n, length)
                                             for p, n in zip(clashing["path"], clashing["inner"])]
        key = _folder_key(plan)
    plan["target"] = plan["split_dir"] + "/" + plan["label_dir"] + "/" + plan["name"]
    order = {s: i for i, s in enumerate(SPLIT_ORDER)}
    plan["_rank"] = plan["split"].map(lambda s: order.get(s, len(order)))
    plan = plan.sort_values(["_rank", "split", "target"], kind="stable")
    return plan[["split", "label", "target", "path", "sha256", "renamed"]].reset_index(drop=True)


def _below_class(path: str, label: str) -> str:
    """Where a file goes inside its class folder: the subfolders below the path's folder named
    like its label, when there is one (``cat/2019/a.jpg`` -> ``2019/a.jpg``), else the name."""
    parts = PurePosixPath(path).parts
    if label in parts[:-1]:
        inner = parts[parts.index(label) + 1:]
        if not any(part in ("", ".", "..") or "\\" in part for part in inner):
            return "/".join(inner)
    return parts[-1] if parts else path


def _folder_key(plan):
    """Target paths as a case-insensitive filesystem compares them."""
    return plan["split_dir"] + "/" + plan["label_dir"] + "/" + plan["name"].str.casefold()


def _tagged(path: str, name: str, length: int) -> str:
    """``name`` (a file's place in its class folder) with a tag from ``path`` before the extension."""
    p = PurePosixPath(name)
    tag = hashlib.sha256(path.encode("utf-8", "surrogateescape")).hexdigest()[:length]
    return str(p.with_name(f"{p.stem}~{tag}{p.suffix}"))


def _folder_names(values, what: str):
    """Split or label values as single folder names; refuse any that cannot be one or would merge."""
    names = values.str.replace("/", "_", regex=False).str.replace("\\", "_", regex=False)
    names = names.str.replace("\0", "_", regex=False)
    bad = names.isin(["", ".", ".."])
    if bad.any():
        raise InputError(f"{what} {values[bad].iloc[0]!r} cannot be a folder name; fix the manifest")
    pairs = dict(zip(values, names))
    merged = {}
    for value, name in sorted(pairs.items()):
        merged.setdefault(name, []).append(value)
    clashes = [v for v in merged.values() if len(v) > 1]
    if clashes:
        raise InputError(f"{what}s {' and '.join(map(repr, clashes[0]))} would share one folder; rename one")
    return names


def _refuse_overlap(plan, root: Path, dest: Path) -> None:
    """Refuse a ``dest`` that holds any source file: force would delete it, and exports would nest."""
    dest_real = os.path.realpath(dest)
    inside = dest_real.rstrip(os.sep) + os.sep
    for rel in plan["path"]:
        try:
            source = os.path.realpath(sources.locate(root, rel)[0])
        except InputError:
            continue  # a path that leaves its root is refused per file by _place
        if source.startswith(inside):
            raise ParameterError(f"dest {dest} holds source files (e.g. {rel}); export to a folder outside them")


def _prepare_dest(dest: Path, plan, *, force: bool) -> None:
    if dest.exists() and not dest.is_dir():
        raise InputError(f"dest {dest} exists and is not a folder")
    if dest.is_dir() and any(dest.iterdir()):
        if not force:
            raise OutputExistsError(f"dest {dest} is not empty; pass --force to replace an earlier export in it")
        for name in sorted(set(SPLIT_ORDER) | set(t.split("/", 1)[0] for t in plan["target"])):
            for entry in (dest / name, dest / f"{name}.csv"):
                _remove(entry)
        _remove(dest / CLASS_LIST)
    try:
        dest.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise InputError(f"cannot create dest {dest}: {exc.strerror}") from exc


def _remove(entry: Path) -> None:
    """Remove one entry directly inside dest; a symlink is removed itself, never followed."""
    if entry.is_symlink() or entry.is_file():
        entry.unlink()
    elif entry.is_dir():
        shutil.rmtree(entry)


class _Skip(Exception):
    """One file could not be exported; the others go on."""


def _place(row, root, dest: Path, mode: str, strip: bool) -> dict:
    try:
        source, member = sources.locate(root, row.path)
    except InputError:
        raise _Skip("the path leaves the scanned folder") from None
    if not source.is_file():
        raise _Skip("the source file is missing")
    target = dest / row.target
    target.parent.mkdir(parents=True, exist_ok=True)
    method, gps_removed = mode, False
    if member is not None or strip:  # strip implies copy; a member has no file to link to
        data = _read_verified(source, row.sha256, member)
        if strip:
            data, gps_removed = strip_location(data)
        digest = _write_verified(data, source, target)
        method = "copy"
    elif mode == "copy":
        digest = _copy_verified(source, target, row.sha256)
    else:
        digest = _hash_file(source)
        if digest != row.sha256:
            raise _Skip(_CHANGED)
        method = _link(source, target, mode)
        if method == "copy":
            digest = _copy_verified(source, target, row.sha256)
        elif not os.path.samefile(source, target):
            raise _Skip(f"the {method} at {row.target} does not lead to the source")
    return {"split": row.split, "label": row.label, "target": row.target, "path": row.path,
            "method": method, "renamed": bool(row.renamed), "gps_removed": gps_removed,
            "bytes": target.stat().st_size, "sha256": digest}


_CHANGED = "its SHA-256 differs from the manifest's (changed since the scan?)"


def _link(source: Path, target: Path, mode: str) -> str:
    """Make the link; return the method used (``copy`` when a hardlink is impossible here)."""
    try:
        if mode == "symlink":
            os.symlink(os.path.abspath(source), target)
        else:
            os.link(source, target)
    except OSError as exc:
        if mode == "hardlink" and exc.errno in _NO_LINK:
            return "copy"
        raise InputError(f"cannot create {target}: {exc.strerror}") from exc
    return mode


def _hash_file(path: Path) -> str:
    h = hashlib.sha256()
    with open(path, "rb") as fh:
        for block in iter(lambda: fh.read(_CHUNK), b""):
            h.update(block)
    return h.hexdigest()


def _read_verified(source: Path, expected: str, member=None) -> bytes:
    """The bytes of ``source`` (or of its archive ``member``), checked against the manifest's digest."""
    if member is None:
        data = source.read_bytes()
    else:
        try:
            data = sources.read_bytes(source, member)
        except OSError as exc:
            raise _Skip(exc.strerror or str(exc)) from exc
    if hashlib.sha256(data).hexdigest() != expected:
        raise _Skip(_CHANGED)
    return data


def _copy_verified(source: Path, target: Path, expected: str) -> str:
    """Copy while hashing the source, check it against the manifest, re-read the copy to check it."""
    def write(tmp):
        h = hashlib.sha256()
        with open(source, "rb") as src, open(tmp, "wb") as out:
            for block in iter(lambda: src.read(_CHUNK), b""):
                h.update(block)
                out.write(block)
        if h.hexdigest() != expected:
            raise _Skip(_CHANGED)
        return expected

    return _publish(target, source, write)


def _write_verified(data: bytes, source: Path, target: Path) -> str:
    def write(tmp):
        Path(tmp).write_bytes(data)
        return hashlib.sha256(data).hexdigest()

    return _publish(target, source, write)


def _publish(target: Path, source: Path, write) -> str:
    """Run ``write(tmp)`` on a temporary file beside ``target``; rename it there once its bytes on
    disk hash to what ``write`` returned. Mode and times are those of the source."""
    fd, tmp = tempfile.mkstemp(prefix=f".{target.name}.", suffix=".part", dir=target.parent)
    os.close(fd)
    try:
        digest = write(tmp)
        if _hash_file(Path(tmp)) != digest:
            raise _Skip("the copy on disk differs from what was written")
        shutil.copystat(source, tmp)
        os.replace(tmp, target)
    except BaseException:
        Path(tmp).unlink(missing_ok=True)
        raise
    return digest


def _write_lists(table, dest: Path, *, force: bool) -> None:
    """``dest/<split folder>.csv`` per split: ``path`` (relative to dest), ``label``, ``source``
    (the manifest's path, which links the exported file back to the one scanned)."""
    from .manifest import write_text

    for _, rows in table.groupby("split", sort=False):
        folder = rows["target"].iloc[0].split("/", 1)[0]
        listed = rows[["target", "label", "path"]].rename(columns={"target": "path", "path": "source"})
        write_text(dest / f"{folder}.csv", listed.to_csv(index=False, lineterminator="\n"),
                   force=force, ledger=False)


def _write_class_list(plan, dest: Path, *, force: bool) -> None:
    """``dest/classes.txt``: every class folder of the export, sorted as a folder-per-class loader
    sorts the folders it finds (torchvision's ``find_classes``: ``sorted`` of the names)."""
    from .manifest import write_text

    folders = sorted({target.split("/")[1] for target in plan["target"]})
    write_text(dest / CLASS_LIST, "".join(f"{name}\n" for name in folders), force=force, ledger=False)


# ---------------------------------------------------------------- location data

def strip_location(data: bytes) -> tuple[bytes, bool]:
    """``data`` without its EXIF GPS block (and XMP packets with ``exif:GPS`` tags), pixels untouched.

    JPEG, PNG and WebP are rewritten segment by segment; the result is read back to confirm that
    no GPS block is left.

    Parameters
    ----------
    data : bytes
        A whole image file.

    Returns
    -------
    (bytes, bool)
        The new file and whether anything was removed (``data`` itself when nothing was).

    Raises
    ------
    _Skip
        Another format that carries GPS data, or location data stored where it is not removed;
        :func:`export` reports the file and goes on.

    Examples
    --------
    >>> import io
    >>> from PIL import Image
    >>> buffer = io.BytesIO()
    >>> Image.new("RGB", (8, 8)).save(buffer, "PNG")
    >>> strip_location(buffer.getvalue())[1]
    False
    """
    from PIL import Image

    try:
        with Image.open(io.BytesIO(data)) as im:
            fmt = im.format
            exif = im.getexif()
    except Exception as exc:  # noqa: BLE001 - a file Pillow cannot open has no EXIF we could edit
        raise _Skip(f"cannot read its metadata: {exc}") from exc
    has_gps = _GPS_IFD in exif
    has_xmp = _XMP_GPS in data
    if not has_gps and not has_xmp:
        return data, False
    new_exif = None
    if has_gps:
        del exif[_GPS_IFD]
        new_exif = exif.tobytes()  # b"Exif\0\0" + TIFF data
    rewrite = {"JPEG": _jpeg_without, "PNG": _png_without, "WEBP": _webp_without}.get(fmt)
    if rewrite is None:
        raise _Skip(f"strip_metadata cannot remove location data from {fmt} files")
    out = rewrite(data, new_exif)
    with Image.open(io.BytesIO(out)) as im:
        if _GPS_IFD in im.getexif() or _XMP_GPS in out:
            raise _Skip("its location data is stored where labelprep cannot remove it")
    return out, True


def _jpeg_without(data: bytes, new_exif) -> bytes:
    """JPEG segments (ITU-T T.81 annex B) with the Exif APP1 replaced and GPS-bearing XMP dropped."""
    out = [data[:2]]
    i = 2
    while i + 4 <= len(data) and data[i] == 0xFF:
        marker = data[i + 1]
        if marker == 0xDA:  # start of scan: the rest is entropy-coded data, copied as it is
            break
        length = int.from_bytes(data[i + 2:i + 4], "big")
        segment = data[i:i + 2 + length]
        payload = segment[4:]
        if marker == 0xE1 and payload.startswith(b"Exif\0\0") and new_exif is not None:
            segment = b"\xff\xe1" + (len(new_exif) + 2).to_bytes(2, "big") + new_exif
        elif marker == 0xE1 and _XMP_GPS in payload and not payload.startswith(b"Exif\0\0"):
            segment = b""
        out.append(segment)
        i += 2 + length
    out.append(data[i:])
    return b"".join(out)


def _png_without(data: bytes, new_exif) -> bytes:
    """PNG chunks (PNG spec, 3rd ed., section 5.3) with eXIf rewritten and GPS-bearing iTXt dropped."""
    out = [data[:8]]
    i = 8
    while i + 8 <= len(data):
        length = int.from_bytes(data[i:i + 4], "big")
        kind = data[i + 4:i + 8]
        body = data[i + 8:i + 8 + length]
        chunk = data[i:i + 12 + length]
        if kind == b"eXIf" and new_exif is not None:
            body = new_exif[6:]
            chunk = (len(body).to_bytes(4, "big") + kind + body
                     + zlib.crc32(kind + body).to_bytes(4, "big"))
        elif kind in (b"iTXt", b"tEXt", b"zTXt") and _XMP_GPS in body:
            chunk = b""
        out.append(chunk)
        i += 12 + length
    return b"".join(out)


def _webp_without(data: bytes, new_exif) -> bytes:
    """RIFF chunks of a WebP (RFC 9649, section 2) with EXIF rewritten and GPS-bearing XMP dropped."""
    out = []
    dropped_xmp = False
    i = 12
    while i + 8 <= len(data):
        kind = data[i:i + 4]
        length = int.from_bytes(data[i + 4:i + 8], "little")
        body = data[i + 8:i + 8 + length]
        if kind == b"EXIF" and new_exif is not None:
            body = new_exif if body.startswith(b"Exif\0\0") else new_exif[6:]
        elif kind == b"XMP " and _XMP_GPS in body:
            body, dropped_xmp = None, True
        if body is not None:
            out.append(kind + len(body).to_bytes(4, "little") + body + b"\0" * (len(body) % 2))
        i += 8 + length + length % 2
    if dropped_xmp and out and out[0][:4] == b"VP8X":
        flags = out[0][8] & ~_VP8X_XMP_FLAG
        out[0] = out[0][:8] + bytes([flags]) + out[0][9:]
    chunks = b"".join(out)
    return b"RIFF" + (len(chunks) + 4).to_bytes(4, "little") + b"WEBP" + chunks
