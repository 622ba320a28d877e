"""Group-aware, stratified train/val/test assignment, k folds, and keeping an earlier split.

Units
-----
Rows that must share a split form a *unit*: the ``bundle`` written by the group stage
(near-duplicate clusters joined with user groups). Without a ``bundle`` column the units are
derived here from ``group`` and ``dup_group`` (rows linked by either share a unit). A row linked to
nothing is a unit of its own. Rows carrying an error code are left out (``split`` is ``""``).

Objective
---------
For the splits ``k`` with target ratios ``r_k``, ``N`` usable rows, ``n_c`` rows of class ``c``
and overall class shares ``p_c = n_c / N``, let ``X_kc`` be the rows of class ``c`` placed in
split ``k``, ``S_k`` the rows in split ``k`` and ``w_k = 1 / (r_k N)**2``. The optimiser
minimises::

    J = sum_k w_k * [ sum_c (X_kc - S_k p_c)**2 + (S_k - r_k N)**2 ]  +  P * Z

The first term is, up to the factor ``(S_k / r_k N)**2``, the squared deviation of each class's
share in split ``k`` from its overall share; the second the squared relative size error of the
split. Weighting by the split's target size matches the small val and test splits as closely as
train. ``Z`` counts empty (split, class) cells that could have been filled: a class with ``u``
units should reach the first ``u`` splits in the order train, test, val (all of them when ``u``
is large enough); ``P = 1`` outweighs any share error. Folds have no such order: only a class
with a unit for every fold is penalised for missing one, so a thin class is spread over the
folds by the size and share terms.

Search
------
1. Units in order of size, largest first (ties in seeded random order). The largest
   ``_GREEDY_UNITS`` are placed one by one where ``J`` grows least; the rest, which are small, are
   placed in one vectorised pass that fills what each class still lacks in each split along a
   cumulative sum of unit sizes.
2. Local moves: each round computes, for every movable unit and every split, the exact change of
   ``J`` when that unit alone moves there (vectorised over units). The best moves per (from, to,
   main class) are applied together when the batch lowers ``J``; otherwise the batch is halved
   until it does.
3. Pair swaps, in the same round: for pairs of splits (every pair for train/val/test; with many
   folds each fold and the ``_SWAP_PARTNERS`` folds its units move to most cheaply, so a round
   costs time linear in the number of folds), the units whose moves cost least are
   paired and the exact change of exchanging them is computed as a matrix; the best disjoint
   exchanges are applied the same way. Swaps fix what single moves cannot (a split holding one
   unit too large while lacking a smaller one).
4. Rounds repeat until none lowers ``J`` or a round budget (proportional to the inverse of the
   manifest's size) is spent. Problems of at most ``_RESTART_MAX_UNITS`` free units are solved
   from ``_RESTARTS`` seeded starting orders and the lowest ``J`` is kept.

Every step is a function of the manifest and the seed only, so the same input and seed give a
byte-identical manifest.
"""

from __future__ import annotations

import numpy as np

from . import codes
from .errors import ParameterError
from .validation import check_manifest
from .progress import resolve

SPLIT_NAMES = ("train", "val", "test")
THIN_CODE = "thin-class"

# the largest units are placed one at a time (exact greedy); beyond this many, the rest go in one
# vectorised pass, which keeps a million-row manifest fast while local moves clean up after it
_GREEDY_UNITS = 4096
# improvement rounds: every round strictly lowers J, so the cap only bounds run time. A round
# costs about one pass over the (unit, class) entries; the budget below keeps a million-row,
# 200,000-bundle manifest near 25 rounds (a few seconds) while small manifests run to the end.
_MAX_ROUNDS = 400
_MIN_ROUNDS = 20
_ROUND_BUDGET = 25_000_000
# restarts from other seeded orders for problems of at most this many free units
_RESTARTS = 8
_RESTART_MAX_UNITS = 2000
# units per split tried in a swap round (those whose move alone costs least), so a round costs
# at most this squared per pair of splits
_SWAP_CANDIDATES = 256
# splits each split exchanges units with in a round (see _Search._swap_pairs): train/val/test and
# up to 5 folds try every pair, more folds only the most promising, so a round stays linear in K
_SWAP_PARTNERS = 4
# weight of an empty (split, class) cell that could have been filled; far above any share term
_EMPTY_CELL_PENALTY = 1.0
# weight of a split's size error against its class-share errors (both in rows)
_SIZE_WEIGHT = 1.0
# the last pass lowers the largest class-share deviation directly (the sum of squares the search
# minimises lets one cell stay a row off); it tries every move and swap, so only small problems
# of train/val/test get it, and a split's size may drift up to this share of the rows for it
_POLISH_MAX_UNITS = 2000
_POLISH_ROUNDS = 200
_POLISH_MAX_CELLS = 1_000_000  # (units of one split x units of another x classes) per swap grid
_POLISH_SIZE_SLACK = 0.005
# objective changes smaller than this are rounding, not improvement
_TOL = 1e-12
# a unit holding kept rows from several old splits follows the first of these (test never loses)
_PRECEDENCE = ("test", "val", "train")
_PRECEDENCE_RANK = {name: i for i, name in enumerate(_PRECEDENCE)}


