"""Near-duplicate accuracy across the kinds of images people train on, with planted true copies.

Kinds: scikit-learn's handwritten digits at their native 8x8 and upsampled to 64x64 with each of
nearest, bilinear, bicubic and Lanczos; capital letters in every TrueType face of Debian's
fonts-dejavu-core and fonts-liberation packages; flat clip-art icons (one to three filled
circles, squares or triangles); document-like pages (rendered text lines); grayscale textures
(scikit-image's brick, grass, gravel cut in tiles); real photos (scikit-image's and
scikit-learn's bundled photos cut in tiles and resized). About a third of each kind's distinct
images get one planted copy each, the edits taken in turn: JPEG re-encode (quality 50-90),
resize to 50-90%, a shift of 1-4 px, a crop of 5-15%, a recolour (brightness, contrast or hue),
a left-right mirror.

Every distinct image is its own source; the label is its class (digit, letter, icon count,
texture, photo), so a false cluster of two classes becomes a ``label-conflict`` and leaves files
out, as it would for a user. Sources are dealt into two halves by a hash of their index: the
``tune`` half is the one the thresholds in ``labelprep/likeness.py``/``clusters.py`` were
chosen on, the ``held-out`` half (the default) is what the README figures come from.

Printed per kind: distinct images falsely clustered (share of distinct images that share a
cluster with another distinct image), planted copies found (in their source's cluster), files
left out (rows given an error code by group), pair precision and recall over all same-cluster
pairs, mirror recall; the same for plain imagehash pHash (connected components at 4 and 8 bits)
as the reference line.

Run:  python benchmarks/dup_kinds.py [--half held-out|tune] [--kinds digits64-nearest,letters]
"""

from __future__ import annotations

import argparse
import io
import os
import time
import zlib
from pathlib import Path

import numpy as np
from PIL import Image, ImageDraw, ImageEnhance, ImageFont

FONT_DIRS = ("/usr/share/fonts/truetype/dejavu", "/usr/share/fonts/truetype/liberation")
LOW_INFORMATION = ("digits8", "digits64-nearest", "digits64-bilinear", "digits64-bicubic",
                   "digits64-lanczos", "letters", "clipart", "documents")
KINDS = (*LOW_INFORMATION, "textures", "photos")
EDITS = ("jpeg", "resize", "shift", "crop", "recolour", "mirror")
COPY_SHARE = 1 / 3


# ---------------------------------------------------------------- the distinct images per kind

def _digits(resample):
    from sklearn.datasets import load_digits

    digits = load_digits()
    images = [Image.fromarray((a * 255 / 16).round().astype(np.uint8)) for a in digits.images]
    if resample is not None:
        images = [im.resize((64, 64), resample) for im in images]
    return images, [str(t) for t in digits.target]


def _letters():
    fonts = sorted(p for d in FONT_DIRS for p in Path(d).glob("*.ttf"))
    if not fonts:
        raise SystemExit("no fonts under " + ", ".join(FONT_DIRS) + ": apt-get install fonts-dejavu-core fonts-liberation")
    images, labels = [], []
    for path in fonts:
        font = ImageFont.truetype(str(path), 44)
        for letter in "ABCDEFGHIJKLMNOPQRSTUVWXYZ":
            im = Image.new("L", (64, 64), 255)
            ImageDraw.Draw(im).text((32, 32), letter, fill=0, font=font, anchor="mm")
            images.append(im)
            labels.append(letter)
    return images, labels


