"""Tests of labelprep.balance: class statistics checked against outside references."""

from __future__ import annotations

import json
import math
from fractions import Fraction

import numpy as np
import pandas as pd
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from labelprep.balance import (
    by_split,
    chi2_sf,
    chi_square,
    class_balanced_weights,
    effective_number,
    normalised_entropy,
)
from labelprep.errors import InputError, ParameterError


def _manifest(rows):
    """A manifest from ``(label, split, n)`` triples: n rows of that label in that split."""
    labels, splits = [], []
    for label, split, n in rows:
        labels += [label] * n
        splits += [split] * n
    return pd.DataFrame({"path": [f"f{i}.png" for i in range(len(labels))],
                         "label": labels, "split": splits})


UNEVEN = _manifest([("cat", "train", 60), ("dog", "train", 25), ("owl", "train", 5),
                    ("cat", "val", 9), ("dog", "val", 1), ("owl", "val", 2),
                    ("cat", "test", 6), ("dog", "test", 4),
                    ("cat", "", 3), ("", "", 2)])


class TestBySplit:
    def test_counts_shares_and_order(self):
        """Counts per class and split, splits in train/val/test/unassigned order."""
        stats = by_split(UNEVEN)
        assert stats["classes"] == ["cat", "dog", "owl"]
        assert list(stats["splits"]) == ["train", "val", "test", "unassigned"]
        assert stats["splits"]["test"]["counts"] == {"cat": 6, "dog": 4, "owl": 0}
        assert stats["splits"]["test"]["missing"] == ["owl"]
        assert stats["overall"]["counts"] == {"cat": 75, "dog": 30, "owl": 7}
        assert stats["splits"]["unassigned"] == {**stats["splits"]["unassigned"], "rows": 5, "unlabelled": 2, "n": 3}
        assert stats["splits"]["unassigned"]["chi_square"] is None
        assert sum(stats["splits"]["train"]["shares"].values()) == pytest.approx(1.0)

    def test_json_round_trip(self):
        """The result is JSON-able as it is and survives a round trip unchanged."""
        stats = by_split(UNEVEN)
        assert json.loads(json.dumps(stats)) == stats

    def test_imbalance_ratio_and_entropy(self):
        """Largest / smallest present class; entropy over ln(k) (Shannon 1948, normalised by its maximum)."""
        train = by_split(UNEVEN)["splits"]["train"]
        assert train["imbalance_ratio"] == 60 / 5
        p = np.array([60, 25, 5]) / 90
        assert train["entropy"] == pytest.approx(float(-(p * np.log(p)).sum() / np.log(3)))

    def test_class_weights_match_scikit_learn(self):
        """'balanced' weights equal sklearn.utils.class_weight.compute_class_weight on the same labels."""
        from sklearn.utils.class_weight import compute_class_weight

        stats = by_split(UNEVEN)
        for name in ("train", "val", "test"):
            sub = UNEVEN[UNEVEN["split"] == name]
            classes = np.array(sorted(sub["label"].unique()))
            reference = compute_class_weight("balanced", classes=classes, y=sub["label"].to_numpy())
            got = stats["splits"][name]["class_weights"]
            assert list(got) == list(classes)
            np.testing.assert_allclose(list(got.values()), reference, rtol=1e-12)

    def test_chi_square_matches_scipy(self):
        """Each split's statistic and p-value equal scipy.stats.chisquare(observed, expected)."""
        from scipy.stats import chisquare

        stats = by_split(UNEVEN)
        shares = stats["overall"]["shares"]
        for name in ("train", "val", "test"):
            split = stats["splits"][name]
            observed = list(split["counts"].values())
            expected = [split["n"] * shares[c] for c in stats["classes"]]
            reference = chisquare(observed, expected)
            assert split["chi_square"]["dof"] == 2
            assert split["chi_square"]["statistic"] == pytest.approx(reference.statistic, rel=1e-12)
            assert split["chi_square"]["p_value"] == pytest.approx(reference.pvalue, rel=1e-9)

    def test_warnings_below_min_count(self):
        """Every class under min_count in a split (zero included) is warned about; unassigned is not."""
        stats = by_split(UNEVEN, min_count=5)
        got = {(w["split"], w["label"], w["count"]) for w in stats["warnings"]}
        assert got == {("val", "dog", 1), ("val", "owl", 2), ("test", "dog", 4), ("test", "owl", 0)}
        assert by_split(UNEVEN, min_count=0)["warnings"] == []

    def test_beta_changes_class_balanced_weights_only(self):
        """beta feeds the effective number; the 'balanced' weights do not depend on it."""
        a, b = by_split(UNEVEN, beta=0.9), by_split(UNEVEN, beta=0.9999)
        assert a["overall"]["class_weights"] == b["overall"]["class_weights"]
        assert a["overall"]["class_balanced_weights"] != b["overall"]["class_balanced_weights"]

    def test_other_split_column_and_names(self):
        """given_split can be read instead of split; unknown split names follow train/val/test sorted."""
        m = _manifest([("a", "holdout", 2), ("b", "train", 2), ("a", "extra", 1)])
        m = m.rename(columns={"split": "given_split"})
        stats = by_split(m, split_column="given_split")
        assert list(stats["splits"]) == ["train", "extra", "holdout"]

    def test_class_only_left_out(self):
        """A class whose files are all left out shows with zeros and warnings, and the chi-square
        (checked against scipy.stats.chisquare) runs over the classes present overall."""
        from scipy.stats import chisquare

        m = _manifest([("a", "train", 6), ("b", "train", 2), ("a", "val", 3), ("b", "val", 3), ("z", "", 4)])
        stats = by_split(m, min_count=1)
        assert stats["classes"] == ["a", "b", "z"]
        assert stats["splits"]["train"]["counts"]["z"] == 0 and "z" in stats["splits"]["val"]["missing"]
        assert {(w["split"], w["label"]) for w in stats["warnings"]} == {("train", "z"), ("val", "z")}
        val = stats["splits"]["val"]
        ref = chisquare([3, 3], [6 * 9 / 14, 6 * 5 / 14])
        assert val["chi_square"]["dof"] == 1
        assert val["chi_square"]["p_value"] == pytest.approx(ref.pvalue, rel=1e-9)

    def test_nothing_assigned(self):
        """With no row in a split the classes come from all rows and overall is empty."""
        stats = by_split(_manifest([("a", "", 2), ("b", "", 1)]))
        assert stats["classes"] == ["a", "b"]
        assert stats["overall"]["n"] == 0
        assert stats["overall"]["imbalance_ratio"] is None
        assert stats["overall"]["entropy"] is None
        assert stats["warnings"] == []

    def test_single_class(self):
        """One class: entropy and chi-square are undefined (None), weights are 1."""
        stats = by_split(_manifest([("a", "train", 3), ("a", "val", 1)]))
        assert stats["splits"]["train"]["entropy"] is None
        assert stats["splits"]["train"]["chi_square"] is None
        assert stats["splits"]["train"]["class_weights"] == {"a": 1.0}

    @pytest.mark.parametrize("kwargs, error, match", [
        ({"beta": 1.0}, ParameterError, r"beta=1\.0"),
        ({"beta": -0.1}, ParameterError, r"beta=-0\.1"),
        ({"beta": "0.9"}, TypeError, "beta must be a number"),
        ({"min_count": -1}, ParameterError, "min_count=-1"),
        ({"min_count": 2.5}, TypeError, "min_count must be an int"),
        ({"split_column": "fold_name"}, InputError, "no column 'fold_name'"),
        ({"split_column": 3}, TypeError, "split_column"),
    ])
    def test_bad_parameters(self, kwargs, error, match):
        """Bad options are refused up front with the bad value in the message."""
        with pytest.raises(error, match=match):
            by_split(UNEVEN, **kwargs)


