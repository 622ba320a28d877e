"""All pairs of 64-bit hashes within a Hamming radius, without an O(n²) Python loop.

Two exact methods give the same answer as comparing every pair:

``"brute"``
    Blocked, vectorised comparison: a block of rows against every later hash at once. Quadratic
    work but no set-up, so it wins on small inputs (a few thousand hashes at radius 8; "auto"
    decides from the cost model in :func:`_plan_chunks`).
``"index"``
    Multi-index hashing. The 64 bits are cut into ``m`` substrings (chunks) with per-chunk radii
    ``r_c`` such that ``sum(r_c + 1) > radius``. By the pigeonhole principle, two hashes within
    ``radius`` agree within ``r_c`` bits on at least one chunk ``c``, so probing a bucket table of
    each chunk with every bit pattern of weight ``<= r_c`` finds every candidate pair; candidates
    are then verified on all 64 bits. On hashes spread over the space the work is far below
    quadratic: 1,000,000 hashes at radius 8 take seconds (benchmarks/dup_scale.py) (Norouzi, Punjani and Fleet, "Fast Search in Hamming Space with Multi-Index
    Hashing", CVPR 2012).
"""

from __future__ import annotations

import os
from itertools import combinations
from math import comb

import numpy as np

from .errors import ParameterError

METHODS = ("auto", "brute", "index")

# Elements of one block's distance matrix; bounds the brute method's memory (~8 bytes each).
_BLOCK_ELEMENTS = 1 << 22
# Widest chunk the index builds a dense bucket table for (2**24 int64 offsets = 128 MiB).
_MAX_CHUNK_BITS = 24
# Costs relative to verifying one index candidate (about 40 ns), measured on 1e6 random hashes:
# one table probe about 14 ns, one brute-force pair about 5.5 ns, one bucket-table slot built
# about 5 ns. They only steer the choice of method and chunking; every choice returns the same
# pairs.
_PROBE_COST = 0.35
_BRUTE_PAIR_COST = 0.14
_TABLE_COST = 0.12


