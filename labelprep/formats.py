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
    ("jpeg2000", 0, b"\xff\x4f\xff\x51"),         # ISO/IEC 15444-1 A.4.1, A.5.1: a bare codestream, SOC then SIZ
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
    "heif": (".heic", ".heif", ".hif"),
    "jxl": (".jxl",),
}
_FORMAT_OF_EXTENSION = {ext: fmt for fmt, exts in EXTENSIONS.items() for ext in exts}

HEAD_BYTES = 64  # every signature above, and an ISO BMFF file-type box with several compatible brands

# ISO/IEC 23008-12 (HEIF) annex B and ISO/IEC 23000-22 brands of still images and sequences coded
# with HEVC, and the generic image brands; AVIF (AV1 Image File Format 1.1, 9.3) has its own two
_HEIF_BRANDS = frozenset({b"heic", b"heix", b"heim", b"heis", b"hevc", b"hevx", b"hevm", b"hevs"})
_GENERIC_BRANDS = frozenset({b"mif1", b"msf1", b"mif2", b"miaf"})
_AVIF_BRANDS = frozenset({b"avif", b"avis"})
# ISO/IEC 18181-2 (JPEG XL file format) 3: the signature box; 18181-1 9.1: a bare codestream's FF 0A
_JXL_CONTAINER = b"\x00\x00\x00\x0cJXL \r\n\x87\n"


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
    if head[4:8] == b"ftyp":
        return _iso_bmff_image(head)
    if head.startswith(_JXL_CONTAINER) or head[:2] == b"\xff\x0a":
        return "jxl"
    return ""


def _iso_bmff_image(head: bytes) -> str:
    """``"avif"``, ``"heif"`` or ``""`` from an ISO/IEC 14496-12 4.3 file-type box: size, "ftyp",
    major brand, minor version, then compatible brands to the box's end.

    A generic major brand (``mif1``: any HEIF image) is resolved by the compatible brands, as
    AV1 and HEVC images both carry it; a box naming no image brand at all (an MP4 video) is no image.
    """
    size = struct.unpack(">I", head[:4])[0]
    brands = {head[8:12]} | {head[i:i + 4] for i in range(16, min(size, len(head)) - 3, 4)}
    if head[8:12] in _AVIF_BRANDS or (head[8:12] in _GENERIC_BRANDS and brands & _AVIF_BRANDS):
        return "avif"
    if brands & (_HEIF_BRANDS | _GENERIC_BRANDS):
        return "heif"
    return ""


def format_of_extension(name: str) -> str:
    """The format an extension usually names (``"photo.JPG"`` -> ``"jpeg"``); ``""`` when none."""
    dot = name.rfind(".")
    return _FORMAT_OF_EXTENSION.get(name[dot:].lower(), "") if dot >= 0 else ""


def header_size(fmt: str, data: bytes):
    """``(width, height)`` as the file's header declares them, without a decoder; None when the
    format is not one read here or the header is cut short or gives no size.

    The pixel budget is judged on this before Pillow opens the file, so a file claiming a huge
    size gets its size in the manifest whatever Pillow's own limit is.

    Examples
    --------
    >>> header_size("png", PNG_SIGNATURE + png_chunk(b"IHDR", struct.pack(">IIBBBBB", 640, 480, 8, 2, 0, 0, 0)))
    (640, 480)
    """
    try:
        if fmt == "png":
            # PNG specification 11.2.2: IHDR, the first chunk, starts with width and height
            if data[12:16] == b"IHDR":
                return struct.unpack(">II", data[16:24])
        elif fmt == "gif":
            # GIF89a section 18: logical screen width and height after the 6-byte header
            return struct.unpack("<HH", data[6:10])
        elif fmt == "bmp":
            # Microsoft BITMAPCOREHEADER (12 bytes: 16-bit sizes) or BITMAPINFOHEADER and later
            # (signed 32-bit; a negative height means rows stored top-down)
            if struct.unpack("<I", data[14:18])[0] == 12:
                return struct.unpack("<HH", data[18:22])
            width, height = struct.unpack("<ii", data[18:26])
            return abs(width), abs(height)
        elif fmt == "webp":
            return _webp_size(data)
        elif fmt == "jpeg":
            return _jpeg_size(data)
    except struct.error:  # a header shorter than its fields
        return None
    return None