class TestEffectiveNumber:
    # Cui et al., "Class-Balanced Loss Based on Effective Number of Samples", CVPR 2019, eq. (2)
    # and Proposition 1: E_1 = 1, E_n = 1 + beta * E_{n-1}, i.e. E_n = sum_{j<n} beta^j, with
    # E_n -> 1 / (1 - beta) as n grows. The worked values below are that series in exact
    # rational arithmetic, an independent route to the closed form the code uses.
    @pytest.mark.parametrize("beta", ["0.9", "0.99", "0.999"])
    @pytest.mark.parametrize("n", [1, 2, 3, 10, 100, 1000, 5000])
    def test_matches_recurrence(self, beta, n):
        """The closed form equals the paper's recurrence summed exactly."""
        b = Fraction(beta)
        e = Fraction(0)
        for _ in range(n):
            e = 1 + b * e
        assert effective_number(n, float(beta)) == pytest.approx(float(e), rel=1e-12)

    @pytest.mark.parametrize("beta, n, worked", [
        (0.9, 2, 1.9),                    # 1 + 0.9
        (0.9, 3, 2.71),                   # 1 + 0.9 + 0.81
        (0.9, 10, 6.513215599),           # (1 - 0.9**10) / 0.1 = (1 - 0.3486784401) / 0.1
        (0.99, 2, 1.99),
        (0.99, 100, 63.39676587),         # (1 - 0.99**100) / 0.01, 0.99**100 = 0.3660323413
        (0.999, 1000, 632.3045752),       # (1 - 0.999**1000) / 0.001, 0.999**1000 = 0.3676954248
    ])
    def test_worked_values(self, beta, n, worked):
        """Hand-worked values of (1 - beta^n) / (1 - beta)."""
        assert effective_number(n, beta) == pytest.approx(worked, rel=1e-9)

    @pytest.mark.parametrize("beta", [0.9, 0.99, 0.999])
    def test_limit(self, beta):
        """E_n approaches 1 / (1 - beta) from below (Cui et al. 2019, Proposition 1)."""
        e = effective_number(100_000, beta)
        assert e <= 1 / (1 - beta)
        assert e == pytest.approx(1 / (1 - beta), rel=1e-12)

    def test_beta_zero_counts_one_sample(self):
        """beta = 0: every class is worth one sample (the paper's no-re-weighting end)."""
        assert effective_number(50, 0.0) == 1.0
        assert class_balanced_weights({"a": 50, "b": 2}, 0.0) == {"a": 1.0, "b": 1.0}

    def test_class_balanced_weights(self):
        """Weights are proportional to (1 - beta) / (1 - beta^n) and sum to the class count (paper, sec. 4)."""
        counts = {"a": 500, "b": 50, "c": 5}
        w = class_balanced_weights(counts, 0.99)
        raw = {c: (1 - 0.99) / (1 - 0.99 ** n) for c, n in counts.items()}
        scale = 3 / sum(raw.values())
        for c in counts:
            assert w[c] == pytest.approx(raw[c] * scale, rel=1e-12)
        assert sum(w.values()) == pytest.approx(3.0)


