"""Class-balance statistics of a split manifest: how many of each class every split holds.

:func:`by_split` returns plain dicts, lists, ints and floats (JSON-able as they are), so the
report, the audit and users' scripts read the same numbers.
"""

from __future__ import annotations

import math

from .errors import ParameterError
from .validation import check_manifest

UNASSIGNED = "unassigned"
SPLIT_ORDER = ("train", "val", "test")
DEFAULT_BETA = 0.999
DEFAULT_MIN_COUNT = 10



def by_split(manifest, *, split_column="split", beta=DEFAULT_BETA, min_count=DEFAULT_MIN_COUNT) -> dict:
    """Class counts, shares, weights and a chi-square test for every split and overall.

    Rows with an empty label are counted under ``unlabelled`` and left out of the class
    statistics. Rows whose split is ``""`` form the split ``"unassigned"``; *overall* means the
    rows that are in a split (what a trainer sees), so ``unassigned`` is not part of it and has no
    chi-square. The classes are every non-empty label of the manifest, sorted, so a class whose
    files were all left out shows with zero counts (and a warning) rather than vanishing.

    Parameters
    ----------
    manifest : pandas.DataFrame
        Needs a ``label`` column and ``split_column``.
    split_column : str
        The column naming each row's split (``split``, or ``given_split`` for the split found in
        the source folders).
    beta : float
        The β of the effective number of samples, ``0 <= beta < 1``. With 0.999 a class's
        effective number saturates near 1/(1-β) = 1000 images, so classes above a few thousand
        images count as about equally well covered.
    min_count : int
        A class with fewer rows than this in a split gets a warning (0 turns warnings off).

    Returns
    -------
    dict
        ``classes`` (sorted labels), ``beta``, ``min_count``, ``overall`` and ``splits``
        (``{name: stats}``: ``train``, ``val``, ``test`` first, other names sorted, then
        ``unassigned``; only the splits present), and ``warnings`` (a list of ``{"split",
        "label", "count", "min_count"}``). Each *stats* dict holds:

        - ``rows``: rows in the split; ``unlabelled``: those with an empty label;
          ``n``: labelled rows.
        - ``counts``, ``shares``: per class (every class, zero included).
        - ``missing``: classes with no row here.
        - ``imbalance_ratio``: largest / smallest count among the classes present; ``None``
          when none is present.
        - ``entropy``: Shannon entropy of the shares divided by ln(number of classes), 1 for
          perfectly even; ``None`` with fewer than two classes.
        - ``class_weights``: ``n / (k * n_c)`` over the k classes present (scikit-learn's
          "balanced" weights).
        - ``effective_number``: ``(1 - beta**n_c) / (1 - beta)`` per class present, and
          ``class_balanced_weights``: proportional to its inverse, summing to k
          (Cui et al., "Class-Balanced Loss Based on Effective Number of Samples", CVPR 2019).
        - ``chi_square``: ``{"statistic", "dof", "p_value"}`` of the counts against the overall
          shares (Pearson's test over the classes present overall, dof = their number - 1);
          ``None`` for ``unassigned``, for overall, or when it is undefined (no labelled row,
          fewer than two classes).

    Examples
    --------
    >>> import pandas as pd
    >>> m = pd.DataFrame({"label": ["cat", "cat", "cat", "dog"],
    ...                   "split": ["train", "train", "val", "train"]})
    >>> stats = by_split(m, min_count=1)
    >>> stats["splits"]["train"]["counts"]
    {'cat': 2, 'dog': 1}
    >>> stats["overall"]["class_weights"]
    {'cat': 0.6666666666666666, 'dog': 2.0}
    >>> stats["warnings"]
    [{'split': 'val', 'label': 'dog', 'count': 0, 'min_count': 1}]
    """
    if not isinstance(split_column, str):
        raise TypeError(f"split_column must be a column name (str), got {type(split_column).__name__}")
    check_manifest(manifest, ["label", split_column])
    if isinstance(beta, bool) or not isinstance(beta, (int, float)):
        raise TypeError(f"beta must be a number, got {type(beta).__name__}")
    if not 0 <= beta < 1:
        raise ParameterError(f"beta must be in [0, 1), got beta={beta!r}")
    if isinstance(min_count, bool) or not isinstance(min_count, int):
        raise TypeError(f"min_count must be an int, got {type(min_count).__name__}")
    if min_count < 0:
        raise ParameterError(f"min_count must be 0 or more, got min_count={min_count!r}")

    labels = manifest["label"].fillna("").astype(str).tolist()
    splits = manifest[split_column].fillna("").astype(str).tolist()
    rows_by_split: dict[str, list[str]] = {}
    for label, split in zip(labels, splits):
        rows_by_split.setdefault(split or UNASSIGNED, []).append(label)

    assigned = [lab for split, labs in rows_by_split.items() if split != UNASSIGNED for lab in labs]
    classes = sorted({lab for lab in labels if lab})

    overall = _stats(assigned, classes, beta, reference=None)
    names = [s for s in SPLIT_ORDER if s in rows_by_split]
    names += sorted(s for s in rows_by_split if s not in SPLIT_ORDER and s != UNASSIGNED)
    names += [UNASSIGNED] if UNASSIGNED in rows_by_split else []
    reference = overall["shares"] if overall["n"] else None
    per_split = {
        name: _stats(rows_by_split[name], classes, beta,
                     reference=None if name == UNASSIGNED else reference)
        for name in names
    }
    warnings = [
        {"split": name, "label": c, "count": stats["counts"][c], "min_count": min_count}
        for name, stats in per_split.items() if name != UNASSIGNED
        for c in classes if stats["counts"][c] < min_count
    ]
    return {"classes": classes, "beta": float(beta), "min_count": min_count,
            "overall": overall, "splits": per_split, "warnings": warnings}


