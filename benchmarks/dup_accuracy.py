"""Near-duplicate accuracy on real photographs: pair precision and recall per edit and per radius.

Photographs bundled with scikit-image (those that load without a download) and scikit-learn's
sample images are written to a temporary folder with edited copies; 3x3 tiles of every photo are
added as distinct distractors. The folder is scanned and grouped by labelprep itself, and pairs
are counted after clustering (two files are "found" when they share a dup_group), which is what a
user gets. Each photo is its own class folder, so a copy carries its original's label and a tile
its own. A second part runs scikit-learn's handwritten digits upsampled to 64x64 (distinct
images that pHash confuses).

Run:  python benchmarks/dup_accuracy.py [--radii 4,6,8,10,12] [--jobs 2]
"""

from __future__ import annotations

import argparse
import io
import itertools
import tempfile
import time
from pathlib import Path

import numpy as np
from PIL import Image, ImageDraw, ImageEnhance, ImageFilter

import labelprep
from labelprep import clusters
from labelprep.clusters import group

SKIMAGE_PHOTOS = ["astronaut", "camera", "chelsea", "coffee", "coins", "clock",
                  "hubble_deep_field", "immunohistochemistry", "moon", "page", "rocket", "text",
                  "retina", "brick", "grass", "gravel", "cell", "microaneurysms"]
HARD = ("hflip", "rot3", "rot10")


def load_photos():
    """name -> RGB or L image, for every bundled photograph that loads offline."""
    import skimage.data
    from sklearn.datasets import load_sample_images

    photos, skipped = {}, []
    for name in SKIMAGE_PHOTOS:
        try:
            photos[name] = Image.fromarray(getattr(skimage.data, name)())
        except Exception:  # needs a download (pooch) or is missing from this version
            skipped.append(name)
    try:
        photos["motorcycle"] = Image.fromarray(skimage.data.stereo_motorcycle()[0])
    except Exception:
        skipped.append("stereo_motorcycle")
    sample = load_sample_images()
    for fname, array in zip(sample.filenames, sample.images):
        photos[Path(fname).stem] = Image.fromarray(array)
    return photos, skipped


def _encoded(img, fmt, **kwargs):
    buf = io.BytesIO()
    img.save(buf, fmt, **kwargs)
    return buf.getvalue()


def _crop(img, frac):
    w, h = img.size
    dx, dy = round(w * frac), round(h * frac)
    return img.crop((dx, dy, w - dx, h - dy))


def _shift(img, px):
    """Content moved px right and down, the edge repeated into the gap."""
    a = np.asarray(img)
    pad = [(px, 0), (px, 0)] + [(0, 0)] * (a.ndim - 2)
    return Image.fromarray(np.pad(a, pad, mode="edge")[: a.shape[0], : a.shape[1]])


def _resize(img, scale):
    w, h = img.size
    return img.resize((max(8, round(w * scale)), max(8, round(h * scale))), Image.Resampling.BICUBIC)


def _noise(img):
    a = np.asarray(img.convert("RGB"), dtype=np.float64)
    rng = np.random.default_rng(0)
    return Image.fromarray(np.clip(a + rng.normal(0, 12, a.shape), 0, 255).astype(np.uint8))


def _overlay(img):
    """A caption box over the lower-left corner (about 4% of the picture)."""
    out = img.convert("RGB")
    w, h = out.size
    draw = ImageDraw.Draw(out)
    draw.rectangle((int(w * 0.03), int(h * 0.86), int(w * 0.33), int(h * 0.97)), fill=(255, 255, 255))
    draw.text((int(w * 0.05), int(h * 0.88)), "(c) sample 2024", fill=(0, 0, 0))
    return out


def _png(img):
    return "png", _encoded(img, "PNG")


def _jpeg(quality):
    return lambda img: ("jpg", _encoded(img.convert("RGB"), "JPEG", quality=quality))


def _as_png(edit):
    return lambda img: _png(edit(img))


