"""The demo dataset: an invented tide-pool survey, drawn procedurally, with planted problems.

Volunteers of a (fictional) coastal survey photograph four kinds of tide-pool creature at numbered
pools. Photos from one pool visit form a group (``pool-NN`` in the file name), the kind of thing a
leak-free split must keep together. The classes are imbalanced on purpose, and a known set of bad
files, copies and a mislabelled copy is planted and listed in ``planted.csv`` beside the photos.
"""

from __future__ import annotations

import csv
import io
import shutil
from pathlib import Path

from .errors import OutputExistsError
from .manifest import guard_output, write_text

CLASSES = {"starfish": 96, "anemone": 64, "urchin": 36, "crab": 20}
POOLS = 24
SIZE = (320, 240)
PLANTED_NAME = "planted.csv"
GROUP_PATTERN = r"^[^/]+/(pool-\d+)-"  # the pool in a demo file name is its group


def make_demo(folder, *, seed: int = 0, force: bool = False) -> Path:
    """Write the demo into ``folder/photos`` and the list of planted problems into ``folder``.

    Parameters
    ----------
    folder : path-like
        Created if missing. An existing demo there is regenerated; anything else needs ``force``
        (``planted.csv`` goes through :func:`labelprep.manifest.guard_output`).
    seed : int
        The same seed draws the same images, byte for byte.

    Returns
    -------
    Path
        ``folder/photos``, the tree to scan.

    Examples
    --------
    >>> photos = make_demo("/tmp/labelprep-demo")   # doctest: +SKIP
    """
    import numpy as np

    folder = Path(folder)
    photos = folder / "photos"
    guard_output(folder / PLANTED_NAME, force=force)  # before anything is removed
    if photos.exists():
        if not (folder / PLANTED_NAME).is_file() and not force:
            raise OutputExistsError(f"{photos} exists and is not a labelprep demo; pass --force to replace it")
        shutil.rmtree(photos)
    photos.mkdir(parents=True)
    rng = np.random.default_rng(seed)
    originals: dict[str, list[Path]] = {}
    for label, count in CLASSES.items():
        (photos / label).mkdir()
        for k in range(count):
            pool = int(rng.integers(1, POOLS + 1))
            path = photos / label / f"pool-{pool:02d}-{k:04d}.jpg"
            _draw(label, rng).save(path, "JPEG", quality=int(rng.integers(80, 95)))
            originals.setdefault(label, []).append(path)
    planted = _plant(photos, originals, rng)
    listing = io.StringIO()
    writer = csv.writer(listing, lineterminator="\n")
    writer.writerow(["path", "problem", "expected_code"])
    writer.writerows(planted)
    write_text(folder / PLANTED_NAME, listing.getvalue(), force=force)
    return photos


def planted_summary(photos) -> str:
    """One line saying what the demo holds."""
    photos = Path(photos)
    with open(photos.parent / PLANTED_NAME, encoding="utf-8") as fh:
        planted = list(csv.DictReader(fh))
    n = sum(CLASSES.values())
    return (f"{n} survey photos in {len(CLASSES)} classes "
            f"({', '.join(f'{k} {v}' for k, v in CLASSES.items())}), "
            f"{len(planted)} planted problems listed in {photos.parent / PLANTED_NAME}")


# ------------------------------------------------------------------ drawing

