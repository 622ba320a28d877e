"""probe(): real bad files, built byte by byte, each reported with the right fault; none crashes."""

from __future__ import annotations

import io
import shutil
import struct
import zlib
from pathlib import Path

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from PIL import Image

from conftest import encode, textured
from labelprep import defaults
from labelprep.formats import PNG_SIGNATURE, format_of_extension, png_chunk
from labelprep.probe import blank_facts, probe


def _probe_bytes(tmp_path: Path, data: bytes, name: str = "f.bin", **kwargs) -> dict:
    path = tmp_path / name
    path.write_bytes(data)
    return probe(path, **kwargs)


def _hand_png(width: int, height: int, *, bit_depth: int = 8, pixel_data: bytes = b"") -> bytes:
    """A structurally valid RGB PNG whose IHDR claims width x height; no pixel data by default."""
    ihdr = struct.pack(">IIBBBBB", width, height, bit_depth, 2, 0, 0, 0)  # PNG spec 11.2.2, type 2 = RGB
    return PNG_SIGNATURE + png_chunk(b"IHDR", ihdr) + png_chunk(b"IDAT", pixel_data) + png_chunk(b"IEND", b"")


def _rgb48_png(width: int, height: int) -> bytes:
    """A 16-bit-per-sample RGB PNG: rows of filter byte 0 (spec 9.2, None) and big-endian samples."""
    samples = np.random.default_rng(2).integers(0, 65536, (height, width * 3)).astype(">u2")
    rows = b"".join(b"\x00" + row.tobytes() for row in samples)
    return _hand_png(width, height, bit_depth=16, pixel_data=zlib.compress(rows))


def _gif_header_only(width: int, height: int) -> bytes:
    # GIF89a sections 17-20: header, logical screen descriptor, image descriptor, an empty LZW
    # stream (minimum code size, then the block terminator), trailer
    screen = struct.pack("<HHBBB", width, height, 0, 0, 0)
    image = b"\x2c" + struct.pack("<HHHHB", 0, 0, width, height, 0)
    return b"GIF89a" + screen + image + b"\x02\x00\x3b"


def _bmp_header_only(width: int, height: int) -> bytes:
    # Microsoft BITMAPFILEHEADER (14 bytes) + BITMAPINFOHEADER (40 bytes): 24-bit, uncompressed
    info = struct.pack("<IiiHHIIiiII", 40, width, height, 1, 24, 0, 0, 2835, 2835, 0, 0)
    return b"BM" + struct.pack("<IHHI", 54, 0, 0, 54) + info


class TestCutFiles:
    """A valid file cut at every byte offset is never clean and never crashes the probe."""

    @pytest.mark.parametrize("fmt, signature_length", [("JPEG", 3), ("PNG", 8)])
    def test_every_offset(self, tmp_path, fmt, signature_length):
        """Cuts shorter than the signature are not images; all longer cuts are truncated."""
        data = encode(textured((16, 12), seed=3), fmt)
        assert probe(_write(tmp_path, "whole", data))["fault"] == ""
        for n in range(len(data)):
            facts = probe(_write(tmp_path, f"cut{n}", data[:n]))
            expected = "empty" if n == 0 else "not-image" if n < signature_length else "truncated"
            assert facts["fault"] == expected, (n, facts["fault_detail"])
            assert facts["fault_detail"]


def _write(folder: Path, name: str, data: bytes) -> Path:
    path = folder / name
    path.write_bytes(data)
    return path


class TestBadFiles:
    """Each kind of broken file gets its own fault and a reason."""

    def test_zero_bytes(self, tmp_path):
        """A zero-byte file is empty, not unreadable."""
        assert _probe_bytes(tmp_path, b"")["fault"] == "empty"

    def test_random_bytes(self, tmp_path):
        """Seeded random bytes match no signature (checked: they start with none)."""
        facts = _probe_bytes(tmp_path, np.random.default_rng(7).bytes(4096), "noise.jpg")
        assert facts["fault"] == "not-image" and facts["format"] == ""

    def test_text_named_jpg(self, tmp_path):
        """The reason quotes the first bytes, which here spell the text."""
        facts = _probe_bytes(tmp_path, b"label,path\ncat,a.jpg\n", "table.jpg")
        assert facts["fault"] == "not-image"
        assert facts["fault_detail"].startswith("first bytes 6c 61 62 65 6c")  # ASCII "label"

    def test_png_named_jpg(self, tmp_path):
        """Content decides the format; the name does not."""
        facts = _probe_bytes(tmp_path, encode(textured(), "PNG"), "photo.jpg")
        assert facts["fault"] == "" and facts["format"] == "png"
        assert format_of_extension("photo.jpg") == "jpeg"

    def test_corrupted_crc(self, tmp_path):
        """PNG specification 5.3: a flipped byte in IDAT fails its CRC; Pillow would decode it."""
        data = bytearray(encode(textured(), "PNG"))
        data[data.find(b"IDAT") + 10] ^= 0x40
        facts = _probe_bytes(tmp_path, bytes(data), "x.png")
        assert facts["fault"] == "corrupt" and "CRC" in facts["fault_detail"]

    def test_broken_pixel_data(self, tmp_path):
        """Chunks intact but IDAT is not a zlib stream: the decoder refuses it."""
        data = _hand_png(40, 30, pixel_data=b"\x00" * 64)
        assert _probe_bytes(tmp_path, data, "x.png")["fault"] == "unreadable"

    def test_missing_file_and_folder(self, tmp_path):
        """An unreadable path is a row with a reason, not an exception."""
        assert probe(tmp_path / "gone.jpg")["fault"] == "unreadable"
        assert probe(tmp_path)["fault"] == "unreadable"


