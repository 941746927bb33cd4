"""Read an X Window Dump (xwd -root) into a BGR array: the XWD file format as X11's
XWDFile.h lays it out (big-endian header, then the colormap, then pixel rows)."""
import struct

import numpy as np


def read_xwd(data: bytes) -> np.ndarray:
    fields = struct.unpack(">25I", data[:100])
    header_size, _, _, _, width, height = fields[:6]
    byte_order, bits_per_pixel, bytes_per_line = fields[7], fields[11], fields[12]
    ncolors = fields[19]
    if bits_per_pixel not in (24, 32):
        raise ValueError(f"only 24- and 32-bit XWD is handled, got {bits_per_pixel}")
    start = header_size + ncolors * 12
    rows = np.frombuffer(data[start:start + height * bytes_per_line], np.uint8).reshape(height, bytes_per_line)
    n = bits_per_pixel // 8
    px = rows[:, : width * n].reshape(height, width, n)
    if byte_order == 1:  # MSBFirst: (X)RGB
        return np.ascontiguousarray(px[:, :, [n - 1, n - 2, n - 3]])
    return np.ascontiguousarray(px[:, :, :3])  # LSBFirst: BGR(X)
