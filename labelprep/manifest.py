"""The manifest: one row per file found, its columns and dtypes, and how it is read and written.

A manifest is a pandas DataFrame. On disk it is CSV (default), Parquet (a name ending in
``.parquet``) or partitioned Parquet (a folder ``<name>.parquet/`` of part files, see
:func:`write`), always written atomically, with a JSON sidecar ``<name>.meta.json`` that records how
it was made. Every column the project writes is registered in :data:`COLUMNS`, so a reader finds
each column's meaning here and the stage that computes it by the ``stage`` field.
"""

from __future__ import annotations

import contextlib
import errno
import hashlib
import json
import os
import secrets
import tempfile
from dataclasses import dataclass
from datetime import datetime, timezone
from pathlib import Path
from typing import Any, Iterator

from .errors import InputError, OutputExistsError, ParameterError

SIDECAR_SUFFIX = ".meta.json"
# facts of one copy of the tree on one disk, kept beside the manifest instead of in it, so that the
# manifest is byte-identical wherever the tree is copied (cp -r resets modification times); read()
# joins them back, which is how a rescan finds the files it need not decode again
CACHE_COLUMNS = ("mtime_ns",)
CACHE_SUFFIX = ".scan-cache"
FORMAT_TAG = "labelprep-manifest/1"
# part files of a partitioned manifest, numbered in row order (read() concatenates them by name)
PART_NAME = "part-{:05d}.parquet"
PART_GLOB = "part-[0-9][0-9][0-9][0-9][0-9].parquet"


@dataclass(frozen=True)
class Column:
    """A registered manifest column: its pandas dtype, the stage that writes it, its meaning."""

    name: str
    dtype: str  # "str", "Int64", "Float64" or "boolean"
    stage: str
    meaning: str


