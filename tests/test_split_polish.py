"""Tests of the split's last pass (splits._polish_largest_share): it lowers the largest class-share
deviation without emptying a cell or straying from the ratios."""

from __future__ import annotations

import warnings

import numpy as np
import pandas as pd
import pytest

from labelprep import splits
from labelprep.splits import split


def writer_digits(seed):
    """scikit-learn's digits, imbalanced (class c keeps about 0.825**c) with writer-like groups of
    1 to 12 rows (as benchmarks/split_quality.py --files, without the files)."""
    from sklearn.datasets import load_digits

    target = load_digits().target
    rng = np.random.default_rng(seed)
    index = np.flatnonzero(rng.random(target.size) < 0.825 ** target)
    order = rng.permutation(index.size)
    sizes = rng.integers(1, 13, size=index.size)
    group = np.empty(index.size, dtype=np.int64)
    group[order] = np.repeat(np.arange(sizes.size), sizes)[: index.size]
    return pd.DataFrame({"path": [f"d{i:04d}.png" for i in index], "label": target[index].astype(str),
                         "group": [f"w{g:03d}" for g in group], "issues": ""})


def figures(out):
    """Largest |class share in a split - overall share|, largest |split share - ratio|, cells filled."""
    overall = out["label"].value_counts(normalize=True)
    table = pd.crosstab(out["split"], out["label"])
    shares = table.div(table.sum(axis=1), axis=0)
    size = (table.sum(axis=1) / len(out) - pd.Series({"train": 0.8, "val": 0.1, "test": 0.1})).abs()
    return float((shares - overall).abs().to_numpy().max()), float(size.max()), int((table > 0).sum().sum())


def test_polish_lowers_the_largest_deviation_and_keeps_sizes(monkeypatch):
    """Never worse on any seed, strictly better on some, no cell emptied, sizes within the slack."""
    data = [(seed, writer_digits(seed)) for seed in range(3)]
    polished = [figures(split(m, seed=seed)) for seed, m in data]
    monkeypatch.setattr(splits, "_polish_largest_share", lambda search: None)
    plain = [figures(split(m, seed=seed)) for seed, m in data]
    for (dev, size, cells), (plain_dev, plain_size, plain_cells) in zip(polished, plain):
        assert dev <= plain_dev
        assert size <= max(splits._POLISH_SIZE_SLACK, plain_size) + 1e-12
        assert cells >= plain_cells
    assert any(p[0] < q[0] for p, q in zip(polished, plain))


@pytest.mark.parametrize("seed", [0, 1, 2])
def test_share_deviation_beats_stratified_group_kfold(seed):
    """Against scikit-learn's StratifiedGroupKFold(10) folded 8/1/1 on the same rows and groups
    (the reference of benchmarks/split_quality.py): labelprep's largest class-share deviation is at
    most half of it (issue 13's target; on these seeds 0.32-0.40 of it)."""
    from sklearn.model_selection import StratifiedGroupKFold

    m = writer_digits(seed)
    ours = figures(split(m, seed=seed))
    reference = m.assign(split="")
    with warnings.catch_warnings():  # the rarest digit has fewer groups than folds: expected
        warnings.simplefilter("ignore", UserWarning)
        folds = StratifiedGroupKFold(n_splits=10, shuffle=True, random_state=seed)
        for fold, (_, test) in enumerate(folds.split(m, m["label"], m["group"])):
            reference.iloc[test, reference.columns.get_loc("split")] = ("train", "val", "test")[max(fold - 7, 0)]
    theirs = figures(reference)
    assert ours[0] <= 0.5 * theirs[0]
    assert ours[1] <= 0.02 and ours[2] == 3 * m["label"].nunique()
