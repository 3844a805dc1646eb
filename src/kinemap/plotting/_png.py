"""PNG files of drawn figures: rows unfiltered, zlib at its fastest level.

matplotlib saves through PIL, which tries the five PNG row filters on every row and keeps
the one with the smallest sum of bytes (libpng's heuristic).  On figures of colour-mapped
maps (noisy pixels beside flat white margins and frames) that choice takes most of the
time of a save and compresses worse than no filter at all: a 720 x 624 map took 25-33 ms
and 0.3-0.7 MB with PIL at zlib level 1 (RGBA), 6-9 ms and 0.2-0.4 MB unfiltered, with
zlib level 1, as RGB (the figure is opaque; compression releases the GIL, so it overlaps
the writer's other work).  The pixels are matplotlib's own (the Agg buffer, drawn by
``savefig`` with its settings); only the file's encoding differs (PNG is lossless).
Figures with any transparent pixel keep their alpha channel.  Like matplotlib's PNGs, the
file carries the resolution (pHYs) and a Software text entry.
"""
from __future__ import annotations

import io
import struct
import zlib

import matplotlib
import numpy as np

__all__ = ["write_png", "png_bytes"]


def _chunk(kind: bytes, data: bytes) -> bytes:
    return (struct.pack(">I", len(data)) + kind + data
            + struct.pack(">I", zlib.crc32(kind + data) & 0xFFFFFFFF))


def png_bytes(rgba, dpi: float) -> bytes:
    """A PNG file of the (height, width, 4) uint8 array ``rgba`` (row 0 at the top)."""
    rgba = np.asarray(rgba)
    h, w, _ = rgba.shape
    opaque = bool((rgba[..., 3] == 255).all())
    pix = rgba[..., :3] if opaque else rgba
    rows = np.empty((h, 1 + w * pix.shape[2]), np.uint8)
    rows[:, 0] = 0  # filter type 0 (none) on every row
    rows[:, 1:] = pix.reshape(h, -1)
    ppm = int(dpi / 0.0254 + 0.5)
    software = f"Matplotlib version{matplotlib.__version__}, https://matplotlib.org/"
    return b"".join((
        b"\x89PNG\r\n\x1a\n",
        # 8 bits per sample; colour type 2 (RGB) or 6 (RGBA); no interlace
        _chunk(b"IHDR", struct.pack(">IIBBBBB", w, h, 8, 2 if opaque else 6, 0, 0, 0)),
        _chunk(b"tEXt", b"Software\0" + software.encode("latin-1")),
        _chunk(b"pHYs", struct.pack(">IIB", ppm, ppm, 1)),
        _chunk(b"IDAT", zlib.compress(rows, 1)),
        _chunk(b"IEND", b""),
    ))


def write_png(fig, path, *, dpi: float) -> None:
    """Draw ``fig`` with ``savefig``'s settings at ``dpi`` and write it as a PNG to ``path``
    (a path or a binary file object)."""
    from matplotlib.backends.backend_agg import FigureCanvasAgg

    if not isinstance(fig.canvas, FigureCanvasAgg):  # another canvas: matplotlib's PNG
        fig.savefig(path, dpi=dpi, format="png")
        return
    # savefig draws on the figure's own Agg canvas (dpi, face colour as for a PNG); the
    # raw bytes it writes are not needed: the canvas keeps the drawn buffer
    fig.savefig(_Discard(), dpi=dpi, format="raw")
    data = png_bytes(fig.canvas.buffer_rgba(), dpi)
    if hasattr(path, "write"):
        path.write(data)
    else:
        with open(path, "wb") as fh:
            fh.write(data)


class _Discard(io.RawIOBase):
    def writable(self):
        return True

    def write(self, b):
        return len(b)
