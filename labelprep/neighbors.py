"""All pairs of 64-bit hashes within a Hamming radius, without an O(n²) Python loop.

Two exact methods give the same answer as comparing every pair:

``"brute"``
    Blocked, vectorised comparison: a block of rows against every later hash at once. Quadratic
    work but tiny constants, so it wins up to a few tens of thousands of hashes.
``"index"``
    Multi-index hashing. The 64 bits are cut into ``m`` substrings (chunks) with per-chunk radii
    ``r_c`` such that ``sum(r_c + 1) > radius``. By the pigeonhole principle, two hashes within
    ``radius`` agree within ``r_c`` bits on at least one chunk ``c``, so probing a bucket table of
    each chunk with every bit pattern of weight ``<= r_c`` finds every candidate pair; candidates
    are then verified on all 64 bits. Work grows about linearly with ``n`` on hashes spread over
    the space (Norouzi, Punjani and Fleet, "Fast Search in Hamming Space with Multi-Index
    Hashing", CVPR 2012).
"""

from __future__ import annotations

from itertools import combinations
from math import comb

import numpy as np

from .errors import ParameterError

METHODS = ("auto", "brute", "index")

# Below this many hashes "auto" compares every pair: measured by benchmarks/dup_scale.py, the
# blocked comparison beats the index up to roughly this size at radius 8-12.
_BRUTE_MAX_N = 12_000
# Elements of one block's distance matrix; bounds the brute method's memory (~8 bytes each).
_BLOCK_ELEMENTS = 1 << 22
# Widest chunk the index builds a dense bucket table for (2**24 int64 offsets = 128 MiB).
_MAX_CHUNK_BITS = 24
# Relative cost of one table probe against verifying one candidate pair; fitted by eye on
# benchmarks/dup_scale.py timings, only used to choose the chunking.
_PROBE_COST = 3.0


def radius_pairs(hashes, radius, *, method="auto"):
    """Every pair of hashes whose Hamming distance is at most ``radius``.

    Parameters
    ----------
    hashes : numpy.ndarray of uint64, shape (n,)
        The hashes; equal values are allowed (they pair at distance 0).
    radius : int
        Largest Hamming distance reported, 0 to 64.
    method : {"auto", "brute", "index"}
        ``"brute"`` blocked all-pairs comparison, ``"index"`` multi-index hashing, ``"auto"``
        brute force for small inputs and the index otherwise. All give identical results.

    Returns
    -------
    i, j, dist : numpy.ndarray of int64
        Pairs with ``i < j`` and their distances, sorted by ``(i, j)``.

    Examples
    --------
    >>> import numpy as np
    >>> h = np.array([0b0000, 0b0011, 0b1111, 0b0001], dtype=np.uint64)
    >>> i, j, d = radius_pairs(h, 1)
    >>> list(zip(i.tolist(), j.tolist(), d.tolist()))
    [(0, 3, 1), (1, 3, 1)]
    """
    hashes = _check_hashes(hashes)
    if isinstance(radius, bool) or not isinstance(radius, (int, np.integer)):
        raise TypeError(f"radius must be an int, got {type(radius).__name__}")
    radius = int(radius)
    if not 0 <= radius <= 64:
        raise ParameterError(f"radius must be between 0 and 64, got radius={radius}")
    if method not in METHODS:
        raise ParameterError(f"method must be one of {', '.join(METHODS)}, got method={method!r}")
    if method == "auto":
        method = "brute" if len(hashes) <= _BRUTE_MAX_N else "index"
    plan = _plan_chunks(len(hashes), radius) if method == "index" else None
    if plan is None:
        i, j = _brute_pairs(hashes, radius)
    else:
        i, j = _index_pairs(hashes, plan)
    order = np.lexsort((j, i))
    i, j = i[order], j[order]
    dist = np.bitwise_count(hashes[i] ^ hashes[j]).astype(np.int64)
    return i, j, dist


def hex_to_uint64(values):
    """Parse 16-digit hex hash strings into a uint64 array (empty strings are not allowed).

    Examples
    --------
    >>> hex_to_uint64(["00000000000000ff", "8000000000000000"]).tolist()
    [255, 9223372036854775808]
    """
    return np.array([int(v, 16) for v in values], dtype=np.uint64)


def _check_hashes(hashes):
    arr = np.asarray(hashes)
    if arr.ndim != 1:
        raise ParameterError(f"hashes must be a 1-D array, got shape {arr.shape}")
    if arr.dtype != np.uint64:
        if arr.size and not np.issubdtype(arr.dtype, np.integer):
            raise TypeError(f"hashes must be a uint64 array, got dtype {arr.dtype}")
        arr = arr.astype(np.uint64)
    return np.ascontiguousarray(arr)