def split(manifest, *, ratios=(0.8, 0.1, 0.1), seed=0, folds=None, keep_from=None, resplit=False,
          progress=None):
    """Assign every usable row to train, val or test, keeping each unit in one split.

    Parameters
    ----------
    manifest : pandas.DataFrame
        Needs ``path`` and ``label``; reads ``issues`` (rows with an error code are left out),
        ``bundle`` (or else ``group`` and ``dup_group``), and ``sha256`` for ``keep_from``.
    ratios : sequence of float
        Target shares summing to 1. Three numbers are train, val, test; two are train, test
        (no val). Zeros are allowed except for train.
    seed : int
        Breaks ties between equal-sized units; the same seed gives the same result.
    folds : int, optional
        When given (2 or more), ``split`` holds only ``train`` and ``test`` (the last ratio is
        the test share; a val share joins train) and every train row gets a ``fold`` from 0 to
        ``folds - 1``, with the same unit and class-share guarantees.
    keep_from : pandas.DataFrame, optional
        An older manifest with a ``split`` column. Each row found there (by ``sha256``, else by
        ``path``) keeps its split (and its fold, when folds are asked and it had one); only the
        other rows are placed. A new row in a unit with a kept row follows it; a unit holding
        kept rows of several splits follows test, then val, then train.
    resplit : bool
        Without ``keep_from``, a manifest of a ``ROOT/<train|val|test>/<label>/`` tree keeps
        every row in its ``given_split`` (the folder it was found in, matched by path) the way
        ``keep_from`` keeps rows, and places only rows outside such folders (see
        :func:`given_assignment`); ``resplit=True`` splits it anew.
    progress : callable, optional
        ``progress(iterable, total=int, label=str)`` wrapped around the one-by-one placement.

    Returns
    -------
    pandas.DataFrame
        A copy of ``manifest`` with ``split`` (``""`` for rows left out), ``fold`` (Int64, empty
        unless ``folds``) and the warning code ``thin-class`` in ``issues`` on rows of a class
        with fewer units than there are splits (or folds). :func:`split_summary` tells what
        was kept and placed.

    Examples
    --------
    >>> import pandas as pd
    >>> m = pd.DataFrame({"path": [f"{i}.png" for i in range(20)],
    ...                   "label": ["cat", "dog"] * 10, "issues": [""] * 20})
    >>> out = split(m, ratios=(0.8, 0.2), seed=1)
    >>> out["split"].value_counts().to_dict()
    {'train': 16, 'test': 4}
    >>> out.groupby("split")["label"].value_counts().to_dict()["test", "cat"]
    2
    """
    import pandas as pd

    check_manifest(manifest, ("path", "label"))
    shares = _check_ratios(ratios)
    seed = _check_seed(seed)
    folds = _check_folds(folds)
    if keep_from is not None:
        check_manifest(keep_from, ("path", "split"), name="keep_from")
    elif not resplit:
        keep_from = given_assignment(manifest)

    order = manifest["path"].astype(str).argsort(kind="stable").to_numpy()
    frame = manifest.iloc[order]
    usable = _usable(frame)
    rows = frame[usable]
    # links are followed through left-out rows too: a truncated file in group g1 that is a near
    # copy of a file in g3 still ties g1 to g3 (same subject), so both stay in one split
    linked = _components(_link_keys(frame), len(frame))
    units = _Units.from_rows(rows, linked[usable])
    old_split, old_fold = _old_assignment(rows, keep_from)
    progress = resolve(progress)

    split_of_row = np.full(len(frame), "", dtype=object)
    fold_of_row = np.full(len(frame), -1, dtype=np.int64)
    thin = np.zeros(units.n_classes, dtype=bool)
    if units.n_units:
        split_of_row[usable], fold_of_row[usable], thin = _place(
            units, old_split, old_fold, shares, folds, seed, progress)

    out = manifest.copy()
    inverse = np.empty_like(order)
    inverse[order] = np.arange(len(order))
    out["split"] = pd.Series(split_of_row[inverse], index=out.index, dtype=object).astype(str)
    fold_values = fold_of_row[inverse]
    out["fold"] = pd.Series(fold_values, index=out.index).where(fold_values >= 0).astype("Int64")
    thin_rows = np.zeros(len(frame), dtype=bool)
    thin_rows[usable] = thin[units.row_class]
    issues = (out["issues"].fillna("").astype(str) if "issues" in out.columns
              else pd.Series("", index=out.index, dtype=str))
    # only rows that carry or gain the code need rewriting (the helper parses row by row)
    touch = thin_rows[inverse] | issues.str.contains(THIN_CODE, regex=False).to_numpy()
    issues = issues.copy()
    if touch.any():
        issues[touch] = codes.replace_stage_codes(issues[touch], "split",
                                                  {THIN_CODE: thin_rows[inverse][touch]})
    out["issues"] = issues
    return out


