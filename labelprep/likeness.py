"""Pixel evidence for near-duplicate candidates: how alike two sketches are once aligned.

The hash search (:mod:`labelprep.neighbors`) proposes pairs; this module looks at the pixels of
both (the 32x32 grayscale ``sketch`` every scan stores, :func:`labelprep.hashing.sketch_pixels`)
and measures how well one explains the other. For each pair it tries a few alignments (either
image seen through a centred box of 90%, 80% or 70% of its side, which is how a crop looks, and
the second mirrored left to right where asked), finds the best shift of each by circular
cross-correlation (FFT, up to :data:`MAX_SHIFT` thumbnail pixels either way), and keeps the
alignment with the highest correlation. There, each image is fitted to the other by a gain and
an offset (re-encoding, brightness and contrast edits are close to linear on luminance) and the
residual tells an edited copy from a different picture of the same kind:

``likeness``
    Pearson correlation over the overlap, in [-1, 1];
``blemish``
    the largest mean residual in any 6x6 window, as a share of the image's standard deviation,
    the worse of the two directions. A pixel's residual is its distance to the range of the
    fitted other image over the pixel's 3x3 neighbourhood, so a sub-pixel misalignment, a
    resampling or JPEG ringing at an edge costs next to nothing, while a stroke that moved, a
    shape that is missing or a letter's different serif leaves a large, localised residual
    even when the correlation is as high as a copy's;
``contrast``
    the ratio of the two standard deviations (>= 1): a gain fit can map a faint picture onto a
    strong one, a copy rarely changes contrast by more than a small factor.

Vectorised over pairs in chunks of :data:`_CHUNK`; scipy's FFT (numpy's is several times slower
on many small transforms).
"""

from __future__ import annotations

import numpy as np

MAX_SHIFT = 4
"""Largest shift searched, in thumbnail pixels (1/8 of the side): a 1-px shift of an 8x8 image,
a 4-px shift of a 32-px one."""

ZOOMS = (1.0, 0.9, 0.8, 0.7)
"""Centred boxes, as a share of the side, through which either image is seen (a crop of 5-30%)."""

FLAT = 2.0
"""Standard deviation (0-255 levels) under which a sketch is flat: no pixel evidence either way."""

_SIDE = 32
_WINDOW = 6
_CHUNK = 4096


def _box_matrix(zoom):
    """(32, 32) linear-interpolation matrix resampling the centred box of ``zoom`` to 32 px."""
    matrix = np.zeros((_SIDE, _SIDE))
    centres = (np.arange(_SIDE) + 0.5) * zoom + _SIDE * (1 - zoom) / 2 - 0.5
    low = np.clip(np.floor(centres).astype(int), 0, _SIDE - 1)
    high = np.clip(low + 1, 0, _SIDE - 1)
    frac = centres - np.floor(centres)
    np.add.at(matrix, (np.arange(_SIDE), low), 1 - frac)
    np.add.at(matrix, (np.arange(_SIDE), high), frac)
    return matrix.astype(np.float32)


_BOXES = {zoom: _box_matrix(zoom) for zoom in ZOOMS}
_PLAIN = [(False, 1.0, 1.0)] + [(False, z, 1.0) for z in ZOOMS[1:]] + [(False, 1.0, z) for z in ZOOMS[1:]]
ALIGNMENTS = tuple(_PLAIN + [(True, a, b) for _, a, b in _PLAIN])
"""Every alignment tried: (mirror the second, box of the first, box of the second)."""


