"""Shared fixtures: a CLI runner and factories that write small real images into tmp_path."""

from __future__ import annotations

import io
from pathlib import Path

import numpy as np
import pytest
from click.testing import CliRunner
from PIL import Image


@pytest.fixture
def runner():
    return CliRunner()


def assert_handled(result, exit_code: int) -> None:
    """A command ended on purpose with ``exit_code``: no exception escaped it.

    Under CliRunner an escaped exception never reaches the output (``result.output`` stays free
    of any traceback); it is kept in ``result.exception`` with exit code 1, so that is where to look.
    """
    escaped = result.exception if not isinstance(result.exception, SystemExit) else None
    assert escaped is None, f"{type(escaped).__name__}: {escaped}"
    assert result.exit_code == exit_code, result.output


def textured(size=(96, 64), seed=0, mode="RGB") -> Image.Image:
    """A random smooth texture: distinct seeds give perceptually distinct images."""
    rng = np.random.default_rng(seed)
    w, h = size
    grid = rng.random((6, 8, 3))
    small = Image.fromarray((grid * 255).astype(np.uint8))
    im = small.resize((w, h), Image.BICUBIC)
    noise = rng.normal(0, 4, (h, w, 3))
    im = Image.fromarray((np.asarray(im, float) + noise).clip(0, 255).astype(np.uint8))
    return im.convert(mode) if mode != "RGB" else im


def encode(im: Image.Image, fmt: str = "JPEG", **kwargs) -> bytes:
    buf = io.BytesIO()
    im.save(buf, fmt, **kwargs)
    return buf.getvalue()


@pytest.fixture
def write_image():
    """``write_image(path, size=(96, 64), seed=0, fmt="JPEG", **save_kwargs) -> Path``."""
    def write(path, size=(96, 64), seed=0, fmt="JPEG", mode="RGB", **kwargs):
        path = Path(path)
        path.parent.mkdir(parents=True, exist_ok=True)
        path.write_bytes(encode(textured(size, seed, mode), fmt, **kwargs))
        return path
    return write


@pytest.fixture
def class_tree(tmp_path, write_image):
    """ROOT/<label>/<file>: 3 classes, 4 distinct JPEGs each, 2 groups per class by name prefix."""
    root = tmp_path / "photos"
    seed = 0
    for label in ("cat", "dog", "eel"):
        for k in range(4):
            write_image(root / label / f"g{k % 2}_{label}_{k}.jpg", seed=seed)
            seed += 1
    return root


@pytest.fixture(scope="session")
def demo_tree(tmp_path_factory):
    """The built-in demo, generated once per test session (read-only for tests)."""
    from labelprep.demo import make_demo

    return make_demo(tmp_path_factory.mktemp("demo"), seed=0)