def _place(units, old_split, old_fold, shares, folds, seed, progress):
    """Split name and fold (-1 for none) of every usable row, and the thin classes."""
    if folds is None:
        names, targets = SPLIT_NAMES, shares
    else:  # train pool and test; the val share joins train, old val rows count as train
        names, targets = ("train", "test"), np.array([1.0 - shares[-1], shares[-1]])
        old_split = np.where(old_split == "val", "train", old_split)
    fixed = _fixed_splits(units, old_split, names)
    assigned, thin = _assign(units, targets, fixed, _priority(names), _rng(seed, 0), progress)
    row_split = np.asarray(names, dtype=object)[assigned[units.row_unit]]
    # a kept row stays where it was even when new links tie it to a unit of another split (the
    # audit then shows that leak); only the unit's new rows follow the unit
    kept = np.isin(old_split, names)
    row_split[kept] = old_split[kept]
    row_fold = np.full(len(row_split), -1, dtype=np.int64)
    if folds is not None:
        sub = units.subset(assigned == 0)
        in_pool = assigned[units.row_unit] == 0
        old_fold = np.where(kept & (old_fold >= 0) & (old_fold < folds), old_fold, -1)
        sub_fixed = sub.fixed_from_rows(old_fold[in_pool])
        fold_units, thin_folds = _assign(sub, np.full(folds, 1.0 / folds), sub_fixed,
                                         None, _rng(seed, 1), progress)
        thin = thin | thin_folds
        row_fold[in_pool] = fold_units[sub.row_unit]
        row_fold = np.where(old_fold >= 0, old_fold, row_fold)
        row_fold[row_split != "train"] = -1
    return row_split, row_fold, thin


def split_summary(manifest, *, keep_from=None) -> dict:
    """What a split holds, and with ``keep_from`` how it relates to the older manifest.

    Parameters
    ----------
    manifest : pandas.DataFrame
        A manifest returned by :func:`split` (needs ``path``, ``label`` and ``split``).
    keep_from : pandas.DataFrame, optional
        The older manifest that was passed to :func:`split`.

    Returns
    -------
    dict
        ``rows``; ``assigned`` and ``left_out`` (rows with an empty split); ``splits``
        (rows per split name); ``folds`` (rows per fold, ``{}`` without folds);
        ``thin_classes`` (labels carrying the ``thin-class`` warning); ``missing``
        (``{split: [labels present elsewhere but absent here]}``, only splits that lack one);
        with folds ``units_per_class`` (``{label: units}``: the groups, clusters or single files
        of each class that the folds share out) and ``fold_units`` (all of them).
        With ``keep_from`` also ``kept`` (rows found in the older split and still there),
        ``placed`` (rows not found there that got a split), ``moved`` (rows found there whose
        split changed: a val row becomes train when folds are asked), ``dropped`` (rows found
        there that are now left out, e.g. because they carry an error code) and ``dropped_from``
        (``{old split: [paths that were in it and are now left out]}``, matched by path).

    Examples
    --------
    >>> import pandas as pd
    >>> old = pd.DataFrame({"path": ["a.png"], "label": ["cat"], "split": ["test"]})
    >>> new = pd.DataFrame({"path": ["a.png", "b.png"], "label": ["cat", "cat"],
    ...                     "split": ["test", "train"]})
    >>> s = split_summary(new, keep_from=old)
    >>> s["kept"], s["placed"], s["moved"]
    (1, 1, 0)
    """
    check_manifest(manifest, ("path", "label", "split"), hint="run labelprep split first")
    split_col = manifest["split"].fillna("").astype(str)
    labels = manifest["label"].fillna("").astype(str)
    assigned = split_col != ""
    names = [n for n in SPLIT_NAMES if (split_col == n).any()]
    names += sorted(set(split_col[assigned]) - set(SPLIT_NAMES))
    present = set(labels[assigned])
    missing = {}
    for name in names:
        absent = sorted(present - set(labels[split_col == name]))
        if absent:
            missing[name] = absent
    folds = {}
    if "fold" in manifest.columns:
        fold = manifest["fold"].dropna()
        folds = {int(k): int(v) for k, v in fold.astype("int64").value_counts().sort_index().items()}
    issues = manifest["issues"].fillna("").astype(str) if "issues" in manifest.columns else None
    thin = []
    if issues is not None:
        flagged = issues.map(lambda cell: THIN_CODE in codes.parse(cell)).astype(bool)
        thin = sorted(set(labels[flagged]))
    summary = {"rows": int(len(manifest)), "assigned": int(assigned.sum()),
               "left_out": int((~assigned).sum()),
               "splits": {n: int((split_col == n).sum()) for n in names},
               "folds": folds, "thin_classes": thin, "missing": missing}
    if folds:
        summary["units_per_class"], summary["fold_units"] = _fold_units(manifest, labels)
    if keep_from is not None:
        check_manifest(keep_from, ("path", "split"), name="keep_from")
        old, _ = _old_assignment(manifest, keep_from)
        now = split_col.to_numpy(dtype=object)
        found = old != ""
        dropped = found & (now == "")
        # who lost a member: the old split of the same path (a new byte copy of an old test
        # file matches it by sha256 above, but was never in test)
        paths = manifest["path"].astype(str)
        was = paths.map(keep_from.assign(path=keep_from["path"].astype(str))
                        .drop_duplicates("path").set_index("path")["split"]).fillna("").to_numpy(dtype=object)
        summary.update(kept=int((found & (now == old)).sum()),
                       placed=int((~found & (now != "")).sum()),
                       moved=int((found & (now != "") & (now != old)).sum()),
                       dropped=int(dropped.sum()),
                       dropped_from={n: sorted(paths[(now == "") & (was == n)]) for n in SPLIT_NAMES
                                     if ((now == "") & (was == n)).any()})
    return summary


def _fold_units(manifest, labels):
    """Units (linked as :func:`split` links them) among the rows that have a fold: per class, and
    in all."""
    import pandas as pd

    unit = _components(_link_keys(manifest), len(manifest))
    has_fold = manifest["fold"].notna().to_numpy()
    pairs = pd.DataFrame({"label": labels.to_numpy()[has_fold], "unit": unit[has_fold]})
    per_class = {str(k): int(v) for k, v in pairs.groupby("label")["unit"].nunique().items()}
    return per_class, int(pairs["unit"].nunique())


