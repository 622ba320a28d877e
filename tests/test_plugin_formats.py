"""HEIF/HEIC, AVIF and JPEG XL: files made by the plugins themselves, read as JPEGs are; reasons
that never show a Python object."""

from __future__ import annotations

import functools
import re
import struct
import sys

import pytest
from PIL import Image, ImageOps

from conftest import encode, textured
from labelprep import probe as probe_module
from labelprep.checks import check
from labelprep.formats import damage, sniff
from labelprep.parallel import map_ordered
from labelprep.probe import decoder_missing, probe
from labelprep.scanner import scan

pillow_heif = pytest.importorskip("pillow_heif")  # in the test extra, so CI always has it
pytest.importorskip("pillow_jxl")
pillow_heif.register_heif_opener()

_ORIENTATION = 0x0112  # TIFF 6.0 / EXIF Orientation tag


def _with_orientation(orientation: int) -> bytes:
    exif = Image.Exif()
    exif[_ORIENTATION] = orientation
    return exif.tobytes()


def _plugin_view(path):
    """Size and mode as the plugin itself reads the file, EXIF orientation applied."""
    with Image.open(path) as im:
        oriented = ImageOps.exif_transpose(im)
        return oriented.size, im.mode


# (Pillow save format, file name); every one decoded by the plugin that wrote it
KINDS = [("HEIF", "phone.heic"), ("AVIF", "phone.avif"), ("JXL", "phone.jxl")]


class TestPluginFormats:
    @pytest.mark.parametrize("fmt,name", KINDS)
    @pytest.mark.parametrize("orientation", [1, 6, 8])
    def test_size_and_orientation_match_the_plugins_own_reading(self, tmp_path, fmt, name, orientation):
        """Width and height are the plugin's, after orientation (EXIF 2.3 4.6.4 A: 6 and 8 turn
        a quarter, so the sides swap); the row is clean and hashed."""
        path = tmp_path / name
        kwargs = {"exif": _with_orientation(orientation)} if fmt != "JXL" else {}
        textured((120, 80), seed=3).save(path, fmt, **kwargs)
        (width, height), mode = _plugin_view(path)
        facts = probe(path)
        assert (facts["width"], facts["height"]) == (width, height)
        assert facts["mode"] == mode and facts["fault"] == "" and len(facts["phash"]) == 16
        if orientation != 1 and fmt != "JXL":
            assert (width, height) == (80, 120)

    @pytest.mark.parametrize("fmt,name", KINDS)
    def test_the_format_comes_from_the_content_not_the_name(self, tmp_path, fmt, name):
        path = tmp_path / "holiday.jpg"
        textured((64, 48)).save(path, fmt)
        facts = probe(path)
        assert facts["format"] == name.rsplit(".", 1)[1].replace("heic", "heif")
        m = check(scan(tmp_path, jobs=1))
        assert "wrong-extension" in m.loc[0, "issues"]

    def test_a_rotated_heic_hashes_like_the_rotated_jpeg(self, tmp_path):
        """The hash is of the upright picture, whichever format carries the turn."""
        im = textured((160, 96), seed=5)
        im.save(tmp_path / "a.heic", "HEIF", exif=_with_orientation(6), quality=95)
        (tmp_path / "b.jpg").write_bytes(encode(im, "JPEG", exif=_with_orientation(6), quality=95))
        a, b = probe(tmp_path / "a.heic"), probe(tmp_path / "b.jpg")
        distance = (int(a["phash"], 16) ^ int(b["phash"], 16)).bit_count()
        assert distance <= 6, distance

    @pytest.mark.parametrize("fmt", ["HEIF", "AVIF"])
    def test_a_cut_file_is_truncated(self, tmp_path, fmt):
        data = encode(textured((64, 48)), fmt)
        facts = probe_module.probe(_write(tmp_path / "cut", data[:-20]))
        assert facts["fault"] == "truncated" and "box" in facts["fault_detail"]


def _write(path, data: bytes):
    path.write_bytes(data)
    return path


def _ftyp(major: bytes, *compatible: bytes) -> bytes:
    """An ISO/IEC 14496-12 4.3 file-type box: size, 'ftyp', major brand, minor version, brands."""
    body = major + b"\x00\x00\x00\x00" + b"".join(compatible)
    return struct.pack(">I", 8 + len(body)) + b"ftyp" + body