_COLUMN_LIST = [
    # core columns: names and meanings are stable (users script against them)
    Column("path", "str", "scan", "POSIX path relative to the scanned root"),
    Column("label", "str", "scan", "class label; empty when unknown"),
    Column("group", "str", "scan", "user group id (same subject, session or source); empty when not given"),
    Column("bytes", "Int64", "scan", "file size in bytes"),
    Column("width", "Int64", "scan", "pixel width after EXIF orientation, as the header declares it (also for files over the pixel budget); empty when the size is unknown"),
    Column("height", "Int64", "scan", "pixel height after EXIF orientation, as the header declares it (also for files over the pixel budget); empty when the size is unknown"),
    Column("format", "str", "scan", "format detected from the file's first bytes (jpeg, png, gif, bmp, tiff, webp, ...); empty when not an image"),
    Column("sha256", "str", "scan", "SHA-256 of the file's bytes, 64 lowercase hex digits"),
    Column("phash", "str", "scan", "64-bit DCT perceptual hash of the oriented image, 16 lowercase hex digits; empty when undecodable"),
    Column("issues", "str", "check, group", "';'-separated issue codes, sorted; empty when clean"),
    Column("dup_group", "Int64", "group", "id shared by every member of a near-duplicate cluster (exact copies included); empty for a file with no copy"),
    Column("split", "str", "split", "train, val or test; empty for rows left out"),
    # scan facts
    Column("given_split", "str", "scan", "split named by a train/val/test folder in the source tree; empty otherwise"),
    Column("source", "str", "scan", "the source a file came from when several roots were scanned in one run: the root's folder or archive name (made unique with -2, -3, ...), which the path starts with; absent with one root"),
    Column("mtime_ns", "Int64", "scan", "modification time in nanoseconds, used to skip unchanged files on a rescan; kept in the scan cache <manifest>.scan-cache, not in the manifest file"),
    Column("mode", "str", "scan", "Pillow mode of the decoded image (RGB, L, CMYK, I;16, P, ...)"),
    Column("bits", "Int64", "scan", "bits per sample as stored (PNG header; otherwise from the mode); over 8 is flagged unusual-mode"),
    Column("frames", "Int64", "scan", "number of frames (more than 1 for animations)"),
    Column("has_alpha", "boolean", "scan", "the image has an alpha channel or a transparent palette entry"),
    Column("has_gps", "boolean", "scan", "the EXIF data holds GPS location tags"),
    Column("spread", "Float64", "scan", "standard deviation of luminance (0-255) on the hash thumbnail; near 0 for a blank image"),
    Column("fault", "str", "scan", "why the file could not be fully decoded: empty, not-image, unreadable, truncated, corrupt, pixel-limit, symlink, timeout, bad-name (not UTF-8), no-decoder, unsafe-member"),
    Column("fault_detail", "str", "scan", "one line from the decoder explaining the fault"),
    Column("phash_c80", "str", "scan", "perceptual hash (as phash) of the centred box keeping 80% of each side; matches copies cropped 5-15% per side"),
    Column("phash_c70", "str", "scan", "perceptual hash (as phash) of the centred box keeping 70% of each side"),
    Column("phash_mirror", "str", "scan", "perceptual hash of the left-right mirrored image; used by group (mirror matching, on unless --no-flips)"),
    Column("detail", "Float64", "scan", "share of the hash thumbnail's AC energy above the hashed frequencies; below 0.05 the image counts as low-detail"),
    Column("sketch", "str", "scan", "the 32x32 grayscale thumbnail behind phash, its 1,024 bytes in base64; compares two images on their pixels"),
    # grouping
    Column("bundle", "Int64", "group", "id of the rows that must share one split: near-duplicate clusters joined with user groups"),
    Column("mixed_labels", "boolean", "group", "the row's near-duplicate cluster holds more than one label (label-conflict unless kept)"),
    Column("keeper", "boolean", "group", "the one file kept per near-duplicate cluster (highest resolution, then largest file, then path); true for files with no copy"),
    Column("linked_to", "str", "group", "the cluster member this file was verified against (its anchor, or the file it is byte-identical to); empty for an anchor or a file with no copy"),
    Column("link_kind", "str", "group", "how linked_to was matched: exact (same bytes), near, mirror (left-right mirrored copy) or given (by another stage or a decision)"),
    Column("link_likeness", "Float64", "group", "correlation of the two sketches after alignment (1 = identical); empty when not measured"),
    Column("link_blemish", "Float64", "group", "largest local residual between the two aligned sketches, in standard deviations; a cluster's weakest link has the largest"),
    # splitting
    Column("fold", "Int64", "split", "cross-validation fold (0..K-1) when --folds K was asked; empty otherwise"),
    # decisions (labelprep.decisions): present only when a decisions file holds rows
    Column("decided", "str", "decisions", "the actions of the decisions file that applied to the row (drop, relabel, separate, join, keep), ';'-separated"),
    Column("decision_note", "str", "decisions", "the notes of those decisions, ' | '-separated"),
    Column("label_original", "str", "decisions", "the label before a relabel decision; empty when not relabelled"),
    Column("muted", "str", "decisions", "warning codes a keep decision removed from issues, ';'-separated"),
]

COLUMNS: dict[str, Column] = {c.name: c for c in _COLUMN_LIST}
CORE_COLUMNS = ("path", "label", "group", "bytes", "width", "height", "format", "sha256",
                "phash", "issues", "dup_group", "split")


def order_columns(df):
    """Return ``df`` with registered columns first (registry order), then any others sorted."""
    known = [c for c in COLUMNS if c in df.columns]
    extra = sorted(c for c in df.columns if c not in COLUMNS)
    return df[known + extra]


def coerce(df):
    """Return a copy of ``df`` with every registered column cast to its dtype.

    String columns hold ``""`` rather than missing values, so that a CSV round trip is exact,
    and use the object dtype: file names that are not UTF-8 arrive surrogate-escaped (PEP 383),
    which Arrow-backed string columns cannot hold.
    """
    import pandas as pd

    out = df.copy()
    for name in out.columns:
        col = COLUMNS.get(name)
        if col is None:
            continue
        if col.dtype == "str":
            values = ["" if v is None or v is pd.NA or v != v else str(v) for v in out[name].tolist()]
            out[name] = pd.Series(values, index=out.index, dtype=object)
        elif col.dtype == "boolean":
            s = out[name]
            if s.dtype == object:
                s = s.map({"True": True, "False": False, "true": True, "false": False,
                           True: True, False: False, "": pd.NA}, na_action="ignore")
            out[name] = s.astype("boolean")
        else:
            s = out[name]
            if s.dtype == object:
                s = s.replace("", pd.NA)
            if col.dtype == "Int64":
                # straight from the text: to_numeric goes through float64 when a cell is empty,
                # which rounds nanosecond times and other integers above 2**53
                out[name] = _exact_ints(s)
            else:
                out[name] = pd.to_numeric(s).astype("Float64")
    return order_columns(out)


