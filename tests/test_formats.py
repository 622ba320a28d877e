"""Format detection and structural checks, against the published specifications."""

from __future__ import annotations

import io
import struct
import zlib

import numpy as np
import pytest
from PIL import Image

from labelprep.formats import (CORRUPT, PNG_SIGNATURE, TRUNCATED, damage, format_of_extension, gif_frames,
                               header_size, jpeg2000_levels,
                               png_chunk, sniff)


def _pillow_bytes(fmt: str, **kwargs) -> bytes:
    buf = io.BytesIO()
    Image.new("RGB", (40, 30), (10, 200, 30)).save(buf, fmt, **kwargs)
    return buf.getvalue()


def _bmp_header(dib_size: int) -> bytes:
    # Microsoft BITMAPFILEHEADER: "BM", file size, two reserved words, pixel offset; then the DIB
    # header, whose first field is its own size (40 = BITMAPINFOHEADER)
    return b"BM" + struct.pack("<IHHI", 0, 0, 0, 14 + dib_size) + struct.pack("<I", dib_size) + bytes(12)


class TestSniff:
    """sniff() names the format from the signatures the specifications publish."""

    @pytest.mark.parametrize("head, expected", [
        (b"\xff\xd8\xff\xe0\x00\x10JFIF\x00", "jpeg"),   # ITU-T T.81 B.1.1.3: SOI FFD8 then a marker
        (b"\xff\xd8\xff\xe1\x00\x10Exif\x00", "jpeg"),   # T.81 SOI, then an APP1 (Exif) marker
        (PNG_SIGNATURE + bytes(8), "png"),              # PNG specification 5.2: 89 50 4E 47 0D 0A 1A 0A
        (b"GIF87a" + bytes(7), "gif"),                  # GIF87a specification, header "GIF87a"
        (b"GIF89a" + bytes(7), "gif"),                  # GIF89a specification section 17, "GIF89a"
        (_bmp_header(40), "bmp"),                       # Microsoft BMP: "BM" + BITMAPINFOHEADER (40)
        (_bmp_header(124), "bmp"),                      # Microsoft BMP: "BM" + BITMAPV5HEADER (124)
        (b"II*\x00\x08\x00\x00\x00", "tiff"),           # TIFF 6.0 section 2: "II", 42 little-endian
        (b"MM\x00*\x00\x00\x00\x08", "tiff"),           # TIFF 6.0 section 2: "MM", 42 big-endian
        (b"RIFF\x24\x00\x00\x00WEBPVP8 ", "webp"),      # RFC 9649 2.5: "RIFF", size, "WEBP"
    ])
    def test_published_signatures(self, head, expected):
        """Each signature as written in its specification is recognised."""
        assert sniff(head) == expected

    @pytest.mark.parametrize("head", [
        b"",
        b"hello, world, this is text",
        bytes(32),
        b"RIFF\x24\x00\x00\x00WAVEfmt ",  # RIFF but a WAV file (RFC 2361), not WebP
        b"BM" + bytes(30),                # "BM" without a known DIB header size
        b"\xff\xd8",                      # SOI alone: T.81 needs another marker after it
        b"\x89PNG\r\n\x1a",               # PNG signature missing its last byte
    ])
    def test_non_images(self, head):
        """Text, zeros, other RIFF types and incomplete signatures match no format."""
        assert sniff(head) == ""

    @pytest.mark.parametrize("pillow_format, expected", [
        ("JPEG", "jpeg"), ("PNG", "png"), ("GIF", "gif"), ("BMP", "bmp"), ("TIFF", "tiff"),
        ("WEBP", "webp"), ("PPM", "pnm"),
    ])
    def test_files_written_by_pillow(self, pillow_format, expected):
        """Files an independent writer (Pillow) produced are detected as their format."""
        assert sniff(_pillow_bytes(pillow_format)[:32]) == expected


