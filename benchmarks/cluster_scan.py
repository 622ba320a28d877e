"""Scan throughput on a Dask cluster with 1 and 2 workers, its costs, and the pair search at scale.

Side by side in one run, on one generated tree of N photo-like JPEGs (crops of photographs bundled
with scikit-image, scaled up, with sensor-like noise):

  (a) scanner.scan in this process (--jobs 1) and on the local process pool (--jobs 2)
  (b) scanner.scan(cluster=...) on a distributed.LocalCluster with 1, then 2 worker processes of
      one thread each (loopback), after a warm-up scan so worker start-up is not counted;
      the manifest is compared byte for byte with (a)'s
  (c) the scheduler's cost per task: map_ordered of a no-op over K items, chunksize 1 and 16
  (d) what crosses the wire per file: pickled size of the task's argument and of its result row

With --pairs N1,N2,... it also times labelprep.neighbors.radius_pairs (the near-pair search of
the group stage) on N random 64-bit hashes, each size in a fresh process (so the peak resident
memory is that size's own), and extrapolates time and memory to 10,000,000 and 100,000,000
hashes with the method's own cost model (neighbors._plan_chunks), calibrated on the largest size.

    python benchmarks/cluster_scan.py                           # the README figures
    python benchmarks/cluster_scan.py --n 60 --tasks 300        # a quick look
    python benchmarks/cluster_scan.py --n 0 --pairs 250000,500000,1000000,2000000

With --cluster-pairs N it runs the same search on N hashes in this process (threads) and as tasks
on a LocalCluster with 1 and 2 workers, checks the pairs are identical, and prints the times.

    python benchmarks/cluster_scan.py --n 0 --cluster-pairs 1000000
"""

from __future__ import annotations

import argparse
import json
import os
import pickle
import resource
import subprocess
import sys
import tempfile
import time
from pathlib import Path

SIDE = (1280, 960)         # a mid-size camera frame: decode cost per file of a few ms
NOISE_SIGMA = 4.0          # sensor-like Gaussian noise in 8-bit levels (from memory)
RADIUS = 8                 # the group stage's default Hamming radius (labelprep.defaults)


