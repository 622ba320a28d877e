"""One file -> the facts labelprep needs about it. :func:`probe` never raises.

The file is read once: the bytes feed the digest, the format sniff, the structural checks and the
decoder. JPEGs are decoded at reduced scale (Pillow's draft mode, DCT-domain downscaling) because the
hashes need only a small image; the decoder still consumes the whole stream, so truncation is seen.
"""

from __future__ import annotations

import contextlib
import functools
import hashlib
import io
import os
import re
import signal
import stat
import threading
import warnings

from . import defaults, formats
from .errors import ParameterError

# JPEGs are decoded, and other images box-reduced, to a shorter side of at least this many
# pixels: 4x the 32-pixel thumbnail pHash is computed from (hashing.py), so the thumbnail's
# Lanczos filter still averages several source pixels per output pixel. On 15 real photos at
# 1-6x scale the hash then differs from imagehash.phash of the full decode by at most 2 bits
# (tests/test_scanner.py), and a 3000x2000 JPEG decodes at 1/8 scale instead of 1/4.
HASH_SIDE = 128
DEFAULT_MAX_PIXELS = defaults.MAX_PIXELS

_GPS_IFD = 0x8825        # EXIF 2.3 (CIPA DC-008) tag of the GPS Info IFD pointer
# EXIF 2.3 table 15: GPSLatitude, GPSLongitude; a GPS IFD holding only its version has no position
_POSITION_TAGS = frozenset({0x0002, 0x0004})
_ORIENTATION = 0x0112    # TIFF 6.0 / EXIF Orientation tag
_ALPHA_MODES = frozenset({"RGBA", "LA", "PA", "RGBa", "La"})
_MODE_BITS = {"1": 1, "I;16": 16, "I;16B": 16, "I;16L": 16, "I;16N": 16, "I": 32, "F": 32}
# formats Pillow decodes only through a plugin or an optional library: what to install, said in the
# row's reason when it is missing (the plugins register themselves with Pillow on import)
_NEEDS = {
    "heif": "HEIF/HEIC needs the pillow-heif plugin: pip install 'labelprep[heif]'",
    "jxl": "JPEG XL needs the pillow-jxl-plugin: pip install 'labelprep[jxl]'",
    "avif": "AVIF needs Pillow 11.3 or later built with AVIF support: pip install -U 'pillow>=11.3'",
}
# a Python object's default representation, e.g. "<_io.BytesIO object at 0x7f26883bf060>" or
# "<class 'PIL.JpegImagePlugin.JpegImageFile'>": never part of a reason a user reads
_OBJECT_REPR = re.compile(r"\s*<[^<>]*(?: object at 0x[0-9a-fA-F]+|class '[^']*')>")


def blank_facts() -> dict:
    """The facts of a file about which nothing is known yet."""
    return {"bytes": None, "mtime_ns": None, "sha256": "", "format": "", "width": None,
            "height": None, "mode": "", "bits": None, "frames": None, "has_alpha": None,
            "has_gps": None, "fault": "", "fault_detail": "",
            # the columns of hashing.fingerprint, so every row has the same keys (a rescan's cache)
            "phash": "", "phash_c80": "", "phash_c70": "", "phash_mirror": "", "detail": None,
            "spread": None, "sketch": ""}


class _OutOfTime(BaseException):
    """Raised by the alarm inside a probe; a BaseException, so the decoder's ``except Exception``
    clauses cannot turn it into an ordinary decoding fault."""


def expire(signum, frame):
    """The SIGALRM handler of a labelprep worker process (installed by its pool's initializer)."""
    raise _OutOfTime


@contextlib.contextmanager
def _deadline(seconds):
    """Interrupt the block with :class:`_OutOfTime` after ``seconds``.

    The alarm is SIGALRM, a process-wide resource, so it is armed only in a process whose
    handler is :func:`expire`: a worker of :func:`labelprep.parallel.map_ordered` (which scans
    use even for one job). In any other process (a host program calling :func:`probe`), or off
    the main thread, the block runs without a limit and no signal state is touched.
    """
    usable = (seconds is not None and hasattr(signal, "setitimer")
              and threading.current_thread() is threading.main_thread()
              and signal.getsignal(signal.SIGALRM) is expire)
    if not usable:
        yield
        return
    signal.setitimer(signal.ITIMER_REAL, seconds)
    try:
        yield
    finally:
        signal.setitimer(signal.ITIMER_REAL, 0)