class TestFormatOfExtension:
    """format_of_extension() maps usual file names to formats, ignoring case."""

    @pytest.mark.parametrize("name, expected", [
        ("a/b/photo.JPG", "jpeg"), ("x.jpeg", "jpeg"), ("x.png", "png"), ("x.tif", "tiff"),
        ("x.webp", "webp"), ("notes.txt", ""), ("noext", ""), ("archive.tar.gz", ""),
    ])
    def test_names(self, name, expected):
        """Known extensions map to their format; unknown ones to the empty string."""
        assert format_of_extension(name) == expected


class TestGifFrames:
    """Frames counted from the GIF89a block structure agree with Pillow's n_frames (the reference)."""

    @pytest.mark.parametrize("frames", [1, 2, 5])
    @pytest.mark.parametrize("kwargs", [{}, {"comment": b"tide pool"}, {"loop": 0, "duration": 80}])
    def test_agrees_with_pillow(self, frames, kwargs):
        rng = np.random.default_rng(frames)
        images = [Image.fromarray(rng.integers(0, 255, (60, 80, 3), dtype=np.uint8)).quantize(32 + 40 * i)
                  for i in range(frames)]
        buf = io.BytesIO()
        images[0].save(buf, "GIF", save_all=True, append_images=images[1:], **kwargs)
        data = buf.getvalue()
        with Image.open(io.BytesIO(data)) as im:
            assert gif_frames(data) == im.n_frames == frames

    def test_gif87a_without_a_global_table(self):
        # GIF87a header, a screen descriptor without global table, one image with a 2-entry
        # local table (flag 0x80, size 0), an LZW stream of one sub-block, the trailer
        image = b"\x2c" + struct.pack("<HHHHB", 0, 0, 1, 1, 0x80) + bytes(6) + b"\x02\x02\x4c\x01\x00"
        data = b"GIF87a" + struct.pack("<HHBBB", 1, 1, 0, 0, 0) + image + b"\x3b"
        assert gif_frames(data) == 1
        with Image.open(io.BytesIO(data)) as im:
            assert im.n_frames == 1

    def test_cut_or_broken_blocks_give_none(self):
        buf = io.BytesIO()
        Image.new("P", (40, 30)).save(buf, "GIF")
        data = buf.getvalue()
        assert gif_frames(data[:-2]) is None       # the trailer and a terminator cut off
        assert gif_frames(data[:13]) is None
        assert gif_frames(data[:-1] + b"\x99") is None  # an unknown block where the trailer should be


@pytest.mark.skipif(not __import__("PIL.features").features.check("jpg_2000"), reason="no OpenJPEG")
class TestJpeg2000Levels:
    """OpenJPEG's num_resolutions is the decomposition levels plus one (ISO/IEC 15444-1 annex F:
    NL levels give NL + 1 resolutions); the COD segment (A.6.1) records NL."""

    @pytest.mark.parametrize("resolutions", [1, 2, 6])
    @pytest.mark.parametrize("container", [True, False])
    def test_levels_from_the_cod_segment(self, resolutions, container):
        buf = io.BytesIO()
        Image.new("RGB", (256, 256), (30, 60, 90)).save(buf, "JPEG2000", num_resolutions=resolutions,
                                                        no_jp2=not container)
        data = buf.getvalue()
        assert sniff(data[:32]) == "jpeg2000"
        assert jpeg2000_levels(data) == resolutions - 1

    def test_cut_or_foreign_headers_give_none(self):
        assert jpeg2000_levels(b"\x00\x00\x00\x0cjP  \r\n\x87\n") is None
        assert jpeg2000_levels(b"\xff\x4f\xff\x51\x00") is None
        assert jpeg2000_levels(b"\xff\x4f\xff\x90\x00\x0a" + bytes(8)) is None  # SOT before COD