class TestPixelBudget:
    """Images over the budget are judged from their header and never decoded."""

    def test_default_is_pillows_documented_limit(self):
        """Pillow docs, Image.MAX_IMAGE_PIXELS: 1024 * 1024 * 1024 // 4 // 3 = 89,478,485."""
        assert defaults.MAX_PIXELS == 1024 * 1024 * 1024 // 4 // 3 == Image.MAX_IMAGE_PIXELS

    @pytest.mark.parametrize("build, name", [(_hand_png, "x.png"), (_gif_header_only, "x.gif"),
                                             (_bmp_header_only, "x.bmp")])
    def test_header_claiming_a_huge_size(self, tmp_path, build, name):
        """Decoding 50000 x 50000 would need gigabytes (a MemoryError is reported as unreadable)."""
        facts = _probe_bytes(tmp_path, build(50_000, 50_000), name)
        assert facts["fault"] == "pixel-limit", facts["fault_detail"]

    def test_between_pillows_warning_and_error(self, tmp_path):
        """10000 x 10000 only warns in Pillow; the budget stops it before decoding.

        The file has no pixel data, so a decode would end in a truncated or unreadable fault.
        """
        facts = _probe_bytes(tmp_path, _hand_png(10_000, 10_000), "x.png")
        assert facts["fault"] == "pixel-limit"
        assert facts["fault_detail"] == "10000x10000 = 100,000,000 pixels, budget 89,478,485"
        assert (facts["width"], facts["height"]) == (10_000, 10_000)

    def test_size_of_a_file_pillow_refuses_to_open(self, tmp_path):
        """Over twice Pillow's limit Image.open raises; the header still gives the row its size."""
        facts = _probe_bytes(tmp_path, _hand_png(50_000, 40_000), "x.png")
        assert (facts["fault"], facts["width"], facts["height"]) == ("pixel-limit", 50_000, 40_000)
        assert facts["fault_detail"] == "50000x40000 = 2,000,000,000 pixels, budget 89,478,485"

    def test_budget_above_pillows_own_limit_says_so(self, tmp_path):
        facts = _probe_bytes(tmp_path, _hand_png(20_000, 10_000), "x.png", max_pixels=10**9)
        assert facts["fault"] == "pixel-limit" and (facts["width"], facts["height"]) == (20_000, 10_000)
        assert "within the budget" in facts["fault_detail"] and "Pillow" in facts["fault_detail"]

    def test_custom_budget(self, tmp_path):
        """A smaller budget flags a real image that is over it."""
        facts = _probe_bytes(tmp_path, encode(textured((96, 64)), "PNG"), "x.png", max_pixels=5000)
        assert facts["fault"] == "pixel-limit" and facts["phash"] == ""


