"""Pipeline scale: a synthetic manifest of 1,000,000 rows through group -> split -> report.

The manifest has 100 classes of unequal size, 200,000 user groups (each inside one class) and
planted near-duplicates: pairs whose perceptual hashes differ by 1..6 bits and whose sketches
(the 32x32 thumbnails a scan stores, 1.4 kB of base64 per row) differ by a little noise, and
exact copies (same sha256, hash and sketch), some of them across groups. Every candidate pair is
verified on the sketches, as for real files. Each stage runs once, in this process, on the
output of the one before; the script prints each stage's time and the peak resident memory so
far, the totals against the issue's budget (under 3 minutes, under 4 GB), and two checks that the
result is right: planted pairs found in one cluster, and no cluster or group spanning splits.

    python benchmarks/pipeline_scale.py                 # 1,000,000 rows (the README figures)
    python benchmarks/pipeline_scale.py --rows 100000   # a quick look
"""

from __future__ import annotations

import argparse
import base64
import os
import resource
import tempfile
import time
from pathlib import Path

BUDGET_SECONDS = 180.0     # issue 7: group -> split -> report under 3 minutes
BUDGET_MB = 4096.0         # issue 7: under 4 GB peak memory
CLASSES = 100
NEAR_SHARE = 0.01          # share of rows that are a near copy of another row
EXACT_SHARE = 0.002        # share of rows that are a byte-identical copy of another row


def _peak_mb() -> float:
    """Peak resident memory since the last _reset_peak (Linux's VmHWM), else since start."""
    try:
        for line in Path("/proc/self/status").read_text().splitlines():
            if line.startswith("VmHWM:"):
                return int(line.split()[1]) / 1024
    except OSError:
        pass
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024


def _reset_peak() -> None:
    """Start the peak count again from the memory in use now (Linux: /proc/self/clear_refs 5), so
    the stages' peak does not include the synthetic manifest's construction; the manifest itself,
    resident, still counts. Memory the construction freed is first handed back to the system
    (glibc's malloc_trim), as a fresh process reading the manifest would not hold it."""
    import ctypes
    import gc

    gc.collect()
    try:
        ctypes.CDLL("libc.so.6").malloc_trim(0)
    except (OSError, AttributeError):
        pass
    try:
        Path("/proc/self/clear_refs").write_text("5")
    except OSError:
        pass


def synthetic_manifest(rows: int, groups: int, seed: int = 0):
    """The synthetic manifest, and the (copy, original) row pairs planted in it."""
    import numpy as np
    import pandas as pd

    from labelprep import manifest

    rng = np.random.default_rng(seed)
    # class sizes fall off like 1/rank^0.5 (a mild long tail); each group lives in one class
    weights = 1 / np.sqrt(np.arange(1, CLASSES + 1))
    group_class = rng.choice(CLASSES, size=groups, p=weights / weights.sum())
    group = rng.integers(0, groups, rows)
    label = group_class[group]
    # every hash column a scan writes (hashing.fingerprint): whole image, two centred boxes, mirror
    hashes = {name: rng.integers(0, 2**64, rows, dtype=np.uint64)
              for name in ("phash", "phash_c80", "phash_c70", "phash_mirror")}
    digest = rng.integers(0, 2**63, (rows, 4), dtype=np.int64)

    n_near, n_exact = int(rows * NEAR_SHARE), int(rows * EXACT_SHARE)
    shuffled = rng.permutation(rows)
    copies = shuffled[: n_near + n_exact]
    originals = rng.choice(shuffled[n_near + n_exact:], n_near + n_exact)  # originals are no copies
    near, exact = copies[:n_near], copies[n_near:]
    for values in hashes.values():
        # 1..6 distinct random bits flipped per near copy
        flips = np.zeros(n_near, dtype=np.uint64)
        for k in range(n_near):
            bits = rng.choice(64, rng.integers(1, 7), replace=False).astype(np.uint64)
            flips[k] = np.bitwise_or.reduce(np.left_shift(np.uint64(1), bits))
        values[near] = values[originals[:n_near]] ^ flips
        values[exact] = values[originals[n_near:]]
    digest[exact] = digest[originals[n_near:]]
    # sketches (the 32x32 thumbnails group verifies candidates on): random for distinct rows, the
    # original's with a little noise for a near copy, the original's for an exact copy; made in
    # chunks so that the pixels never all sit in memory next to their text
    sketch = []
    for start in range(0, rows, 65_536):
        block = rng.integers(0, 256, (min(65_536, rows - start), 1024), dtype=np.uint8)
        sketch += [base64.b64encode(row.tobytes()).decode("ascii") for row in block]
    sketch = np.array(sketch, dtype=object)
    for copy, original in zip(near.tolist(), originals[:n_near].tolist()):
        pixels = np.frombuffer(base64.b64decode(sketch[original]), dtype=np.uint8).astype(np.int16)
        moved = np.clip(pixels + rng.integers(-3, 4, pixels.shape), 0, 255).astype(np.uint8)
        sketch[copy] = base64.b64encode(moved.tobytes()).decode("ascii")
    sketch[exact] = sketch[originals[n_near:]]
    label[copies] = label[originals]  # a copy carries its original's label (no planted conflicts)

    df = pd.DataFrame({
        "path": [f"class{c:03d}/img{i:07d}.jpg" for i, c in enumerate(label)],
        "label": [f"class{c:03d}" for c in label],
        "group": [f"g{g:06d}" for g in group],
        "bytes": rng.integers(20_000, 4_000_000, rows),
        "width": np.full(rows, 3000), "height": np.full(rows, 2000),
        "format": "jpeg",
        "sha256": [f"{a:016x}{b:016x}{c:016x}{d:016x}" for a, b, c, d in digest.tolist()],
        **{name: [f"{h:016x}" for h in values.tolist()] for name, values in hashes.items()},
        "sketch": sketch,
        "detail": rng.uniform(0.1, 0.5, rows).round(4),  # photos: well above the low-detail limit
        "issues": "",
        "mtime_ns": np.full(rows, 1_700_000_000_000_000_000), "mode": "RGB", "frames": 1,
        "has_alpha": False, "has_gps": False, "spread": 40.0, "fault": "", "fault_detail": "",
    })
    pairs = list(zip(copies.tolist(), originals.tolist()))
    return manifest.coerce(df), pairs