def given_assignment(manifest):
    """The split the folders gave (``given_split``) as a ``path,split`` frame for ``keep_from``,
    or None when no row has one. Rows are matched by path only: a byte copy in another folder
    is another file here.

    Examples
    --------
    >>> import pandas as pd
    >>> m = pd.DataFrame({"path": ["train/cat/a.png", "b.png"], "given_split": ["train", ""]})
    >>> given_assignment(m).to_dict("list")
    {'path': ['train/cat/a.png'], 'split': ['train']}
    """
    if "given_split" not in manifest.columns:
        return None
    given = manifest["given_split"].fillna("").astype(str)
    if not given.isin(SPLIT_NAMES).any():
        return None
    rows = given.isin(SPLIT_NAMES)
    return manifest.loc[rows, ["path"]].assign(split=given[rows]).reset_index(drop=True)


# ---------------------------------------------------------------- parameters

def _check_ratios(ratios):
    """Ratios as three shares (train, val, test); two-way ratios get a val share of 0."""
    if isinstance(ratios, (str, bytes)) or not hasattr(ratios, "__len__"):
        raise TypeError(f"ratios must be a sequence of numbers, got {type(ratios).__name__}")
    values = list(ratios)
    if any(isinstance(v, bool) or not isinstance(v, (int, float, np.integer, np.floating))
           for v in values):
        raise TypeError(f"ratios must be numbers, got {values!r}")
    if len(values) not in (2, 3):
        raise ParameterError(f"ratios must have 2 (train, test) or 3 (train, val, test) values, "
                             f"got ratios={values!r}")
    arr = np.array(values, dtype=float)
    if not np.isfinite(arr).all() or (arr < 0).any() or arr[0] <= 0:
        raise ParameterError(f"ratios must be 0 or more and train's above 0, got ratios={values!r}")
    if abs(arr.sum() - 1.0) > 1e-6:
        raise ParameterError(f"ratios must sum to 1, got ratios={values!r} (sum {arr.sum():g})")
    arr = arr / arr.sum()
    return arr if len(arr) == 3 else np.array([arr[0], 0.0, arr[1]])


def _check_seed(seed):
    if isinstance(seed, bool) or not isinstance(seed, (int, np.integer)):
        raise TypeError(f"seed must be an int, got {type(seed).__name__}")
    if seed < 0:
        raise ParameterError(f"seed must be 0 or more, got seed={seed!r}")
    return int(seed)


def _check_folds(folds):
    if folds is None:
        return None
    if isinstance(folds, bool) or not isinstance(folds, (int, np.integer)):
        raise TypeError(f"folds must be an int or None, got {type(folds).__name__}")
    if folds < 2:
        raise ParameterError(f"folds must be 2 or more, got folds={folds!r}")
    return int(folds)


def _priority(names):
    """Split indices in the order a thin class should reach them: train (to learn it), test, val."""
    return [names.index(n) for n in ("train", "test", "val") if n in names]


def _rng(seed, stage):
    """The one source of randomness: a generator per (seed, stage) so stages do not share draws."""
    return np.random.default_rng([seed, stage])


# ---------------------------------------------------------------- rows and units

def _usable(frame):
    """Rows without an error code, as a numpy bool array."""
    usable = np.ones(len(frame), dtype=bool)
    if "issues" in frame.columns:
        issues = frame["issues"].fillna("").astype(str)
        flagged = (issues != "").to_numpy()  # most rows are clean; parse only the others
        usable[flagged] = ~codes.errors_mask(issues[flagged]).to_numpy()
    return usable


def _fixed_splits(units, old_split, names):
    """Per unit the index in ``names`` of its kept rows' split, -1 for a unit of new rows only.

    A unit whose kept rows come from several splits follows the first in :data:`_PRECEDENCE`.
    """
    import pandas as pd

    row_rank = pd.Series(old_split, dtype=object).map(_PRECEDENCE_RANK).fillna(-1).to_numpy(dtype=np.int64)
    fixed = units.fixed_from_rows(row_rank)
    to_index = np.array([names.index(p) if p in names else -1 for p in _PRECEDENCE])
    return np.where(fixed >= 0, to_index[np.clip(fixed, 0, None)], -1)


def _old_assignment(frame, old):
    """Each row's split (and fold) in ``old``, matched by sha256, else by path; ``""`` / -1 if new."""
    import pandas as pd

    n = len(frame)
    if old is None:
        return np.full(n, "", dtype=object), np.full(n, -1, dtype=np.int64)
    prev = old.assign(split=old["split"].fillna("").astype(str), path=old["path"].astype(str))
    prev = prev[prev["split"].isin(SPLIT_NAMES)]
    prev = prev.assign(_rank=prev["split"].map(_PRECEDENCE_RANK))
    prev = prev.sort_values(["_rank", "path"], kind="stable")
    fold = (pd.to_numeric(prev["fold"], errors="coerce") if "fold" in prev.columns
            else pd.Series(np.nan, index=prev.index))
    prev = prev.assign(_fold=fold.fillna(-1).astype("int64"))
    split_of = pd.Series("", index=frame.index, dtype=object)
    fold_of = pd.Series(-1, index=frame.index, dtype="int64")
    found = pd.Series(False, index=frame.index)
    for column in ("sha256", "path"):
        if column not in frame.columns or column not in prev.columns:
            continue
        table = prev[prev[column].fillna("").astype(str) != ""].drop_duplicates(column)
        table = table.set_index(table[column].astype(str))
        key = frame[column].fillna("").astype(str)
        hit = ~found & key.isin(table.index)
        split_of[hit] = key[hit].map(table["split"])
        fold_of[hit] = key[hit].map(table["_fold"])
        found |= hit
    return split_of.to_numpy(dtype=object), fold_of.to_numpy(dtype=np.int64)


