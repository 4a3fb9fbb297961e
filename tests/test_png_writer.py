"""``peaksift._png.png_bytes`` and the figure canvas's PNG writer, against independent
decoders and the PNG specification (W3C, Portable Network Graphics, 2nd edition, 2003:
signature 5.2, chunk layout and CRC-32 5.3, IHDR 11.2.2, pHYs 11.3.5.3, tEXt 11.3.4.3).

Outside references: Pillow's decoder (``Image.open(...).load()``) and Pillow's own PNG
encoding of the same array, matplotlib's ``imread``, ``zlib.crc32`` re-computed here on
each chunk.  Pixels are compared exactly (tolerance 0: PNG is lossless)."""

from __future__ import annotations

import io
import struct
import zlib

import numpy as np
import pytest
from PIL import Image

from peaksift._png import png_bytes
from peaksift._style import new_figure


def _chunks(data: bytes) -> list[tuple[bytes, bytes]]:
    """The chunks of a PNG, each CRC checked (spec 5.3: CRC-32 over type and data)."""
    assert data[:8] == b"\x89PNG\r\n\x1a\n"  # spec 5.2
    out, i = [], 8
    while i < len(data):
        (n,) = struct.unpack(">I", data[i:i + 4])
        kind, body = data[i + 4:i + 8], data[i + 8:i + 8 + n]
        (crc,) = struct.unpack(">I", data[i + 8 + n:i + 12 + n])
        assert crc == zlib.crc32(kind + body) & 0xFFFFFFFF, kind
        out.append((kind, body))
        i += 12 + n
    assert i == len(data)
    return out


def _pillow_pixels(data: bytes) -> tuple[str, np.ndarray]:
    im = Image.open(io.BytesIO(data))
    im.load()  # decodes every IDAT byte (a truncated or corrupt stream raises here)
    return im.mode, np.asarray(im)


@pytest.mark.parametrize("shape", [(1, 1, 3), (1, 1, 4), (7, 13, 3), (13, 7, 4),
                                   (2, 1, 3), (333, 517, 3), (101, 2049, 4)])
def test_pixels_decode_exactly_as_pillows_encoding(shape):
    """Random pixels (odd sizes, 1x1, a wide row): Pillow and matplotlib decode the same
    array that was written, and the same pixels as Pillow's own encoding of it."""
    rng = np.random.default_rng(20261203)
    px = rng.integers(0, 256, size=shape, dtype=np.uint8)
    data = png_bytes(px, 100.0)
    kinds = [k for k, _ in _chunks(data)]
    assert kinds[0] == b"IHDR" and kinds[-1] == b"IEND"
    assert kinds.index(b"pHYs") < kinds.index(b"IDAT")  # spec 5.6: pHYs before IDAT
    w, h, depth, ctype, comp, filt, inter = struct.unpack(">IIBBBBB", _chunks(data)[0][1])
    assert (w, h, depth, comp, filt, inter) == (shape[1], shape[0], 8, 0, 0, 0)
    assert ctype == {3: 2, 4: 6}[shape[2]]  # spec 11.2.2: truecolour, with alpha
    mode, got = _pillow_pixels(data)
    assert mode == ("RGB" if shape[2] == 3 else "RGBA")
    assert np.array_equal(got, px)
    ref = io.BytesIO()
    Image.fromarray(px).save(ref, format="png")
    assert np.array_equal(_pillow_pixels(ref.getvalue())[1], got)
    import matplotlib.image as mpimg
    assert np.array_equal(np.round(mpimg.imread(io.BytesIO(data)) * 255).astype(np.uint8), px)


def test_a_non_contiguous_view_is_written_as_its_pixels():
    """The writer's own use: the RGB channels of an RGBA buffer (a strided view)."""
    rng = np.random.default_rng(7)
    rgba = rng.integers(0, 256, size=(9, 11, 4), dtype=np.uint8)
    assert np.array_equal(_pillow_pixels(png_bytes(rgba[..., :3], 72.0))[1], rgba[..., :3])


