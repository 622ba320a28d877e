"""How well labelprep's splitter keeps groups together and matches class shares.

Data: the handwritten digits bundled with scikit-learn (``sklearn.datasets.load_digits``,
1,797 images of 10 classes), made imbalanced (class ``c`` keeps about ``0.75**c`` of its images)
and given synthetic groups (rows shuffled and cut into groups of 1 to 12, like writers or
sessions, so most groups mix classes). Every method splits the same rows 8/1/1:

- labelprep: :func:`labelprep.splits.split`;
- random groups: a seeded shuffle of the groups, cut at 80 % and 90 % of the rows (what a plain
  group shuffle does);
- StratifiedGroupKFold: scikit-learn's ``StratifiedGroupKFold(10, shuffle=True)`` folds, eight
  combined into train, one val, one test.

Figures per method, mean and worst over the seeds: group leakage (groups found in more than one
split), size deviation (largest ``|rows in split / usable rows - ratio|``), class-share deviation
(largest ``|share of class in split - overall share|``) and the share of usable rows left
unassigned. Targets (issue 5): zero leakage, size deviation <= 0.02, class-share deviation at
most half of the better baseline's, no more than 1 % left unassigned.

With ``--scale N`` it also splits a synthetic manifest of ``N`` rows (100 classes with Zipf
shares, ``N / 5`` groups of mixed classes, as in the million-row pipeline benchmark) and prints
the time and the same figures; the target there is well under a minute for 1,000,000 rows.

With ``--folds K,K,...`` it times ``split(folds=K)`` on one fixed manifest (200 files of 4
classes, one unit each, as in issue 18's report) for each K, and prints the seconds, the seconds
per fold, the log-log growth exponent between the smallest and the largest K (target: at most 1,
no worse than linear in K) and how far the fold sizes are from even.

Run: ``python benchmarks/split_quality.py [--seeds 10] [--scale 1000000] [--folds 5,20,80,180]``.
"""

from __future__ import annotations

import argparse
import time
import warnings

import numpy as np
import pandas as pd

RATIOS = (0.8, 0.1, 0.1)
NAMES = ("train", "val", "test")


def make_rows(seed: int) -> pd.DataFrame:
    """Imbalanced digits with synthetic groups, as a manifest."""
    from sklearn.datasets import load_digits

    target = load_digits().target
    rng = np.random.default_rng(seed)
    keep = rng.random(target.size) < 0.75 ** target
    labels = target[keep]
    order = rng.permutation(labels.size)
    sizes = rng.integers(1, 13, size=labels.size)
    group_of_slot = np.repeat(np.arange(sizes.size), sizes)[: labels.size]
    group = np.empty(labels.size, dtype=np.int64)
    group[order] = group_of_slot
    return pd.DataFrame({"path": [f"digit_{i:05d}.png" for i in range(labels.size)],
                         "label": labels.astype(str), "group": [f"g{g}" for g in group],
                         "issues": ""})


def labelprep_split(rows: pd.DataFrame, seed: int) -> np.ndarray:
    from labelprep.splits import split

    return split(rows, ratios=RATIOS, seed=seed)["split"].to_numpy(dtype=object)


def random_groups(rows: pd.DataFrame, seed: int) -> np.ndarray:
    groups, codes = np.unique(rows["group"].to_numpy(dtype=str), return_inverse=True)
    rng = np.random.default_rng(seed)
    order = rng.permutation(groups.size)
    sizes = np.bincount(codes, minlength=groups.size)[order]
    position = (np.cumsum(sizes) - sizes / 2) / sizes.sum()
    cut = np.searchsorted(np.cumsum(RATIOS)[:-1], position, side="right")
    split_of_group = np.empty(groups.size, dtype=np.int64)
    split_of_group[order] = cut
    return np.asarray(NAMES, dtype=object)[split_of_group[codes]]


def stratified_group_kfold(rows: pd.DataFrame, seed: int) -> np.ndarray:
    from sklearn.model_selection import StratifiedGroupKFold

    folds = StratifiedGroupKFold(n_splits=10, shuffle=True, random_state=seed)
    out = np.empty(len(rows), dtype=object)
    with warnings.catch_warnings():  # the rarest digit has fewer rows than folds: expected here
        warnings.simplefilter("ignore", UserWarning)
        for fold, (_, test) in enumerate(folds.split(rows, rows["label"], rows["group"])):
            out[test] = "train" if fold < 8 else NAMES[fold - 7]
    return out


def measure(rows: pd.DataFrame, assigned: np.ndarray) -> dict:
    frame = pd.DataFrame({"label": rows["label"], "group": rows["group"], "split": assigned})
    placed = frame[frame["split"] != ""]
    leaks = int((placed.groupby("group")["split"].nunique() > 1).sum())
    overall = placed["label"].value_counts(normalize=True)
    size_dev = max(abs((placed["split"] == n).sum() / len(frame) - r) for n, r in zip(NAMES, RATIOS))
    share_dev = 0.0
    for name in NAMES:
        part = placed[placed["split"] == name]["label"]
        shares = part.value_counts(normalize=True).reindex(overall.index, fill_value=0.0)
        share_dev = max(share_dev, float((shares - overall).abs().max()) if len(part) else 1.0)
    return {"leaks": leaks, "size_dev": size_dev, "share_dev": share_dev,
            "unassigned": 1 - len(placed) / len(frame)}


