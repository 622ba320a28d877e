"""map_ordered: input order whatever the finishing order, bounded look-ahead, errors in place."""

from __future__ import annotations

import os
import time

import pytest

from labelprep.errors import ParameterError
from labelprep.parallel import WINDOW_PER_JOB, map_ordered, resolve_jobs


def _late_for_early_items(i):
    """Earlier items take longer, so workers finish them after later ones."""
    time.sleep(0.001 * (8 - i % 8))
    return i * i


def _fails_on_five(i):
    if i == 5:
        raise ValueError("item five")
    return i


class _Counting:
    """An iterable that records how many items have been taken from it."""

    def __init__(self, n):
        self.n, self.taken = n, 0

    def __iter__(self):
        for i in range(self.n):
            self.taken += 1
            yield i


@pytest.mark.parametrize("jobs", [1, 2])
@pytest.mark.parametrize("chunksize", [1, 3, 16])
def test_results_in_input_order(jobs, chunksize):
    """Same results in the same order as the built-in map, for any jobs and chunk size."""
    items = range(41)
    assert list(map_ordered(_late_for_early_items, items, jobs=jobs, chunksize=chunksize)) == \
        list(map(_late_for_early_items, items))


@pytest.mark.parametrize("jobs", [1, 2])
def test_empty_input(jobs):
    assert list(map_ordered(abs, [], jobs=jobs)) == []


@pytest.mark.parametrize("jobs, chunksize", [(1, 4), (2, 4), (2, 1)])
def test_look_ahead_is_bounded(jobs, chunksize):
    """Items are consumed lazily: at most jobs x WINDOW_PER_JOB chunks ahead of the consumer."""
    items = _Counting(10_000)
    results = map_ordered(abs, items, jobs=jobs, chunksize=chunksize)
    assert next(results) == 0
    limit = 1 if jobs == 1 else jobs * WINDOW_PER_JOB * chunksize
    assert 1 <= items.taken <= limit
    results.close()
    assert items.taken <= limit


@pytest.mark.parametrize("jobs", [1, 2])
def test_error_raised_at_its_position(jobs):
    """Results before the failing item arrive; the worker's exception then reaches the caller."""
    got = []
    with pytest.raises(ValueError, match="item five"):
        for value in map_ordered(_fails_on_five, range(20), jobs=jobs, chunksize=2):
            got.append(value)
    assert got == [0, 1, 2, 3, 4]


class TestResolveJobs:
    @pytest.mark.parametrize("jobs", [None, 0])
    def test_default_is_every_core(self, jobs):
        assert resolve_jobs(jobs) == (os.cpu_count() or 1)

    def test_explicit(self):
        assert resolve_jobs(3) == 3

    def test_negative(self):
        with pytest.raises(ParameterError, match="jobs=-1"):
            resolve_jobs(-1)

    @pytest.mark.parametrize("jobs", ["2", 2.0, True])
    def test_wrong_type(self, jobs):
        with pytest.raises(TypeError, match="jobs must be an int"):
            resolve_jobs(jobs)


@pytest.mark.parametrize("chunksize, error, match", [
    (0, ParameterError, "chunksize=0"), (2.5, TypeError, "chunksize must be an int")])
def test_bad_chunksize(chunksize, error, match):
    with pytest.raises(error, match=match):
        list(map_ordered(abs, [1], jobs=1, chunksize=chunksize))
