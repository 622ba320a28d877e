"""Nearest neighbours of unit vectors, against scikit-learn's brute-force search."""

from __future__ import annotations

import numpy as np
import pytest

from labelprep.errors import ParameterError
from labelprep.vectorsearch import pca_units, top_k


def _units(n, d, seed=0, clusters=None):
    rng = np.random.default_rng(seed)
    if clusters:
        centres = rng.normal(size=(clusters, d))
        x = centres[rng.integers(0, clusters, n)] + rng.normal(0, 0.3, (n, d))
    else:
        x = rng.normal(size=(n, d))
    return (x / np.linalg.norm(x, axis=1, keepdims=True)).astype(np.float32)


class TestTopK:
    def test_exact_matches_scikit_learn(self):
        """scikit-learn NearestNeighbors(metric='cosine', algorithm='brute') as the reference."""
        from sklearn.neighbors import NearestNeighbors

        x = _units(500, 16)
        index, sims = top_k(x, 5)
        _, ref = NearestNeighbors(n_neighbors=6, metric="cosine", algorithm="brute").fit(x).kneighbors(x)
        assert (index == ref[:, 1:]).mean() > 0.99  # ties may order differently
        np.testing.assert_allclose(sims[:, 0], np.einsum("ij,ij->i", x, x[index[:, 0]]), rtol=1e-5)
        assert (np.diff(sims, axis=1) <= 1e-6).all()

    def test_cells_find_most_exact_neighbours(self):
        x = _units(6000, 16, clusters=40)
        exact, _ = top_k(x, 5, exact=True)
        cells, _ = top_k(x, 5, exact=False)
        found = np.mean([len(set(a) & set(b)) / 5 for a, b in zip(exact, cells)])
        assert found >= 0.9

    def test_blocked_rows_are_never_neighbours(self):
        x = _units(200, 8)
        blocked = np.arange(200) // 4
        index, _ = top_k(x, 3, blocked=blocked)
        assert not (blocked[index] == blocked[:, None]).any()
        assert not (index == np.arange(200)[:, None]).any()

    def test_fewer_rows_than_k(self):
        index, sims = top_k(_units(3, 4), 5)
        assert (index[:, 2:] == -1).all() and np.isneginf(sims[:, 2:]).all()

    def test_bad_k_is_named(self):
        with pytest.raises(ParameterError, match="k=0"):
            top_k(_units(3, 4), 0)


class TestPCA:
    def test_matches_scikit_learn_components(self):
        """The projection spans scikit-learn's PCA subspace (signs may differ)."""
        from sklearn.decomposition import PCA

        x = np.random.default_rng(1).normal(size=(400, 12)).astype(np.float32) * np.arange(1, 13)
        z, residual = pca_units(x, 4, seed=0)
        ref = PCA(4).fit_transform(x)
        ref /= np.linalg.norm(ref, axis=1, keepdims=True)
        np.testing.assert_allclose(np.abs(z), np.abs(ref), atol=1e-3)
        assert ((0 <= residual) & (residual <= 1)).all()