def _exact_ints(s):
    import pandas as pd

    try:
        return s.astype("Int64")
    except (TypeError, ValueError):  # text such as "3.0": parsed as a number first
        return pd.to_numeric(s).astype("Int64")


def empty(columns=CORE_COLUMNS):
    """An empty manifest with the given registered columns."""
    import pandas as pd

    return coerce(pd.DataFrame({c: [] for c in columns}))


# ---------------------------------------------------------------- reading and writing

def is_parquet(path) -> bool:
    return str(path).lower().endswith(".parquet")


def sidecar_path(path) -> Path:
    path = Path(path)
    return path.with_name(path.name + SIDECAR_SUFFIX)


def cache_path(path) -> Path:
    """Where :data:`CACHE_COLUMNS` of manifest ``path`` are kept: ``<name>.scan-cache`` (CSV)."""
    path = Path(path)
    return path.with_name(path.name + CACHE_SUFFIX)


def read(path):
    """Read a manifest written by :func:`write` (CSV, Parquet or a partitioned Parquet folder)
    with every column's dtype restored.

    Raises
    ------
    InputError
        When the file is missing or is not a manifest (no ``path`` column).
    """
    import pandas as pd

    path = Path(path)
    parts = part_files(path)
    if path.is_dir() and not parts:
        raise InputError(f"{path} is a folder but not a partitioned manifest (only "
                         f"{PART_NAME.format(0)}, ... files)")
    if not path.is_file() and not parts:
        raise InputError(f"manifest {path} does not exist")
    try:
        if parts:
            df = pd.concat([pd.read_parquet(p) for p in parts], ignore_index=True)
        elif is_parquet(path):
            df = pd.read_parquet(path)
        else:
            df = pd.read_csv(path, dtype=object, keep_default_na=False, encoding="utf-8",
                             encoding_errors="surrogateescape")
    except ImportError as exc:
        raise InputError(f"reading {path} needs pyarrow: pip install 'labelprep[parquet]'") from exc
    except (ValueError, OSError, UnicodeDecodeError) as exc:
        raise InputError(f"cannot read manifest {path}: {exc}") from exc
    if "path" not in df.columns:
        raise InputError(f"{path} is not a labelprep manifest (it has no 'path' column)")
    return _with_cache(coerce(df), path)


def _with_cache(df, path: Path):
    """``df`` with the cache columns joined back by path, where the cache row's sha256 agrees.

    The digest guards against a cache older than the manifest (a crash between the two writes):
    a row it does not match gets no modification time, so the rescan decodes that file again.
    """
    import pandas as pd

    missing = [c for c in CACHE_COLUMNS if c not in df.columns]
    if not missing or "sha256" not in df.columns:
        return df
    try:
        cache = pd.read_csv(cache_path(path), dtype=object, keep_default_na=False,
                            encoding="utf-8", encoding_errors="surrogateescape")
    except (OSError, ValueError):
        return df  # no cache (or a damaged one): every file is decoded again, nothing is wrong
    if not {"path", "sha256", *missing} <= set(cache.columns):
        return df
    cache = coerce(cache[["path", "sha256", *missing]]).drop_duplicates("path")
    return order_columns(df.merge(cache, on=["path", "sha256"], how="left"))


def to_csv_bytes(df) -> bytes:
    """The exact bytes :func:`write` puts in a CSV manifest (UTF-8, ``\\n`` line ends)."""
    return _csv_bytes(_without_cache(df))


def _without_cache(df):
    return df.drop(columns=[c for c in CACHE_COLUMNS if c in df.columns])


def _csv_bytes(df) -> bytes:
    out = coerce(df)
    text = out.to_csv(index=False, lineterminator="\n", float_format="%.4f")
    return text.encode("utf-8", errors="surrogateescape")


