"""Perceptual fingerprints of one image: the manifest's hash columns.

Every hash is the 64-bit DCT perceptual hash of imagehash.phash (grayscale, 32x32 Lanczos
thumbnail, 2-D DCT-II, the 8x8 lowest frequencies compared with their median), computed here from
the DCT so that one thumbnail serves several hashes. The DCT is two products with the 32x32 DCT-II
matrix (numpy), not scipy's: importing scipy.fft costs about half a second in every scan and
worker, more than the transforms of a few hundred files.

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
``sketch``
    the 32x32 grayscale thumbnail the whole-image hash is taken from, its 1,024 bytes (row-major,
    0-255) in standard base64 (1,368 characters): a signature rich enough to compare two images
    on their pixels, and to learn from, with no second decode of either file.
``spread``
    the standard deviation of the thumbnail's luminance (0-255): near 0 for a blank image. It
    comes from the same DCT, since an orthonormal DCT keeps energy (Parseval): the AC energy is
    the thumbnail's variance times its pixel count. No second thumbnail is made for it.
"""

from __future__ import annotations

import base64

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

# scipy.fftpack.dct's unnormalised DCT-II as a matrix: C[k, n] = 2 cos(pi k (2n + 1) / 2N)
_DCT = 2 * np.cos(np.pi * np.outer(np.arange(_THUMB), 2 * np.arange(_THUMB) + 1) / (2 * _THUMB))
# coefficients this small next to the largest are rounding noise of an exact zero (a flat or
# symmetric image): zeroed, as scipy's transform gives them, so such images keep imagehash's hash
_ZERO = 1e-9
# weights turning the unnormalised DCT-II into the orthonormal one (energy-preserving)
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
        digits, ``detail`` as a float in [0, 1], ``spread`` as a float in [0, 127.5] and
        ``sketch`` as base64 text (decode it with :func:`sketch_pixels`).

    Examples
    --------
    >>> from PIL import Image
    >>> fp = fingerprint(Image.linear_gradient("L"))
    >>> sorted(fp)
    ['detail', 'phash', 'phash_c70', 'phash_c80', 'phash_mirror', 'sketch', 'spread']
    >>> fp["phash"] == fp["phash_mirror"]  # a top-to-bottom gradient is its own mirror image
    True
    """
    from PIL import Image

    if not isinstance(img, Image.Image):
        raise TypeError(f"fingerprint expects a PIL.Image.Image, got {type(img).__name__}")
    # the same conversion imagehash.phash makes, so that "phash" equals its value bit for bit
    gray = img.convert("L")
    thumb = np.asarray(gray.resize((_THUMB, _THUMB), Image.Resampling.LANCZOS), dtype=np.uint8)
    full = _transform(thumb.astype(np.float64), _THUMB)
    low = [full[:_BITS, :_BITS], full[:_BITS, :_BITS] * _MIRROR_SIGNS]
    # the box hashes need no bit-exact reference, so they start from a box-filtered reduction
    # whose shorter side is still >= 2x the thumbnail: a Lanczos pass costs in proportion to the
    # source pixels, so on a 375x250 JPEG draft this makes both boxes 9x cheaper
    factor = max(1, min(gray.size) // (2 * _THUMB))
    small = gray.reduce(factor) if factor > 1 else gray
    w, h = small.size
    low += [_dct(small, (w * cut, h * cut, w * (1 - cut), h * (1 - cut)), _BITS) for cut in _INNER_BOXES.values()]
    out = dict(zip(("phash", MIRROR_COLUMN, *_INNER_BOXES), _hex(np.stack(low))))
    energy = (full * _ORTHO_2D) ** 2
    energy[0, 0] = 0.0
    total = float(energy.sum())
    kept = float(energy[:_BITS, :_BITS].sum())
    out["detail"] = round((total - kept) / total, 4) if total > 0 else 0.0
    out["spread"] = round(float(np.sqrt(total / _THUMB ** 2)), 4)
    out["sketch"] = base64.b64encode(thumb.tobytes()).decode("ascii")
    return out


def sketch_pixels(cells):
    """The thumbnails of ``sketch`` cells as an ``(n, 32, 32)`` uint8 array.

    Parameters
    ----------
    cells : sequence of str
        ``sketch`` values as :func:`fingerprint` writes them; an empty cell (an undecodable file)
        gives a thumbnail of zeros.

    Examples
    --------
    >>> from PIL import Image
    >>> sketch_pixels([fingerprint(Image.new("L", (64, 64), 200))["sketch"], ""])[:, 0, 0].tolist()
    [200, 0]
    """
    out = np.zeros((len(cells), _THUMB, _THUMB), dtype=np.uint8)
    filled = [i for i, cell in enumerate(cells) if cell]
    raws = [base64.b64decode(cells[i], validate=True) for i in filled]
    wrong = next((raw for raw in raws if len(raw) != _THUMB * _THUMB), None)
    if wrong is not None:
        raise ValueError(f"a sketch holds {_THUMB * _THUMB} bytes; got {len(wrong)}")
    if raws:
        out[filled] = np.frombuffer(b"".join(raws), dtype=np.uint8).reshape(-1, _THUMB, _THUMB)
    return out


def _dct(gray, box, keep=_THUMB):
    """2-D DCT-II (scipy.fftpack convention, as imagehash uses) of the 32x32 thumbnail of box:
    its ``keep`` x ``keep`` lowest frequencies."""
    from PIL import Image

    thumb = gray.resize((_THUMB, _THUMB), Image.Resampling.LANCZOS, box=box)
    return _transform(np.asarray(thumb, dtype=np.float64), keep)


def _transform(pixels, keep):
    """The ``keep`` x ``keep`` lowest DCT-II frequencies of a 32x32 thumbnail."""
    basis = _DCT[:keep]
    coefficients = basis @ pixels @ basis.T
    coefficients[np.abs(coefficients) <= _ZERO * np.abs(coefficients).max()] = 0.0
    return coefficients


def _hex(blocks):
    """One hash per 8x8 block of ``blocks`` (n, 8, 8), in imagehash's bit order: row-major, first
    coefficient the most significant bit, each bit set when above its block's median."""
    flat = blocks.reshape(len(blocks), -1)
    bits = np.packbits(flat > np.median(flat, axis=1, keepdims=True), axis=1)
    return [row.tobytes().hex() for row in bits]