def _stats(labels: list[str], classes: list[str], beta: float, *, reference) -> dict:
    """The statistics of one group of rows (see :func:`by_split`)."""
    counts = {c: 0 for c in classes}
    for lab in labels:
        if lab:
            counts[lab] += 1
    n = sum(counts.values())
    present = {c: k for c, k in counts.items() if k > 0}
    k = len(present)
    chi = None
    # a class with no file in any split has expected count 0 here and observed 0: it adds nothing
    tested = [] if reference is None else [c for c in classes if reference[c] > 0]
    if n and len(tested) > 1:
        chi = chi_square([counts[c] for c in tested], [n * reference[c] for c in tested])
    return {
        "rows": len(labels),
        "unlabelled": len(labels) - n,
        "n": n,
        "counts": counts,
        "shares": {c: (counts[c] / n if n else 0.0) for c in classes},
        "missing": [c for c in classes if counts[c] == 0],
        "imbalance_ratio": max(present.values()) / min(present.values()) if present else None,
        "entropy": normalised_entropy(list(counts.values())) if len(classes) > 1 and n else None,
        "class_weights": {c: n / (k * nc) for c, nc in present.items()},
        "effective_number": {c: effective_number(nc, beta) for c, nc in present.items()},
        "class_balanced_weights": class_balanced_weights(present, beta),
        "chi_square": chi,
    }


def normalised_entropy(counts) -> float:
    """Shannon entropy of ``counts``' shares over ln(len(counts)): 1 when even, 0 when one class.

    Parameters
    ----------
    counts : sequence of int
        At least two counts, not all zero.

    Returns
    -------
    float
        Pielou's evenness, in [0, 1].

    Examples
    --------
    >>> round(normalised_entropy([5, 5, 5]), 12)
    1.0
    >>> normalised_entropy([9, 0])
    0.0
    """
    n = sum(counts)
    h = -sum(c / n * math.log(c / n) for c in counts if c)
    return h / math.log(len(counts)) + 0.0  # + 0.0 turns -0.0 into 0.0


def effective_number(n: int, beta: float) -> float:
    """The effective number of ``n`` samples, ``(1 - beta**n) / (1 - beta)`` (Cui et al. 2019).

    Parameters
    ----------
    n : int
        Samples of the class.
    beta : float
        ``0 <= beta < 1``; 0 counts every class as one sample, values near 1 approach ``n``.

    Returns
    -------
    float

    Examples
    --------
    >>> round(effective_number(3, 0.9), 10)   # 1 + 0.9 + 0.81
    2.71
    """
    if beta == 0:
        return 1.0 if n else 0.0
    # expm1/log1p keep precision when beta is close to 1 (1 - beta**n loses digits there)
    return -math.expm1(n * math.log(beta)) / -math.expm1(math.log(beta))


def class_balanced_weights(counts: dict, beta: float) -> dict:
    """Weights proportional to 1 / effective number, scaled to sum to the number of classes.

    Parameters
    ----------
    counts : dict
        ``{class: samples}``, every count positive.
    beta : float
        As in :func:`effective_number`.

    Returns
    -------
    dict
        ``{class: weight}`` in the order of ``counts``.

    Examples
    --------
    >>> class_balanced_weights({"a": 1, "b": 1}, 0.9)
    {'a': 1.0, 'b': 1.0}
    """
    inverse = {c: 1.0 / effective_number(nc, beta) for c, nc in counts.items()}
    total = sum(inverse.values())
    return {c: len(inverse) * w / total for c, w in inverse.items()}


def chi_square(observed, expected) -> dict:
    """Pearson's chi-square statistic of ``observed`` against ``expected`` counts, and its p-value.

    Parameters
    ----------
    observed, expected : sequence of float
        Same length; ``expected`` values must be positive.

    Returns
    -------
    dict
        ``statistic`` = sum of (O - E)² / E, ``dof`` = len - 1 and ``p_value`` = P(X ≥ statistic)
        for X chi-square distributed with ``dof`` degrees of freedom.

    Examples
    --------
    >>> chi_square([10, 10], [10, 10])
    {'statistic': 0.0, 'dof': 1, 'p_value': 1.0}
    """
    if len(observed) != len(expected) or len(observed) < 2:
        raise ParameterError(f"chi_square needs two sequences of the same length >= 2, got {len(observed)} and {len(expected)}")
    if any(e <= 0 for e in expected):
        raise ParameterError(f"expected counts must be positive, got {list(expected)}")
    statistic = sum((o - e) ** 2 / e for o, e in zip(observed, expected))
    dof = len(observed) - 1
    return {"statistic": statistic, "dof": dof, "p_value": chi2_sf(statistic, dof)}


def chi2_sf(x: float, dof: int) -> float:
    """Survival function of the chi-square distribution: Q(dof / 2, x / 2).

    Parameters
    ----------
    x : float
        The statistic.
    dof : int
        Degrees of freedom, 1 or more.

    Returns
    -------
    float
        P(X >= x) for X chi-square distributed with ``dof`` degrees of freedom.

    Examples
    --------
    >>> round(chi2_sf(3.841458820694124, 1), 6)   # the 5 % critical value for one dof
    0.05
    """
    from scipy.special import gammaincc  # regularised upper incomplete gamma Q(a, x)

    if x <= 0:
        return 1.0
    return float(gammaincc(dof / 2.0, x / 2.0))