class TestHeaderSize:
    """Sizes read from the header alone agree with Pillow's decoder (the reference library)."""

    @pytest.mark.parametrize("fmt, mode, kwargs", [
        ("JPEG", "RGB", {}), ("JPEG", "RGB", {"progressive": True}), ("PNG", "RGB", {}),
        ("GIF", "RGB", {}), ("BMP", "RGB", {}), ("WEBP", "RGB", {"quality": 80}),
        ("WEBP", "RGB", {"lossless": True}),
        ("WEBP", "RGBA", {"quality": 80}),  # lossy with alpha: RFC 9649 2.7, the extended (VP8X) header
    ])
    @pytest.mark.parametrize("size", [(40, 30), (1, 1), (613, 17)])
    def test_agrees_with_pillow(self, fmt, mode, kwargs, size):
        buf = io.BytesIO()
        Image.new(mode, size, (10, 200, 30, 100)[:len(mode)]).save(buf, fmt, **kwargs)
        data = buf.getvalue()
        with Image.open(io.BytesIO(data)) as im:
            expected = im.size
        if fmt == "WEBP":
            assert data[12:16] == {"RGBA": b"VP8X", "RGB": b"VP8L" if "lossless" in kwargs else b"VP8 "}[mode]
        assert header_size(fmt.lower(), data) == expected

    def test_jpeg_size_behind_an_exif_thumbnail(self):
        """The frame header (T.81 B.2.2) of the image, not that of a thumbnail inside APP1."""
        thumb = _pillow_bytes("JPEG")  # 40 x 30
        buf = io.BytesIO()
        Image.new("RGB", (300, 200)).save(buf, "JPEG")
        main = buf.getvalue()
        app = b"\xff\xe1" + struct.pack(">H", len(thumb) + 2) + thumb
        assert header_size("jpeg", main[:2] + app + main[2:]) == (300, 200)

    def test_cut_or_unknown_headers_give_none(self):
        assert header_size("png", PNG_SIGNATURE + b"\x00\x00") is None
        assert header_size("jpeg", b"\xff\xd8\xff\xe0\x00") is None
        assert header_size("tiff", b"II*\x00" + bytes(20)) is None
        assert header_size("webp", b"RIFF\x00\x00\x00\x00WEBPVP8?") is None


class TestDamageJpeg:
    """JPEG structure follows ITU-T T.81 annex B: segments, entropy-coded data, EOI."""

    @pytest.mark.parametrize("kwargs", [{}, {"progressive": True}, {"restart_marker_blocks": 1},
                                        {"quality": 30, "subsampling": 2}])
    def test_whole_files_pass(self, kwargs):
        """Baseline, progressive (many SOS) and restart-marker (RSTn, B.2.1) files are whole."""
        assert damage("jpeg", _pillow_bytes("JPEG", **kwargs)) == ("", "")

    def test_fill_bytes_before_eoi(self):
        """T.81 B.1.1.2: any number of FF fill bytes may precede a marker."""
        data = _pillow_bytes("JPEG")
        assert damage("jpeg", data[:-2] + b"\xff\xff\xff\xd9") == ("", "")

    def test_trailing_bytes_after_eoi(self):
        """Bytes after EOI (some cameras append data) do not make the image incomplete."""
        assert damage("jpeg", _pillow_bytes("JPEG") + b"trailer") == ("", "")

    def test_embedded_thumbnail_end_marker_does_not_count(self):
        """An EOI inside an application segment (a thumbnail) is skipped with its segment."""
        thumb = _pillow_bytes("JPEG")
        main = _pillow_bytes("JPEG", quality=95)
        app = b"\xff\xe2" + struct.pack(">H", len(thumb) + 2) + thumb   # APPn: length counts itself
        whole = main[:2] + app + main[2:]
        cut = whole[: len(whole) - 40]  # cut inside the main image's scan
        assert damage("jpeg", whole) == ("", "")
        assert damage("jpeg", cut)[0] == TRUNCATED

    def test_progressive_cut_between_scans(self):
        """A progressive file cut right after one of its scans (at a later SOS marker, T.81
        annex G) ends without EOI: truncated, although every segment before the cut is whole."""
        data = _pillow_bytes("JPEG", progressive=True)
        second_scan = data.index(b"\xff\xda", data.index(b"\xff\xda") + 2)
        assert damage("jpeg", data[:second_scan])[0] == TRUNCATED

    def test_missing_end_marker(self):
        """A file without its final EOI is truncated."""
        kind, why = damage("jpeg", _pillow_bytes("JPEG")[:-2])
        assert kind == TRUNCATED and "FFD9" in why

    def test_segment_running_past_end(self):
        """A marker segment whose length goes past the file's end is truncated."""
        kind, why = damage("jpeg", b"\xff\xd8\xff\xe0\x40\x00JFIF")
        assert kind == TRUNCATED and "FFE0" in why

    def test_length_below_two_is_corrupt(self):
        """T.81 B.1.1.4: a segment length counts its own two bytes, so it is at least 2."""
        assert damage("jpeg", b"\xff\xd8\xff\xe0\x00\x01" + bytes(20))[0] == CORRUPT


