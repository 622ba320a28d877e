"""Speed of ``report`` on a big manifest and of ``export`` per mode, measured side by side.

Report: a synthetic manifest of --rows rows (5 classes, 3 % of rows in near-duplicate pairs, some
issue codes); every cluster member gets a real image, so thumbnails are made up to the page's budget.
Export: --files real JPEGs exported by each mode, next to a bare ``shutil.copyfile`` loop (no
digest, no verification) as the floor a copy cannot beat.

Run: python benchmarks/bench_report_export.py [--rows 100000] [--files 1000]
"""

from __future__ import annotations

import argparse
import hashlib
import shutil
import tempfile
import time
from pathlib import Path

import numpy as np
import pandas as pd
from PIL import Image

from labelprep.exports import export
from labelprep.reports import page, report


def _timed(func, *args, **kwargs):
    start = time.perf_counter()
    result = func(*args, **kwargs)
    return time.perf_counter() - start, result


def synthetic_manifest(rows: int, rng) -> pd.DataFrame:
    labels = rng.choice(["ant", "bee", "cicada", "damselfly", "earwig"], rows, p=[.4, .3, .15, .1, .05])
    splits = rng.choice(["train", "val", "test", ""], rows, p=[.78, .1, .1, .02])
    pairs = int(rows * 0.015)
    dup = np.full(rows, -1)
    dup[: 2 * pairs] = np.repeat(np.arange(pairs), 2)
    phash = [f"{v:016x}" for v in rng.integers(0, 2**63, rows)]
    issues = np.where(splits == "", "too-small", np.where(dup >= 0, "near-copy", ""))
    m = pd.DataFrame({"path": [f"{lab}/{i:07d}.jpg" for i, lab in enumerate(labels)], "label": labels,
                      "split": splits, "issues": issues, "phash": phash,
                      "dup_group": pd.array(np.where(dup >= 0, dup, None), dtype="Int64"),
                      "keeper": pd.array((dup < 0) | (np.arange(rows) % 2 == 0), dtype="boolean")})
    return m


def write_images(root: Path, paths, rng, side=320) -> None:
    for path in paths:
        target = root / path
        target.parent.mkdir(parents=True, exist_ok=True)
        pixels = rng.integers(0, 255, (side * 3 // 4 // 8, side // 8, 3), dtype=np.uint8)
        Image.fromarray(pixels).resize((side, side * 3 // 4)).save(target, "JPEG", quality=85)


def bench_report(rows: int, work: Path, rng) -> None:
    m = synthetic_manifest(rows, rng)
    root = work / "report-root"
    clustered = m[m["dup_group"].notna()]  # every cluster member has an image, as in real use
    write_images(root, clustered["path"], rng)
    t_summary, _ = _timed(report, m)
    t_json, _ = _timed(report, m, json=work / "r.json")
    t_md, _ = _timed(report, m, markdown=work / "r.md")
    t_html, _ = _timed(report, m, html=work / "r.html", root=root)
    t_plain, _ = _timed(report, m, html=work / "r-plain.html")
    size = (work / "r.html").stat().st_size / 1e6
    print(f"report, {rows} rows, {m['dup_group'].nunique()} clusters "
          f"(budgets: {page.CLUSTERS_LISTED} clusters listed, {page.THUMBNAILS} thumbnails):")
    print(f"  summary only        {t_summary:7.2f} s   ({rows / t_summary:,.0f} rows/s)")
    print(f"  + JSON              {t_json:7.2f} s")
    print(f"  + Markdown          {t_md:7.2f} s")
    print(f"  + HTML, no root     {t_plain:7.2f} s   (thumbnails off)")
    print(f"  + HTML, thumbnails  {t_html:7.2f} s   page {size:.2f} MB; "
          f"thumbnails cost {t_html - t_plain:.2f} s for {min(len(clustered), page.THUMBNAILS)} files")


def bench_export(files: int, work: Path, rng) -> None:
    root = work / "export-root"
    paths = [f"c{i % 4}/{i:05d}.jpg" for i in range(files)]
    write_images(root, paths, rng)
    m = pd.DataFrame({"path": paths, "label": [p.split("/")[0] for p in paths],
                      "split": rng.choice(["train", "val", "test"], files, p=[.8, .1, .1])})
    m["sha256"] = [hashlib.sha256((root / p).read_bytes()).hexdigest() for p in paths]
    megabytes = sum((root / p).stat().st_size for p in paths) / 1e6

    def bare_copy(dest: Path):
        for p in paths:
            target = dest / p
            target.parent.mkdir(parents=True, exist_ok=True)
            shutil.copyfile(root / p, target)

    t_bare, _ = _timed(bare_copy, work / "bare")
    print(f"export, {files} JPEGs, {megabytes:.1f} MB (page cache warm):")
    print(f"  bare copyfile loop  {t_bare:7.2f} s   {files / t_bare:8,.0f} files/s   (no digest, no checks)")
    for mode, strip in (("hardlink", False), ("symlink", False), ("copy", False), ("copy", True)):
        t, table = _timed(export, m, work / f"out-{mode}-{strip}", root=root, mode=mode, strip_metadata=strip)
        name = mode + (" + strip" if strip else "")
        print(f"  {name:<18}  {t:7.2f} s   {files / t:8,.0f} files/s   {t / t_bare:5.2f} x bare copy;"
              f" methods {sorted(set(table['method']))}")


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--rows", type=int, default=100_000)
    parser.add_argument("--files", type=int, default=1000)
    args = parser.parse_args()
    rng = np.random.default_rng(0)
    with tempfile.TemporaryDirectory() as tmp:
        bench_report(args.rows, Path(tmp), rng)
        bench_export(args.files, Path(tmp), rng)


if __name__ == "__main__":
    main()
