"""The learned-feature steps at scale: vet and the same-scene proposal search on 1,000,000 rows.

A synthetic manifest of ``--rows`` sketches (100 classes; each row its class's smooth 32x32
pattern, shifted by up to 2 pixels, plus noise; 1% of the labels changed) goes through
:func:`labelprep.vet` (orientation histograms, PCA, the cell search, the votes), and a matrix of
``--rows`` unit embeddings (1280 values, 100 clusters) through the proposal search that
:func:`labelprep.scenes.scene_links` runs (PCA to 64, 5 neighbours). The script prints each
step's time, the peak resident memory, the share of exact neighbours the cell search finds
(against a brute-force search for 1,000 sampled rows), the planted labels found, and the total
against the pipeline's budget (issue 7: group -> split -> report under 3 minutes, which used
109-124 s of it at 1,000,000 rows, so the new steps get the remaining minute).

    python benchmarks/vector_scale.py                 # 1,000,000 rows (the README figures)
    python benchmarks/vector_scale.py --rows 100000   # a quick look
"""

from __future__ import annotations

import argparse
import base64
import resource
import time

import numpy as np

BUDGET_SECONDS = 60.0


def _peak_mb() -> float:
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024


def synthetic(rows: int, seed: int = 0):
    import pandas as pd
    from PIL import Image

    rng = np.random.default_rng(seed)
    protos = [np.asarray(Image.fromarray((rng.random((6, 6)) * 255).astype(np.uint8)).resize((36, 36), Image.BICUBIC), np.int16)
              for _ in range(100)]
    labels = rng.integers(0, 100, rows)
    shifts = rng.integers(0, 5, (rows, 2))
    cells = []
    for start in range(0, rows, 50_000):
        stop = min(rows, start + 50_000)
        block = np.stack([protos[c][dy:dy + 32, dx:dx + 32]
                          for c, (dy, dx) in zip(labels[start:stop], shifts[start:stop])])
        block = (block + rng.normal(0, 12, block.shape)).clip(0, 255).astype(np.uint8)
        cells += [base64.b64encode(b.tobytes()).decode("ascii") for b in block]
    given = labels.copy()
    wrong = rng.random(rows) < 0.01
    given[wrong] = (labels[wrong] + rng.integers(1, 100, wrong.sum())) % 100
    m = pd.DataFrame({"path": [f"c{c:03d}/{i:07d}.png" for i, c in enumerate(given)],
                      "label": [f"c{c:03d}" for c in given], "sha256": [f"{i:064x}" for i in range(rows)],
                      "sketch": cells})
    return m, wrong


def main():
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--rows", type=int, default=1_000_000)
    args = parser.parse_args()

    from labelprep.labelcheck import vet
    from labelprep.scenes import CANDIDATES
    from labelprep.vectorsearch import pca_units, top_k

    start = time.perf_counter()
    m, wrong = synthetic(args.rows)
    print(f"{args.rows:,} synthetic rows made in {time.perf_counter() - start:.0f} s "
          f"(machine shared with other work: times are indicative)")

    start = time.perf_counter()
    out = vet(m)
    vet_s = time.perf_counter() - start
    flagged = (out["likely_label"] != "").to_numpy()
    print(f"vet: {vet_s:.1f} s, peak {_peak_mb():.0f} MB; planted wrong labels found: "
          f"recall {(flagged & wrong).sum() / wrong.sum():.3f}, precision {(flagged & wrong).sum() / max(flagged.sum(), 1):.3f}")
    del out, m

    rng = np.random.default_rng(1)
    centres = rng.normal(size=(100, 1280)).astype(np.float32)
    vectors = np.empty((args.rows, 1280), dtype=np.float16)  # as the features cache holds them
    for s in range(0, args.rows, 100_000):
        part = centres[rng.integers(0, 100, min(100_000, args.rows - s))]
        part += rng.normal(0, 1.0, part.shape).astype(np.float32)
        vectors[s:s + len(part)] = part / np.linalg.norm(part, axis=1, keepdims=True)
    start = time.perf_counter()
    reduced = pca_units(vectors.astype(np.float32) if args.rows <= 200_000 else vectors, 64, 0)[0]
    index, _ = top_k(reduced, CANDIDATES, seed=0)
    search_s = time.perf_counter() - start
    queries = rng.choice(args.rows, 1000, replace=False)
    exact = np.argsort(-(reduced[queries] @ reduced.T), axis=1)[:, 1:CANDIDATES + 1]
    found = np.mean([len(set(a) & set(b)) / CANDIDATES for a, b in zip(exact, index[queries])])
    print(f"same-scene proposals (PCA 1280 -> 64, {CANDIDATES} neighbours): {search_s:.1f} s, "
          f"peak {_peak_mb():.0f} MB; exact neighbours found {found:.3f}")
    total = vet_s + search_s
    print(f"\nnew steps together: {total:.0f} s of a {BUDGET_SECONDS:.0f} s share of the pipeline budget "
          f"({total / BUDGET_SECONDS:.2f}); {'met' if total <= BUDGET_SECONDS else 'NOT met'}")


if __name__ == "__main__":
    main()