def write(df, path, *, meta: dict | None = None, force: bool = False, partitions=None,
          new_sidecar: bool = False) -> Path:
    """Write ``df`` to ``path`` atomically, and its sidecar beside it.

    The :data:`CACHE_COLUMNS` go to the scan cache beside it (:func:`cache_path`), not into the
    manifest; :func:`read` joins them back.

    Parameters
    ----------
    df : pandas.DataFrame
        The manifest.
    path : str or Path
        Target file; ``.parquet`` selects Parquet, anything else CSV.
    meta : dict, optional
        Facts recorded in the sidecar (options, seed, root); tool version and time are added.
    force : bool
        Replace ``path`` even when it holds something that is not a labelprep manifest.
    partitions : int, optional
        Write ``path`` (a ``.parquet`` name) as a folder of this many part files of consecutive
        rows, written in parallel threads; readers such as ``dask.dataframe.read_parquet`` then
        take one part per task. When ``path`` already is such a folder, it stays one, with the
        same number of parts, unless ``partitions`` says otherwise.
    new_sidecar : bool, default False
        Start the sidecar afresh with ``meta`` instead of merging it into the old one: for a
        manifest whose every row is new (a scan, a prepare), which no earlier stage's record or
        seed describes any more.

    Returns
    -------
    Path
        The path written.

    Examples
    --------
    >>> write(m, "out/manifest.parquet", partitions=8)      # doctest: +SKIP
    >>> read("out/manifest.parquet").equals(m)              # doctest: +SKIP
    True
    """
    path = Path(path)
    if partitions is None:
        partitions = len(part_files(path)) or None
    if partitions is not None:
        check_partitions(partitions, path)
    guard_output(path, force=force)
    # the sidecar first: a manifest is known as labelprep's by its sidecar (guard_output), so no
    # interrupt may leave a new manifest without one (a rerun would refuse to replace it); if the
    # manifest then fails, the old sidecar is put back, so a failed write changes nothing
    side = sidecar_path(path)
    old_side = side.read_bytes() if side.is_file() else None
    write_sidecar(path, meta or {}, merge=not new_sidecar)
    try:
        _write_rows(df, path, partitions)
    except BaseException:
        _put_back(side, old_side)
        raise
    return path


def _write_rows(df, path: Path, partitions) -> None:
    """The manifest's own file (or part files), then its scan cache."""
    cached = [c for c in CACHE_COLUMNS if c in df.columns]
    if partitions is not None:
        _write_parts(df, path, partitions)
    elif is_parquet(path):
        try:
            import pyarrow  # noqa: F401
        except ImportError as exc:
            raise InputError(f"writing {path} needs pyarrow: pip install 'labelprep[parquet]'") from exc
        with atomic_path(path) as tmp:
            coerce(_without_cache(df)).to_parquet(tmp, index=False)
    else:
        data = to_csv_bytes(df)
        with atomic_path(path) as tmp:
            Path(tmp).write_bytes(data)
    if cached and "sha256" in df.columns:
        # after the manifest, never before: a crash in between leaves an older cache, whose
        # digests then fail to match and cost a decode, never a stale row reused
        data = _csv_bytes(df[["path", "sha256", *cached]])
        with atomic_path(cache_path(path)) as tmp:
            Path(tmp).write_bytes(data)


def _put_back(side: Path, old) -> None:
    """Restore a sidecar's earlier bytes (``None``: there was none)."""
    if old is None:
        side.unlink(missing_ok=True)
        return
    with atomic_path(side) as tmp:
        Path(tmp).write_bytes(old)


def guard_output(path, *, force: bool) -> None:
    """The one output guard: refuse to replace a file that labelprep did not write, unless ``force``.

    labelprep wrote ``path`` when it is a manifest (it has a sidecar, or it is a folder of part
    files), or when the ledger of its folder (:data:`LEDGER_NAME`, kept by :func:`write_text`)
    holds its name with the digest of the bytes it has now: a report the user edited since is
    theirs, and is not replaced either. Call it before long work, so a refusal costs nothing.
    """
    path = Path(path)
    if not path.exists() or force:
        return
    if path.is_dir():
        if part_files(path):
            return
        raise OutputExistsError(f"{path} is a folder; give a file name")
    if sidecar_path(path).is_file() or _written_here(path):
        return
    raise OutputExistsError(f"{path} exists and labelprep did not write it; pass --force to replace it")