class TestFacts:
    """Facts the check stage reads: frames, mode, alpha, location, spread, orientation."""

    def test_animated_gif(self, tmp_path):
        """GIF89a animation: every frame is counted."""
        frames = [textured(seed=s).convert("P") for s in range(3)]
        buf = io.BytesIO()
        frames[0].save(buf, "GIF", save_all=True, append_images=frames[1:])
        facts = _probe_bytes(tmp_path, buf.getvalue(), "a.gif")
        assert facts["fault"] == "" and facts["frames"] == 3

    def test_cmyk_jpeg(self, tmp_path):
        """A four-channel (Adobe CMYK) JPEG keeps its mode."""
        facts = _probe_bytes(tmp_path, encode(textured().convert("CMYK"), "JPEG"), "c.jpg")
        assert facts["fault"] == "" and facts["mode"] == "CMYK"

    def test_16_bit_png(self, tmp_path):
        """PNG IHDR bit depth 16 (spec 11.2.2) opens as I;16; its spread is not clipped to blank."""
        grey = np.asarray(textured().convert("L"), dtype=np.uint16) * 257
        data = encode(Image.fromarray(grey), "PNG")
        assert data[24] == 16  # IHDR bit-depth byte: 8 signature + 8 chunk head + 8 size bytes
        facts = _probe_bytes(tmp_path, data, "d.png")
        assert facts["fault"] == "" and facts["mode"] == "I;16"
        assert facts["spread"] > 10 and facts["bits"] == 16
        flat = _probe_bytes(tmp_path, encode(Image.new("L", (96, 64), 255), "PNG"), "flat.png")
        assert facts["phash"] != flat["phash"]  # not hashed as the white image a clipping conversion gives

    def test_48_bit_rgb_png(self, tmp_path):
        """Pillow reads 16-bit RGB as 8-bit RGB; the header's bit depth still says 16."""
        facts = _probe_bytes(tmp_path, _rgb48_png(30, 20), "d.png")
        assert (facts["fault"], facts["mode"], facts["bits"]) == ("", "RGB", 16)

    @pytest.mark.parametrize("mode, kwargs, alpha", [("RGBA", {}, True), ("P", {"transparency": 0}, True),
                                                    ("RGB", {}, False)])
    def test_alpha(self, tmp_path, mode, kwargs, alpha):
        """An alpha channel or a transparent palette entry is recorded; plain RGB is not."""
        facts = _probe_bytes(tmp_path, encode(textured().convert(mode), "PNG", **kwargs), "a.png")
        assert facts["has_alpha"] is alpha

    def test_gps_position(self, tmp_path):
        """EXIF 2.3 GPS IFD (tag 0x8825) with GPSLatitude (2) and GPSLongitude (4) is a location."""
        exif = Image.Exif()
        exif[0x8825] = {1: "N", 2: (51.0, 30.0, 0.0), 3: "E", 4: (0.0, 7.0, 0.0)}
        facts = _probe_bytes(tmp_path, encode(textured(), "JPEG", exif=exif), "g.jpg")
        assert facts["has_gps"] is True

    def test_gps_version_only_is_no_location(self, tmp_path):
        """A GPS IFD holding only GPSVersionID (tag 0) carries no position."""
        exif = Image.Exif()
        exif[0x8825] = {0: b"\x02\x03\x00\x00"}
        facts = _probe_bytes(tmp_path, encode(textured(), "JPEG", exif=exif), "g.jpg")
        assert facts["has_gps"] is False

    def test_orientation_swaps_axes(self, tmp_path):
        """EXIF Orientation 6 (rotate 90 CW to view, TIFF 6.0 tag 274) swaps width and height."""
        exif = Image.Exif()
        exif[0x0112] = 6
        facts = _probe_bytes(tmp_path, encode(textured((96, 64)), "JPEG", exif=exif), "o.jpg")
        assert (facts["width"], facts["height"]) == (64, 96)

    def test_flat_image_has_no_spread(self, tmp_path):
        """One flat colour measures a spread of exactly zero."""
        facts = _probe_bytes(tmp_path, encode(Image.new("RGB", (64, 64), (90, 90, 90)), "PNG"), "f.png")
        assert facts["spread"] == 0.0


@settings(max_examples=60, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(flips=st.lists(st.tuples(st.integers(0, 10_000), st.integers(1, 255)), min_size=1, max_size=6),
       fmt=st.sampled_from(["JPEG", "PNG", "GIF", "BMP", "TIFF", "WEBP"]))
def test_damaged_files_never_crash(tmp_path, flips, fmt):
    """Bytes flipped anywhere in a valid file give a row with every fact key, whatever happens."""
    data = bytearray(encode(textured((24, 16), seed=1).convert("RGB"), fmt))
    for pos, mask in flips:
        data[pos % len(data)] ^= mask
    facts = _probe_bytes(tmp_path, bytes(data), "x")
    assert set(blank_facts()) <= set(facts)
    assert facts["fault"] in ("", "not-image", "unreadable", "truncated", "corrupt", "pixel-limit")


def test_scan_of_scikit_image_photos(tmp_path, runner):
    """`labelprep scan` on scikit-image's bundled files: every file listed; each image decoded
    with the size scikit-image's reader (imageio) gives and the format its name says."""
    import imageio.v3 as iio
    import skimage

    from labelprep.cli import main
    from labelprep.manifest import read

    source = Path(skimage.__file__).parent / "data"
    root = tmp_path / "photos" / "skimage"
    root.mkdir(parents=True)
    names = sorted(p.name for p in source.iterdir() if p.is_file())
    for name in names:
        shutil.copyfile(source / name, root / name)
    result = runner.invoke(main, ["scan", str(tmp_path / "photos"), "-o", str(tmp_path / "m.csv"), "-j", "1"])
    assert result.exit_code == 0, result.output
    m = read(tmp_path / "m.csv").set_index("path")
    assert sorted(m.index) == [f"skimage/{n}" for n in names]
    images = [n for n in names if format_of_extension(n)]
    assert len(images) >= 20  # scikit-image 0.2x bundles about 30 pictures
    for name in images:
        row = m.loc[f"skimage/{name}"]
        assert row["format"] == format_of_extension(name), name
        if _pillow_reads(root / name):
            height, width = iio.improps(root / name, index=0).shape[:2]
            assert (row["width"], row["height"], row["fault"]) == (width, height, ""), name
        else:  # e.g. multipage_rgb.tif: planar 64-bit float RGB, which Pillow has no mode for
            assert row["fault"] == "unreadable", name
    for name in set(names) - set(images):
        assert m.loc[f"skimage/{name}", "fault"] == "not-image", name


def _pillow_reads(path: Path) -> bool:
    try:
        with Image.open(path) as im:
            im.load()
        return True
    except Exception:
        return False