def _components(keys, n):
    """Connected components of rows linked by sharing any key: a unit id per row (0, 1, ...).

    ``keys`` are int arrays (-1 = no key). Minimum-label propagation with pointer jumping; ids
    are numbered in row order, so they depend on the (path-sorted) rows only.
    """
    label = np.arange(n)
    changed = True
    while changed:
        changed = False
        for key in keys:
            has = key >= 0
            if not has.any():
                continue
            smallest = np.full(int(key.max()) + 1, n)
            np.minimum.at(smallest, key[has], label[has])
            new = np.minimum(label[has], smallest[key[has]])
            if (new < label[has]).any():
                changed = True
                label[has] = new
        label = label[label]
    return np.unique(label, return_inverse=True)[1]


def _link_keys(rows):
    """Int codes of the columns that tie rows together: ``bundle``, else ``group`` and ``dup_group``."""
    import pandas as pd

    columns = ["bundle"] if "bundle" in rows.columns else [c for c in ("group", "dup_group")
                                                           if c in rows.columns]
    keys = []
    for column in columns:
        values = rows[column]
        if column == "group":
            values = values.fillna("").astype(str).replace("", pd.NA)
        keys.append(pd.factorize(values, use_na_sentinel=True)[0].astype(np.int64))
    return keys


class _Units:
    """Usable rows grouped into units, with each unit's class counts as sparse entries.

    ``eu``, ``ec``, ``ev``: unit, class and row count of every non-zero (unit, class) pair, sorted
    by unit then class; ``ptr[u]:ptr[u + 1]`` are unit ``u``'s entries.
    """

    def __init__(self, row_unit, row_class, n_classes):
        self.row_unit = row_unit
        self.row_class = row_class
        self.n_classes = n_classes
        self.n_units = int(row_unit.max()) + 1 if len(row_unit) else 0
        pair, count = np.unique(row_unit * max(n_classes, 1) + row_class, return_counts=True)
        self.eu = pair // max(n_classes, 1)
        self.ec = pair % max(n_classes, 1)
        self.ev = count.astype(np.float64)
        self.ptr = np.searchsorted(self.eu, np.arange(self.n_units + 1))
        self.size = np.bincount(self.eu, self.ev, minlength=self.n_units)
        # main class: most rows in the unit, the lower class index on a tie
        by_count = np.lexsort((self.ec, -self.ev, self.eu))
        self.main = self.ec[by_count[self.ptr[:-1]]]

    @classmethod
    def from_rows(cls, rows, link):
        """Units of ``rows`` from ``link`` (any int id per row: equal ids share a unit)."""
        import pandas as pd

        row_unit = np.unique(link, return_inverse=True)[1].reshape(-1)
        row_class, classes = pd.factorize(rows["label"].fillna("").astype(str), sort=True)
        return cls(row_unit.astype(np.int64), row_class.astype(np.int64), len(classes))

    def subset(self, keep):
        """The units where ``keep`` is true, renumbered in order, over the rows they hold."""
        rows = keep[self.row_unit]
        new_id = np.cumsum(keep) - 1
        return _Units(new_id[self.row_unit[rows]], self.row_class[rows], self.n_classes)

    def fixed_from_rows(self, row_rank):
        """Per unit the split its rows were fixed to (-1 when none): the smallest row rank wins."""
        big = np.iinfo(np.int64).max
        fixed = np.full(self.n_units, big, dtype=np.int64)
        has = row_rank >= 0
        np.minimum.at(fixed, self.row_unit[has], row_rank[has])
        return np.where(fixed == big, -1, fixed)

    def entries_of(self, units):
        """Positions of the entries of ``units`` and, for each, the index into ``units``."""
        lens = self.ptr[units + 1] - self.ptr[units]
        local = np.repeat(np.arange(len(units)), lens)
        starts = np.repeat(self.ptr[units] - np.cumsum(lens) + lens, lens)
        return starts + np.arange(int(lens.sum())), local


# ---------------------------------------------------------------- the optimiser

