"""One file -> the facts labelprep needs about it. :func:`probe` never raises.

The file is read once: the bytes feed the digest, the format sniff, the structural checks and the
decoder. JPEGs are decoded at reduced scale (Pillow's draft mode, DCT-domain downscaling) because the
hashes need only a small image; the decoder still consumes the whole stream, so truncation is seen.
"""

from __future__ import annotations

import hashlib
import io
import os
import warnings

from . import defaults, formats

HASH_SIDE = 256          # the hashes work on at most this many pixels per side (see hashing.py)
DEFAULT_MAX_PIXELS = defaults.MAX_PIXELS

_GPS_IFD = 0x8825        # EXIF 2.3 (CIPA DC-008) tag of the GPS Info IFD pointer
_ORIENTATION = 0x0112    # TIFF 6.0 / EXIF Orientation tag
_ALPHA_MODES = frozenset({"RGBA", "LA", "PA", "RGBa", "La"})


def blank_facts() -> dict:
    """The facts of a file about which nothing is known yet."""
    return {"bytes": None, "mtime_ns": None, "sha256": "", "format": "", "width": None,
            "height": None, "mode": "", "frames": None, "has_alpha": None, "has_gps": None,
            "spread": None, "fault": "", "fault_detail": "", "phash": ""}


def probe(path, *, max_pixels: int = DEFAULT_MAX_PIXELS) -> dict:
    """Read one file and return its facts as a dict of manifest columns.

    Parameters
    ----------
    path : str or os.PathLike
        The file (opened read-only; never modified).
    max_pixels : int
        Pixel budget: an image whose header declares more pixels is not decoded (decompression-bomb
        guard) and gets ``fault="pixel-limit"``.

    Returns
    -------
    dict
        ``bytes``, ``mtime_ns``, ``sha256``, ``format``, ``width``, ``height`` (after EXIF
        orientation), ``mode``, ``frames``, ``has_alpha``, ``has_gps``, ``spread``, ``fault``,
        ``fault_detail`` and the hash columns of :func:`labelprep.hashing.fingerprint`.
        ``fault`` is one of ``""``, ``"empty"``, ``"unreadable"``, ``"not-image"``,
        ``"truncated"``, ``"pixel-limit"``.

    Examples
    --------
    >>> facts = probe("photo.jpg")            # doctest: +SKIP
    >>> facts["format"], facts["width"], facts["fault"]   # doctest: +SKIP
    ('jpeg', 3000, '')
    """
    facts = blank_facts()
    try:
        _probe_into(facts, os.fspath(path), max_pixels)
    except MemoryError:
        facts["fault"], facts["fault_detail"] = "unreadable", "out of memory while decoding"
    except Exception as exc:  # the contract is a row, never a crash: keep the reason
        facts["fault"] = facts["fault"] or "unreadable"
        facts["fault_detail"] = _one_line(exc)
    return facts


def _probe_into(facts: dict, path: str, max_pixels: int) -> None:
    try:
        st = os.stat(path)
        with open(path, "rb") as fh:
            data = fh.read()
    except OSError as exc:
        facts["fault"], facts["fault_detail"] = "unreadable", _one_line(exc)
        return
    facts["bytes"] = len(data)
    facts["mtime_ns"] = st.st_mtime_ns
    facts["sha256"] = hashlib.sha256(data).hexdigest()
    if not data:
        facts["fault"], facts["fault_detail"] = "empty", "zero bytes"
        return
    fmt = formats.sniff(data[:formats.HEAD_BYTES])
    facts["format"] = fmt
    if not fmt:
        facts["fault"], facts["fault_detail"] = "not-image", "content matches no image signature"
        return
    _decode_into(facts, data, fmt, max_pixels)


def _decode_into(facts: dict, data: bytes, fmt: str, max_pixels: int) -> None:
    from PIL import Image, ImageOps

    from .hashing import fingerprint

    with warnings.catch_warnings():
        # the pixel budget below replaces Pillow's own warning; an error above twice its limit
        # still reaches the except clause as a pixel-limit fault
        warnings.simplefilter("ignore", Image.DecompressionBombWarning)
        try:
            im = Image.open(io.BytesIO(data))
        except Image.DecompressionBombError as exc:
            facts["fault"], facts["fault_detail"] = "pixel-limit", _one_line(exc)
            return
        except Exception as exc:
            facts["fault"], facts["fault_detail"] = "unreadable", _one_line(exc)
            return
        with im:
            width, height = im.size
            exif = im.getexif()
            orientation = exif.get(_ORIENTATION, 1)
            if orientation in (5, 6, 7, 8):  # these EXIF orientations swap the axes
                width, height = height, width
            facts["width"], facts["height"] = width, height
            facts["mode"] = im.mode
            facts["frames"] = getattr(im, "n_frames", 1)
            facts["has_alpha"] = im.mode in _ALPHA_MODES or "transparency" in im.info
            facts["has_gps"] = bool(exif.get_ifd(_GPS_IFD))
            if width * height > max_pixels:
                facts["fault"] = "pixel-limit"
                facts["fault_detail"] = f"{width}x{height} = {width * height:,} pixels, budget {max_pixels:,}"
                return
            if fmt == "jpeg":
                im.draft(im.mode, (HASH_SIDE, HASH_SIDE))
            try:
                im.load()
            except Exception as exc:
                detail = _one_line(exc)
                facts["fault"] = "truncated" if "truncated" in detail else "unreadable"
                facts["fault_detail"] = detail
                return
            missing = formats.incomplete(fmt, data)
            if missing:
                facts["fault"], facts["fault_detail"] = "truncated", missing
                return
            small = _reduce(im)
            small = ImageOps.exif_transpose(small) if orientation != 1 else small
            facts["spread"] = _spread(small)
            facts.update(fingerprint(small))


def _reduce(im):
    """A copy of ``im`` whose shorter side is about HASH_SIDE..2*HASH_SIDE (box filter, cheap)."""
    factor = min(im.size) // HASH_SIDE
    if factor >= 2:
        try:
            return im.reduce(factor)
        except ValueError:  # modes reduce() does not support (e.g. P, 1)
            pass
    return im.copy()


def _spread(im) -> float:
    """Luminance standard deviation on a 64-pixel thumbnail: close to 0 for a blank image."""
    import numpy as np

    gray = im.convert("RGBA").convert("L") if im.mode in ("P", "PA") else im.convert("L")
    gray = gray.resize((64, 64))
    return round(float(np.asarray(gray, dtype=np.float64).std()), 4)


def _one_line(exc: BaseException) -> str:
    text = " ".join(str(exc).split()) or type(exc).__name__
    return text[:200]