class TestBrands:
    @pytest.mark.parametrize("head,expected", [
        (_ftyp(b"heic", b"mif1", b"heic"), "heif"),      # ISO/IEC 23008-12 B.4: HEVC still image
        (_ftyp(b"mif1", b"heic"), "heif"),
        (_ftyp(b"mif1", b"miaf", b"avif"), "avif"),       # AV1 Image File Format 9.3: avif brand
        (_ftyp(b"avif", b"mif1"), "avif"),
        (_ftyp(b"msf1", b"hevc"), "heif"),                # image sequence
        (_ftyp(b"isom", b"mp41"), ""),                    # an MP4 video (ISO/IEC 14496-14): no image
        (b"\x00\x00\x00\x0cJXL \r\n\x87\n" + bytes(8), "jxl"),  # ISO/IEC 18181-2 signature box
        (b"\xff\x0a" + bytes(8), "jxl"),                  # ISO/IEC 18181-1 codestream signature
    ])
    def test_brands_name_the_format(self, head, expected):
        assert sniff(head + bytes(16)) == expected

    def test_a_box_past_the_end_is_truncated_and_a_tiny_box_corrupt(self):
        box = _ftyp(b"heic", b"mif1")
        assert damage("heif", box + struct.pack(">I", 100) + b"mdat" + bytes(10))[0] == "truncated"
        assert damage("heif", box + struct.pack(">I", 4) + b"mdat")[0] == "corrupt"
        assert damage("heif", box + struct.pack(">I", 0) + b"mdat" + bytes(10)) == ("", "")


class TestMissingPlugin:
    @pytest.fixture
    def without_heif(self, monkeypatch):
        monkeypatch.setitem(sys.modules, "pillow_heif", None)  # import now raises ImportError
        decoder_missing.cache_clear()
        yield
        decoder_missing.cache_clear()

    def test_the_reason_names_the_extra_to_install(self, tmp_path, without_heif):
        path = _write(tmp_path / "phone.heic", encode(textured((64, 48)), "HEIF"))
        facts = probe(path)
        assert facts["fault"] == "no-decoder" and facts["format"] == "heif"
        assert "pip install 'labelprep[heif]'" in facts["fault_detail"]
        m = check(scan(tmp_path, jobs=1))
        assert m.loc[0, "issues"] == "no-decoder;no-label"


# "<_io.BytesIO object at 0x7f...>", "<class 'x'>", "<function f at 0x...>": what must never show
_REPR = re.compile(r"<[^<>]*( object at 0x| at 0x[0-9a-f]+|class ')")


class TestReasonsShowNoObjects:
    def test_the_message_pillow_gives_is_cleaned(self):
        exc = OSError("cannot identify image file <_io.BytesIO object at 0x7f26883bf060>")
        text = probe_module._one_line(exc)
        assert not _REPR.search(text) and "Pillow cannot identify" in text
        assert probe_module._one_line(TypeError("got <class 'int'> here")) == "got here"
        assert probe_module._one_line(ValueError()) == "the decoder failed without a message (ValueError)"

    def test_every_fault_path(self, tmp_path, monkeypatch):
        """One file per fault the probe can give; no reason holds an object representation."""
        png = encode(textured((64, 48)), "PNG")
        jpeg = encode(textured((64, 48)), "JPEG")
        cases = {
            "empty.png": b"",
            "text.png": b"hello, not an image at all",
            "cut.png": png[:-30],
            "crc.png": png[:40] + bytes([png[40] ^ 0xFF]) + png[41:],
            "cut.jpg": jpeg[: len(jpeg) // 2],
            "header.jpg": jpeg[:20],
            "nonsense.jpg": b"\xff\xd8\xff" + bytes(200),
            "badwebp.webp": b"RIFF\x10\x00\x00\x00WEBPVP8 " + bytes(8),
            "badgif.gif": b"GIF89a" + bytes(20),
            "badtiff.tif": b"II*\x00" + bytes(40),
            "badbmp.bmp": b"BM" + bytes(12) + struct.pack("<I", 40) + bytes(30),
            "badheif.heic": _ftyp(b"heic", b"mif1") + struct.pack(">I", 16) + b"meta" + bytes(8),
            "badavif.avif": _ftyp(b"avif", b"mif1") + struct.pack(">I", 16) + b"meta" + bytes(8),
            "badjxl.jxl": b"\xff\x0a" + bytes(30),
            "jp2.jp2": b"\x00\x00\x00\x0cjP  \r\n\x87\n" + bytes(30),
            "ico.ico": b"\x00\x00\x01\x00" + bytes(30),
        }
        for name, data in cases.items():
            _write(tmp_path / name, data)
        (tmp_path / "folder.png").mkdir()
        reasons = {name: probe(tmp_path / name)["fault_detail"] for name in [*cases, "folder.png", "gone.png"]}
        reasons["big.png"] = probe(_write(tmp_path / "big.png", png), max_pixels=10)["fault_detail"]
        # in a labelprep worker, as a scan probes: the only place the time limit is armed
        slow = functools.partial(probe, time_limit=1e-9)
        reasons["slow.png"] = next(map_ordered(slow, [tmp_path / "big.png"], jobs=1, isolated=True))["fault_detail"]
        monkeypatch.setitem(sys.modules, "pillow_heif", None)
        decoder_missing.cache_clear()
        try:
            reasons["nodecoder.heic"] = probe(_write(tmp_path / "n.heic", encode(textured(), "HEIF")))["fault_detail"]
        finally:
            decoder_missing.cache_clear()
        assert all(reasons.values()), {k: v for k, v in reasons.items() if not v}
        shown = {name: why for name, why in reasons.items() if _REPR.search(why)}
        assert not shown, shown
