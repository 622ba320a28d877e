"""Hard copies: pair precision and recall of heavily edited copies, plain pHash against learned features.

Every photograph bundled with scikit-image and scikit-learn that loads offline (the list of
benchmarks/dup_accuracy.py) gets the eleven hard edits of issue 14: crops of 20% and 30% per side,
rotations of 10, 20 and 90 degrees, mirror + JPEG quality 70, squashed to 60% of its width,
letterboxed onto a square, hue shifted by 60 degrees, the frame moved by a quarter of its width
and a 12% zoom. Every other photograph (in name order) is instead cut into 2x2 tiles that do not
overlap: distinct pictures of the same textures, the hardest test of precision (a tile of an
edited photo would be a crop of it, a true copy). The folder is scanned, then grouped twice by
labelprep itself: once as the default run without the extra (the reference line: plain
perceptual hashes) and once with the learned features (embedding neighbours + keypoint check).
Two files are "found" when they share a dup_group, which is what the split keeps together.

Run:  python benchmarks/hard_copies.py [--jobs 2] [--no-flips]
"""

from __future__ import annotations

import argparse
import itertools
import sys
import tempfile
import time
from pathlib import Path

import numpy as np
from PIL import Image, ImageOps

sys.path.insert(0, str(Path(__file__).resolve().parent))
from dup_accuracy import load_photos  # noqa: E402  (the same photographs)

EDITS = ("crop20", "crop30", "rot10", "rot20", "rot90", "mirror_q70", "squash", "letterbox",
         "hue60", "reframe", "zoom12")
TARGET_PRECISION, TARGET_RECALL = 0.98, 0.85  # issue 14


def edited(img, edit):
    """One hard edit of ``img`` (RGB), and the JPEG quality to save it with."""
    w, h = img.size
    if edit.startswith("crop"):
        cut = int(edit[4:]) / 100
        return img.crop((int(w * cut), int(h * cut), int(w * (1 - cut)), int(h * (1 - cut)))), 90
    if edit.startswith("rot"):
        return img.rotate(int(edit[3:]), resample=Image.Resampling.BILINEAR, expand=True), 90
    if edit == "mirror_q70":
        return ImageOps.mirror(img), 70
    if edit == "squash":
        return img.resize((int(w * 0.6), h), Image.Resampling.LANCZOS), 90
    if edit == "letterbox":
        side = max(w, h)
        canvas = Image.new("RGB", (side, side))
        canvas.paste(img, ((side - w) // 2, (side - h) // 2))
        return canvas, 90
    if edit == "hue60":
        hsv = np.asarray(img.convert("HSV")).copy()
        hsv[..., 0] = (hsv[..., 0].astype(int) + 256 * 60 // 360) % 256
        return Image.fromarray(hsv, "HSV").convert("RGB"), 90
    if edit == "reframe":
        return img.crop((w // 4, 0, w, h)), 90
    if edit == "zoom12":
        kw, kh = w / 1.12, h / 1.12
        box = ((w - kw) / 2, (h - kh) / 2, (w + kw) / 2, (h + kh) / 2)
        return img.resize((w, h), Image.Resampling.LANCZOS, box=box), 90
    raise ValueError(edit)


def build(root: Path):
    """Write the originals, edits and tiles; return {path: source} for the edited families."""
    photos, skipped = load_photos()
    family = {}
    names = sorted(photos)
    for name in names[1::2]:
        img = photos[name].convert("RGB")
        w, h = img.size
        for i, j in itertools.product(range(2), range(2)):
            tile_folder = root / f"{name}-tile{i}{j}"
            tile_folder.mkdir(parents=True)
            img.crop((i * w // 2, j * h // 2, (i + 1) * w // 2, (j + 1) * h // 2)).save(tile_folder / "tile.png")
    for name in names[::2]:
        img = photos[name].convert("RGB")
        folder = root / name
        folder.mkdir(parents=True)
        img.save(folder / "original.png")
        family[f"{name}/original.png"] = name
        for edit in EDITS:
            copy, quality = edited(img, edit)
            copy.save(folder / f"{edit}.jpg", quality=quality)
            family[f"{name}/{edit}.jpg"] = name
    return family, names, skipped


def score(m, family):
    """Pair precision and recall over all files, and recall per edit (original to edit)."""
    dup = m.set_index("path")["dup_group"].dropna()
    together = {pair for members in dup.groupby(dup).groups.values()
                for pair in itertools.combinations(sorted(members), 2)}
    paths = sorted(m["path"])
    truth = {(a, b) for a, b in itertools.combinations(paths, 2)
             if a in family and b in family and family[a] == family[b]}
    hits = len(together & truth)
    precision = hits / len(together) if together else 1.0
    recall = hits / len(truth) if truth else 1.0
    per_edit = {}
    for edit in EDITS:
        pairs = [(f"{s}/original.png", f"{s}/{edit}.jpg") for s in set(family.values())]
        pairs = [tuple(sorted(p)) for p in pairs]
        per_edit[edit] = sum(p in together for p in pairs) / len(pairs)
    return precision, recall, per_edit, len(together), len(truth)


def main():
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--jobs", type=int, default=2)
    parser.add_argument("--no-flips", dest="flips", action="store_false",
                        help="do not match mirror images (group --no-flips; matching them is the default)")
    args = parser.parse_args()

    import labelprep
    from labelprep.embedding import features_for
    from labelprep.scenes import as_links, mark, scene_links

    with tempfile.TemporaryDirectory() as tmp:
        root = Path(tmp) / "photos"
        family, names, skipped = build(root)
        print(f"{len(names[::2])} photographs x (original + {len(EDITS)} edits) and "
              f"{4 * len(names[1::2])} tiles of {len(names[1::2])} others; "
              f"skipped (need a download): {', '.join(skipped) or 'none'}")
        m = labelprep.check(labelprep.scan(root, jobs=args.jobs))
        start = time.perf_counter()
        plain = labelprep.group(m, flips=args.flips)
        plain_s = time.perf_counter() - start
        start = time.perf_counter()
        vectors, _ = features_for(m, root, features="model", jobs=args.jobs)
        embed_s = time.perf_counter() - start
        start = time.perf_counter()
        links = scene_links(m, root, vectors, flips=args.flips, jobs=args.jobs)
        learned = mark(labelprep.group(m, flips=args.flips, links=as_links(m, links)), links)
        scene_s = time.perf_counter() - start
        inliers = learned["scene_inliers"].dropna().astype(int)
        print(f"same-scene rows: {int(learned['issues'].str.contains('same-scene').sum())}, "
              f"inliers min {inliers.min() if len(inliers) else '-'}")
    print(f"(machine shared with other work: times are indicative) group {plain_s:.1f} s; "
          f"features {embed_s:.1f} s; keypoints + group {scene_s:.1f} s")
    print(f"\n{'run':<28}{'precision':>10}{'recall':>8}{'pairs':>7}{'true':>6}  " + " ".join(f"{e:>10}" for e in EDITS))
    for name, result in (("plain pHash (reference)", plain), ("learned features", learned)):
        precision, recall, per_edit, found, truth = score(result, family)
        print(f"{name:<28}{precision:>10.3f}{recall:>8.3f}{found:>7}{truth:>6}  "
              + " ".join(f"{per_edit[e]:>10.2f}" for e in EDITS))
    precision, recall, *_ = score(learned, family)
    met = precision >= TARGET_PRECISION and recall >= TARGET_RECALL
    print(f"\ntarget precision >= {TARGET_PRECISION}, recall >= {TARGET_RECALL}: {'met' if met else 'NOT met'}")


if __name__ == "__main__":
    main()