def probe(path, *, max_pixels: int = DEFAULT_MAX_PIXELS,
          time_limit: float | None = defaults.PROBE_SECONDS) -> dict:
    """Read one file and return its facts as a dict of manifest columns.

    Parameters
    ----------
    path : str, os.PathLike or callable
        The file (opened read-only; never modified), or a callable returning ``(bytes,
        mtime_ns)`` of data held elsewhere (an archive member); its OSError becomes an
        ``unreadable`` row like the file's own.
    max_pixels : int
        Pixel budget: an image whose header declares more pixels is not decoded (decompression-bomb
        guard) and gets ``fault="pixel-limit"``.
    time_limit : float or None
        Seconds the file may take; a file still being read or decoded then gets
        ``fault="timeout"``. None: no limit. Enforced (by SIGALRM) only in a labelprep worker
        process, so that a host program's signal handling is never touched; scans always probe
        in one (see :func:`labelprep.parallel.map_ordered`'s ``isolated``).

    Returns
    -------
    dict
        ``bytes``, ``mtime_ns``, ``sha256``, ``format``, ``width``, ``height`` (after EXIF
        orientation), ``mode``, ``bits``, ``frames``, ``has_alpha``, ``has_gps``, ``fault``,
        ``fault_detail`` and the columns of :func:`labelprep.hashing.fingerprint`.
        ``fault`` is one of ``""``, ``"empty"``, ``"unreadable"``, ``"not-image"``,
        ``"truncated"``, ``"corrupt"``, ``"pixel-limit"``, ``"timeout"``, ``"no-decoder"`` (a
        format this installation cannot decode; the reason names what to install).

    Examples
    --------
    >>> facts = probe("photo.jpg")            # doctest: +SKIP
    >>> facts["format"], facts["width"], facts["fault"]   # doctest: +SKIP
    ('jpeg', 3000, '')
    """
    if time_limit is not None:
        if not isinstance(time_limit, (int, float)) or isinstance(time_limit, bool):
            raise TypeError(f"time_limit must be a number of seconds or None; got {type(time_limit).__name__}")
        if not time_limit > 0:
            raise ParameterError(f"time_limit must be positive; got time_limit={time_limit!r}")
    facts = blank_facts()
    try:
        with _deadline(time_limit):
            _probe_into(facts, path if callable(path) else os.fspath(path), max_pixels)
    except _OutOfTime:
        facts["fault"], facts["fault_detail"] = "timeout", f"not read and decoded within {time_limit:g} s"
    except ImportError:
        raise  # a broken installation is not a property of the file
    except MemoryError:
        facts["fault"], facts["fault_detail"] = "unreadable", "out of memory while decoding"
    except Exception as exc:  # the contract is a row, never a crash: keep the reason
        facts["fault"] = facts["fault"] or "unreadable"
        facts["fault_detail"] = _one_line(exc)
    return facts


def _probe_into(facts: dict, path, max_pixels: int) -> None:
    try:
        if callable(path):  # an archive member (labelprep.sources): the reader gives its bytes
            data, mtime_ns = path()
        else:
            st = os.stat(path)
            if stat.S_ISDIR(st.st_mode):  # a folder the walk could not list (scanner.walk)
                os.listdir(path)
            with open(path, "rb") as fh:
                data = fh.read()
            mtime_ns = st.st_mtime_ns
    except OSError as exc:
        # the reason alone: the message's absolute path would make the manifest depend on where
        # the tree is (the row's path already names the file)
        facts["fault"], facts["fault_detail"] = "unreadable", exc.strerror or _one_line(exc)
        return
    facts["bytes"] = len(data)
    facts["mtime_ns"] = mtime_ns
    facts["sha256"] = hashlib.sha256(data).hexdigest()
    if not data:
        facts["fault"], facts["fault_detail"] = "empty", "zero bytes"
        return
    fmt = formats.sniff(data[:formats.HEAD_BYTES])
    facts["format"] = fmt
    if not fmt:
        facts["fault"] = "not-image"
        facts["fault_detail"] = f"first bytes {data[:8].hex(' ')} match no image signature"
        return
    _decode_into(facts, data, fmt, max_pixels)