class TestDamagePng:
    """PNG structure follows the PNG specification 5.3 (chunks, CRC) and 5.6 (IHDR first, IEND last)."""

    def test_crc_of_iend_matches_the_specification(self):
        """Every PNG ends with IEND's CRC AE 42 60 82 (PNG specification 5.3, CRC over type and data)."""
        assert png_chunk(b"IEND", b"")[-4:] == bytes.fromhex("ae426082")
        assert _pillow_bytes("PNG").endswith(bytes.fromhex("0000000049454e44ae426082"))

    def test_whole_file_passes(self):
        """A PNG written by Pillow is whole."""
        assert damage("png", _pillow_bytes("PNG")) == ("", "")

    def test_corrupted_crc(self):
        """A byte flipped inside IDAT breaks that chunk's CRC-32."""
        data = bytearray(_pillow_bytes("PNG"))
        data[data.find(b"IDAT") + 6] ^= 0x01
        kind, why = damage("png", bytes(data))
        assert kind == CORRUPT and "IDAT" in why

    def test_first_chunk_must_be_ihdr(self):
        """PNG specification 5.6: IHDR is the first chunk."""
        data = PNG_SIGNATURE + png_chunk(b"tEXt", b"a\x00b") + png_chunk(b"IEND", b"")
        assert damage("png", data)[0] == CORRUPT

    def test_length_over_the_limit(self):
        """PNG specification 5.3: a chunk length is at most 2^31 - 1."""
        data = PNG_SIGNATURE + struct.pack(">I", 2**31) + b"IHDR" + bytes(8)
        assert damage("png", data)[0] == CORRUPT

    def test_no_iend(self):
        """A file that stops at a chunk boundary before IEND is truncated."""
        data = _pillow_bytes("PNG")
        assert damage("png", data[:-12]) == (TRUNCATED, "no IEND chunk: the data stops early")

    def test_crc_agrees_with_zlib_reference(self):
        """png_chunk's CRC is CRC-32 over type and data, as zlib computes it (ISO 3309)."""
        chunk = png_chunk(b"tEXt", b"key\x00value")
        assert struct.unpack(">I", chunk[-4:])[0] == zlib.crc32(b"tEXtkey\x00value")


class TestDamageOthers:
    """GIF and WebP end checks."""

    def test_gif_trailer(self):
        """GIF89a section 27: the stream ends with the trailer 0x3B."""
        data = _pillow_bytes("GIF")
        assert damage("gif", data) == ("", "")
        assert damage("gif", data[:-1])[0] == TRUNCATED

    def test_webp_riff_size(self):
        """RFC 9649 2.5: the RIFF size field counts the bytes after the first 8."""
        data = _pillow_bytes("WEBP")
        assert damage("webp", data) == ("", "")
        assert damage("webp", data[:-10])[0] == TRUNCATED