def _webp_size(data: bytes):
    # RFC 9649: the first chunk after "RIFF" size "WEBP" is VP8, VP8L or VP8X
    chunk = data[12:16]
    if chunk == b"VP8X":       # 2.7: canvas width and height minus one, 24 bits each, at 24
        return (int.from_bytes(data[24:27], "little") + 1, int.from_bytes(data[27:30], "little") + 1)
    if chunk == b"VP8L" and data[20:21] == b"\x2f":  # 3.2: signature, then 14-bit sizes minus one
        bits = int.from_bytes(data[21:25], "little")
        return ((bits & 0x3FFF) + 1, ((bits >> 14) & 0x3FFF) + 1)
    if chunk == b"VP8 " and data[23:26] == b"\x9d\x01\x2a":  # RFC 6386 9.1: start code, 14-bit sizes
        width, height = struct.unpack("<HH", data[26:30])
        return width & 0x3FFF, height & 0x3FFF
    return None


# T.81 table B.1: SOF0-SOF15 carry the frame size, except C4 (DHT), C8 (reserved) and CC (DAC)
_JPEG_SOF = frozenset(range(0xC0, 0xD0)) - {0xC4, 0xC8, 0xCC}


def _jpeg_size(data: bytes):
    # T.81 B.2.2: the frame header is precision (1 byte), then number of lines and samples per
    # line (2 bytes each); a height of 0 is defined later by a DNL marker: not known here
    try:
        for code, pos, _ in _jpeg_segments(data):
            if code in _JPEG_SOF:
                height, width = struct.unpack(">HH", data[pos + 5:pos + 9])
                return (width, height) if height else None
    except _Damage:
        pass
    return None


def gif_frames(data: bytes):
    """The number of images in a GIF (its frames), by walking its blocks; None when the blocks
    run past the end or break the format, so that a decoder may judge the file.

    GIF89a specification: header and logical screen descriptor (sections 17-18), a global colour
    table of 3 * 2**(N+1) bytes when its flag is set (19), then blocks up to the trailer 0x3B
    (27): extensions (0x21, a label, then data sub-blocks) and images (0x2C: a 9-byte descriptor,
    a local colour table when flagged (20-21), the LZW minimum code size, then sub-blocks (22)).
    Sub-blocks are a length byte and that many bytes, ended by a zero length (15). Pillow counts
    frames by reading every sub-block through its file object, about ten times slower.
    """
    end = len(data)
    if end < 13:
        return None
    flags = data[10]
    pos = 13 + (3 << ((flags & 7) + 1) if flags & 0x80 else 0)
    frames = 0
    while pos < end:
        block = data[pos]
        if block == 0x3B:
            return frames
        if block == 0x21:
            pos += 2
        elif block == 0x2C:
            if pos + 10 > end:
                return None
            flags = data[pos + 9]
            pos += 10 + (3 << ((flags & 7) + 1) if flags & 0x80 else 0) + 1  # descriptor, table, code size
            frames += 1
        else:
            return None
        while pos < end and data[pos]:  # data sub-blocks up to the terminator
            pos += data[pos] + 1
        pos += 1
    return None


def jpeg2000_levels(data: bytes):
    """The number of wavelet decomposition levels of a JPEG 2000 image: how many times a decoder
    can halve its resolution. None when the main header gives none (or is cut short).

    ISO/IEC 15444-1: a JP2 file is a sequence of boxes (annex I.4: 4-byte length, 4-byte type;
    length 1 means an 8-byte length follows, 0 means to the end), the codestream in the ``jp2c``
    box; a bare codestream starts with SOC. In the main header (up to the first SOT), the COD
    segment (A.6.1) gives the levels as the first byte of SPcod, after Lcod (2 bytes), Scod (1)
    and SGcod (4).
    """
    pos = 0 if data[:2] == b"\xff\x4f" else _jp2_codestream(data)
    if pos is None:
        return None
    pos += 2  # SOC has no length
    while pos + 4 <= len(data) and data[pos] == 0xFF:
        marker, length = data[pos + 1], (data[pos + 2] << 8) | data[pos + 3]
        if marker == 0x52:  # COD
            return data[pos + 9] if pos + 10 <= len(data) else None
        if marker == 0x90 or length < 2:  # SOT: the main header ended without COD
            return None
        pos += 2 + length
    return None


def _jp2_codestream(data: bytes):
    pos = 0
    while pos + 8 <= len(data):
        size, kind, head = int.from_bytes(data[pos:pos + 4], "big"), data[pos + 4:pos + 8], 8
        if size == 1:
            size, head = int.from_bytes(data[pos + 8:pos + 16], "big"), 16
        elif size == 0:
            size = len(data) - pos
        if kind == b"jp2c":
            return pos + head
        if size < head:
            return None
        pos += size
    return None


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
    if fmt in ("heif", "avif"):
        return _iso_bmff_damage(data)
    return "", ""


