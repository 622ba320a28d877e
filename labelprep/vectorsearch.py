"""Nearest neighbours of unit vectors by cosine similarity: exact blocked BLAS, or cells above a size.

Up to :data:`EXACT_ROWS` rows every row is compared with every other, a block of queries at a
time (one matrix product per block, then a partial sort). Above it the search is restricted to
cells: k-means centroids fitted on a seeded sample, each row assigned to its nearest centroid,
and the rows of one cell compared with the rows of the :data:`PROBES` cells whose centroids lie
nearest to that cell's. The cells cut the work from n² to about n²·PROBES/cells, and a neighbour
is missed only when it sits in none of the probed cells (benchmarks/vector_scale.py measures the
share found against the exact search).

Rows sharing a ``blocked`` id with the query (its own near-duplicate cluster, say) are never its
neighbours; a row is never its own.
"""

from __future__ import annotations

import numpy as np

from .errors import ParameterError

EXACT_ROWS = 60_000
PROBES = 6
_BLOCK_ENTRIES = 1 << 23  # similarities held at once by a query block (32 MiB of float32)
_SAMPLE = 40_000  # rows the centroids are fitted on
_KMEANS_ROUNDS = 8
PCA_SAMPLE = 20_000  # rows the principal components are fitted on


def top_k(vectors, k, *, blocked=None, seed=0, exact=None):
    """The ``k`` most similar rows of each row.

    Parameters
    ----------
    vectors : ndarray, shape (n, d)
        Unit-length rows (float32 or float16).
    k : int
        Neighbours per row (fewer exist when n is small: missing slots hold index -1).
    blocked : ndarray of int, shape (n,), optional
        Rows with the same non-negative id are not neighbours of each other.
    seed : int
        Seeds the sample the cells are fitted on (only above :data:`EXACT_ROWS`).
    exact : bool, optional
        Force the exact (True) or the cell search (False); default by size.

    Returns
    -------
    index : ndarray of int64, shape (n, k)
    similarity : ndarray of float32, shape (n, k)
        Most similar first; ``-inf`` where the index is -1.

    Examples
    --------
    >>> v = np.array([[1, 0], [0.8, 0.6], [0, 1]], dtype=np.float32)
    >>> top_k(v, 1)[0].ravel().tolist()
    [1, 0, 1]
    """
    if isinstance(k, bool) or not isinstance(k, (int, np.integer)) or k < 1:
        raise ParameterError(f"k must be a positive int, got k={k!r}")
    vectors = np.ascontiguousarray(vectors, dtype=np.float32)
    if vectors.ndim != 2:
        raise ParameterError(f"vectors must be 2-D, got shape {vectors.shape}")
    n = len(vectors)
    ids = np.full(n, -1, dtype=np.int64) if blocked is None else np.asarray(blocked, dtype=np.int64)
    index = np.full((n, k), -1, dtype=np.int64)
    similarity = np.full((n, k), -np.inf, dtype=np.float32)
    if n < 2:
        return index, similarity
    if exact if exact is not None else n <= EXACT_ROWS:
        everything = np.arange(n)
        _search(vectors, ids, everything, everything, k, index, similarity)
        return index, similarity
    cells, centroids = _cells(vectors, seed)
    nearest = np.argsort(-(centroids @ centroids.T), axis=1)[:, :PROBES]
    order = np.argsort(cells, kind="stable")
    starts = np.searchsorted(cells[order], np.arange(len(centroids) + 1))
    members = [order[starts[c]:starts[c + 1]] for c in range(len(centroids))]
    for c, queries in enumerate(members):
        if len(queries):
            candidates = np.concatenate([members[o] for o in nearest[c]])
            _search(vectors, ids, queries, candidates, k, index, similarity)
    return index, similarity