class TestChiSquare:
    @settings(max_examples=60, deadline=None)
    @given(st.lists(st.integers(0, 400), min_size=2, max_size=12),
           st.lists(st.floats(0.05, 1.0), min_size=12, max_size=12))
    def test_matches_scipy(self, observed, weights):
        """Statistic and p-value equal scipy.stats.chisquare on random counts and expected shares."""
        from scipy.stats import chisquare

        if sum(observed) == 0:
            observed[0] = 1
        w = np.array(weights[: len(observed)])
        expected = (w / w.sum() * sum(observed)).tolist()
        got = chi_square(observed, expected)
        ref = chisquare(observed, expected)
        assert got["statistic"] == pytest.approx(ref.statistic, rel=1e-9, abs=1e-12)
        assert got["p_value"] == pytest.approx(ref.pvalue, rel=1e-8, abs=1e-300)

    @pytest.mark.parametrize("dof", [1, 2, 3, 7, 30, 150])
    @pytest.mark.parametrize("quantile", [0.001, 0.05, 0.5, 0.95, 0.999999])
    def test_survival_function_matches_scipy(self, dof, quantile):
        """chi2_sf at scipy.stats.chi2's quantiles gives back the tail probability (both branches)."""
        from scipy.stats import chi2

        x = chi2.isf(quantile, dof)
        assert chi2_sf(x, dof) == pytest.approx(quantile, rel=1e-9)

    def test_critical_values(self):
        """The 5 % critical values 3.841 (1 dof) and 5.991 (2 dof) from printed chi-square tables
        (e.g. NIST/SEMATECH e-Handbook of Statistical Methods, table 1.3.6.7.4)."""
        assert chi2_sf(3.841, 1) == pytest.approx(0.05, abs=1e-4)
        assert chi2_sf(5.991, 2) == pytest.approx(0.05, abs=1e-4)
        assert chi2_sf(5.991, 2) == pytest.approx(math.exp(-5.991 / 2), rel=1e-12)  # 2 dof: Q = e^(-x/2)

    def test_bad_input(self):
        """Mismatched lengths and non-positive expectations are refused."""
        with pytest.raises(ParameterError, match="same length"):
            chi_square([1, 2], [1.5])
        with pytest.raises(ParameterError, match="positive"):
            chi_square([1, 2], [3, 0])


def test_normalised_entropy_extremes():
    """Even counts give 1 (the maximum ln k), a single non-zero class 0."""
    assert normalised_entropy([7, 7, 7, 7]) == pytest.approx(1.0)
    assert normalised_entropy([0, 12, 0]) == 0.0