def radius_pairs(hashes, radius, *, method="auto", progress=None, cluster=None):
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
    progress : callable, optional
        ``progress(iterable, total=int, label=str)`` returning an iterable; wraps the index's
        passes (one per chunk, run in parallel threads).
    cluster : str, optional
        Address of a Dask scheduler: the index's passes (one per chunk and probe bit, a few
        dozen) run as tasks on its workers, the hashes sent to each worker once. The same pairs.

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
    n = len(hashes)
    plan, cost = _plan_chunks(n, radius)
    if method == "brute" or (method == "auto" and _BRUTE_PAIR_COST * n * n / 2 <= cost):
        i, j = _brute_pairs(hashes, radius)
    elif cluster is not None:
        i, j = _cluster_pairs(hashes, plan, cluster, progress)
    else:
        i, j = _index_pairs(hashes, plan, progress)
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
    """Chunk widths and radii for the index with the lowest estimated cost, and that cost.

    For ``m`` chunks, ``radius + 1`` is shared out as ``r_c + 1`` per chunk (wider chunks first).
    For hashes spread uniformly a chunk costs its table, one probe per hash per pattern (half the
    patterns, since each pair is probed from one side) and ``n²/2 * patterns / 2**width``
    candidates.
    """
    best, best_cost = None, float("inf")
    # more chunks than radius + 1 leave some unused (radius -1), which only helps when radius is tiny
    for m in range(1, max(radius + 1, 3) + 1):
        widths = [64 // m + (1 if c < 64 % m else 0) for c in range(m)]
        if widths[0] > _MAX_CHUNK_BITS:
            continue
        radii = [(radius + 1) // m - 1 + (1 if c < (radius + 1) % m else 0) for c in range(m)]
        cost = 0.0
        for width, r in zip(widths, radii):
            patterns = sum(comb(width, k) for k in range(r + 1))
            cost += (_TABLE_COST * 2.0**width + _PROBE_COST * n * patterns / 2
                     + n * n / 2 * patterns / 2.0**width)
        if cost < best_cost:
            best, best_cost = (widths, radii, radius), cost
    return best, best_cost


def _index_pairs(hashes, plan, progress=None):
    """Multi-index hashing: each chunk's pairs, found in parallel threads, each pair once."""
    from concurrent.futures import ThreadPoolExecutor, as_completed

    widths, radii, _ = plan
    active = [c for c, r in enumerate(radii) if r >= 0]  # a -1 chunk is covered by the others
    # numpy releases the GIL in the array operations that make up the work, so threads share
    # the cores without copying the hashes
    with ThreadPoolExecutor(max_workers=min(len(active), os.cpu_count() or 1)) as pool:
        futures = {pool.submit(_chunk_pairs, hashes, plan, c): c for c in active}
        done = as_completed(futures)
        if progress is not None:
            done = progress(done, total=len(futures), label="near-duplicate search")
        found = {futures[f]: f.result() for f in done}
    parts = [found[c] for c in active]
    return _concat([p[0] for p in parts]), _concat([p[1] for p in parts])


_TASKS_PER_CHUNK = 8  # cluster tasks per chunk: enough to spread over workers, few re-sorts


def _passes(plan, c) -> list[int]:
    """The independent passes of chunk ``c``: -1 (pairs inside a bucket), then one per probe bit."""
    widths, radii, _ = plan
    return [-1] + list(range(widths[c] if radii[c] > 0 else 0))


def _cluster_pairs(hashes, plan, address, progress=None):
    """:func:`_index_pairs` with every pass of every chunk a task on a Dask cluster."""
    from .parallel import map_ordered

    _, radii, _ = plan
    # every task sorts its chunk's keys again, so passes are dealt out round-robin (later probe
    # bits cost more) into a few tasks per chunk rather than one task each
    tasks = [(c, passes[g::_TASKS_PER_CHUNK]) for c, r in enumerate(radii) if r >= 0
             for passes in [_passes(plan, c)] for g in range(_TASKS_PER_CHUNK)
             if passes[g::_TASKS_PER_CHUNK]]
    results = map_ordered(_pass_pairs, tasks, cluster=address, chunksize=1, shared=(hashes, plan))
    if progress is not None:
        results = progress(results, total=len(tasks), label="near-duplicate search")
    parts = list(results)
    return _concat([p[0] for p in parts]), _concat([p[1] for p in parts])


def _pass_pairs(task, shared):
    c, passes = task
    hashes, plan = shared
    return _chunk_pairs(hashes, plan, c, passes=passes)


def _chunk_pairs(hashes, plan, c, passes=None):
    """Pairs within the radius that chunk ``c`` finds and no earlier chunk does.

    ``passes`` (see :func:`_passes`) selects part of the work; by default all of it. Passes find
    disjoint sets of pairs, so they can run anywhere and be concatenated.
    """
    widths, radii, radius = plan
    passes = _passes(plan, c) if passes is None else passes
    shifts = np.cumsum([0] + widths[:-1]).tolist()
    width, r = widths[c], radii[c]
    earlier = [(np.uint64(((1 << widths[e]) - 1) << shifts[e]), radii[e])
               for e in range(c) if radii[e] >= 0]
    # items sorted by chunk value: bucket members are contiguous and probes stay local
    keys = ((hashes >> np.uint64(shifts[c])) & np.uint64((1 << width) - 1)).astype(np.int32)
    order = np.argsort(keys, kind="stable")
    sorted_keys, sorted_hashes = keys[order], hashes[order]
    counts = np.bincount(keys, minlength=1 << width).astype(np.int64)
    # one gather per probe: bucket start in the high 32 bits, size in the low 32
    table = ((np.cumsum(counts) - counts) << 32) | counts
    found_i, found_j = [], []

    def verify(pos_i, pos_j):
        xor = sorted_hashes[pos_i] ^ sorted_hashes[pos_j]
        keep = np.bitwise_count(xor) <= radius
        # report a pair only from the first chunk whose radius it meets, so no pair twice
        for mask, earlier_radius in earlier:
            keep &= np.bitwise_count(xor & mask) > earlier_radius
        a, b = order[pos_i[keep]], order[pos_j[keep]]
        found_i.append(np.minimum(a, b))
        found_j.append(np.maximum(a, b))

    if -1 in passes:
        # pattern 0: pairs inside one bucket, each taken once (later position only)
        pos = np.arange(len(keys))
        ends = (table[sorted_keys] >> 32) + (table[sorted_keys] & 0xFFFFFFFF)
        verify(*_expand(pos, pos + 1, ends - pos - 1))
    for high in (p for p in passes if p >= 0):
        # a pattern whose top bit is `high` pairs a key without that bit to one with it;
        # probing only from the keys without it finds each pair once
        query = np.flatnonzero(((sorted_keys >> high) & 1) == 0)
        query_keys = sorted_keys[query]
        for low in _patterns(high, r - 1):
            entry = table[query_keys ^ ((1 << high) | low)]
            hit = np.flatnonzero(entry & 0xFFFFFFFF)
            if len(hit):
                verify(*_expand(query[hit], entry[hit] >> 32, entry[hit] & 0xFFFFFFFF))
    return _concat(found_i), _concat(found_j)


def _patterns(width, r):
    """Every ``width``-bit integer with at most ``r`` bits set, smallest weight first."""
    for k in range(r + 1):
        for bits in combinations(range(width), k):
            yield sum(1 << b for b in bits)


def _expand(queries, lo, count):
    """Pairs (query, lo + k) for every query and every ``k < count`` of that query."""
    count = count.astype(np.int64)
    total = int(count.sum())
    cand_i = np.repeat(queries, count)
    # run r covers lo[r], lo[r]+1, ...: subtract where run r starts in the flat output
    cand_j = np.repeat(lo - (np.cumsum(count) - count), count) + np.arange(total)
    return cand_i, cand_j


def _concat(parts):
    return np.concatenate(parts).astype(np.int64) if parts else np.zeros(0, dtype=np.int64)