# beside the outputs of write_text: {"files": {name: sha256 of the bytes labelprep wrote}}
LEDGER_NAME = ".labelprep-outputs.json"


def _ledger(folder: Path) -> dict:
    try:
        files = json.loads((folder / LEDGER_NAME).read_text(encoding="utf-8")).get("files", {})
    except (OSError, ValueError, AttributeError):
        return {}
    return files if isinstance(files, dict) else {}


def _written_here(path: Path) -> bool:
    expected = _ledger(path.parent).get(path.name)
    if not isinstance(expected, str):
        return False
    try:
        return hashlib.sha256(path.read_bytes()).hexdigest() == expected
    except OSError:
        return False


def _note_written(path: Path, data: bytes) -> None:
    files = _ledger(path.parent)
    files[path.name] = hashlib.sha256(data).hexdigest()
    text = json.dumps({"format": "labelprep-outputs/1", "files": files}, indent=2, sort_keys=True) + "\n"
    with atomic_path(path.parent / LEDGER_NAME) as tmp:
        Path(tmp).write_text(text, encoding="utf-8")


def part_files(path) -> list:
    """The part files of a partitioned manifest folder in row order; empty for anything else
    (a file, a missing path, a folder holding anything besides part files)."""
    path = Path(path)
    if not path.is_dir():
        return []
    names = sorted(os.listdir(path))
    parts = sorted(p.name for p in path.glob(PART_GLOB))
    return [path / name for name in parts] if parts and parts == names else []


def check_partitions(partitions, path) -> None:
    """Raise unless ``path`` may be written as ``partitions`` part files (see :func:`write`);
    callers check before a long scan rather than after it."""
    path = Path(path)
    if not isinstance(partitions, int) or isinstance(partitions, bool):
        raise TypeError(f"partitions must be an int; got {type(partitions).__name__}")
    if partitions < 1:
        raise ParameterError(f"partitions must be >= 1; got partitions={partitions}")
    if not is_parquet(path):
        raise ParameterError(f"partitions needs a .parquet manifest name; got {path}")
    if path.is_dir() and not part_files(path):
        # never replaced, even with force: removing it could delete files labelprep did not write
        raise OutputExistsError(f"{path} is a folder that is not a partitioned manifest; not replaced")


