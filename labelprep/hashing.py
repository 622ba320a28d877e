"""Perceptual fingerprints of one image: the manifest's hash columns.

Every hash is the 64-bit DCT perceptual hash of imagehash.phash (grayscale, 32x32 Lanczos
thumbnail, 2-D DCT-II, the 8x8 lowest frequencies compared with their median), computed here from
the DCT so that one thumbnail serves several hashes:

``phash``
    the whole image (identical to ``str(imagehash.phash(img))``);
``phash_c80``, ``phash_c70``
    the centred box keeping 80% and 70% of each side. A copy cropped by 5-15% per side has its
    whole-image hash close to one of these, where its ``phash`` moves 12-30 bits.
``phash_mirror``
    the hash of the left-right mirrored image, taken from the same DCT: mirroring a row reverses
    it, which multiplies DCT-II coefficient ``k`` by ``(-1)**k``.
``detail``
    the share of the thumbnail's AC energy above the 8x8 frequencies the hash keeps. A smooth
    image (icon, blank, small picture upscaled) has little, its hash bits are strongly
    correlated, and distinct images of that kind fall within a few bits of each other.
"""

from __future__ import annotations

import numpy as np

HASH_COLUMNS = ("phash", "phash_c80", "phash_c70")
"""The hashes compared to find near copies (any of one image against any of another)."""

INNER_COLUMN = "phash_c70"
"""The innermost box: two images matched on another box must also agree here."""

MIRROR_COLUMN = "phash_mirror"

# box kept around the centre, as the fraction cut from each side
_INNER_BOXES = {"phash_c80": 0.10, "phash_c70": 0.15}
_THUMB = 32  # thumbnail side: imagehash.phash's hash_size 8 times highfreq_factor 4
_BITS = 8

# weights turning scipy's unnormalised DCT-II into the orthonormal one (energy-preserving)
_ORTHO = np.sqrt(np.r_[1 / (4 * _THUMB), np.full(_THUMB - 1, 1 / (2 * _THUMB))])
_ORTHO_2D = np.outer(_ORTHO, _ORTHO)
_MIRROR_SIGNS = np.where(np.arange(_BITS) % 2 == 1, -1.0, 1.0)[None, :]


def fingerprint(img):
    """The hash columns of one decoded image.

    Parameters
    ----------
    img : PIL.Image.Image
        The image after EXIF orientation, in any mode; it may have been reduced (JPEG draft
        mode) as long as its shorter side stays at least ``probe.HASH_SIDE`` (128) px when the
        original was larger: four times the 32 px thumbnail the DCT is taken from.

    Returns
    -------
    dict of str to str or float
        ``phash``, ``phash_c80``, ``phash_c70`` and ``phash_mirror`` as 16 lowercase hex
        digits, and ``detail`` as a float in [0, 1].

    Examples
    --------
    >>> from PIL import Image
    >>> fp = fingerprint(Image.linear_gradient("L"))
    >>> sorted(fp)
    ['detail', 'phash', 'phash_c70', 'phash_c80', 'phash_mirror']
    >>> fp["phash"] == fp["phash_mirror"]  # a top-to-bottom gradient is its own mirror image
    True
    """
    from PIL import Image

    if not isinstance(img, Image.Image):
        raise TypeError(f"fingerprint expects a PIL.Image.Image, got {type(img).__name__}")
    # the same conversion imagehash.phash makes, so that "phash" equals its value bit for bit
    gray = img.convert("L")
    full = _dct(gray, None)
    out = {"phash": _hex(full[:_BITS, :_BITS]),
           MIRROR_COLUMN: _hex(full[:_BITS, :_BITS] * _MIRROR_SIGNS)}
    # the box hashes need no bit-exact reference, so they start from a box-filtered reduction
    # (shorter side still >= 4x the thumbnail): about half the cost of two full Lanczos passes
    factor = max(1, min(gray.size) // (4 * _THUMB))
    small = gray.reduce(factor) if factor > 1 else gray
    for name, cut in _INNER_BOXES.items():
        w, h = small.size
        out[name] = _hex(_dct(small, (w * cut, h * cut, w * (1 - cut), h * (1 - cut)))[:_BITS, :_BITS])
    energy = (full * _ORTHO_2D) ** 2
    energy[0, 0] = 0.0
    total = float(energy.sum())
    kept = float(energy[:_BITS, :_BITS].sum())
    out["detail"] = round((total - kept) / total, 4) if total > 0 else 0.0
    return out


def _dct(gray, box):
    """2-D DCT-II (scipy.fftpack convention, as imagehash uses) of the 32x32 thumbnail of box."""
    from PIL import Image
    from scipy.fftpack import dct

    thumb = gray.resize((_THUMB, _THUMB), Image.Resampling.LANCZOS, box=box)
    pixels = np.asarray(thumb, dtype=np.float64)
    return dct(dct(pixels, axis=0), axis=1)


def _hex(coefficients):
    """imagehash's bit order: row-major, first coefficient the most significant bit."""
    bits = (coefficients > np.median(coefficients)).ravel()
    value = int.from_bytes(np.packbits(bits).tobytes(), "big")
    return f"{value:016x}"