def _background(rng):
    """Sand and rock: smooth noise at three scales, tinted, plus pebbles."""
    import numpy as np
    from PIL import Image, ImageDraw

    w, h = SIZE
    field = np.zeros((h, w))
    for cells, weight in ((4, 1.0), (12, 0.5), (40, 0.25)):
        grid = rng.random((cells * h // w + 2, cells + 2))
        up = np.asarray(Image.fromarray((grid * 255).astype(np.uint8)).resize((w, h), Image.BICUBIC), float)
        field += weight * up / 255
    field /= field.max()
    tint = rng.uniform(0.35, 0.9, size=3)
    rgb = (field[..., None] * tint * 255 + rng.normal(0, 6, (h, w, 3))).clip(0, 255).astype(np.uint8)
    im = Image.fromarray(rgb)
    draw = ImageDraw.Draw(im)
    for _ in range(int(rng.integers(8, 20))):
        x, y, r = rng.integers(0, w), rng.integers(0, h), rng.integers(3, 14)
        shade = tuple(int(v) for v in rng.integers(40, 200, size=3))
        draw.ellipse((x - r, y - r, x + r, y + r * 0.7), fill=shade)
    return im, draw


def _draw(label: str, rng):
    import math

    im, draw = _background(rng)
    w, h = SIZE
    cx, cy = rng.uniform(0.3, 0.7) * w, rng.uniform(0.3, 0.7) * h
    size = rng.uniform(0.18, 0.32) * h
    turn = rng.uniform(0, 2 * math.pi)
    colour = tuple(int(v) for v in rng.integers(60, 255, size=3))

    def at(angle, radius):
        return (cx + radius * math.cos(angle + turn), cy + radius * math.sin(angle + turn))

    if label == "starfish":
        points = [at(math.pi * k / 5, size if k % 2 == 0 else size * 0.38) for k in range(10)]
        draw.polygon(points, fill=colour, outline=(30, 20, 10))
    elif label == "anemone":
        for k in range(28):
            draw.line([at(2 * math.pi * k / 28, size * 0.3), at(2 * math.pi * k / 28, size)],
                      fill=colour, width=4)
        draw.ellipse((cx - size * 0.35, cy - size * 0.35, cx + size * 0.35, cy + size * 0.35),
                     fill=tuple(c // 2 for c in colour))
    elif label == "urchin":
        for k in range(60):
            draw.line([at(2 * math.pi * k / 60, size * 0.2), at(2 * math.pi * k / 60, size * 0.9)],
                      fill=(40, 20, 60), width=2)
        draw.ellipse((cx - size * 0.45, cy - size * 0.45, cx + size * 0.45, cy + size * 0.45),
                     fill=(70, 30, 90))
    else:  # crab
        for side in (-1, 1):
            for k in range(3):
                a = side * (math.pi / 2) + (k - 1) * 0.45
                draw.line([at(a, size * 0.3), at(a, size * 0.95)], fill=colour, width=5)
            draw.ellipse([*at(side * 0.5, size * 0.75), *(v + size * 0.3 for v in at(side * 0.5, size * 0.75))],
                         fill=colour)
        draw.ellipse((cx - size * 0.6, cy - size * 0.4, cx + size * 0.6, cy + size * 0.4), fill=colour,
                     outline=(40, 10, 0))
    return im


# ------------------------------------------------------------------ planted problems

def _jpeg_bytes(im, quality=90, **kwargs) -> bytes:
    buf = io.BytesIO()
    im.save(buf, "JPEG", quality=quality, **kwargs)
    return buf.getvalue()


def _hand_png(width: int, height: int, pixel_data: bytes) -> bytes:
    """An 8-bit RGB PNG assembled chunk by chunk, so its header can claim any size."""
    import struct

    from .formats import PNG_SIGNATURE, png_chunk

    header = struct.pack(">IIBBBBB", width, height, 8, 2, 0, 0, 0)  # PNG spec 11.2.2 IHDR fields
    return PNG_SIGNATURE + png_chunk(b"IHDR", header) + png_chunk(b"IDAT", pixel_data) + png_chunk(b"IEND", b"")


def _plant_odd_pixels(put, rng) -> None:
    """Files that decode but that a training loader may mishandle; drawn fresh, so no copies."""
    import numpy as np
    from PIL import Image

    frames = [_draw("anemone", rng) for _ in range(3)]
    gif = io.BytesIO()
    frames[0].save(gif, "GIF", save_all=True, append_images=frames[1:], duration=300)
    put("anemone/pool-19-0915.gif", gif.getvalue(), "3-frame animated GIF", "multi-frame")
    put("urchin/pool-20-0916.jpg", _jpeg_bytes(_draw("urchin", rng).convert("CMYK")), "CMYK JPEG",
        "unusual-mode")
    deep = io.BytesIO()
    Image.fromarray(np.asarray(_draw("crab", rng).convert("L"), dtype=np.uint16) * 257).save(deep, "PNG")
    put("crab/pool-21-0917.png", deep.getvalue(), "16-bit greyscale PNG", "unusual-mode")
    put("starfish/pool-22-0918.jpg", _jpeg_bytes(Image.new("RGB", SIZE, (150, 130, 95))),
        "blank frame of one sand colour", "near-blank")
    put("starfish/pool-23-0919.jpg", _jpeg_bytes(_draw("starfish", rng).resize((640, 120))),
        "640x120 strip", "extreme-aspect")


def _plant(photos: Path, originals: dict, rng) -> list[tuple[str, str, str]]:
    from PIL import Image

    planted = []

    def put(rel: str, data: bytes, problem: str, code: str):
        (photos / rel).parent.mkdir(parents=True, exist_ok=True)
        (photos / rel).write_bytes(data)
        planted.append((rel, problem, code))

    def rel(p: Path) -> str:
        return p.relative_to(photos).as_posix()

    star, anem, urch, crab = (originals[k] for k in CLASSES)
    put("starfish/pool-03-0900.jpg", rng.bytes(4096), "random bytes named .jpg", "not-image")
    put("anemone/field-notes.txt", b"pool 7: low tide 06:40, calm\n", "a text file among the photos", "not-image")
    put("crab/pool-05-0901.jpg", b"", "empty file", "empty-file")
    full = star[1].read_bytes()
    put("starfish/pool-04-0902.jpg", full[: len(full) * 55 // 100], "JPEG cut at 55% of its bytes", "truncated")
    put("urchin/pool-06-0903.png", _hand_png(*SIZE, rng.bytes(3000)),
        "PNG whose pixel data is not a zlib stream", "unreadable")
    tiny = Image.open(anem[2]).resize((24, 18))
    put("anemone/pool-08-0904.jpg", _jpeg_bytes(tiny), "24x18 thumbnail", "too-small")
    png = io.BytesIO()
    Image.open(star[3]).save(png, "PNG")
    put("starfish/pool-09-0905.jpg", png.getvalue(), "PNG saved under a .jpg name", "wrong-extension")
    flipped = bytearray(png.getvalue())
    flipped[flipped.find(b"IDAT") + 40] ^= 0xFF
    put("crab/pool-17-0913.png", bytes(flipped), "PNG with one pixel-data byte flipped (its CRC fails)", "corrupt")
    put("starfish/pool-18-0914.png", _hand_png(30_000, 30_000, b""),
        "PNG header claiming 30000x30000 pixels, with no pixels behind it", "pixel-limit")
    gps = Image.Exif()
    gps[0x8825] = {1: "N", 2: (47.0, 36.0, 12.5), 3: "W", 4: (122.0, 19.0, 40.0)}  # invented place
    put("crab/pool-10-0906.jpg", _jpeg_bytes(Image.open(crab[4]), exif=gps), "photo carrying GPS tags",
        "has-location")
    for source, name in ((star[5], "starfish/pool-11-0907.jpg"), (anem[6], "anemone/pool-12-0908.jpg")):
        put(name, source.read_bytes(), f"byte copy of {rel(source)}", "exact-copy")
    im = Image.open(star[7])
    put("starfish/pool-13-0909.jpg", _jpeg_bytes(im, quality=55), f"re-encoded copy of {rel(star[7])}", "near-copy")
    im = Image.open(anem[8])
    put("anemone/pool-14-0910.jpg", _jpeg_bytes(im.resize((224, 168), Image.LANCZOS)),
        f"resized copy of {rel(anem[8])}", "near-copy")
    im = Image.open(star[9])
    shifted = Image.new("RGB", im.size)
    shifted.paste(im.crop((2, 2, im.width, im.height)), (0, 0))
    shifted.paste(im.crop((im.width - 2, 0, im.width, im.height)).resize((2, im.height)), (im.width - 2, 0))
    put("starfish/pool-15-0911.jpg", _jpeg_bytes(shifted), f"copy of {rel(star[9])} shifted by 2 px", "near-copy")
    im = Image.open(urch[10])
    put("crab/pool-16-0912.jpg", _jpeg_bytes(im.resize((288, 216), Image.LANCZOS), quality=80),
        f"resized copy of urchin photo {rel(urch[10])} filed under crab", "label-conflict")
    _plant_odd_pixels(put, rng)
    put(".DS_Store", b"\x00\x00\x00\x01Bud1", "hidden system file (skipped and counted)", "")
    return planted