def _brute_pairs(hashes, radius):
    """Blocked all-pairs comparison: rows ``[a, b)`` against every hash after ``a``."""
    n = len(hashes)
    rows = max(1, _BLOCK_ELEMENTS // max(n, 1))
    found_i, found_j = [], []
    for a in range(0, n, rows):
        b = min(a + rows, n)
        dist = np.bitwise_count(hashes[a:b, None] ^ hashes[None, a:])
        # keep only the upper triangle: column offset k is hash a+k, row r is hash a+r
        near = dist <= radius
        near &= np.arange(n - a)[None, :] > np.arange(b - a)[:, None]
        r, k = np.nonzero(near)
        found_i.append(r + a)
        found_j.append(k + a)
    return _concat(found_i), _concat(found_j)


def _plan_chunks(n, radius):
    """Choose chunk widths and radii for the index, or None when brute force is cheaper.

    For ``m`` chunks, ``radius + 1`` is shared out as ``r_c + 1`` per chunk (wider chunks first);
    the estimated cost counts one probe per pattern per hash and, for hashes spread uniformly,
    ``n²/2 * patterns / 2**width`` candidate pairs per chunk.
    """
    best, best_cost = None, n * (n - 1) / 2  # brute force cost: every pair verified once
    for m in range(1, min(radius + 1, 64) + 1):
        widths = [64 // m + (1 if c < 64 % m else 0) for c in range(m)]
        if widths[0] > _MAX_CHUNK_BITS:
            continue
        radii = [(radius + 1) // m - 1 + (1 if c < (radius + 1) % m else 0) for c in range(m)]
        cost = 0.0
        for width, r in zip(widths, radii):
            patterns = sum(comb(width, k) for k in range(r + 1))
            cost += _PROBE_COST * n * patterns + n * n / 2 * patterns / 2.0**width
        if cost < best_cost:
            best, best_cost = (widths, radii, radius), cost
    return best


def _index_pairs(hashes, plan):
    """Multi-index hashing: probe each chunk's bucket table, verify, keep each pair once."""
    widths, radii, radius = plan
    n = len(hashes)
    shifts = np.cumsum([0] + widths[:-1])
    masks = [np.uint64((1 << w) - 1) << np.uint64(s) for w, s in zip(widths, shifts)]
    found_i, found_j = [], []
    for c, (width, r, shift) in enumerate(zip(widths, radii, shifts)):
        keys = ((hashes >> np.uint64(shift)) & np.uint64((1 << width) - 1)).astype(np.int64)
        order = np.argsort(keys, kind="stable")
        starts = np.zeros((1 << width) + 1, dtype=np.int64)
        np.cumsum(np.bincount(keys, minlength=1 << width), out=starts[1:])
        for pattern in _patterns(width, r):
            probe = keys ^ pattern
            lo, hi = starts[probe], starts[probe + 1]
            count = hi - lo
            q = np.flatnonzero(count)
            if not len(q):
                continue
            cand_i, cand_j = _expand(q, lo[q], count[q], order)
            keep = cand_i < cand_j
            cand_i, cand_j = cand_i[keep], cand_j[keep]
            xor = hashes[cand_i] ^ hashes[cand_j]
            keep = np.bitwise_count(xor) <= radius
            # report a pair only from the first chunk whose radius it meets, so no pair twice
            for earlier in range(c):
                keep &= np.bitwise_count(xor & masks[earlier]) > radii[earlier]
            found_i.append(cand_i[keep])
            found_j.append(cand_j[keep])
    return _concat(found_i), _concat(found_j)


def _patterns(width, r):
    """Every ``width``-bit integer with at most ``r`` bits set, smallest weight first."""
    for k in range(r + 1):
        for bits in combinations(range(width), k):
            yield sum(1 << b for b in bits)


def _expand(queries, lo, count, order):
    """Pairs (query, member) for every query and every member of its bucket range."""
    total = int(count.sum())
    cand_i = np.repeat(queries, count)
    # position inside each run: global offset minus the offset where the run began
    run_start = np.repeat(np.cumsum(count) - count, count)
    cand_j = order[np.repeat(lo, count) + np.arange(total) - run_start]
    return cand_i.astype(np.int64), cand_j.astype(np.int64)


def _concat(parts):
    return np.concatenate(parts).astype(np.int64) if parts else np.zeros(0, dtype=np.int64)
