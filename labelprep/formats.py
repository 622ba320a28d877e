"""What the file-format specifications say about a file's bytes: signatures and end markers.

Detection looks at content, never at the name, so a PNG saved as ``.jpg`` is still a PNG. The
structural checks are cheap passes over bytes already in memory; they catch files that a decoder
may accept although the file is incomplete.
"""

from __future__ import annotations

import struct
import zlib

# (format, offset, signature); sources named per line
_SIGNATURES = [
    ("jpeg", 0, b"\xff\xd8\xff"),                 # ITU-T T.81 B.1.1.3: SOI marker FFD8, then a marker
    ("png", 0, b"\x89PNG\r\n\x1a\n"),             # PNG specification (ISO/IEC 15948) 5.2 signature
    ("gif", 0, b"GIF87a"),                        # GIF87a specification, header block
    ("gif", 0, b"GIF89a"),                        # GIF89a specification section 17, header block
    ("tiff", 0, b"II*\x00"),                      # TIFF 6.0 section 2: little-endian header, 42
    ("tiff", 0, b"MM\x00*"),                      # TIFF 6.0 section 2: big-endian header, 42
    ("jpeg2000", 0, b"\x00\x00\x00\x0cjP  \r\n\x87\n"),  # ISO/IEC 15444-1 annex I.5.1 signature box
    ("ico", 0, b"\x00\x00\x01\x00"),              # ICONDIR: reserved 0, type 1 (Microsoft ICO)
]

# names a format is usually saved under; the first is the canonical one
EXTENSIONS = {
    "jpeg": (".jpg", ".jpeg", ".jpe", ".jfif"),
    "png": (".png",),
    "gif": (".gif",),
    "bmp": (".bmp", ".dib"),
    "tiff": (".tif", ".tiff"),
    "webp": (".webp",),
    "pnm": (".ppm", ".pgm", ".pbm", ".pnm"),
    "jpeg2000": (".jp2", ".j2k", ".jpx"),
    "ico": (".ico",),
    "avif": (".avif",),
    "heif": (".heic", ".heif"),
}
IMAGE_EXTENSIONS = frozenset(e for exts in EXTENSIONS.values() for e in exts)

HEAD_BYTES = 32  # enough for every signature above


def sniff(head: bytes) -> str:
    """The image format named by a file's first bytes, or ``""`` when none matches.

    Examples
    --------
    >>> sniff(b"\\x89PNG\\r\\n\\x1a\\n" + bytes(8))
    'png'
    >>> sniff(b"hello")
    ''
    """
    for fmt, offset, sig in _SIGNATURES:
        if head[offset:offset + len(sig)] == sig:
            return fmt
    # RFC 9649 (WebP) 2.5: "RIFF", 4-byte size, "WEBP"
    if head[:4] == b"RIFF" and head[8:12] == b"WEBP":
        return "webp"
    # Microsoft BITMAPFILEHEADER: "BM", then a DIB header whose size is one of the known ones
    if head[:2] == b"BM" and len(head) >= 18:
        dib_size = struct.unpack("<I", head[14:18])[0]
        if dib_size in (12, 40, 52, 56, 64, 108, 124):
            return "bmp"
    # Netpbm: "P1".."P6" then whitespace (netpbm format documentation)
    if len(head) >= 3 and head[0:1] == b"P" and head[1:2] in b"123456" and head[2:3] in b" \t\r\n":
        return "pnm"
    # ISO/IEC 14496-12 file-type box: size, "ftyp", major brand (ISO BMFF containers)
    if head[4:8] == b"ftyp":
        brand = head[8:12]
        if brand in (b"avif", b"avis"):
            return "avif"
        if brand in (b"heic", b"heix", b"hevc", b"heim", b"heis", b"mif1", b"msf1"):
            return "heif"
    return ""


def format_of_extension(name: str) -> str:
    """The format an extension usually names (``"photo.JPG"`` -> ``"jpeg"``); ``""`` when none."""
    dot = name.rfind(".")
    ext = name[dot:].lower() if dot >= 0 else ""
    for fmt, exts in EXTENSIONS.items():
        if ext in exts:
            return fmt
    return ""


def incomplete(fmt: str, data: bytes) -> str:
    """Why ``data`` of format ``fmt`` is structurally incomplete, or ``""`` when it looks whole.

    Decoders are lenient about a file's tail: a JPEG cut just before its end marker, or a PNG with
    its last chunk missing, can decode without complaint. These checks read the specs' rules.
    """
    if fmt == "jpeg":
        return _jpeg_incomplete(data)
    if fmt == "png":
        return _png_incomplete(data)
    if fmt == "gif":
        # GIF89a section 27: the trailer 0x3B ends the data stream
        return "" if data.rstrip(b"\x00").endswith(b"\x3b") else "no GIF trailer (0x3B) at the end"
    if fmt == "webp":
        # RFC 9649 2.5: the RIFF size counts the bytes after the first 8
        if len(data) < 12:
            return "shorter than a RIFF header"
        declared = struct.unpack("<I", data[4:8])[0] + 8
        return "" if len(data) >= declared else f"RIFF header declares {declared} bytes, file has {len(data)}"
    return ""


def _jpeg_incomplete(data: bytes) -> str:
    # ITU-T T.81 B.2.1: the image ends with EOI (FFD9) after its last scan (SOS, FFDA). Byte
    # stuffing (B.1.1.5) keeps FFD9 out of entropy-coded data, so an EOI after the last SOS is the
    # real end; an EOI inside an earlier embedded thumbnail does not count.
    last_sos = data.rfind(b"\xff\xda")
    if last_sos < 0:
        return "no start-of-scan marker (FFDA)"
    if data.find(b"\xff\xd9", last_sos + 2) < 0:
        return "no end-of-image marker (FFD9) after the last scan"
    return ""


def _png_incomplete(data: bytes) -> str:
    # PNG specification 5.3: each chunk is length, type, data, CRC-32 over type and data;
    # 5.6: IEND is the last chunk
    pos = 8
    end = len(data)
    while pos + 12 <= end:
        length = struct.unpack(">I", data[pos:pos + 4])[0]
        ctype = data[pos + 4:pos + 8]
        stop = pos + 8 + length
        if stop + 4 > end:
            return f"chunk {ctype.decode('latin-1')!r} runs past the end of the file"
        crc = struct.unpack(">I", data[stop:stop + 4])[0]
        if zlib.crc32(data[pos + 4:stop]) != crc:
            return f"CRC mismatch in chunk {ctype.decode('latin-1')!r}"
        if ctype == b"IEND":
            return ""
        pos = stop + 4
    return "no IEND chunk"