def make_tree(root: Path, n: int, seed: int = 0) -> Path:
    import numpy as np
    import skimage.data
    from PIL import Image

    rng = np.random.default_rng(seed)
    photos = [skimage.data.astronaut(), skimage.data.coffee(), skimage.data.chelsea()]
    for k in range(n):
        photo = photos[k % len(photos)]
        h, w = photo.shape[:2]
        top, left = int(rng.integers(0, h // 4)), int(rng.integers(0, w // 4))
        crop = Image.fromarray(photo[top:top + h * 3 // 4, left:left + w * 3 // 4]).resize(SIDE)
        pixels = np.asarray(crop, float) + rng.normal(0, NOISE_SIGMA, (SIDE[1], SIDE[0], 3))
        target = root / f"class{k % 3}" / f"img{k:05d}.jpg"
        target.parent.mkdir(parents=True, exist_ok=True)
        Image.fromarray(pixels.clip(0, 255).astype(np.uint8)).save(target, quality=90)
    return root


def timed(fn):
    t0 = time.perf_counter()
    value = fn()
    return value, time.perf_counter() - t0


def scan_side_by_side(n: int, tasks: int) -> None:
    import functools

    import importlib

    from distributed import Client, LocalCluster

    from labelprep import manifest
    from labelprep.parallel import map_ordered
    from labelprep.probe import probe
    from labelprep.scanner import scan

    with tempfile.TemporaryDirectory() as tmp:
        tmp = Path(tmp)
        root = make_tree(tmp / "tree", n)
        warm = make_tree(tmp / "warm", 6, seed=1)
        mb = sum(p.stat().st_size for p in root.rglob("*.jpg")) / 2**20
        print(f"== tree: {n} JPEGs {SIDE[0]}x{SIDE[1]}, {mb:.0f} MiB; {os.cpu_count()} cores, "
              f"load average {os.getloadavg()[0]:.1f} (other processes share them)")

        scan(warm, jobs=2)  # page cache and imports warm for the local runs too
        rows = {}
        for jobs in (1, 2):
            m, seconds = timed(lambda: scan(root, jobs=jobs))
            rows[f"local --jobs {jobs}"] = seconds
            reference = manifest.to_csv_bytes(m)
        for workers in (1, 2):
            with LocalCluster(n_workers=workers, threads_per_worker=1, processes=True,
                              host="127.0.0.1", dashboard_address=None) as cluster:
                address = cluster.scheduler_address
                with Client(address, set_as_default=False) as client:
                    # every worker imports the probe's modules before the clock starts (a warm-up
                    # scan alone may land all its chunks on one worker)
                    client.run(importlib.import_module, "labelprep.probe")
                scan(warm, cluster=address)
                m, seconds = timed(lambda: scan(root, cluster=address))
                rows[f"cluster, {workers} worker{'s' if workers > 1 else ''}"] = seconds
                same = manifest.to_csv_bytes(m) == reference
                print(f"cluster with {workers} worker(s): manifest byte-identical to local: {same}")
                if workers == 1:
                    overhead = {}
                    for chunksize in (1, 16):
                        _, seconds = timed(lambda: list(map_ordered(
                            abs, range(tasks), cluster=address, chunksize=chunksize)))
                        overhead[chunksize] = seconds / tasks * 1000
        print(f"\n== throughput, {n} files (walk + decode + hashes + manifest)")
        base = rows["cluster, 1 worker"]
        for name, seconds in rows.items():
            print(f"{name:22s} {seconds:7.2f} s  {n / seconds:7.1f} files/s  "
                  f"speed-up over 1 cluster worker {base / seconds:4.2f}x")
        extra = (rows["cluster, 1 worker"] - rows["local --jobs 1"]) / n * 1000
        print(f"cluster (1 worker) minus in-process (--jobs 1), per file: {extra:+.2f} ms")

        print(f"\n== scheduler cost per item, no-op function, {tasks} items, 1 worker")
        for chunksize, ms in overhead.items():
            print(f"chunksize {chunksize:2d}: {ms:.3f} ms per item")

        path = os.path.join(root, "class0", "img00000.jpg")
        work = functools.partial(probe, max_pixels=manifest_budget())
        row = (False, work(path))
        per_chunk = len(pickle.dumps(work)) / 16  # the function travels once per chunk of 16
        _, seconds = timed(lambda: [pickle.loads(pickle.dumps(row)) for _ in range(1000)])
        print("\n== serialised per file (pickle)")
        print(f"sent: path {len(pickle.dumps(path))} B + function {per_chunk:.0f} B (its share of a "
              f"16-file chunk); returned: facts {len(pickle.dumps(row))} B, pickled and unpickled "
              f"in {seconds:.3f} ms; image bytes are read on the worker, never sent")


def manifest_budget() -> int:
    from labelprep.probe import DEFAULT_MAX_PIXELS

    return DEFAULT_MAX_PIXELS


def one_pair_search(n: int) -> dict:
    """Time and peak RSS of radius_pairs on n random hashes (run in a fresh process)."""
    import numpy as np

    from labelprep.neighbors import radius_pairs

    # the base is taken before the hashes exist: their 8 bytes each count as part of the search
    before = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024
    # uniform 64-bit hashes made from random bytes: no temporaries larger than the array itself
    hashes = np.frombuffer(np.random.default_rng(0).bytes(8 * n), dtype=np.uint64)
    (i, _, _), seconds = timed(lambda: radius_pairs(hashes, RADIUS, method="index"))
    peak = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024
    return {"n": n, "seconds": seconds, "peak_mib": peak, "base_mib": before, "pairs": int(len(i))}


def pair_search_at_scale(sizes: list) -> None:
    from labelprep.neighbors import _plan_chunks

    print(f"\n== near-pair search (radius_pairs, index), radius {RADIUS}, random hashes; "
          f"load average {os.getloadavg()[0]:.1f}")
    runs = []
    for n in sizes:
        out = subprocess.run([sys.executable, __file__, "--one-pair-search", str(n)],
                             capture_output=True, text=True, check=True)
        run = json.loads(out.stdout)
        plan, cost = _plan_chunks(n, RADIUS)
        run["cost"] = cost
        runs.append(run)
        print(f"n={n:>11,}: {run['seconds']:8.2f} s, peak RSS {run['peak_mib']:7.0f} MiB "
              f"(process before the hashes {run['base_mib']:.0f} MiB), pairs {run['pairs']:,}, "
              f"chunks {plan[0]}")
    last = runs[-1]
    per_unit = last["seconds"] / last["cost"]
    per_hash = (last["peak_mib"] - last["base_mib"]) / last["n"] * 2**20
    for run in runs[:-1]:
        print(f"cost model calibrated at n={last['n']:,} predicts n={run['n']:,}: "
              f"{run['cost'] * per_unit:.2f} s (measured {run['seconds']:.2f} s)")
    print(f"memory above the process at n={last['n']:,}: {per_hash:.0f} bytes per hash")
    # the method's complexity: probes grow as n, candidate checks as n^2 (table set-up is fixed)
    fit = fitted_terms(runs) if len(runs) > 1 else None
    if fit is not None:
        print(f"least-squares fit t = a*n + b*n^2: a = {fit[0] * 1e6:.2f} s per million hashes, "
              f"b = {fit[1] * 1e12:.3f} s per million squared")
    for n in (10_000_000, 100_000_000, 300_000_000):
        plan, cost = _plan_chunks(n, RADIUS)
        fitted = "" if fit is None else f"; fit {(fit[0] * n + fit[1] * n * n) / 3600:6.2f} h"
        print(f"extrapolated n={n:>11,}: cost model {cost * per_unit / 3600:6.2f} h{fitted}; "
              f"about {per_hash * n / 2**30:5.1f} GiB (chunks {plan[0]})")


def fitted_terms(runs):
    """``(a, b)`` of ``seconds = a*n + b*n**2`` by least squares, both kept >= 0."""
    import numpy as np
    from scipy.optimize import nnls

    n = np.array([r["n"] for r in runs], dtype=float)
    seconds = np.array([r["seconds"] for r in runs])
    scale = n.max()  # columns of similar size keep the solve well conditioned
    (a, b), _ = nnls(np.column_stack([n / scale, (n / scale) ** 2]), seconds)
    return a / scale, b / scale**2


def pair_search_on_cluster(n: int) -> None:
    """The pair search in process and on a LocalCluster with 1 and 2 workers, side by side."""
    import numpy as np
    from distributed import LocalCluster

    from labelprep.neighbors import radius_pairs

    hashes = np.frombuffer(np.random.default_rng(0).bytes(8 * n), dtype=np.uint64)
    print(f"\n== near-pair search on a cluster, {n:,} random hashes, radius {RADIUS}; "
          f"load average {os.getloadavg()[0]:.1f}")
    local, seconds = timed(lambda: radius_pairs(hashes, RADIUS, method="index"))
    print(f"in process (threads)   {seconds:8.2f} s   pairs {len(local[0]):,}")
    for workers in (1, 2):
        with LocalCluster(n_workers=workers, threads_per_worker=1, processes=True,
                          host="127.0.0.1", dashboard_address=None) as cluster:
            remote, seconds = timed(lambda: radius_pairs(hashes, RADIUS, method="index",
                                                         cluster=cluster.scheduler_address))
        same = all(np.array_equal(a, b) for a, b in zip(local, remote))
        print(f"cluster, {workers} worker(s)    {seconds:8.2f} s   identical pairs: {same}")


def main():
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("--n", type=int, default=240, help="files in the tree (0: skip the scan)")
    parser.add_argument("--tasks", type=int, default=2000, help="no-op items for the overhead")
    parser.add_argument("--pairs", default="", help="hash counts for the pair search, e.g. 1000000,2000000")
    parser.add_argument("--cluster-pairs", type=int, default=0,
                        help="hash count for the pair search on a LocalCluster (0: skip)")
    parser.add_argument("--one-pair-search", type=int, help=argparse.SUPPRESS)
    args = parser.parse_args()
    if args.one_pair_search:
        print(json.dumps(one_pair_search(args.one_pair_search)))
        return
    if args.n:
        scan_side_by_side(args.n, args.tasks)
    if args.pairs:
        pair_search_at_scale([int(x) for x in args.pairs.split(",")])
    if args.cluster_pairs:
        pair_search_on_cluster(args.cluster_pairs)


if __name__ == "__main__":
    main()
