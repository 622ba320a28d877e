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

With ``--files`` it also runs the digits as real files (issue 13): each digit upsampled to 64x64
with nearest-neighbour (PNG), an imbalanced subset of about 880 (class ``c`` keeps ``0.825**c``
of its images) and writer-like groups (shuffled, cut into groups of 1 to 12) given in a label
table, through scan -> check -> group -> split, twice: with the group stage as it is (its
near-duplicate links) and with true clusters (every digit is a distinct image, so only
byte-identical files may be linked: the hashes are blanked before grouping). Per split it prints
the size deviation, the classes present and the largest class-share deviation, next to
scikit-learn's ``StratifiedGroupKFold`` folded 8/1/1 on the same rows and the writer groups (the
reference). Target: every class in every split, size deviation <= 0.02, largest class-share
deviation <= half of the reference's; the diagnosis of :mod:`labelprep.split_diagnosis` is
printed for each run that misses.

With ``--scale N`` it also splits a synthetic manifest of ``N`` rows (100 classes with Zipf
shares, ``N / 5`` groups of mixed classes, as in the million-row pipeline benchmark) and prints
the time and the same figures; the target there is well under a minute for 1,000,000 rows.

With ``--folds K,K,...`` it times ``split(folds=K)`` on one fixed manifest (200 files of 4
classes, one unit each, as in issue 18's report) for each K, and prints the seconds, the seconds
per fold, the log-log growth exponent between the smallest and the largest K (target: at most 1,
no worse than linear in K) and how far the fold sizes are from even.

Run: ``python benchmarks/split_quality.py [--seeds 10] [--files [--file-seeds 3]] [--scale 1000000]
[--folds 5,20,80,180]``.
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


def digit_files(folder, seed: int):
    """Write the imbalanced digits as 64x64 PNGs under ``folder/img`` and a label table with
    writer-like groups at ``folder/labels.csv``; return the table's path."""
    from PIL import Image
    from sklearn.datasets import load_digits

    digits = load_digits()
    rng = np.random.default_rng(seed)
    keep = rng.random(digits.target.size) < 0.825 ** digits.target
    index = np.flatnonzero(keep)
    order = rng.permutation(index.size)
    sizes = rng.integers(1, 13, size=index.size)
    group_of_slot = np.repeat(np.arange(sizes.size), sizes)[: index.size]
    group = np.empty(index.size, dtype=np.int64)
    group[order] = group_of_slot
    (folder / "img").mkdir(parents=True)
    for i in index:
        pixels = (digits.images[i] * (255 / 16)).round().astype(np.uint8)
        Image.fromarray(pixels).resize((64, 64), Image.NEAREST).save(folder / "img" / f"d{i:04d}.png")
    table = folder / "labels.csv"
    pd.DataFrame({"path": [f"img/d{i:04d}.png" for i in index], "label": digits.target[index].astype(str),
                  "group": [f"w{g:03d}" for g in group]}).to_csv(table, index=False)
    return table


def file_runs(seeds: int) -> None:
    """The digits as files through the pipeline, with and without the group stage's near links."""
    import tempfile
    from pathlib import Path

    from labelprep.checks import check
    from labelprep.clusters import group
    from labelprep.reports.split_findings import split_lines
    from labelprep.scanner import scan
    from labelprep.split_diagnosis import diagnose_split
    from labelprep.splits import split

    print("\n== digits as files: 64x64 nearest-neighbour PNGs, writer groups from a label table ==")
    print(f"{'seed':<5}{'clusters':<15}{'rows':>6}{'placed':>8}  {'size dev train/val/test':<26}"
          f"{'classes t/v/t':<15}{'share dev':>10}{'SGKF share dev':>16}{'ratio':>7}  target")
    ratios = {"as grouped": [], "true clusters": []}
    verdicts = {"as grouped": True, "true clusters": True}
    for seed in range(seeds):
        with tempfile.TemporaryDirectory() as tmp:
            table = digit_files(Path(tmp), seed)
            scanned = check(scan(tmp, labels=str(table), jobs=1))
        blank = scanned.copy()
        for column in [c for c in blank.columns if c.startswith("phash")]:
            blank[column] = ""
        for name, frame in (("as grouped", scanned), ("true clusters", blank)):
            grouped = group(frame)
            out = split(grouped, ratios=RATIOS, seed=seed)
            placed = out[out["split"] != ""].reset_index(drop=True)
            ours, ref = measure(placed, placed["split"].to_numpy(dtype=object)), None
            ref = measure(placed, stratified_group_kfold(placed, seed))
            devs = [abs((placed["split"] == n).mean() - r) for n, r in zip(NAMES, RATIOS)]
            present = [placed.loc[placed["split"] == n, "label"].nunique() for n in NAMES]
            every = placed["label"].nunique()
            ratio = ours["share_dev"] / ref["share_dev"]
            met = max(devs) <= 0.02 and min(present) == every and ratio <= 0.5
            verdicts[name] &= met
            ratios[name].append(ratio)
            print(f"{seed:<5}{name:<15}{len(out):>6}{len(placed):>8}  "
                  f"{'/'.join(f'{d:.3f}' for d in devs):<26}{'/'.join(map(str, present)) + f' of {every}':<15}"
                  f"{ours['share_dev']:>10.4f}{ref['share_dev']:>16.4f}{ratio:>7.2f}  "
                  f"{'met' if met else 'MISSED'}")
            for line in split_lines(diagnose_split(out, ratios=RATIOS))[:6]:
                print(f"       {line}")
    for name, values in ratios.items():
        print(f"{name}: share dev / StratifiedGroupKFold's, mean over {seeds} seeds "
              f"{np.mean(values):.3f} (target <= 0.5); {'targets met' if verdicts[name] else 'TARGETS MISSED'}")


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
    parser.add_argument("--files", action="store_true",
                        help="also run the digits as 64x64 files through scan, check, group, split")
    parser.add_argument("--file-seeds", type=int, default=3)
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
    if args.files:
        file_runs(args.file_seeds)
    if args.scale:
        scale(args.scale)


if __name__ == "__main__":
    main()