def main(argv=None):
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--rows", type=int, default=1_000_000)
    parser.add_argument("--groups", type=int, default=None, help="user groups (default rows / 5)")
    args = parser.parse_args(argv)
    groups = args.groups or args.rows // 5

    from labelprep.clusters import group
    from labelprep.reports import report
    from labelprep.splits import split

    print(f"pipeline_scale: {args.rows:,} rows, {CLASSES} classes, {groups:,} groups, "
          f"{os.cpu_count()} cores, load average {' '.join(f'{v:.1f}' for v in os.getloadavg())}")
    start = time.perf_counter()
    m, pairs = synthetic_manifest(args.rows, groups)
    print(f"{'synthetic manifest (not counted)':<34} {time.perf_counter() - start:8.1f} s "
          f"{_peak_mb():8.0f} MB peak so far; {len(pairs):,} planted copies")

    _reset_peak()
    print(f"{'manifest in memory at the start':<34} {'':8s}   {_peak_mb():8.0f} MB")
    out = Path(tempfile.mkdtemp(prefix="labelprep-scale-"))
    total = 0.0
    for name in ("group", "split", "report (JSON + HTML)"):
        start = time.perf_counter()
        if name == "group":
            m = group(m)
        elif name == "split":
            m = split(m, seed=0)
        else:
            report(m, json=out / "report.json", html=out / "report.html")
        took = time.perf_counter() - start
        total += took
        print(f"{name:<34} {took:8.1f} s {_peak_mb():8.0f} MB peak so far")
    peak = _peak_mb()
    print(f"{'total group -> split -> report':<34} {total:8.1f} s {peak:8.0f} MB peak")
    print(f"  budget {BUDGET_SECONDS:.0f} s: {total / BUDGET_SECONDS:5.2f} of it used, "
          f"{'met' if total < BUDGET_SECONDS else 'MISSED'}")
    print(f"  budget {BUDGET_MB:.0f} MB: {peak / BUDGET_MB:5.2f} of it used, "
          f"{'met' if peak < BUDGET_MB else 'MISSED'}")

    dup = m["dup_group"].to_numpy(dtype="float64", na_value=float("nan"))
    found = sum(1 for a, b in pairs if dup[a] == dup[b])
    print(f"  planted copies found in their original's cluster: {found:,} of {len(pairs):,}")
    placed = m[m["split"] != ""]
    crossing = {col: int((placed.groupby(col)["split"].nunique() > 1).sum())
                for col in ("dup_group", "group")}
    print(f"  clusters spanning splits: {crossing['dup_group']}, groups spanning splits: "
          f"{crossing['group']} (both must be 0)")
    print(f"  report files: {', '.join(f'{p.name} {p.stat().st_size / 1e6:.1f} MB' for p in sorted(out.iterdir()))}")


if __name__ == "__main__":
    main()