def compare(first, second, *, mirror=True, side=None):
    """Evidence that each pair of sketches shows the same picture.

    Parameters
    ----------
    first, second : numpy.ndarray
        ``(k, 32, 32)`` uint8 sketches, pair ``i`` being ``first[i]`` and ``second[i]``.
    mirror : bool or array of bool, default True
        Also try the second image mirrored left to right (for all pairs, or per pair).
    side : array of float, optional
        Per pair, the shorter side in pixels of the smaller image. Under 32 px the sketch is an
        enlargement whose fine structure is the resampler's, not the picture's (an 8x8 image
        enlarged by Lanczos, or first by nearest neighbour, gives different sketches): both
        sketches are then averaged over boxes of one source pixel (``32 // side``) first.

    Returns
    -------
    dict of str to numpy.ndarray
        Per pair: ``likeness``, ``blemish`` and ``contrast`` (see the module docstring),
        ``flat`` (bool: either sketch is flat, :data:`FLAT`), ``level_gap`` (difference of
        the mean levels, 0-255), ``mirrored`` (bool: the best
        alignment mirrors the second), ``shift`` (``(k, 2)`` rows and columns the second is
        moved by to meet the first) and ``zoom`` (``(k, 2)`` the box of each image used).

    Examples
    --------
    >>> import numpy as np
    >>> rng = np.random.default_rng(0)
    >>> a = rng.integers(0, 255, (1, 32, 32)).astype(np.uint8)
    >>> out = compare(a, np.roll(a, 2, axis=2))
    >>> round(float(out["likeness"][0]), 3), out["shift"][0].tolist()
    (1.0, [0, -2])
    """
    first = np.asarray(first)
    second = np.asarray(second)
    if first.shape != second.shape or first.ndim != 3 or first.shape[1:] != (_SIDE, _SIDE):
        raise ValueError(f"sketches must be two (k, 32, 32) arrays of one shape, got {first.shape} and {second.shape}")
    k = len(first)
    mirror = np.broadcast_to(np.asarray(mirror, dtype=bool), (k,))
    out = {"likeness": np.full(k, -np.inf), "blemish": np.full(k, np.inf), "contrast": np.ones(k),
           "flat": np.zeros(k, dtype=bool), "level_gap": np.zeros(k), "mirrored": np.zeros(k, dtype=bool),
           "shift": np.zeros((k, 2), dtype=np.int64), "zoom": np.ones((k, 2))}
    box = np.ones(k, dtype=np.int64)
    if side is not None:
        side = np.broadcast_to(np.asarray(side, dtype=float), (k,))
        box = np.clip(_SIDE // np.clip(np.nan_to_num(side, nan=_SIDE), 1, _SIDE), 1, 8).astype(np.int64)
    for start in range(0, k, _CHUNK):
        part = slice(start, start + _CHUNK)
        _compare_chunk(_coarse(first[part], box[part]), _coarse(second[part], box[part]), mirror[part],
                       {name: value[part] for name, value in out.items()})
    return out


def _coarse(images, box):
    """Each sketch as float32, averaged over ``box`` x ``box`` pixels where box > 1."""
    out = images.astype(np.float32)
    for size in np.unique(box[box > 1]):
        rows = np.flatnonzero(box == size)
        before, after = size // 2, size - 1 - size // 2
        padded = np.pad(out[rows], ((0, 0), (before, after), (before, after)), mode="edge")
        out[rows] = _window_means(padded, int(size))
    return out


def _compare_chunk(a_all, b_all, mirror, out):
    """compare() on one chunk, writing into the views ``out``."""
    import scipy.fft

    def seen(images, zoom, flip=False):
        images = images[:, :, ::-1] if flip else images
        return _BOXES[zoom] @ images @ _BOXES[zoom].T if zoom != 1 else images

    def spectrum(images):
        return scipy.fft.rfft2(images - images.mean(axis=(1, 2), keepdims=True), workers=1)

    views_a = {zoom: seen(a_all, zoom) for zoom in ZOOMS}
    spectra_a = {zoom: spectrum(view) for zoom, view in views_a.items()}
    best_corr = np.full(len(a_all), -np.inf)
    choice = np.zeros((len(a_all), 6))  # flip, zoom a, zoom b, flat index into shift, fractions
    for flip in (False, True):
        rows = np.flatnonzero(mirror) if flip else np.arange(len(a_all))
        if not len(rows):
            continue
        views_b = {zoom: seen(b_all[rows], zoom, flip) for zoom in ZOOMS}
        spectra_b = {zoom: spectrum(view) for zoom, view in views_b.items()}
        for flipped, zoom_a, zoom_b in ALIGNMENTS:
            if flipped != flip:
                continue
            corr, shift, fy, fx = _best_shift(spectra_a[zoom_a][rows], spectra_b[zoom_b])
            norm = np.sqrt(_energy(views_a[zoom_a][rows]) * _energy(views_b[zoom_b]))
            with np.errstate(divide="ignore", invalid="ignore"):
                corr = np.where(norm > 0, corr / norm, 0.0)
            better = corr > best_corr[rows]
            sel = rows[better]
            best_corr[sel] = corr[better]
            choice[sel] = np.column_stack([np.full(len(sel), flip), np.full(len(sel), zoom_a),
                                           np.full(len(sel), zoom_b), shift[better], fy[better], fx[better]])
    # the residual figures once per pair, at its chosen alignment, all pairs at once
    take = np.arange(len(a_all))
    flip = choice[:, 0].astype(bool)
    zoom_index = np.abs(choice[:, 1:3, None] - np.array(ZOOMS)).argmin(axis=2)
    a = np.stack([views_a[z] for z in ZOOMS])[zoom_index[:, 0], take]
    b_flipped = np.where(flip[:, None, None], b_all[:, :, ::-1], b_all)
    b = np.stack([seen(b_flipped, z) for z in ZOOMS])[zoom_index[:, 1], take]
    dy, dx = _unflatten(choice[:, 3].astype(np.int64))
    grid = np.arange(_SIDE)
    rows = np.clip(grid[None, :] - dy[:, None], 0, _SIDE - 1)
    cols = np.clip(grid[None, :] - dx[:, None], 0, _SIDE - 1)
    moved = b[take[:, None, None], rows[:, :, None], cols[:, None, :]]
    inside = (((grid[None, :] - dy[:, None]) >= 0) & ((grid[None, :] - dy[:, None]) < _SIDE))[:, :, None] & \
        (((grid[None, :] - dx[:, None]) >= 0) & ((grid[None, :] - dx[:, None]) < _SIDE))[:, None, :]
    # the fraction of a pixel left over, moved by linear interpolation
    best = _residual(a, _fraction_moved(moved, choice[:, 4], choice[:, 5]), inside)
    for name, value in zip(("likeness", "blemish", "contrast", "flat", "level_gap"), best):
        out[name][:] = value
    out["shift"][:] = np.column_stack([dy, dx])
    out["mirrored"][:] = flip
    out["zoom"][:] = choice[:, 1:3]


_OFFSETS = np.arange(-MAX_SHIFT, MAX_SHIFT + 1)


def _unflatten(index):
    return _OFFSETS[index // len(_OFFSETS)], _OFFSETS[index % len(_OFFSETS)]


def _energy(images):
    centred = images - images.mean(axis=(1, 2), keepdims=True)
    return (centred * centred).sum(axis=(1, 2))


def _best_shift(spectrum_a, spectrum_b):
    """Highest circular cross-correlation of b moved onto a within MAX_SHIFT, its shift index,
    and the fractions of a pixel (rows, columns) a parabola through the peak adds to it."""
    import scipy.fft

    corr = scipy.fft.irfft2(spectrum_a * np.conj(spectrum_b), (_SIDE, _SIDE), workers=1)
    window = corr[:, _OFFSETS[:, None] % _SIDE, _OFFSETS[None, :] % _SIDE].reshape(len(corr), -1)
    best = window.argmax(axis=1)
    dy, dx = _unflatten(best)
    k = np.arange(len(corr))

    def fraction(before, peak, after):
        curve = before - 2 * peak + after
        with np.errstate(divide="ignore", invalid="ignore"):
            return np.clip(np.where(curve < 0, (before - after) / (2 * curve), 0.0), -0.5, 0.5)

    peak = corr[k, dy % _SIDE, dx % _SIDE]
    fy = fraction(corr[k, (dy - 1) % _SIDE, dx % _SIDE], peak, corr[k, (dy + 1) % _SIDE, dx % _SIDE])
    fx = fraction(corr[k, dy % _SIDE, (dx - 1) % _SIDE], peak, corr[k, dy % _SIDE, (dx + 1) % _SIDE])
    return window[k, best], best, fy, fx


def _fraction_moved(images, fy, fx):
    """Each image moved by its fractions of a pixel (|f| <= 0.5), linear interpolation, edge
    repeated."""
    padded = np.pad(images, ((0, 0), (1, 1), (1, 1)), mode="edge")
    h, w = images.shape[1:]
    sy = np.where(fy > 0, 1, -1)
    sx = np.where(fx > 0, 1, -1)
    k = np.arange(len(images))[:, None, None]
    rows = np.arange(h)[None, :, None] + 1
    cols = np.arange(w)[None, None, :] + 1
    wy = np.abs(fy)[:, None, None]
    wx = np.abs(fx)[:, None, None]
    near_y = padded[k, rows - sy[:, None, None], cols]
    near_x = padded[k, rows, cols - sx[:, None, None]]
    near_xy = padded[k, rows - sy[:, None, None], cols - sx[:, None, None]]
    return ((1 - wy) * (1 - wx) * images + wy * (1 - wx) * near_y + (1 - wy) * wx * near_x
            + wy * wx * near_xy).astype(np.float32)


def _residual(a, b, inside):
    """likeness, blemish, contrast, flat and level gap of two aligned stacks, over the pixels
    ``inside`` the overlap."""
    weight = inside.astype(np.float32)
    pixels = weight.sum(axis=(1, 2))

    def mean(x):
        return (x * weight).sum(axis=(1, 2)) / pixels

    mean_a, mean_b = mean(a), mean(b)
    za = (a - mean_a[:, None, None]) * weight
    zb = (b - mean_b[:, None, None]) * weight
    sa = np.sqrt((za * za).sum(axis=(1, 2)) / pixels)
    sb = np.sqrt((zb * zb).sum(axis=(1, 2)) / pixels)
    sab = (za * zb).sum(axis=(1, 2)) / pixels
    flat = (sa < FLAT) | (sb < FLAT)
    with np.errstate(divide="ignore", invalid="ignore"):
        likeness = np.where(flat, np.where((sa < FLAT) & (sb < FLAT), 1.0, 0.0), sab / (sa * sb))
        contrast = np.where(flat, 1.0, np.maximum(sa, sb) / np.minimum(sa, sb))
        blemish = np.maximum(_tolerant(za, zb, sa, sb, likeness, weight),
                             _tolerant(zb, za, sb, sa, likeness, weight))
    return likeness, np.where(flat, 0.0, blemish), contrast, flat, np.abs(mean_a - mean_b)


def _tolerant(target, other, s_target, s_other, likeness, weight):
    """Largest 6x6 window mean of target's distance to the half-pixel range of other fitted
    onto it, in target's standard deviations (pixels outside the overlap count as 0)."""
    gain = np.where(s_other > 0, likeness * s_target / np.where(s_other > 0, s_other, 1), 0.0)
    fitted = np.pad((gain[:, None, None] * other).astype(np.float32), ((0, 0), (1, 1), (1, 1)), mode="edge")
    low, high = _range3(fitted, np.minimum), _range3(fitted, np.maximum)
    gap = np.maximum(np.maximum(low - target, target - high), 0.0) * weight
    local = _window_means(gap, _WINDOW).max(axis=(1, 2))
    return local / np.where(s_target > 0, s_target, 1)


def _range3(padded, pick):
    """Minimum or maximum, per pixel of an edge-padded stack, over the pixel and the four
    half-pixel moves of it (the means with each 4-neighbour): half a pixel of tolerance."""
    centre = padded[:, 1:-1, 1:-1]
    out = centre
    for near in (padded[:, :-2, 1:-1], padded[:, 2:, 1:-1], padded[:, 1:-1, :-2], padded[:, 1:-1, 2:]):
        out = pick(out, (centre + near) / 2)
    return out


def _window_means(values, size):
    """Means over every size x size window of each (k, h, w) array (summed-area table)."""
    table = np.pad(values.cumsum(axis=1).cumsum(axis=2), ((0, 0), (1, 0), (1, 0)))
    sums = table[:, size:, size:] - table[:, :-size, size:] - table[:, size:, :-size] + table[:, :-size, :-size]
    return sums / (size * size)


MAX_BLEMISH = 0.3
"""Largest ``blemish`` of a copy. Chosen on the tune half of benchmarks/dup_kinds.py: planted
copies of digits, letters, clip-art, textures and photos stay at or below 0.25 (shifts and
recolours the highest), distinct digits that a hash links start at 0.23 (10 of 1,342 such pairs
below 0.3)."""

MAX_BLEMISH_SMOOTH = 0.15
"""Largest ``blemish`` of a copy when either image is smooth (``detail`` under
:data:`labelprep.clusters.LOW_DETAIL`): a smooth picture's residual is small everywhere, so a
different digit upsampled bilinearly scores from 0.09. On the tune half (digits upsampled
bilinearly), 5 false pairs of 5,292 candidates pass at 0.15 (15 at 0.2, 108 at 0.3) while 270
of the 281 copies proposed stay."""

MIN_LIKENESS = 0.5
"""Smallest ``likeness`` of a copy: only a guard against fits that explain little; the blemish
decides."""

MAX_CONTRAST = 1.6
"""Largest ``contrast`` ratio of a copy: contrast and brightness edits of +-25% give at most 1.31
on the tune half."""

FLAT_LEVELS = 3.0
"""Two flat sketches are copies when their mean levels differ by at most this (0-255): a blank
frame re-encoded keeps its level; blanks of different colours do not."""


def accepted(evidence, smooth=False):
    """Which compared pairs are copies: a boolean array from :func:`compare`'s evidence;
    ``smooth`` (per pair or for all) marks pairs held to :data:`MAX_BLEMISH_SMOOTH`."""
    flat = evidence["flat"]
    both_flat = flat & (evidence["level_gap"] <= FLAT_LEVELS) & (evidence["likeness"] >= 1.0)
    limit = np.where(smooth, MAX_BLEMISH_SMOOTH, MAX_BLEMISH)
    detailed = (~flat & (evidence["likeness"] >= MIN_LIKENESS) & (evidence["blemish"] <= limit)
                & (evidence["contrast"] <= MAX_CONTRAST))
    return both_flat | detailed