SHIFTS = tuple((dy, dx) for dy in (-1, 0, 1) for dx in (-1, 0, 1) if (dy, dx) != (0, 0))
"""The eight directions of :func:`shifted_phashes`."""


def shifted_phashes(pixels, step):
    """The whole-image hash of each sketch moved by ``step`` pixels in each of the 8 directions.

    pHash moves by many bits when a picture is shifted by a few percent of its side, so a shifted
    copy is no candidate for the hash search; these hashes make it one. The sketch is moved with
    its edge repeated into the gap; only the 8x8 low frequencies are computed (two products per
    direction instead of a whole DCT).

    Parameters
    ----------
    pixels : numpy.ndarray
        ``(n, 32, 32)`` sketches (:func:`sketch_pixels`).
    step : int or array of int
        Pixels to move by, for all sketches or one per sketch (1 to 8).

    Returns
    -------
    numpy.ndarray
        ``(n, 8)`` uint64 hashes in the order of :data:`SHIFTS`, imagehash's bit order.

    Examples
    --------
    >>> from PIL import Image
    >>> fp = fingerprint(Image.linear_gradient("L").rotate(30))
    >>> moved = shifted_phashes(sketch_pixels([fp["sketch"]]), 2)
    >>> moved.shape, str(moved.dtype)
    ((1, 8), 'uint64')
    """
    pixels = np.asarray(pixels, dtype=np.float32)
    n = len(pixels)
    steps = np.broadcast_to(np.asarray(step, dtype=np.int64), (n,))
    if n and (steps.min() < 1 or steps.max() > 8):
        raise ValueError(f"step must be between 1 and 8 pixels, got {int(steps.min())}..{int(steps.max())}")
    basis = _DCT[:_BITS].astype(np.float32)
    out = np.zeros((n, len(SHIFTS)), dtype=np.uint64)
    for s in np.unique(steps):
        rows = np.flatnonzero(steps == s)
        k = len(rows)
        moved = {d: basis @ _shift_matrix(d * s) for d in (-1, 0, 1)}
        # one matrix product per direction over all sketches at once (as columns side by side)
        columns = pixels[rows].transpose(1, 0, 2).reshape(_THUMB, k * _THUMB)
        left = {dy: (moved[dy] @ columns).reshape(_BITS, k, _THUMB).transpose(1, 0, 2).reshape(k * _BITS, _THUMB)
                for dy in (-1, 0, 1)}
        blocks = np.stack([(left[dy] @ moved[dx].T).reshape(k, _BITS * _BITS) for dy, dx in SHIFTS], axis=1)
        # the median rule of _hex (candidates need no bit-exact reference, so no zeroing of
        # rounding noise as in _transform)
        bits = blocks.reshape(k * len(SHIFTS), _BITS * _BITS)
        middle = np.partition(bits, (_BITS * _BITS // 2 - 1, _BITS * _BITS // 2), axis=1)
        median = middle[:, _BITS * _BITS // 2 - 1: _BITS * _BITS // 2 + 1].mean(axis=1, keepdims=True)
        packed = np.packbits(bits > median, axis=1)
        out[rows] = packed.view(">u8").astype(np.uint64).reshape(k, len(SHIFTS))
    return out


def _shift_matrix(offset):
    """(32, 32) matrix moving a column vector by ``offset`` entries, the edge repeated."""
    source = np.clip(np.arange(_THUMB) - offset, 0, _THUMB - 1)
    matrix = np.zeros((_THUMB, _THUMB), dtype=np.float32)
    matrix[np.arange(_THUMB), source] = 1.0
    return matrix