def _write_parts(df, path: Path, partitions: int) -> None:
    """``df`` as ``partitions`` Parquet files of consecutive rows in folder ``path``.

    The parts go to a temporary folder beside ``path`` that then takes its place, so a reader
    never sees a mix of old and new parts.
    """
    import shutil
    from concurrent.futures import ThreadPoolExecutor

    try:
        import pyarrow  # noqa: F401
    except ImportError as exc:
        raise InputError(f"writing {path} needs pyarrow: pip install 'labelprep[parquet]'") from exc
    out = coerce(_without_cache(df))
    bounds = [len(out) * k // partitions for k in range(partitions + 1)]

    def write_part(k):
        part = tmp / PART_NAME.format(k)
        out.iloc[bounds[k]:bounds[k + 1]].to_parquet(part, index=False)
        with open(part, "rb+") as fh:
            os.fsync(fh.fileno())

    tmp = None
    try:
        tmp = Path(tempfile.mkdtemp(prefix=f".{path.name}.", suffix=".tmp", dir=path.parent))
        # pyarrow releases the GIL while it encodes and compresses, so threads write in parallel
        with ThreadPoolExecutor(max_workers=min(partitions, os.cpu_count() or 1)) as pool:
            list(pool.map(write_part, range(partitions)))
        _swap_in(tmp, path)
    except OSError as exc:
        if tmp is not None:
            shutil.rmtree(tmp, ignore_errors=True)
        raise InputError(f"cannot write {path}: {exc.strerror or exc}") from exc
    except BaseException:
        if tmp is not None:
            shutil.rmtree(tmp, ignore_errors=True)
        raise


def _swap_in(new: Path, path: Path) -> None:
    """Put folder ``new`` at ``path``, replacing the file or parts folder there.

    A folder cannot be renamed over another in one step, so the old one is first renamed aside:
    between the two renames ``path`` is briefly missing, never half written.
    """
    import shutil

    if not path.exists():
        os.rename(new, path)
        return
    old = new.with_name(new.name + ".old")
    os.rename(path, old)
    os.rename(new, path)
    if old.is_dir():
        shutil.rmtree(old)
    else:
        old.unlink()


def _fresh_file(path: Path) -> str:
    """Create a new empty file with a unique name beside ``path`` and return its name.

    Created with mode 0666, which the kernel reduces by the process's umask, so outputs get the
    usual permissions without reading the umask (``os.umask`` can only be read by setting it,
    a race with a host program's threads); ``O_EXCL`` makes the name ours alone.
    """
    for _ in range(100):
        tmp = str(path.parent / f".{path.name}.{secrets.token_hex(6)}.tmp")
        try:
            os.close(os.open(tmp, os.O_WRONLY | os.O_CREAT | os.O_EXCL, 0o666))
        except FileExistsError:
            continue
        return tmp
    raise FileExistsError(errno.EEXIST, "no free temporary name", str(path.parent))


@contextlib.contextmanager
def atomic_path(path) -> Iterator[str]:
    """Yield a temporary name beside ``path``; on success rename it over ``path``, else remove it.

    The rename is atomic on POSIX filesystems, so a reader sees the old file or the new one,
    never half of either, even when the process is killed mid-write.
    """
    path = Path(path)
    if not path.parent.is_dir():
        raise InputError(f"cannot write {path}: folder {path.parent} does not exist")
    try:
        tmp = _fresh_file(path)
    except OSError as exc:
        raise InputError(f"cannot write {path}: {exc.strerror}") from exc
    try:
        yield tmp
        with open(tmp, "rb+") as fh:
            os.fsync(fh.fileno())
        os.replace(tmp, path)
    except OSError as exc:
        with contextlib.suppress(OSError):
            os.unlink(tmp)
        raise InputError(f"cannot write {path}: {exc.strerror or exc}") from exc
    except BaseException:
        with contextlib.suppress(OSError):
            os.unlink(tmp)
        raise


def write_text(path, text: str, *, force: bool = False, ledger: bool = True) -> Path:
    """Write a text output (report, audit, list) atomically, through :func:`guard_output`.

    With ``ledger`` the ledger beside it then records the digest of what was written, so
    labelprep may replace the file later without ``force`` as long as nobody changed it; an
    export's lists go without (its folder is replaced as a whole, and a training framework
    should find only the split folders and lists there).
    """
    path = Path(path)
    guard_output(path, force=force)
    data = text.encode("utf-8")
    with atomic_path(path) as tmp:
        Path(tmp).write_bytes(data)
    if ledger:
        _note_written(path, data)
    return path


def write_sidecar(path, meta: dict, *, merge: bool = True) -> Path:
    """Write the JSON sidecar of manifest ``path``, merging ``meta`` into what is there.

    Stages record their options under their own key (``meta["stages"][name]``), so a manifest
    that went through scan, check and group keeps all three. With ``merge=False`` the old
    sidecar is replaced, not merged into.
    """
    from . import __version__

    side = sidecar_path(path)
    old = read_sidecar(path) if merge else {}
    stages = dict(old.get("stages", {}))
    stages.update(meta.get("stages", {}))
    merged = {**old, **meta, "stages": stages, "format": FORMAT_TAG, "tool": "labelprep",
              "version": __version__,
              "written": datetime.now(timezone.utc).isoformat(timespec="seconds")}
    text = json.dumps(_jsonable(merged), indent=2, sort_keys=True) + "\n"
    with atomic_path(side) as tmp:
        Path(tmp).write_text(text, encoding="utf-8")
    return side


def read_sidecar(path) -> dict:
    """The sidecar of manifest ``path`` as a dict; empty when there is none or it is unreadable."""
    side = sidecar_path(path)
    try:
        return json.loads(side.read_text(encoding="utf-8"))
    except (OSError, ValueError):
        return {}


def _jsonable(value: Any):
    if isinstance(value, dict):
        return {str(k): _jsonable(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [_jsonable(v) for v in value]
    if isinstance(value, Path):
        return str(value)
    if isinstance(value, (str, int, float, bool)) or value is None:
        return value
    return str(value)