# edit name -> function image -> (extension, file bytes)
EDITS = {
    **{f"jpeg{q}": _jpeg(q) for q in (30, 50, 75, 95)},
    **{f"resize{s}": _as_png(lambda im, s=s: _resize(im, s)) for s in (0.25, 0.5, 1.5, 2)},
    "crop5": _as_png(lambda im: _crop(im, 0.05)),
    "crop10": _as_png(lambda im: _crop(im, 0.10)),
    "shift2": _as_png(lambda im: _shift(im, 2)),
    "shift4": _as_png(lambda im: _shift(im, 4)),
    "bright+20": _as_png(lambda im: ImageEnhance.Brightness(im).enhance(1.2)),
    "bright-20": _as_png(lambda im: ImageEnhance.Brightness(im).enhance(0.8)),
    "contrast+20": _as_png(lambda im: ImageEnhance.Contrast(im).enhance(1.2)),
    "contrast-20": _as_png(lambda im: ImageEnhance.Contrast(im).enhance(0.8)),
    "blur": _as_png(lambda im: im.filter(ImageFilter.GaussianBlur(2))),
    "noise": _as_png(_noise),
    "gray": _as_png(lambda im: im.convert("L")),
    "png": _png,
    "overlay": _as_png(_overlay),
    "hflip": _as_png(lambda im: im.transpose(Image.Transpose.FLIP_LEFT_RIGHT)),
    "rot3": _as_png(lambda im: im.rotate(3, Image.Resampling.BICUBIC)),
    "rot10": _as_png(lambda im: im.rotate(10, Image.Resampling.BICUBIC)),
}


