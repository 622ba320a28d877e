"""labelprep.neighbors.radius_pairs returns exactly the pairs a brute-force comparison returns."""

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from labelprep.errors import ParameterError
from labelprep.neighbors import _index_pairs, _plan_chunks, radius_pairs


def reference_pairs(hashes, radius):
    """All pairs i < j within radius, by a plain double loop over Python ints (the definition)."""
    values = [int(h) for h in hashes]
    out = []
    for i, a in enumerate(values):
        for j in range(i + 1, len(values)):
            d = bin(a ^ values[j]).count("1")
            if d <= radius:
                out.append((i, j, d))
    return out


def as_triples(result):
    i, j, d = result
    return list(zip(i.tolist(), j.tolist(), d.tolist()))


def planted(n, seed, max_flips=12):
    """Random hashes where every third one is a copy of its neighbour with a few bits flipped."""
    rng = np.random.default_rng(seed)
    h = rng.integers(0, 2**64 - 1, n, dtype=np.uint64, endpoint=True)
    for k in range(1, n, 3):
        bits = rng.choice(64, size=rng.integers(0, max_flips + 1), replace=False)
        h[k] = h[k - 1] ^ np.uint64(sum(1 << int(b) for b in bits))
    return h


class TestRadiusPairs:
    @pytest.mark.parametrize("method", ["brute", "index", "auto"])
    @pytest.mark.parametrize("radius", [0, 1, 4, 8, 13, 64])
    def test_planted_equals_reference(self, method, radius):
        """Planted near copies, exact copies and random hashes: same pairs as the double loop."""
        h = planted(150, seed=radius)
        h[100:110] = h[0]  # a run of identical hashes
        assert as_triples(radius_pairs(h, radius, method=method)) == reference_pairs(h, radius)

    @settings(max_examples=60, deadline=None)
    @given(st.lists(st.integers(0, 2**64 - 1), max_size=40), st.integers(0, 64),
           st.sampled_from(["brute", "index"]))
    def test_random_equals_reference(self, values, radius, method):
        """Any hashes, any radius, either method: same pairs as the double loop."""
        h = np.array(values, dtype=np.uint64)
        assert as_triples(radius_pairs(h, radius, method=method)) == reference_pairs(h, radius)

    @settings(max_examples=30, deadline=None)
    @given(st.lists(st.integers(0, 255), min_size=2, max_size=60), st.integers(0, 10))
    def test_clustered_values_equal_reference(self, low_bytes, radius):
        """Hashes differing only in their low byte crowd a few buckets; still the same pairs."""
        h = np.array([0xABCD_0000_0000_0000 | v for v in low_bytes], dtype=np.uint64)
        assert as_triples(radius_pairs(h, radius, method="index")) == reference_pairs(h, radius)

    @pytest.mark.parametrize("radius", [0, 2, 8, 12])
    def test_every_chunking_equals_brute(self, radius):
        """Each chunking the planner may choose (3 to 7 chunks) finds the brute-force pairs."""
        h = planted(600, seed=1)
        expected = as_triples(radius_pairs(h, radius, method="brute"))
        for m in range(3, 8):
            widths = [64 // m + (1 if c < 64 % m else 0) for c in range(m)]
            radii = [(radius + 1) // m - 1 + (1 if c < (radius + 1) % m else 0) for c in range(m)]
            i, j = _index_pairs(h, (widths, radii, radius))
            order = np.lexsort((j, i))
            got = list(zip(i[order].tolist(), j[order].tolist()))
            assert got == [(a, b) for a, b, _ in expected]

    def test_plan_meets_pigeonhole_bound(self):
        """The chosen per-chunk radii satisfy sum(r_c + 1) > radius for every radius."""
        for radius in range(65):
            widths, radii, _ = _plan_chunks(1_000_000, radius)[0]
            assert sum(widths) == 64
            assert sum(r + 1 for r in radii if r >= 0) > radius

    def test_empty_and_single(self):
        for n in (0, 1):
            i, j, d = radius_pairs(np.zeros(n, dtype=np.uint64), 5)
            assert len(i) == len(j) == len(d) == 0
            assert i.dtype == np.int64

    def test_bad_parameters(self):
        h = np.zeros(3, dtype=np.uint64)
        with pytest.raises(ParameterError, match="radius=65"):
            radius_pairs(h, 65)
        with pytest.raises(ParameterError, match="method='fast'"):
            radius_pairs(h, 3, method="fast")
        with pytest.raises(TypeError, match="radius must be an int"):
            radius_pairs(h, 2.5)
        with pytest.raises(TypeError, match="uint64"):
            radius_pairs(np.zeros(3), 2)
        with pytest.raises(ParameterError, match="1-D"):
            radius_pairs(np.zeros((2, 2), dtype=np.uint64), 2)