def _decode_into(facts: dict, data: bytes, fmt: str, max_pixels: int) -> None:
    from PIL import Image, ImageOps

    from .hashing import fingerprint

    declared = formats.header_size(fmt, data)
    if declared is not None and declared[0] * declared[1] > max_pixels:
        # judged on the header alone, before Pillow: its own limit would refuse the largest
        # files without saying their size
        facts["width"], facts["height"] = declared
        facts["fault"], facts["fault_detail"] = "pixel-limit", _over_budget(*declared, max_pixels)
        return
    with warnings.catch_warnings():
        # the library never prints: Pillow's warnings are silenced, both the decompression-bomb
        # one (the pixel budget replaces it) and its notes on damaged files
        warnings.simplefilter("ignore")
        missing = decoder_missing(fmt)
        if missing:
            facts["fault"], facts["fault_detail"] = "no-decoder", missing
            return
        try:
            im = Image.open(io.BytesIO(data))
        except Image.DecompressionBombError as exc:
            # over twice Pillow's Image.MAX_IMAGE_PIXELS, which Pillow refuses whatever our budget
            facts["fault"] = "pixel-limit"
            facts["fault_detail"] = (f"{declared[0]}x{declared[1]} is within the budget of {max_pixels:,} pixels but "
                                     f"over Pillow's own limit ({2 * Image.MAX_IMAGE_PIXELS:,})"
                                     if declared else _one_line(exc))
            if declared:
                facts["width"], facts["height"] = declared
            return
        except Exception as exc:
            # a header cut short or failing its checksum is the better explanation when there is one
            kind, why = formats.damage(fmt, data)
            facts["fault"], facts["fault_detail"] = (kind, why) if kind else ("unreadable", _one_line(exc))
            return
        with im:
            # header facts first: the budget and the structure are judged before anything that
            # may decode (Pillow's getexif() loads a whole PNG to find a trailing eXIf chunk)
            width, height = im.size
            facts["width"], facts["height"] = width, height
            facts["mode"] = im.mode
            facts["bits"] = _bits(fmt, data, im.mode)
            facts["has_alpha"] = im.mode in _ALPHA_MODES or "transparency" in im.info
            if width * height > max_pixels:  # a format whose header is not read by formats.header_size
                facts["fault"], facts["fault_detail"] = "pixel-limit", _over_budget(width, height, max_pixels)
                return
            kind, why = formats.damage(fmt, data)
            if kind:  # no time spent decoding pixels that are not all there
                facts["fault"], facts["fault_detail"] = kind, why
                return
            exif = im.getexif()
            orientation = exif.get(_ORIENTATION, 1)
            if orientation in (5, 6, 7, 8):  # these EXIF orientations swap the axes
                facts["width"], facts["height"] = height, width
            # Pillow's n_frames reads a whole GIF through its file object to count frames; its
            # count stands in only where the block walk gives none
            counted = formats.gif_frames(data) if fmt == "gif" else None
            facts["frames"] = counted or getattr(im, "n_frames", 1)
            facts["has_gps"] = bool(_POSITION_TAGS & exif.get_ifd(_GPS_IFD).keys())
            try:
                im = _load_small(im, fmt, data)
            except Exception as exc:
                detail = _one_line(exc)
                facts["fault"] = "truncated" if "truncated" in detail else "unreadable"
                facts["fault_detail"] = detail
                return
            small = _reduce(im)
            small = ImageOps.exif_transpose(small) if orientation != 1 else small
            facts.update(fingerprint(_eight_bit(small)))


@functools.cache
def decoder_missing(fmt: str) -> str:
    """``""`` when this installation decodes ``fmt``; else what to install, as a row's reason.

    Importing a plugin registers it with Pillow, once per process (cached).

    Examples
    --------
    >>> decoder_missing("png")
    ''
    """
    if fmt == "heif":
        try:
            import pillow_heif
        except ImportError:
            return _NEEDS[fmt]
        pillow_heif.register_heif_opener()
    elif fmt == "jxl":
        try:
            import pillow_jxl  # noqa: F401 - registers the JPEG XL plugin with Pillow
        except ImportError:
            return _NEEDS[fmt]
    elif fmt == "avif":
        from PIL import features

        if not features.check("avif"):
            return _NEEDS[fmt]
    return ""


def register_plugins() -> None:
    """Register with Pillow every optional decoder plugin that is installed (see :func:`decoder_missing`).

    Examples
    --------
    >>> register_plugins()   # afterwards Image.open reads HEIC where pillow-heif is installed
    """
    for fmt in _NEEDS:
        decoder_missing(fmt)


def _load_small(im, fmt: str, data: bytes):
    """``im`` decoded at the smallest scale the hashes need: a JPEG through draft mode, a JPEG 2000
    with fewer resolution levels; other formats in full (then box-reduced by :func:`_reduce`).

    A JPEG 2000 whose reduced decode fails (a tile may declare fewer levels than the main
    header) is decoded again in full, so that an error reported is the file's own.
    """
    if fmt == "jpeg":
        draft_for_hashing(im)
        # the bytes are in memory already: one decoder call instead of one per 64 KiB block,
        # each of which copies the block and the unconsumed rest (4% of the decode's instructions)
        im.decodermaxblock = max(im.decodermaxblock, len(data))
    elif fmt == "jpeg2000":
        levels = _jpeg2000_levels_to_skip(im.size, formats.jpeg2000_levels(data))
        if levels:
            im.reduce = levels  # Pillow's JPEG 2000 plugin: decode 1/2**levels of each side
            try:
                im.load()
                return im
            except Exception:
                from PIL import Image

                im = Image.open(io.BytesIO(data))
    im.load()
    return im


