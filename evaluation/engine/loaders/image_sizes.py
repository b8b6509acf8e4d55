"""Width and height of an image from the first bytes of its file (no image library).

PNG: the IHDR chunk, which the PNG specification (W3C, 2003) puts first, width then
height as 4-byte big-endian integers at bytes 16-24. JPEG: the first start-of-frame
marker (SOF0-SOF15 except DHT 0xC4, JPG 0xC8, DAC 0xCC), height then width as 2-byte
big-endian integers after the precision byte (ITU-T T.81, B.2.2). BMP: the
BITMAPINFOHEADER's signed 32-bit width and height at bytes 18-26 (a negative height
means top-down rows). GIF: the logical screen's 2-byte little-endian width and height.
"""

import struct

IMAGE_EXTENSIONS = (".png", ".jpg", ".jpeg", ".bmp", ".gif")
_SOF = set(range(0xC0, 0xD0)) - {0xC4, 0xC8, 0xCC}


def size_from_header(data):
    """``(width, height)`` from an image file's first bytes, or None if unreadable."""
    if data.startswith(b"\x89PNG\r\n\x1a\n") and data[12:16] == b"IHDR" and len(data) >= 24:
        return struct.unpack(">II", data[16:24])
    if data.startswith(b"\xff\xd8"):
        return _jpeg(data)
    if data.startswith(b"BM") and len(data) >= 26:
        width, height = struct.unpack("<ii", data[18:26])
        return width, abs(height)
    if data[:6] in (b"GIF87a", b"GIF89a") and len(data) >= 10:
        return struct.unpack("<HH", data[6:10])
    return None


def _jpeg(data):
    i = 2
    while i + 4 <= len(data):
        if data[i] != 0xFF:
            return None
        marker = data[i + 1]
        if marker == 0xFF:  # fill byte
            i += 1
            continue
        if marker in (0x01, *range(0xD0, 0xD8)):  # markers without a length
            i += 2
            continue
        (length,) = struct.unpack(">H", data[i + 2 : i + 4])
        if marker in _SOF:
            if i + 9 > len(data):
                return None
            height, width = struct.unpack(">HH", data[i + 5 : i + 9])
            return width, height
        i += 2 + length
    return None