def synthetic_rows(n: int, seed: int = 0) -> pd.DataFrame:
    """``n`` rows, 100 classes with shares proportional to 1/rank, ``n // 5`` random groups."""
    rng = np.random.default_rng(seed)
    weights = 1.0 / np.arange(1, 101)
    labels = rng.choice(100, n, p=weights / weights.sum())
    groups = rng.integers(0, max(n // 5, 1), n)
    return pd.DataFrame({"path": [f"img_{i:07d}.jpg" for i in range(n)],
                         "label": [f"class_{c:03d}" for c in labels],
                         "group": [f"g{g}" for g in groups], "issues": ""})


def scale(n: int) -> None:
    rows = synthetic_rows(n)
    start = time.perf_counter()
    assigned = labelprep_split(rows, 0)
    seconds = time.perf_counter() - start
    figures = measure(rows, assigned)
    print(f"scale: {n} rows, {rows['group'].nunique()} groups, 100 classes: split in {seconds:.1f} s; "
          f"leaking groups {figures['leaks']}, size dev {figures['size_dev']:.5f}, "
          f"share dev {figures['share_dev']:.5f}, unassigned {figures['unassigned']:.4f}")


def fold_scaling(ks: list[int], repeat: int = 2) -> None:
    """Seconds of ``split(folds=K)`` on one fixed 200-file manifest for each K (best of ``repeat``)."""
    from labelprep.splits import split

    rows = pd.DataFrame({"path": [f"{i:04d}.png" for i in range(200)],
                         "label": [f"c{i % 4}" for i in range(200)], "issues": ""})
    times = []
    for k in ks:
        best = np.inf
        for _ in range(repeat):
            start = time.perf_counter()
            out = split(rows, folds=k, seed=0)
            best = min(best, time.perf_counter() - start)
        times.append(best)
        sizes = out["fold"].value_counts().reindex(range(k), fill_value=0)
        train = int((out["split"] == "train").sum())
        print(f"folds {k:>4}: {best:7.2f} s, {best / k * 1000:8.1f} ms per fold; fold sizes "
              f"{sizes.min()}-{sizes.max()} (even: {train / k:.2f})")
    exponent = np.log(times[-1] / times[0]) / np.log(ks[-1] / ks[0])
    print(f"growth exponent of time in K from {ks[0]} to {ks[-1]} folds: {exponent:.2f} "
          f"({'target met' if exponent <= 1 else 'TARGET MISSED'}: at most 1, linear)")


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--seeds", type=int, default=10)
    parser.add_argument("--scale", type=int, default=0, metavar="N",
                        help="also time a synthetic manifest of N rows")
    parser.add_argument("--folds", default="", metavar="K,K,...",
                        help="only time split --folds K on a fixed 200-file manifest, each K")
    args = parser.parse_args()
    if args.folds:
        fold_scaling([int(k) for k in args.folds.split(",")])
        return
    methods = {"labelprep": labelprep_split, "random groups": random_groups,
               "StratifiedGroupKFold": stratified_group_kfold}
    results = {name: [] for name in methods}
    seconds = {name: 0.0 for name in methods}
    for seed in range(args.seeds):
        rows = make_rows(seed)
        for name, method in methods.items():
            start = time.perf_counter()
            assigned = method(rows, seed)
            seconds[name] += time.perf_counter() - start
            results[name].append(measure(rows, assigned))
    rows0 = make_rows(0)
    print(f"digits (sklearn load_digits), imbalanced: {len(rows0)} rows, "
          f"{rows0['group'].nunique()} groups, class counts "
          f"{rows0['label'].value_counts().sort_index().tolist()} (seed 0); {args.seeds} seeds")
    print(f"{'method':<22}{'leaking groups':>16}{'size dev':>18}{'share dev':>18}"
          f"{'unassigned':>12}{'s/run':>8}")
    print(f"{'':<22}{'mean / max':>16}{'mean / max':>18}{'mean / max':>18}{'max':>12}")
    summary = {}
    for name, runs in results.items():
        table = pd.DataFrame(runs)
        summary[name] = table
        print(f"{name:<22}{table.leaks.mean():>9.1f} / {table.leaks.max():<4d}"
              f"{table.size_dev.mean():>10.4f} / {table.size_dev.max():.4f}"
              f"{table.share_dev.mean():>10.4f} / {table.share_dev.max():.4f}"
              f"{table.unassigned.max():>12.4f}{seconds[name] / args.seeds:>8.3f}")
    ours = summary["labelprep"]
    best_base = min(summary["random groups"].share_dev.mean(),
                    summary["StratifiedGroupKFold"].share_dev.mean())
    ratio = ours.share_dev.mean() / best_base
    print(f"share deviation, labelprep / better baseline (means): {ratio:.3f} (target <= 0.5)")
    verdict = (ours.leaks.max() == 0 and ours.size_dev.max() <= 0.02 and ratio <= 0.5
               and ours.unassigned.max() <= 0.01)
    print("targets met" if verdict else "TARGETS MISSED")
    if args.scale:
        scale(args.scale)


if __name__ == "__main__":
    main()