def _jpeg2000_levels_to_skip(size, levels) -> int:
    """The most resolution levels a JPEG 2000 decode may drop keeping the shorter side at least
    :data:`HASH_SIDE`; each level halves both sides (ISO/IEC 15444-1 annex F)."""
    skip = 0
    while levels is not None and skip < levels and min(size) >> (skip + 1) >= HASH_SIDE:
        skip += 1
    return skip


def draft_for_hashing(im) -> None:
    """Ask the JPEG decoder for the smallest image the hashes and checks need.

    The DCT scale (1/2, 1/4 or 1/8) is the smallest that keeps the shorter side at least
    :data:`HASH_SIDE`, and a colour JPEG is decoded to luminance only, since every hash and the
    spread work on gray: libjpeg then skips the colour planes' inverse DCT, upsampling and
    conversion. The decoder still reads every entropy-coded byte, so truncation is still seen.
    """
    im.draft("L" if im.mode == "RGB" else im.mode, (HASH_SIDE, HASH_SIDE))


def preload() -> None:
    """Import, in this process, everything decoding a file needs (Pillow and its format plugins,
    numpy), by probing a small JPEG made in memory.

    Worker processes forked afterwards inherit the modules instead of each importing them again:
    about 0.2 s of CPU saved per worker, which on a few hundred files is a few percent.
    """
    from PIL import Image

    Image.init()
    register_plugins()
    buf = io.BytesIO()
    Image.new("RGB", (2 * HASH_SIDE, 2 * HASH_SIDE)).save(buf, "JPEG")
    _decode_into(blank_facts(), buf.getvalue(), "jpeg", DEFAULT_MAX_PIXELS)


# modes whose samples are not intensities (palette indices) or that reduce() refuses, and the
# mode they are reduced in instead (averaging palette indices would give noise)
_REDUCE_AS = {"P": "RGB", "PA": "RGBA", "1": "L", "I;16": "I", "I;16L": "I", "I;16B": "I", "I;16N": "I"}


def _reduce(im):
    """``im`` box-reduced so that its shorter side is in [HASH_SIDE, 2*HASH_SIDE); small ones as they are.

    JPEGs arrive here already reduced by draft mode; other formats are decoded in full, and a
    reduction by an integer factor (box filter) is the cheapest way to make the hash and spread
    work independent of the image size.
    """
    factor = min(im.size) // HASH_SIDE
    if factor < 2:
        return im
    mode = _REDUCE_AS.get(im.mode)
    if mode == "RGB" and "transparency" in im.info:
        mode = "RGBA"
    from PIL import Image

    try:
        # the base class's method: Pillow's JPEG 2000 plugin shadows reduce() with its
        # resolution-level setting once that is set (see _load_small)
        return Image.Image.reduce(im.convert(mode) if mode else im, factor)
    except ValueError:  # a mode reduce() does not know: the hash code resizes it itself
        return im


def _bits(fmt: str, data: bytes, mode: str) -> int:
    """Bits per sample as stored. Pillow reads 16-bit RGB PNGs as 8-bit RGB, so the mode alone
    would hide them; the PNG header says it (PNG specification 11.2.2: IHDR bit depth, byte 24)."""
    if fmt == "png" and len(data) > 24:
        return data[24]
    return _MODE_BITS.get(mode, 8)


def _eight_bit(im):
    """``im`` as it is, or for 16-bit, int and float samples their own range stretched to 0..255 (L).

    Pillow's conversion to L clips such samples at 255, which turns most 16-bit images white:
    blank to the spread, and one hash shared with every flat image.
    """
    if not (im.mode.startswith("I") or im.mode == "F"):
        return im
    import numpy as np
    from PIL import Image

    values = np.asarray(im.convert("F"), dtype=np.float32)
    low, span = float(values.min()), float(values.max() - values.min())
    scaled = (values - low) * (255 / span) if span > 0 else np.zeros_like(values)
    return Image.fromarray(scaled.round().astype(np.uint8))


def _over_budget(width: int, height: int, max_pixels: int) -> str:
    return f"{width}x{height} = {width * height:,} pixels, budget {max_pixels:,}"


def _one_line(exc: BaseException) -> str:
    """The exception's message on one line, without Python object representations (Pillow says
    "cannot identify image file <_io.BytesIO object at 0x...>", which tells a user nothing)."""
    text = " ".join(_OBJECT_REPR.sub("", str(exc)).split())
    if text == "cannot identify image file":
        text = "Pillow cannot identify the image data (damaged, or a variant its decoder does not read)"
    return text[:200] or f"the decoder failed without a message ({type(exc).__name__})"