def _clipart(count=1200, seed=1):
    """Icons of one to three shapes on a 6-px grid, each layout (shape, place, size) used once,
    and each drawn partition into regions once, so that no two icons differ only in colour (a
    recoloured copy would be indistinguishable)."""
    rng = np.random.default_rng(seed)
    palette = [tuple(int(v) for v in rng.integers(0, 256, 3)) for _ in range(12)]
    import pandas as pd

    images, labels, layouts, drawn = [], [], set(), set()
    while len(images) < count:
        shapes = int(rng.integers(1, 4))
        layout = tuple(sorted((int(rng.integers(3)), int(rng.integers(1, 8)) * 6, int(rng.integers(1, 8)) * 6,
                               int(rng.integers(2, 5)) * 6) for _ in range(shapes)))
        if layout in layouts:
            continue
        layouts.add(layout)
        colours = rng.choice(len(palette), shapes + 1, replace=False)  # every shape visible
        im = Image.new("RGB", (64, 64), palette[colours[0]])
        draw = ImageDraw.Draw(im)
        for (kind, x, y, size), colour in zip(layout, colours[1:]):
            box = (x - 4, y - 4, x - 4 + size, y - 4 + size)
            if kind == 0:
                draw.ellipse(box, fill=palette[colour])
            elif kind == 1:
                draw.rectangle(box, fill=palette[colour])
            else:
                draw.polygon([(box[0], box[3]), (box[2], box[3]), ((box[0] + box[2]) // 2, box[1])], fill=palette[colour])
        # the regions as drawn, whatever their colours, cut to their bounding box and taken
        # with their mirror image: a shape hidden under another, a layout moved as a whole or
        # mirrored would make two icons one picture (a shifted or mirrored copy)
        regions = pd.factorize(np.asarray(im).reshape(-1, 3).view("V3").ravel())[0].reshape(64, 64)
        ys, xs = np.nonzero(regions)
        box = regions[ys.min():ys.max() + 1, xs.min():xs.max() + 1].astype(np.uint16)
        key = min(box.tobytes() + bytes(box.shape), box[:, ::-1].copy().tobytes() + bytes(box.shape))
        if key in drawn:
            continue
        drawn.add(key)
        images.append(im)
        labels.append(f"{shapes}-shapes")
    return images, labels


def _documents(count=400, seed=2):
    rng = np.random.default_rng(seed)
    fonts = sorted(p for d in FONT_DIRS for p in Path(d).glob("*.ttf"))[:8]
    words = ("the of and invoice total amount date page section report number account paid due "
             "order item price quantity customer address phone reference signed approved").split()
    images, labels = [], []
    for k in range(count):
        font = ImageFont.truetype(str(fonts[k % len(fonts)]), int(rng.integers(11, 16)))
        im = Image.new("L", (192, 256), 255)
        draw = ImageDraw.Draw(im)
        y = int(rng.integers(8, 30))
        while y < 240:
            line = " ".join(rng.choice(words, int(rng.integers(2, 7))))
            draw.text((int(rng.integers(8, 30)), y), line, fill=0, font=font)
            y += int(rng.integers(16, 30))
        images.append(im)
        labels.append(["letter", "invoice", "form"][k % 3])
    return images, labels


def _tiles(arrays, tile, size):
    images, labels = [], []
    for name, array in arrays.items():
        im = Image.fromarray(array)
        w, h = im.size
        for top in range(0, h - tile + 1, tile):
            for left in range(0, w - tile + 1, tile):
                images.append(im.crop((left, top, left + tile, top + tile)).resize((size, size), Image.Resampling.LANCZOS))
                labels.append(name)
    return images, labels


def _textures():
    import skimage.data

    return _tiles({name: getattr(skimage.data, name)() for name in ("brick", "grass", "gravel")}, 64, 64)


def _photos():
    import skimage.data
    from sklearn.datasets import load_sample_images

    arrays = {}
    for name in ("astronaut", "camera", "chelsea", "coffee", "coins", "rocket", "immunohistochemistry"):
        try:
            arrays[name] = getattr(skimage.data, name)()
        except Exception:  # needs a download in this version
            continue
    sample = load_sample_images()
    for fname, array in zip(sample.filenames, sample.images):
        arrays[Path(fname).stem] = array
    return _tiles(arrays, 128, 96)


def distinct_images(kind):
    """(images, labels) of one kind's distinct pictures."""
    resamplers = {"nearest": Image.Resampling.NEAREST, "bilinear": Image.Resampling.BILINEAR,
                  "bicubic": Image.Resampling.BICUBIC, "lanczos": Image.Resampling.LANCZOS}
    if kind == "digits8":
        return _digits(None)
    if kind.startswith("digits64-"):
        return _digits(resamplers[kind.split("-")[1]])
    return {"letters": _letters, "clipart": _clipart, "documents": _documents,
            "textures": _textures, "photos": _photos}[kind]()


# ---------------------------------------------------------------- planted copies

def _jpeg(im, quality):
    buf = io.BytesIO()
    im.convert("RGB" if im.mode not in ("L", "RGB") else im.mode).save(buf, "JPEG", quality=quality)
    return Image.open(io.BytesIO(buf.getvalue())).copy()


def _shift(im, px, rng):
    a = np.asarray(im)
    dy, dx = int(rng.integers(-px, px + 1)), int(rng.choice([-px, px]))
    pad = [(max(dy, 0), max(-dy, 0)), (max(dx, 0), max(-dx, 0))] + [(0, 0)] * (a.ndim - 2)
    moved = np.pad(a, pad, mode="edge")
    top, left = max(-dy, 0), max(-dx, 0)
    return Image.fromarray(moved[top: top + a.shape[0], left: left + a.shape[1]])


def _crop(im, share, rng):
    w, h = im.size
    cut_w, cut_h = max(1, round(w * share)), max(1, round(h * share))
    left, top = int(rng.integers(0, cut_w + 1)), int(rng.integers(0, cut_h + 1))
    return im.crop((left, top, w - (cut_w - left), h - (cut_h - top)))


def _recolour(im, rng):
    choice = rng.integers(3)
    if choice == 0:
        return ImageEnhance.Brightness(im).enhance(float(rng.uniform(0.75, 1.25)))
    if choice == 1:
        return ImageEnhance.Contrast(im).enhance(float(rng.uniform(0.75, 1.25)))
    if im.mode != "RGB":  # a hue turn needs colour: tint the gray picture instead
        return Image.merge("RGB", [im.point(lambda v, g=g: int(v * g)) for g in rng.uniform(0.7, 1.0, 3)])
    hsv = np.asarray(im.convert("HSV")).copy()
    hsv[..., 0] = (hsv[..., 0].astype(int) + int(rng.integers(20, 60))) % 256
    return Image.fromarray(hsv, "HSV").convert("RGB")


def edited(im, edit, rng):
    """A planted copy of ``im``."""
    side = min(im.size)
    if edit == "jpeg":
        return _jpeg(im, int(rng.integers(50, 91)))
    if edit == "resize":
        if side < 16:  # an 8x8 digit is enlarged instead: shrinking it to 4-7 px keeps nothing
            return im.resize((side * 4, side * 4), Image.Resampling.NEAREST)
        scale = float(rng.uniform(0.5, 0.9))
        return im.resize((max(8, round(im.size[0] * scale)), max(8, round(im.size[1] * scale))), Image.Resampling.BICUBIC)
    if edit == "shift":
        return _shift(im, min(int(rng.integers(1, 5)), max(1, side // 16)), rng)
    if edit == "crop":
        return _crop(im, float(rng.uniform(0.05, 0.15)), rng)
    if edit == "recolour":
        return _recolour(im, rng)
    return im.transpose(Image.Transpose.FLIP_LEFT_RIGHT)


def in_half(index, half):
    """Deal sources into the tune / held-out halves by a hash of their index."""
    return (zlib.crc32(index.to_bytes(4, "little")) % 2 == 0) == (half == "tune")


def build(kind, half, seed=0):
    """The kind's manifest rows (fingerprints) for one half, plus imagehash's pHash per row."""
    import imagehash
    import pandas as pd

    from labelprep.hashing import fingerprint

    images, labels = distinct_images(kind)
    rng = np.random.default_rng(seed)
    rows, plain = [], []
    chosen = [k for k in range(len(images)) if in_half(k, half)]
    planted = 0
    for k in chosen:
        versions = [("orig", images[k])]
        if rng.random() < COPY_SHARE:
            edit = EDITS[planted % len(EDITS)]
            planted += 1
            versions.append((edit, edited(images[k], edit, rng)))
        for edit, im in versions:
            rows.append({"path": f"{kind}/{k:05d}-{edit}.png", "label": labels[k],
                         "sha256": f"{kind}-{k}-{edit}", "width": im.size[0], "height": im.size[1],
                         "bytes": im.size[0] * im.size[1], "source": k, "edit": edit, **fingerprint(im)})
            plain.append(str(imagehash.phash(im)))
    frame = pd.DataFrame(rows)
    frame["imagehash_phash"] = plain
    return frame


# ---------------------------------------------------------------- scoring

def plain_phash_clusters(frame, radius):
    """Connected components of imagehash pHash pairs within ``radius`` bits: the reference."""
    from scipy.sparse import coo_matrix
    from scipy.sparse.csgraph import connected_components

    from labelprep.neighbors import hex_to_uint64, radius_pairs

    i, j, _ = radius_pairs(hex_to_uint64(frame["imagehash_phash"].to_numpy(dtype=object)), radius)
    n = len(frame)
    graph = coo_matrix((np.ones(len(i)), (i, j)), shape=(n, n))
    return connected_components(graph, directed=False)[1]


def scores(frame, cluster, left_out):
    """The printed figures from a cluster id per row (singletons have ids of their own)."""
    source = frame["source"].to_numpy()
    edit = frame["edit"].to_numpy()
    orig = edit == "orig"
    cluster = np.asarray(cluster)
    # distinct images sharing a cluster with another distinct image
    originals_per_cluster = np.bincount(cluster[orig], minlength=cluster.max() + 1)
    falsely = (originals_per_cluster[cluster[orig]] > 1).mean()
    home = dict(zip(source[orig], cluster[orig]))
    copies = ~orig
    found = np.array([home[s] == c for s, c in zip(source[copies], cluster[copies])])
    mirror = edit[copies] == "mirror"
    # pairs: sort rows by cluster, count pairs per cluster and same-source pairs per cluster
    pairs_per_cluster = np.bincount(cluster)
    all_pairs = int((pairs_per_cluster * (pairs_per_cluster - 1) // 2).sum())
    true_found = int(found.sum())
    true_total = int(copies.sum())
    precision = true_found / all_pairs if all_pairs else 1.0
    return {"falsely": falsely, "copies": found.mean() if len(found) else 1.0,
            "left_out": left_out, "precision": precision,
            "recall": true_found / true_total if true_total else 1.0,
            "mild": found[~mirror].mean() if (~mirror).any() else 1.0,
            "mirror": found[mirror].mean() if mirror.any() else float("nan")}


def labelprep_scores(frame, **options):
    from labelprep import codes
    from labelprep.clusters import group

    out = group(frame, **options)
    dup = out["dup_group"].astype("Float64").fillna(-1).to_numpy()
    cluster = np.where(dup < 0, dup.max() + 1 + np.arange(len(dup)), dup).astype(np.int64)
    left_out = codes.errors_mask(out["issues"]).mean()
    return scores(frame, cluster, left_out)


def reference_scores(frame, radius):
    import pandas as pd

    cluster = plain_phash_clusters(frame, radius)
    # a cluster with two labels would be a label conflict: all its rows left out
    labels = pd.Series(frame["label"].to_numpy()).groupby(cluster).transform("nunique").to_numpy()
    return scores(frame, cluster, (labels > 1).mean())


def _line(name, s):
    return (f"  {name:<26} {s['falsely']:8.3f} {s['copies']:7.3f} {s['left_out']:9.3f} "
            f"{s['precision']:9.3f} {s['recall']:7.3f} {s['mild']:6.3f} {s['mirror']:7.3f}")


def main(argv=None):
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--half", choices=("held-out", "tune"), default="held-out")
    parser.add_argument("--kinds", default=",".join(KINDS))
    args = parser.parse_args(argv)
    kinds = [k for k in args.kinds.split(",") if k]
    unknown = sorted(set(kinds) - set(KINDS))
    if unknown:
        parser.error(f"unknown kinds {unknown}; known: {', '.join(KINDS)}")

    print(f"dup_kinds: {args.half} half, {os.cpu_count()} cores, load average "
          f"{' '.join(f'{v:.1f}' for v in os.getloadavg())}")
    print(f"  {'method':<26} {'falsely':>8} {'copies':>7} {'left out':>9} {'precision':>9} "
          f"{'recall':>7} {'mild':>6} {'mirror':>7}")
    for kind in kinds:
        start = time.perf_counter()
        frame = build(kind, args.half)
        built = time.perf_counter() - start
        start = time.perf_counter()
        ours = labelprep_scores(frame)
        took = time.perf_counter() - start
        target = ("targets: falsely <= 0.01, copies >= 0.95, left out <= 0.01" if kind in LOW_INFORMATION
                  else "targets: precision >= 0.99, mild 1.0, mirror >= 0.95" if kind == "photos" else "")
        print(f"{kind}: {int((frame['edit'] == 'orig').sum())} distinct, {int((frame['edit'] != 'orig').sum())} "
              f"planted copies (built {built:.1f} s, group {took:.1f} s) {target}")
        print(_line("labelprep (default)", ours))
        print(_line("labelprep --no-mirrors", labelprep_scores(frame, flips=False)))
        for radius in (4, 8):
            print(_line(f"imagehash pHash {radius} bits", reference_scores(frame, radius)))


if __name__ == "__main__":
    main()