def _iso_bmff_damage(data: bytes) -> tuple[str, str]:
    """Walk the top-level boxes of an ISO BMFF file (ISO/IEC 14496-12 4.2: a 32-bit size and a
    type; size 1 means a 64-bit size follows, 0 that the box runs to the end of the file): a box
    that reaches past the last byte means the file stops early."""
    pos = 0
    while pos < len(data):
        if pos + 8 > len(data):
            return TRUNCATED, f"a box header at byte {pos} is cut short"
        size = struct.unpack(">I", data[pos:pos + 4])[0]
        if size == 1:
            if pos + 16 > len(data):
                return TRUNCATED, f"a box header at byte {pos} is cut short"
            size = struct.unpack(">Q", data[pos + 8:pos + 16])[0]
        elif size == 0:
            return "", ""
        if size < 8:
            return CORRUPT, f"the box at byte {pos} declares {size} bytes, less than its header"
        if pos + size > len(data):
            kind = data[pos + 4:pos + 8].decode("latin-1")
            return TRUNCATED, f"the {kind!r} box at byte {pos} declares {size} bytes, {len(data) - pos} are there"
        pos += size
    return "", ""


# ITU-T T.81 B.1.1.5: inside entropy-coded data FF is followed by 00 (stuffing) or RSTn
# (D0-D7); FF then any other byte is the next marker. Extra FF bytes are fill (B.1.1.2).
_JPEG_NEXT_MARKER = re.compile(rb"\xff[^\x00\xd0-\xd7\xff]")
_JPEG_STANDALONE = frozenset({0x01, 0xD8, *range(0xD0, 0xD8)})  # T.81 B.1.1.3: TEM, SOI, RSTn have no length
_SOS, _EOI = 0xDA, 0xD9


class _Damage(Exception):
    def __init__(self, kind: str, why: str):
        super().__init__(why)
        self.kind, self.why = kind, why


def _jpeg_segments(data: bytes):
    """``(code, start, stop)`` of each marker up to the first SOS or EOI, the last one included.

    T.81 B.2: SOI, then marker segments (FFxx and a 2-byte length that counts itself). Walking
    segment by segment skips embedded thumbnails (inside APP1), whose own markers must not count.
    Stray bytes between segments are skipped to the next marker, as libjpeg does, since decoders
    still read such files. Raises :class:`_Damage` for a segment cut off or with a bad length.
    """
    pos, end = 2, len(data)
    while True:
        found = _JPEG_NEXT_MARKER.search(data, pos)
        if found is None:
            return
        pos = found.start()
        code = data[pos + 1]
        if code in _JPEG_STANDALONE:
            pos += 2
            continue
        if code == _EOI:
            yield code, pos, pos + 2
            return
        if pos + 4 > end:
            raise _Damage(TRUNCATED, f"marker FF{code:02X} at byte {pos} is cut off")
        length = (data[pos + 2] << 8) | data[pos + 3]
        if length < 2:
            raise _Damage(CORRUPT, f"marker segment FF{code:02X} at byte {pos} declares length {length} (T.81 needs >= 2)")
        stop = pos + 2 + length
        if stop > end:
            raise _Damage(TRUNCATED, f"marker segment FF{code:02X} at byte {pos} runs past the end of the file")
        yield code, pos, stop
        if code == _SOS:
            return
        pos = stop


def _jpeg_damage(data: bytes) -> tuple[str, str]:
    # After the first SOS, entropy-coded data (and in a progressive file more segments and
    # scans) runs to EOI (FFD9). FF D9 cannot occur inside entropy-coded data (B.1.1.5), so one
    # search from the end finds the end marker; walking every marker of a multi-megabyte scan
    # instead cost as much as a twentieth of the reduced decode.
    try:
        for code, _, stop in _jpeg_segments(data):
            if code == _EOI:
                return "", ""
            if code == _SOS:
                if data.rfind(b"\xff\xd9", stop) < 0:
                    return TRUNCATED, "no end-of-image marker (FFD9) after the scan data: the data stops early"
                return "", ""
    except _Damage as damaged:
        return damaged.kind, damaged.why
    return TRUNCATED, "no end-of-image marker (FFD9): the data stops early"


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
