"""Feature stage cost per image against bare onnxruntime inference plus the bare reduced decode.

``--files`` JPEGs (640x480, from scikit-image's bundled photographs, each a different crop) are
embedded three ways in this one process, one thread each, side by side:

1. the bare reduced decode: Pillow open, draft mode to the network's side, RGB, resize, array;
2. bare onnxruntime inference of the converted EfficientNet-Lite0 on those arrays, 16 at a time;
3. :func:`labelprep.embedding.embed` with ``jobs=1`` (the stage: reading, decoding, batching,
   inference, cache bookkeeping).

It prints the per-image cost of each and the ratio of the stage to the sum of the two bare
loops (issue 14's target: within 1.3x). Needs labelprep[features].

Run:  python benchmarks/feature_speed.py [--files 160] [--rounds 3]
"""

from __future__ import annotations

import argparse
import io
import tempfile
import time
from pathlib import Path

import numpy as np
from PIL import Image

TARGET = 1.3


def write_files(root: Path, count: int):
    import skimage.data

    photos = [Image.fromarray(getattr(skimage.data, n)()).convert("RGB").resize((960, 720))
              for n in ("astronaut", "coffee", "chelsea", "rocket", "hubble_deep_field", "immunohistochemistry")]
    rng = np.random.default_rng(0)
    (root / "x").mkdir(parents=True)
    for i in range(count):
        x, y = rng.integers(0, 320), rng.integers(0, 240)
        photos[i % len(photos)].crop((x, y, x + 640, y + 480)).save(root / "x" / f"{i:04d}.jpg", quality=90)


def main():
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--files", type=int, default=160)
    parser.add_argument("--rounds", type=int, default=3)
    args = parser.parse_args()

    import labelprep
    from labelprep import embedding

    net = embedding.embedder(None)
    with tempfile.TemporaryDirectory() as tmp:
        root = Path(tmp) / "photos"
        write_files(root, args.files)
        m = labelprep.scan(root, jobs=1)
        files = [root / p for p in m["path"]]
        best = {"decode": np.inf, "inference": np.inf, "stage": np.inf}
        for _ in range(args.rounds):  # interleaved rounds: load on the machine hits all three alike
            start = time.perf_counter()
            arrays = []
            for f in files:
                with Image.open(io.BytesIO(f.read_bytes())) as im:
                    im.draft("RGB", (net.side, net.side))
                    arrays.append(net.pixels(im))
            best["decode"] = min(best["decode"], time.perf_counter() - start)
            start = time.perf_counter()
            for s in range(0, len(arrays), embedding.BATCH):
                net.run(np.stack(arrays[s:s + embedding.BATCH]))
            best["inference"] = min(best["inference"], time.perf_counter() - start)
            start = time.perf_counter()
            embedding.embed(m, root, jobs=1)
            best["stage"] = min(best["stage"], time.perf_counter() - start)
    per = {k: v / args.files * 1000 for k, v in best.items()}
    ratio = per["stage"] / (per["decode"] + per["inference"])
    print(f"{args.files} JPEGs 640x480, best of {args.rounds} rounds, one thread "
          f"(machine shared with other work: the ratio is what counts)")
    print(f"bare reduced decode      {per['decode']:7.2f} ms/image")
    print(f"bare onnxruntime         {per['inference']:7.2f} ms/image")
    print(f"feature stage (jobs=1)   {per['stage']:7.2f} ms/image")
    print(f"stage / (decode + inference) = {ratio:.2f}; target <= {TARGET}: {'met' if ratio <= TARGET else 'NOT met'}")


if __name__ == "__main__":
    main()