@pytest.mark.parametrize("dpi", [72.0, 100.0, 150.0, 300.0, 96.5])
def test_dpi_as_pillow_reads_it(dpi):
    """pHYs in pixels per metre, unit 1 (spec 11.3.5.3); Pillow reads it back as dpi
    (ppm * 0.0254) within its rounding to a whole number of pixels per metre (0.0254/2
    dpi), and writes the same pHYs body for the same dpi."""
    px = np.zeros((3, 5, 3), np.uint8)
    data = png_bytes(px, dpi)
    phys = dict(_chunks(data))[b"pHYs"]
    im = Image.open(io.BytesIO(data))
    assert abs(im.info["dpi"][0] - dpi) <= 0.0254 / 2 + 1e-9
    ref = io.BytesIO()
    Image.fromarray(px).save(ref, format="png", dpi=(dpi, dpi))
    assert dict(_chunks(ref.getvalue()))[b"pHYs"] == phys


def test_text_notes_latin1_read_back_by_pillow():
    """tEXt keyword NUL text, Latin-1 (spec 11.3.4.3): a Latin-1 note reads back intact."""
    data = png_bytes(np.zeros((2, 2, 3), np.uint8), 72.0,
                     {"Software": "plain", "Comment": "Z\u00e9ro \u00b5m \u00c5"})
    im = Image.open(io.BytesIO(data))
    assert im.info["Software"] == "plain"
    assert im.info["Comment"] == "Z\u00e9ro \u00b5m \u00c5"


def _figure(transparent: bool = False):
    fig, ax = new_figure((3.1, 2.3))
    ax.plot([0, 1, 2], [0, 1, 0.5], color="C1")
    ax.set_xlabel("mass")
    if transparent:
        fig.patch.set_alpha(0.0)
        ax.patch.set_alpha(0.0)
    return fig


@pytest.mark.parametrize("kwargs", [{}, {"dpi": 57}, {"bbox_inches": "tight"},
                                    {"transparent": True}, {"dpi": 123, "bbox_inches": "tight"}])
def test_figure_png_matches_matplotlibs_agg_pixels(tmp_path, kwargs):
    """A figure saved through our canvas, to a path and to a file object, against the
    same canvas's RGBA buffer handed to Pillow (matplotlib's own route: Agg buffer ->
    Pillow), pixel for pixel; the alpha channel is dropped only when every pixel is
    opaque; the dpi is written."""
    fig = _figure(transparent=kwargs.get("transparent", False))
    path = tmp_path / "f.png"
    fig.savefig(path, **kwargs)
    buf = io.BytesIO()
    fig.savefig(buf, format="png", **kwargs)
    assert buf.getvalue() == path.read_bytes()
    ref = io.BytesIO()
    fig.savefig(ref, format="png", pil_kwargs={}, metadata={"Software": "x"}, **kwargs)
    _, want = _pillow_pixels(ref.getvalue())  # matplotlib's writer (our canvas defers)
    mode, got = _pillow_pixels(path.read_bytes())
    assert got.shape[:2] == want.shape[:2]
    if kwargs.get("transparent"):
        assert mode == "RGBA" and (want[..., 3] < 255).any()
        assert np.array_equal(got, want)
    else:
        assert mode == "RGB" and (want[..., 3] == 255).all()
        assert np.array_equal(got, want[..., :3])
    dpi = kwargs.get("dpi", fig.dpi)
    assert abs(Image.open(path).info["dpi"][0] - dpi) <= 0.0254 / 2 + 1e-9
    assert Image.open(path).info["Software"].startswith("Matplotlib version")


@pytest.mark.parametrize("fmt,magic", [("pdf", b"%PDF"), ("svg", b"<?xml")])
def test_other_formats_untouched(tmp_path, fmt, magic):
    """PDF and SVG go through matplotlib's own writers (file magic: PDF 1.7 ISO 32000-1
    7.5.2 header; SVG is XML)."""
    fig = _figure()
    fig.savefig(tmp_path / f"f.{fmt}")
    assert (tmp_path / f"f.{fmt}").read_bytes().startswith(magic)
