"""Speed and memory of the near-pair search (labelprep.neighbors.radius_pairs) at a million hashes.

Random 64-bit hashes with planted near copies (1 to radius bits flipped). Prints: time and peak
memory of the index at --n hashes, whether every planted pair was found, and, on a size where
brute force still runs, both methods side by side with their ratio and identical output. Then
the whole group stage on a manifest whose hashes (3 per row) add up to the same count.

Run:  python benchmarks/dup_scale.py [--n 1000000] [--radius 8] [--brute-n 40000]
"""

from __future__ import annotations

import argparse
import resource
import time

import numpy as np

from labelprep.clusters import DEFAULT_MAX_DISTANCE
from labelprep.neighbors import _plan_chunks, radius_pairs


def planted_hashes(n, radius, seed):
    """n random hashes; every 100th is a copy of the one before with 1..radius bits flipped."""
    rng = np.random.default_rng(seed)
    h = rng.integers(0, 2**64 - 1, n, dtype=np.uint64, endpoint=True)
    copies = np.arange(1, n, 100)
    for k in copies:
        bits = rng.choice(64, size=int(rng.integers(1, radius + 1)), replace=False)
        h[k] = h[k - 1] ^ np.uint64(sum(1 << int(b) for b in bits))
    return h, copies


def measured(fn):
    """(result, seconds, process peak resident memory in MiB so far).

    The peak is the process-wide high-water mark (getrusage): a later step's figure covers the
    earlier steps too. tracemalloc is not used because tracing every numpy allocation slows the
    search two- to threefold.
    """
    t0 = time.perf_counter()
    result = fn()
    seconds = time.perf_counter() - t0
    return result, seconds, resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024


def fingerprint_cost(repeats=200):
    """Per-image time of fingerprint() and of imagehash.phash alone, side by side, on the sizes
    the probe hands over (shorter side 256-511 px after its reduction)."""
    import imagehash
    import skimage.data
    from PIL import Image

    from labelprep.hashing import fingerprint

    photo = Image.fromarray(skimage.data.astronaut())  # scikit-image's bundled 512x512 photo
    print("\n== per-image cost: fingerprint (4 hashes + detail) against imagehash.phash alone")
    for side in (256, 384, 511):
        img = photo.resize((side * 4 // 3, side))
        costs = []
        for fn in (fingerprint, imagehash.phash):
            t0 = time.perf_counter()
            for _ in range(repeats):
                fn(img)
            costs.append((time.perf_counter() - t0) / repeats * 1000)
        print(f"{img.size[0]}x{img.size[1]} RGB: fingerprint {costs[0]:.2f} ms, "
              f"imagehash.phash {costs[1]:.2f} ms, ratio {costs[0] / costs[1]:.2f}x")


def main():
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("--n", type=int, default=1_000_000)
    parser.add_argument("--radius", type=int, default=DEFAULT_MAX_DISTANCE)
    parser.add_argument("--brute-n", type=int, default=40_000)
    parser.add_argument("--skip-group", action="store_true")
    args = parser.parse_args()
    r = args.radius

    h, copies = planted_hashes(args.n, r, seed=0)
    widths, radii, _ = _plan_chunks(args.n, r)[0]
    print(f"== index, n={args.n:,} hashes, radius {r}: chunks {widths} bits, radii {radii}")
    (i, j, d), seconds, peak = measured(lambda: radius_pairs(h, r, method="index"))
    found = set(zip(i.tolist(), j.tolist()))
    planted_found = sum((int(k) - 1, int(k)) in found for k in copies)
    print(f"pairs {len(i):,}; planted found {planted_found:,}/{len(copies):,}; "
          f"time {seconds:.1f} s; process peak RSS {peak:.0f} MiB")

    n = args.brute_n
    small, _ = planted_hashes(n, r, seed=1)
    print(f"\n== side by side, n={n:,}, radius {r}")
    brute, t_brute, _ = measured(lambda: radius_pairs(small, r, method="brute"))
    index, t_index, _ = measured(lambda: radius_pairs(small, r, method="index"))
    same = all(np.array_equal(a, b) for a, b in zip(brute, index))
    print(f"brute {t_brute:.2f} s, index {t_index:.2f} s: "
          f"ratio brute/index {t_brute / t_index:.1f}x; identical pairs: {same} ({len(brute[0]):,})")
    scale = (args.n / n) ** 2
    print(f"brute force at n={args.n:,} would take about {t_brute * scale:.0f} s "
          f"(quadratic extrapolation) against {seconds:.1f} s measured: {t_brute * scale / seconds:.0f}x")

    fingerprint_cost()
    if args.skip_group:
        return
    import pandas as pd

    from labelprep.clusters import group

    rows = args.n // 3
    print(f"\n== group(), {rows:,} rows x 3 hashes (phash, phash_c80, phash_c70) = {3 * rows:,} hashes")
    rng = np.random.default_rng(2)
    cols = {}
    for name in ("phash", "phash_c80", "phash_c70"):
        values, _ = planted_hashes(rows, r, seed=int(rng.integers(1 << 30)))
        cols[name] = [f"{v:016x}" for v in values.tolist()]
    m = pd.DataFrame({"path": [f"img/{k:07d}.jpg" for k in range(rows)], "label": "x",
                      "sha256": [f"{k:064x}" for k in range(rows)], "detail": 0.3, **cols})
    out, seconds, peak = measured(lambda: group(m))
    print(f"clustered rows {int(out['dup_group'].notna().sum()):,}; time {seconds:.1f} s; "
          f"process peak RSS {peak:.0f} MiB (manifest included)")


if __name__ == "__main__":
    main()