def _search(vectors, ids, queries, candidates, k, index, similarity):
    """Fill ``index``/``similarity`` rows of ``queries`` with their best among ``candidates``."""
    take = min(k, len(candidates))
    step = max(1, _BLOCK_ENTRIES // max(len(candidates), 1))
    cand = vectors[candidates]
    cand_ids = ids[candidates]
    for start in range(0, len(queries), step):
        rows = queries[start:start + step]
        sims = vectors[rows] @ cand.T
        sims[rows[:, None] == candidates[None, :]] = -np.inf
        same = (ids[rows][:, None] == cand_ids[None, :]) & (cand_ids[None, :] >= 0)
        sims[same] = -np.inf
        part = np.argpartition(-sims, take - 1, axis=1)[:, :take] if take < len(candidates) else \
            np.broadcast_to(np.arange(len(candidates)), (len(rows), len(candidates))).copy()
        best = np.take_along_axis(sims, part, axis=1)
        rank = np.argsort(-best, axis=1, kind="stable")
        part = np.take_along_axis(part, rank, axis=1)
        best = np.take_along_axis(best, rank, axis=1)
        found = candidates[part]
        found[~np.isfinite(best)] = -1
        index[rows, :take] = found
        similarity[rows, :take] = best


def _cells(vectors, seed):
    """Spherical k-means on a seeded sample: each row's cell and the unit centroids."""
    n = len(vectors)
    count = max(2, int(np.sqrt(n)))
    rng = np.random.default_rng(seed)
    sample = vectors[np.sort(rng.choice(n, size=min(n, _SAMPLE), replace=False))]
    centroids = sample[rng.choice(len(sample), size=count, replace=False)].copy()
    for _ in range(_KMEANS_ROUNDS):
        assign = np.argmax(sample @ centroids.T, axis=1)
        sums = np.zeros_like(centroids)
        np.add.at(sums, assign, sample)
        norms = np.linalg.norm(sums, axis=1, keepdims=True)
        empty = norms[:, 0] == 0
        centroids = np.where(empty[:, None], centroids, sums / np.where(empty[:, None], 1, norms))
    cells = np.empty(n, dtype=np.int64)
    step = max(1, _BLOCK_ENTRIES // count)
    for start in range(0, n, step):
        cells[start:start + step] = np.argmax(vectors[start:start + step] @ centroids.T, axis=1)
    return cells, centroids


def pca_units(x, dim, seed):
    """PCA to ``dim`` components fitted on a seeded sample of rows, then unit length; and the
    share of each centred row's energy outside the components."""
    rng = np.random.default_rng(seed)
    sample = x if len(x) <= PCA_SAMPLE else x[np.sort(rng.choice(len(x), PCA_SAMPLE, replace=False))]
    mean = sample.mean(axis=0, dtype=np.float64)
    centred = sample - mean
    from threadpoolctl import threadpool_limits

    # LAPACK's symmetric eigensolver on one thread: on two busy cores its threads slow it 30-fold
    # (measured here on a 576x576 matrix: 4.9 s against 0.16 s)
    with threadpool_limits(limits=1, user_api="blas"):
        values, vectors = np.linalg.eigh(centred.T @ centred)
    basis = vectors[:, np.argsort(-values, kind="stable")[:dim]].T
    # a component's sign is arbitrary: fix it so that the result is the same on any machine
    basis = basis * np.sign(basis[:, :1] + (basis[:, :1] == 0))
    z = np.empty((len(x), len(basis)), dtype=np.float32)
    residual = np.empty(len(x))
    step = max(1, _BLOCK_ENTRIES // max(x.shape[1], 1))
    for start in range(0, len(x), step):  # in blocks: a million centred rows would double memory
        centred = x[start:start + step] - mean.astype(np.float32)
        part = centred @ basis.T.astype(np.float32)
        kept = (part ** 2).sum(axis=1)
        residual[start:start + step] = np.clip(1 - kept / np.maximum((centred ** 2).sum(axis=1), 1e-12), 0, 1)
        z[start:start + step] = part / np.maximum(np.sqrt(kept), 1e-12)[:, None]
    return z, residual

