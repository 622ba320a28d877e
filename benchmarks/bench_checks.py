"""What the check stage costs: the structural pass per file next to decoding, and check() per row.

Run: python benchmarks/bench_checks.py [--rows N] [--repeat R]

Part 1 times labelprep.formats.damage() (segment walk for JPEG, chunk walk with CRC-32 for PNG) on
the file's bytes, side by side with Pillow decoding the same bytes (full scale, and for JPEG in
draft mode at the hash size the probe uses). Part 2 times labelprep.check() on a synthetic
manifest: it is vectorised, so rows per second should be far above the decode rate of any scan.
"""

from __future__ import annotations

import argparse
import io
import statistics
import time


def _median_seconds(func, repeat: int) -> float:
    times = []
    for _ in range(repeat):
        start = time.perf_counter()
        func()
        times.append(time.perf_counter() - start)
    return statistics.median(times)


def _photo(width: int, height: int):
    """A smooth random texture with noise: compresses like a photo, not like a flat image."""
    import numpy as np
    from PIL import Image

    rng = np.random.default_rng(0)
    base = Image.fromarray((rng.random((12, 16, 3)) * 255).astype(np.uint8)).resize((width, height), Image.BICUBIC)
    noisy = np.asarray(base, dtype=np.float64) + rng.normal(0, 8, (height, width, 3))
    return Image.fromarray(noisy.clip(0, 255).astype(np.uint8))


def _decode(data: bytes, draft: bool) -> None:
    from PIL import Image

    with Image.open(io.BytesIO(data)) as im:
        if draft:
            im.draft(im.mode, (256, 256))
        im.load()


def structural_vs_decode(repeat: int) -> None:
    from labelprep.formats import damage

    print("structural pass (damage) vs Pillow decode, median of", repeat)
    print(f"{'file':<22}{'MB':>7}{'damage ms':>11}{'decode ms':>11}{'draft ms':>10}{'damage/probe decode':>21}")
    for fmt, (w, h) in (("JPEG", (1600, 1200)), ("JPEG", (4000, 3000)), ("PNG", (1600, 1200))):
        buf = io.BytesIO()
        _photo(w, h).save(buf, fmt, **({"quality": 90} if fmt == "JPEG" else {}))
        data = buf.getvalue()
        t_damage = _median_seconds(lambda: damage(fmt.lower(), data), repeat)
        t_full = _median_seconds(lambda: _decode(data, False), repeat)
        t_draft = _median_seconds(lambda: _decode(data, True), repeat) if fmt == "JPEG" else float("nan")
        probe_decode = t_draft if fmt == "JPEG" else t_full  # what the probe runs on this format
        print(f"{fmt + f' {w}x{h}':<22}{len(data) / 1e6:>7.2f}{t_damage * 1e3:>11.2f}{t_full * 1e3:>11.1f}"
              f"{t_draft * 1e3:>10.1f}{t_damage / probe_decode:>21.3f}")


def check_throughput(rows: int, repeat: int) -> None:
    import numpy as np
    import pandas as pd

    from labelprep.checks import check
    from labelprep.manifest import coerce

    rng = np.random.default_rng(1)
    m = coerce(pd.DataFrame({
        "path": [f"c{i % 7}/f{i:07d}.jpg" for i in range(rows)],
        "label": [f"c{i % 7}" for i in range(rows)],
        "format": rng.choice(["jpeg", "png", ""], rows, p=[0.8, 0.19, 0.01]),
        "width": rng.integers(8, 4000, rows), "height": rng.integers(8, 4000, rows),
        "mode": rng.choice(["RGB", "L", "CMYK", "RGBA"], rows, p=[0.9, 0.05, 0.02, 0.03]),
        "bits": np.full(rows, 8), "frames": np.ones(rows, dtype=int), "has_alpha": np.zeros(rows, dtype=bool),
        "has_gps": rng.random(rows) < 0.05, "spread": rng.uniform(0, 80, rows),
        "fault": rng.choice(["", "truncated", "not-image"], rows, p=[0.98, 0.01, 0.01]),
        "fault_detail": "", "issues": "",
    }))
    seconds = _median_seconds(lambda: check(m), repeat)
    print(f"\ncheck() on {rows:,} synthetic rows: {seconds:.2f} s median of {repeat}, "
          f"{rows / seconds:,.0f} rows/s")


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--rows", type=int, default=200_000)
    parser.add_argument("--repeat", type=int, default=5)
    args = parser.parse_args()
    structural_vs_decode(args.repeat)
    check_throughput(args.rows, max(1, args.repeat // 2))


if __name__ == "__main__":
    main()