def build_tree(root: Path, photos):
    """ROOT/<source>/<edit>.<ext>; tiles are sources of their own."""
    for name, img in photos.items():
        (root / name).mkdir()
        (root / name / "orig.png").write_bytes(_encoded(img, "PNG"))
        for edit, make in EDITS.items():
            ext, data = make(img)
            (root / name / f"{edit}.{ext}").write_bytes(data)
        w, h = img.size
        for a, b in itertools.product(range(3), range(3)):
            tile = img.crop((w * a // 3, h * b // 3, w * (a + 1) // 3, h * (b + 1) // 3))
            (root / f"{name}-tile{a}{b}").mkdir()
            (root / f"{name}-tile{a}{b}" / "orig.png").write_bytes(_encoded(tile, "PNG"))


def pair_scores(manifest):
    """Per edit: (found, total) of (original, copy) pairs; overall pair precision and mild recall."""
    source = manifest["label"].to_numpy()
    edit = manifest["path"].map(lambda p: Path(p).stem).to_numpy()
    cluster = manifest["dup_group"].astype("Float64").fillna(-1).to_numpy()
    singleton = cluster < 0
    cluster = np.where(singleton, -np.arange(1, len(cluster) + 1), cluster)  # own id per singleton
    index = {(s, e): k for k, (s, e) in enumerate(zip(source, edit))}
    per_edit = {}
    for e in EDITS:
        hits = [cluster[index[(s, "orig")]] == cluster[k] for (s, ed), k in index.items() if ed == e]
        per_edit[e] = (int(np.sum(hits)), len(hits))
    same_cluster = cluster[:, None] == cluster[None, :]
    same_source = source[:, None] == source[None, :]
    upper = np.triu(np.ones_like(same_cluster), 1)
    found = same_cluster & upper
    tp, fp = int((found & same_source).sum()), int((found & ~same_source).sum())
    mild = ~np.isin(edit, HARD)
    wanted = same_source & upper & mild[:, None] & mild[None, :]
    recall = (found & wanted).sum() / max(wanted.sum(), 1)
    precision = tp / max(tp + fp, 1)
    largest = int(np.bincount(cluster[~singleton].astype(int)).max()) if (~singleton).any() else 1
    return per_edit, precision, recall, fp, largest


def digits_scores(radius, *, variant):
    """Distinct digits linked into clusters, largest cluster, and recall of their re-encoded copies."""
    import pandas as pd
    from sklearn.datasets import load_digits

    from labelprep.hashing import fingerprint

    rows = []
    for k, (a, y) in enumerate(zip(load_digits().images, load_digits().target)):
        img = Image.fromarray((a * 255 / 16).astype(np.uint8)).resize((64, 64), Image.Resampling.BILINEAR)
        copies = [("orig", img)]
        if k < 200:  # near copies of the first 200: JPEG q90 and a 2x enlargement
            copies += [("jpeg", Image.open(io.BytesIO(_encoded(img, "JPEG", quality=90)))),
                       ("big", img.resize((128, 128), Image.Resampling.BICUBIC))]
        for kind, im in copies:
            rows.append({"path": f"{k:04d}-{kind}", "label": str(y), "sha256": f"{k}-{kind}",
                         "source": k, "kind": kind, **fingerprint(im)})
    out = _grouped(pd.DataFrame(rows), variant, radius)
    cluster = out["dup_group"].astype("Float64").fillna(-1).to_numpy()
    orig = (out["kind"] == "orig").to_numpy()
    # originals per cluster: a cluster holding two or more distinct digits is a false one
    groups = pd.Series(out["source"].to_numpy()[orig]).groupby(cluster[orig])
    sizes = groups.size()
    sizes = sizes[sizes.index >= 0]
    false_pairs = int((sizes * (sizes - 1) // 2).sum())
    by_source = dict(zip(zip(out["source"], out["kind"]), cluster))
    copies = [(s, kind) for s, kind in by_source if kind != "orig"]
    found = sum(by_source[(s, "orig")] >= 0 and by_source[(s, "orig")] == by_source[(s, kind)]
                for s, kind in copies)
    falsely = int(sizes[sizes > 1].sum())
    largest = int(sizes.max()) if len(sizes) else 1
    return falsely, int(orig.sum()), largest, found / len(copies), false_pairs


def _variant(manifest, variant):
    """The manifest as the named variant sees it: a step is switched off by removing the
    column it reads (boxes: phash_c80/c70, low-detail rule: detail)."""
    drop = {"phash only": ["phash_c80", "phash_c70", "detail"],
            "phash + boxes, no centre check": ["detail"],
            "phash + boxes + centre check": ["detail"]}.get(variant, [])
    return manifest.drop(columns=[c for c in drop if c in manifest.columns])


def _grouped(manifest, variant, radius):
    """group() as the variant runs it."""
    if variant.endswith("no centre check"):
        # the check runs when the innermost box column is among those compared; naming a column
        # that is never there switches it off for this run only
        saved, clusters.INNER_COLUMN = clusters.INNER_COLUMN, "switched-off"
        try:
            return group(_variant(manifest, variant), max_distance=radius, keep_conflicts=True)
        finally:
            clusters.INNER_COLUMN = saved
    return group(_variant(manifest, variant), max_distance=radius,
                 flips=variant.endswith("flips"), keep_conflicts=True)


VARIANTS = ("phash only", "phash + boxes, no centre check", "phash + boxes + centre check",
            "+ low-detail rule (default)", "+ low-detail rule + flips")


def main():
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("--radii", default="4,6,8,10,12")
    parser.add_argument("--jobs", type=int, default=2)
    args = parser.parse_args()
    radii = [int(r) for r in args.radii.split(",")]

    photos, skipped = load_photos()
    print(f"photos: {len(photos)} ({', '.join(sorted(photos))}); skipped (need a download): "
          f"{', '.join(skipped) or 'none'}")
    with tempfile.TemporaryDirectory() as tmp:
        root = Path(tmp) / "photos"
        root.mkdir()
        build_tree(root, photos)
        t0 = time.perf_counter()
        manifest = labelprep.scan(root, layout="folders", jobs=args.jobs)
        print(f"files: {len(manifest)} ({len(photos)} originals x {len(EDITS)} edits, "
              f"{9 * len(photos)} tiles); scan {time.perf_counter() - t0:.1f} s")

    print("\n== pairs after clustering: precision over all pairs, recall over the mild edits ==")
    print(f"{'variant':34s} {'radius':>6s} {'precision':>9s} {'recall':>7s} {'false pairs':>11s} {'largest':>7s}")
    results = {}
    for variant in VARIANTS:
        for radius in radii:
            out = _grouped(manifest, variant, radius)
            per_edit, precision, recall, fp, largest = pair_scores(out)
            results[(variant, radius)] = per_edit
            print(f"{variant:34s} {radius:6d} {precision:9.4f} {recall:7.4f} {fp:11d} {largest:7d}")

    print("\n== recall of (original, copy) per edit type, by radius ==")
    for variant in (VARIANTS[0], VARIANTS[3], VARIANTS[4]):
        print(f"-- {variant}")
        print(f"{'edit':12s} " + " ".join(f"r={r:<4d}" for r in radii))
        for e in EDITS:
            cells = [results[(variant, r)][e] for r in radii]
            tag = "  (hard)" if e in HARD else ""
            print(f"{e:12s} " + " ".join(f"{f / t:6.2f}" for f, t in cells) + tag)

    print("\n== scikit-learn digits upsampled to 64x64 (1797 distinct images + 400 near copies) ==")
    print(f"{'variant':34s} {'radius':>6s} {'falsely linked':>14s} {'largest':>7s} {'false pairs':>11s} {'copy recall':>11s}")
    for variant in VARIANTS:
        for radius in (4, 8):
            falsely, total, largest, recall, false_pairs = digits_scores(radius, variant=variant)
            print(f"{variant:34s} {radius:6d} {falsely:6d}/{total:<7d} {largest:7d} {false_pairs:11d} {recall:11.3f}")


if __name__ == "__main__":
    main()
