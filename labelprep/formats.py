"""What the file-format specifications say about a file's bytes: signatures and structure.

Detection looks at content, never at the name, so a PNG saved as ``.jpg`` is still a PNG. The
structural checks (:func:`damage`) are cheap passes over bytes already in memory; they catch files
that a decoder may accept although the file is incomplete or fails its own checksums.
"""

from __future__ import annotations

import re
import struct
import zlib

PNG_SIGNATURE = b"\x89PNG\r\n\x1a\n"  # PNG specification (ISO/IEC 15948) 5.2

# (format, offset, signature); sources named per line
_SIGNATURES = [
    ("jpeg", 0, b"\xff\xd8\xff"),                 # ITU-T T.81 B.1.1.3: SOI marker FFD8, then a marker
    ("png", 0, PNG_SIGNATURE),                    # PNG specification (ISO/IEC 15948) 5.2 signature
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
_FORMAT_OF_EXTENSION = {ext: fmt for fmt, exts in EXTENSIONS.items() for ext in exts}

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
    return _FORMAT_OF_EXTENSION.get(name[dot:].lower(), "") if dot >= 0 else ""


TRUNCATED = "truncated"
CORRUPT = "corrupt"


def damage(fmt: str, data: bytes) -> tuple[str, str]:
    """What the format's rules say is wrong with ``data``: ``(kind, why)``, ``("", "")`` when whole.

    ``kind`` is :data:`TRUNCATED` (the bytes are a valid start that stops early) or
    :data:`CORRUPT` (the bytes break an integrity rule, such as a chunk checksum). Decoders are
    lenient about both: a JPEG cut just before its end marker, or a PNG whose pixel data fails its
    checksum, can decode without complaint. Formats without a check here return ``("", "")``.

    Examples
    --------
    >>> damage("gif", b"GIF89a")
    ('truncated', 'no GIF trailer (0x3B) at the end')
    """
    if fmt == "jpeg":
        return _jpeg_damage(data)
    if fmt == "png":
        return _png_damage(data)
    if fmt == "gif":
        # GIF89a section 27: the trailer 0x3B ends the data stream (some writers pad with zeros)
        if data.rstrip(b"\x00").endswith(b"\x3b"):
            return "", ""
        return TRUNCATED, "no GIF trailer (0x3B) at the end"
    if fmt == "webp":
        # RFC 9649 2.5: the RIFF size counts the bytes after the first 8
        if len(data) < 12:
            return TRUNCATED, "shorter than a RIFF header"
        declared = struct.unpack("<I", data[4:8])[0] + 8
        if len(data) < declared:
            return TRUNCATED, f"RIFF header declares {declared} bytes, file has {len(data)}"
    return "", ""


# ITU-T T.81 B.1.1.5: inside entropy-coded data FF is followed by 00 (stuffing) or RSTn
# (D0-D7); FF then any other byte is the next marker. Extra FF bytes are fill (B.1.1.2).
_JPEG_NEXT_MARKER = re.compile(rb"\xff[^\x00\xd0-\xd7\xff]")
_JPEG_STANDALONE = frozenset({0x01, 0xD8, *range(0xD0, 0xD8)})  # T.81 B.1.1.3: TEM, SOI, RSTn have no length
_SOS, _EOI = 0xDA, 0xD9


def _jpeg_damage(data: bytes) -> tuple[str, str]:
    # T.81 B.2: SOI, then marker segments (FFxx and a 2-byte length that counts itself) up to
    # the first SOS; entropy-coded data (and, in a progressive file, more segments and scans)
    # follows, and EOI (FFD9) ends the image. The header is walked segment by segment, which
    # skips embedded thumbnails (inside APP1) whose own EOI must not count. Stray bytes between
    # segments are skipped to the next marker, as libjpeg does, since decoders still read such
    # files. After the first SOS one search from the end suffices: FF D9 cannot occur inside
    # entropy-coded data (B.1.1.5), so any FFD9 there is the end marker; walking every marker of
    # a multi-megabyte scan instead cost as much as a twentieth of the reduced decode.
    pos, end = 2, len(data)
    while True:
        found = _JPEG_NEXT_MARKER.search(data, pos)
        if found is None:
            return TRUNCATED, "no end-of-image marker (FFD9): the data stops early"
        pos = found.start()
        code = data[pos + 1]
        if code == _EOI:
            return "", ""
        if code in _JPEG_STANDALONE:
            pos += 2
            continue
        if pos + 4 > end:
            return TRUNCATED, f"marker FF{code:02X} at byte {pos} is cut off"
        length = (data[pos + 2] << 8) | data[pos + 3]
        if length < 2:
            return CORRUPT, f"marker segment FF{code:02X} at byte {pos} declares length {length} (T.81 needs >= 2)"
        stop = pos + 2 + length
        if stop > end:
            return TRUNCATED, f"marker segment FF{code:02X} at byte {pos} runs past the end of the file"
        if code == _SOS:
            if data.rfind(b"\xff\xd9", stop) < 0:
                return TRUNCATED, "no end-of-image marker (FFD9) after the scan data: the data stops early"
            return "", ""
        pos = stop


def png_chunk(ctype: bytes, payload: bytes) -> bytes:
    """One PNG chunk laid out as PNG specification 5.3 says: length, type, data, CRC-32.

    Used to build test and demo files by hand, e.g. a header that claims a huge size.

    Examples
    --------
    >>> png_chunk(b"IEND", b"").hex()
    '0000000049454e44ae426082'
    """
    return struct.pack(">I", len(payload)) + ctype + payload + struct.pack(">I", zlib.crc32(ctype + payload))


def _png_damage(data: bytes) -> tuple[str, str]:
    # PNG specification (ISO/IEC 15948) 5.3: a chunk is a 4-byte length (at most 2^31-1), a
    # 4-byte type, the data and a CRC-32 over type and data; 5.6: IHDR comes first, IEND last.
    pos, end = 8, len(data)
    while pos + 12 <= end:
        length = struct.unpack(">I", data[pos:pos + 4])[0]
        ctype = data[pos + 4:pos + 8]
        name = ctype.decode("latin-1")
        if length > 0x7FFFFFFF:
            return CORRUPT, f"chunk {name!r} at byte {pos} declares length {length}, over 2^31-1"
        if pos == 8 and ctype != b"IHDR":
            return CORRUPT, f"first chunk is {name!r}, the PNG specification requires IHDR"
        stop = pos + 8 + length
        if stop + 4 > end:
            return TRUNCATED, f"chunk {name!r} at byte {pos} runs past the end of the file"
        crc = struct.unpack(">I", data[stop:stop + 4])[0]
        if zlib.crc32(data[pos + 4:stop]) != crc:
            return CORRUPT, f"CRC mismatch in chunk {name!r} at byte {pos}"
        if ctype == b"IEND":
            return "", ""
        pos = stop + 4
    return TRUNCATED, "no IEND chunk: the data stops early"