def _assign(units, ratios, fixed, priority, rng, progress):
    """A split index per unit, and which classes are too thin to reach every split.

    ``ratios`` holds one target share per split (0 for a split that only keeps fixed units);
    ``fixed`` the split of each unit that may not move, -1 for a free unit; ``priority`` the
    split indices in the order a class too thin for all of them should reach them (None: the
    splits are interchangeable folds). See the module docstring for the objective and the search.
    """
    ratios = np.asarray(ratios, dtype=float)
    best = None
    free = np.flatnonzero((fixed < 0) & (units.size > 0))
    rounds = int(np.clip(_ROUND_BUDGET // max(units.eu.size, 1), _MIN_ROUNDS, _MAX_ROUNDS))
    # small problems are cheap to solve again from other starting orders; keep the best
    for _ in range(_RESTARTS if free.size <= _RESTART_MAX_UNITS else 1):
        search = _Search(units, ratios, fixed, priority)
        key = rng.permutation(free.size)
        by_size = np.lexsort((key, -units.size[free]))
        one_by_one, rest = free[by_size[:_GREEDY_UNITS]], by_size[_GREEDY_UNITS:]
        for u in progress(one_by_one.tolist(), total=len(one_by_one), label="split"):
            search.place_best(u)
        if rest.size:
            # in random order, not by size: filled along a cumulative sum, size order would send
            # the smallest (purest) units of every class to the last split
            search.fill(free[rest[np.argsort(key[rest])]])
        for _ in range(rounds):
            if not search.improve():
                break
        if best is None or search.objective() < best.objective() - _TOL:
            best = search
    if best.k <= len(SPLIT_NAMES):  # not the folds: a pass over every pair of K folds is K**2
        _polish_largest_share(best)
    return best.assign, best.thin


class _Search:
    """State of the optimiser: rows per (split, class), the objective and its exact deltas.

    A unit with class counts ``v`` and size ``s`` changes the residuals ``R_kc = X_kc - S_k p_c``
    of the split it joins by ``v' = v - s p``; every delta below is a quadratic form in ``v'``,
    evaluated from the unit's sparse entries without forming ``v'``.
    """

    def __init__(self, units, ratios, fixed, priority):
        self.u = units
        self.k = len(ratios)
        self.active = ratios > 0
        # units fixed to a split with no target take no part in the targets or the search
        outside = (fixed >= 0) & ~self.active[np.clip(fixed, 0, None)]
        taking = ~outside[units.eu]
        n_c = np.bincount(units.ec[taking], units.ev[taking], minlength=units.n_classes)
        total = n_c.sum()
        self.p = n_c / total if total else n_c
        self.target = np.outer(ratios, n_c)
        self.size_target = ratios * total
        self.weight = np.zeros(self.k)
        self.weight[self.active] = 1.0 / (ratios[self.active] * max(total, 1)) ** 2
        units_per_class = np.bincount(units.ec[taking], minlength=units.n_classes)
        self.thin = (units_per_class < self.active.sum()) & (units_per_class > 0)
        # penalised (split, class) cells: a class with u units should reach the first u active
        # splits in priority order (all of them when it has enough units). Folds have no order
        # (priority None): a class too thin for every fold is left to the size and share terms,
        # which spread its units over the folds instead of crowding the first u of them
        if priority is None:
            reaching = self.active[:, None] & (units_per_class >= self.active.sum())[None, :]
        else:
            rank = np.full(self.k, self.k)
            in_order = [k for k in priority if self.active[k]]
            rank[in_order] = np.arange(len(in_order))
            reaching = rank[:, None] < units_per_class[None, :]
        self.penalised = reaching * _EMPTY_CELL_PENALTY
        # per unit: v . p and |v'|^2 = |v|^2 - 2 s (v . p) + s^2 |p|^2
        self.vp = np.bincount(units.eu, units.ev * self.p[units.ec], minlength=units.n_units)
        vv = np.bincount(units.eu, units.ev ** 2, minlength=units.n_units)
        self.norm2 = vv - 2 * units.size * self.vp + units.size ** 2 * (self.p @ self.p)
        self.x = np.zeros((self.k, units.n_classes))
        self.s = np.zeros(self.k)
        self.assign = fixed.copy()
        self.movable = (fixed < 0) & (units.size > 0)
        placed = np.flatnonzero(fixed >= 0)
        self._add(placed, fixed[placed], +1)

    # -- state
    def _add(self, units, dest, sign):
        ent, local = self.u.entries_of(units)
        np.add.at(self.x, (dest[local], self.u.ec[ent]), sign * self.u.ev[ent])
        self.s += sign * np.bincount(dest, self.u.size[units], minlength=self.k)

    def _move(self, units, dest):
        self._add(units, self.assign[units], -1)
        self._add(units, dest, +1)
        self.assign[units] = dest

    def _residuals(self):
        return self.x - np.outer(self.s, self.p), self.s - self.size_target

    def objective(self):
        r, e = self._residuals()
        spread = self.weight @ ((r * r).sum(axis=1) + _SIZE_WEIGHT * e * e)
        return spread + float((self.penalised * (self.x == 0)).sum())

    def _dots(self, units, ent, local, dest):
        """``v'_u . R_k`` for every unit ``u`` of ``units`` and its own split ``k = dest[i]``."""
        r, _ = self._residuals()
        c, v = self.u.ec[ent], self.u.ev[ent]
        return (np.bincount(local, v * r[dest[local], c], minlength=len(units))
                - self.u.size[units] * (r @ self.p)[dest])

    # -- construction
    def place_best(self, unit):
        """Put one unit where the objective grows least (the one-unit case of :meth:`move_deltas`)."""
        lo, hi = self.u.ptr[unit], self.u.ptr[unit + 1]
        c, v = self.u.ec[lo:hi], self.u.ev[lo:hi]
        size = self.u.size[unit]
        dots = ((self.x[:, c] - np.outer(self.s, self.p[c])) @ v
                - size * (self.x @ self.p - self.s * (self.p @ self.p)))
        e = self.s - self.size_target
        grow = self.norm2[unit] + 2 * dots + _SIZE_WEIGHT * (size * size + 2 * size * e)
        dest = int(np.argmin(np.where(self.active, self.weight * grow, np.inf)))
        self.x[dest, c] += v
        self.s[dest] += size
        self.assign[unit] = dest

    def fill(self, units):
        """Place many small units at once: each class's units share what it still lacks per split."""
        main = self.u.main[units]
        by_class = np.argsort(main, kind="stable")
        units, main = units[by_class], main[by_class]
        size = self.u.size[units]
        lack = np.clip(self.target - self.x, 0, None) * self.active[:, None]
        total_lack = lack.sum(axis=0)
        fallback = self.target / np.maximum(self.target.sum(axis=0), 1e-300)
        share = np.where(total_lack > 0, lack / np.where(total_lack > 0, total_lack, 1), fallback)
        bounds = np.cumsum(share, axis=0)[:-1]
        class_total = np.bincount(main, size, minlength=self.u.n_classes)
        class_start = np.concatenate([[0.0], np.cumsum(class_total)[:-1]])
        middle = np.cumsum(size) - size / 2 - class_start[main]
        position = middle / class_total[main]
        dest = (position[None, :] > bounds[:, main]).sum(axis=0)
        self.assign[units] = dest
        self._add(units, dest, +1)

    # -- improvement
    def move_deltas(self, units, splits=None):
        """Exact change of the objective for moving each unit alone to each split (inf: no move).

        ``splits`` limits the columns computed (all splits by default), so asking for one
        destination costs one pass over the units' entries whatever the number of splits.
        """
        splits = range(self.k) if splits is None else splits
        ent, local = self.u.entries_of(units)
        c, v = self.u.ec[ent], self.u.ev[ent]
        e = self.s - self.size_target
        src = self.assign[units]
        a = src[local]
        size = self.u.size[units]
        leave_empty = np.bincount(local, self.penalised[a, c] * (self.x[a, c] == v), minlength=len(units))
        leave = (self.weight[src] * (self.norm2[units] - 2 * self._dots(units, ent, local, src)
                                     + _SIZE_WEIGHT * (size * size - 2 * size * e[src])) + leave_empty)
        deltas = np.empty((len(units), len(splits)))
        for column, b in enumerate(splits):
            fill_empty = np.bincount(local, self.penalised[b, c] * (self.x[b, c] == 0), minlength=len(units))
            dots = self._dots(units, ent, local, np.full(len(units), b))
            deltas[:, column] = (self.weight[b] * (self.norm2[units] + 2 * dots
                                                   + _SIZE_WEIGHT * (size * size + 2 * size * e[b]))
                                 - fill_empty + leave)
            deltas[src == b, column] = np.inf
            if not self.active[b]:
                deltas[:, column] = np.inf
        return deltas

    def improve(self):
        """One round of moves, then swaps between pairs of splits; True when J went down."""
        units = np.flatnonzero(self.movable)
        if units.size == 0:
            return False
        deltas = self.move_deltas(units)
        improved = self._moves(units, deltas)
        for a, b in self._swap_pairs(units, deltas):
            improved |= self._swap_pair(a, b, units, deltas)
        return improved

    def _swap_pairs(self, units, deltas):
        """The pairs of splits a round tries to swap between, at most ``_SWAP_PARTNERS`` per split.

        Each split is paired with the splits that its units' cheapest single moves go to (where
        a unit from it fits best), so the pairs, and a round's cost, grow linearly with the
        number of splits (folds); with up to ``_SWAP_PARTNERS + 1`` splits every pair is tried.
        """
        cheapest = np.full((self.k, self.k), np.inf)
        np.minimum.at(cheapest, self.assign[units], deltas)
        pairs = set()
        for a in np.flatnonzero(self.active):
            finite = np.flatnonzero(np.isfinite(cheapest[a]))
            near = finite[np.lexsort((finite, cheapest[a, finite]))[:_SWAP_PARTNERS]]
            pairs.update((min(a, b), max(a, b)) for b in near.tolist())
        return sorted(pairs)

    def _moves(self, units, deltas):
        """Apply the best single-unit moves, one per (from, to, main class)."""
        dest = deltas.argmin(axis=1)
        gain = deltas[np.arange(len(units)), dest]
        good = gain < -_TOL
        units, dest, gain = units[good], dest[good], gain[good]
        # moves in different (from, to, class) cells barely interact, so they go in one batch
        cell = (self.assign[units] * self.k + dest) * self.u.n_classes + self.u.main[units]
        chosen = _best_per_key(cell, gain)
        return self._apply_batch(units[chosen, None], dest[chosen, None])

    def _swap_pair(self, a, b, units, deltas):
        """Exchange units between ``a`` and ``b``: the best disjoint pairs among the candidates."""
        in_a, move_ab = self._swap_candidates(a, b, units, deltas)
        in_b, move_ba = self._swap_candidates(b, a, units, deltas)
        if in_a.size == 0 or in_b.size == 0:
            return False
        # a swap is both moves plus their cross term -2 (w_a + w_b) (v'_i . v'_j + s_i s_j); the
        # empty-cell part is taken from the moves alone (the batch is checked against J anyway)
        size_a, size_b = self.u.size[in_a], self.u.size[in_b]
        overlap = (self._class_rows(in_a) @ self._class_rows(in_b).T
                   - np.outer(self.vp[in_a], size_b) - np.outer(size_a, self.vp[in_b])
                   + (self.p @ self.p + _SIZE_WEIGHT) * np.outer(size_a, size_b))
        gain = move_ab[:, None] + move_ba[None, :] - 2 * (self.weight[a] + self.weight[b]) * overlap
        partner = gain.argmin(axis=1)
        best = gain[np.arange(in_a.size), partner]
        good = best < -_TOL
        first, second, best = in_a[good], in_b[partner[good]], best[good]
        chosen = _best_per_key(second, best)  # each unit of b in one swap at most
        pairs = np.stack([first[chosen], second[chosen]], axis=1)
        dest = np.tile(np.array([b, a]), (len(chosen), 1))
        return self._apply_batch(pairs, dest)

    def _swap_candidates(self, source, dest, units, deltas):
        """Up to ``_SWAP_CANDIDATES`` units now in ``source`` that lose least by moving to ``dest``.

        Chosen by the round's ``deltas`` (moves made since only shift them a little); their move
        deltas are then computed afresh.
        """
        here = self.assign[units] == source
        pool, cost = units[here], deltas[here, dest]
        if pool.size > _SWAP_CANDIDATES:
            cut = np.partition(cost, _SWAP_CANDIDATES - 1)[_SWAP_CANDIDATES - 1]
            pool, cost = pool[cost <= cut], cost[cost <= cut]
            pool = np.sort(pool[np.lexsort((pool, cost))[:_SWAP_CANDIDATES]])
        if pool.size == 0:
            return pool, np.zeros(0)
        return pool, self.move_deltas(pool, [dest])[:, 0]

    def _class_rows(self, units):
        """Dense (units x classes) row counts."""
        ent, local = self.u.entries_of(units)
        dense = np.zeros((len(units), self.u.n_classes))
        dense[local, self.u.ec[ent]] = self.u.ev[ent]
        return dense

    def _apply_batch(self, units, dest):
        """Apply changes ``units[i] -> dest[i]`` (rows of unit arrays), best first.

        Keeps the first ``n`` changes when together they lower the objective, halving ``n``
        until they do; True when something was kept.
        """
        before = self.objective()
        n = len(units)
        while n:
            moving, target = units[:n].ravel(), dest[:n].ravel()
            source = self.assign[moving].copy()
            self._move(moving, target)
            if self.objective() < before - _TOL:
                return True
            self._move(moving, source)
            n //= 2
        return False


def _polish_largest_share(search):
    """Lower the largest ``|share of a class in a split - its overall share|`` in place.

    Each round evaluates every single move and every pair swap between two splits (vectorised)
    and applies the one that lowers the largest deviation most, as long as no filled (split,
    class) cell empties and no split's size strays more than ``_POLISH_SIZE_SLACK`` of the rows
    from its target (or more than it already did).
    """
    units = np.flatnonzero(search.movable)
    if units.size == 0 or units.size > _POLISH_MAX_UNITS:
        return
    active = np.flatnonzero(search.active)
    rows = search._class_rows(units)
    size = search.u.size[units]
    total = max(search.size_target.sum(), 1.0)
    ratio = search.size_target / total
    p = search.p

    def worst(x, s):
        """Largest deviation per split; an emptied split counts as the worst possible."""
        with np.errstate(invalid="ignore", divide="ignore"):
            dev = np.abs(x / s[..., None] - p).max(axis=-1)
        return np.where(s > 0, dev, np.inf)

    for _ in range(_POLISH_ROUNDS):
        x, s, where = search.x, search.s, search.assign[units]
        per = worst(x[active], s[active])
        slack = max(_POLISH_SIZE_SLACK, float(np.abs(s[active] / total - ratio[active]).max()))
        best, step = per.max() - _TOL, None
        for i, a in enumerate(active):
            in_a = np.flatnonzero(where == a)
            for j, b in enumerate(active):
                if a == b or in_a.size == 0:
                    continue
                rest = np.delete(per, [i, j]).max(initial=0.0)
                # moves of a unit of a to b as an (m, 1) grid; for a < b also swaps of unit m of
                # a for unit n of b as an (m, n) grid
                grids = [(np.zeros(0, dtype=np.int64), -rows[in_a][:, None, :], -size[in_a][:, None])]
                in_b = np.flatnonzero(where == b)
                if a < b and 0 < in_a.size * in_b.size * rows.shape[1] <= _POLISH_MAX_CELLS:
                    grids.append((in_b, rows[in_b][None, :, :] - rows[in_a][:, None, :],
                                  size[in_b][None, :] - size[in_a][:, None]))
                for partner, change, grown in grids:
                    xa, sa, xb, sb = x[a] + change, s[a] + grown, x[b] - change, s[b] - grown
                    ok = (((xa > 0) | (x[a] == 0)).all(axis=2) & ((xb > 0) | (x[b] == 0)).all(axis=2)
                          & (np.abs(sa / total - ratio[a]) <= slack)
                          & (np.abs(sb / total - ratio[b]) <= slack))
                    score = np.where(ok, np.maximum(np.maximum(worst(xa, sa), worst(xb, sb)), rest), np.inf)
                    if score.min() < best:
                        m, n = np.unravel_index(int(score.argmin()), score.shape)
                        best = score[m, n]
                        step = (([in_a[m], partner[n]], [b, a]) if partner.size else ([in_a[m]], [b]))
        if step is None:
            return
        search._move(units[step[0]], np.array(step[1]))


def _best_per_key(key, gain):
    """Indices of the lowest ``gain`` per distinct ``key``, ordered by gain (ties: lower index)."""
    if key.size == 0:
        return np.zeros(0, dtype=np.int64)
    order = np.lexsort((np.arange(key.size), gain, key))
    first = order[np.concatenate([[True], key[order][1:] != key[order][:-1]])]
    return first[np.lexsort((first, gain[first]))]
