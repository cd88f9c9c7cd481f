"""Drawing the report's figures once: a digest of the data a figure shows, and one figure saved in every format.

The report job keys each figure on :func:`data_digest` of exactly the
arguments its builder draws (through the job's per-part memo,
``foldwise.provenance.memo.part_memo``), so a figure whose data did not
change is restored instead of drawn; :func:`save_preview` writes the
screen preview the page embeds, and :func:`save_publication_files` lays a
figure out once and writes its publication files (PNG 300 dpi, SVG, PDF)
from that one layout.
"""

import functools
import hashlib
import io
import math
import struct

import numpy as np
import pandas as pd

from foldwise.data.fileio import save_figure, write_bytes_atomic

__all__ = ["PNG_COMPRESS_LEVEL", "PREVIEW_DPI", "clear_text_cache", "data_digest", "save_publication_files", "save_preview"]

# The page shows each figure at screen resolution: at 100 dpi an 11-inch-wide
# figure is 1,100 pixels, about the page's width (common practice, no source);
# the 300-dpi PNG, the SVG and the PDF are linked beside it.
PREVIEW_DPI = 100
# zlib level of the PNGs the page embeds (previews and quality checks). Measured on bench_report's study: level 3
# encodes the 38 previews in 0.055 s and the 18 quality-check images in 0.06 s, Pillow's default 6 in 0.107 s and
# 0.15 s; the files are 14% and 18% larger (1.08 -> 1.22 MB, 0.91 -> 1.06 MB). Level 1 is hardly faster and 23%
# larger. (The GLM's design image uses level 3 too.)
PNG_COMPRESS_LEVEL = 3


def _feed(digest, value):
    """Feed ``value`` to ``digest`` with a type tag, so that equal data gives equal bytes and nothing else does."""
    if value is None:
        digest.update(b"N")
    elif isinstance(value, (bool, np.bool_)):
        digest.update(b"T" if value else b"F")
    elif isinstance(value, (int, np.integer)):
        digest.update(b"i" + str(int(value)).encode("ascii") + b";")
    elif isinstance(value, (float, np.floating)):
        number = float(value)
        digest.update(b"f" + (b"nan" if math.isnan(number) else struct.pack(">d", number)))
    elif isinstance(value, str):
        encoded = value.encode("utf-8")
        digest.update(b"s" + str(len(encoded)).encode("ascii") + b":" + encoded)
    elif isinstance(value, bytes):
        digest.update(b"b" + str(len(value)).encode("ascii") + b":" + value)
    elif isinstance(value, np.ndarray):
        if value.dtype.kind == "O":
            _feed(digest, value.tolist())
            return
        array = np.ascontiguousarray(value)
        if array.dtype.kind == "f":
            array = np.where(np.isnan(array), np.nan, array)  # one NaN bit pattern
        digest.update(b"a" + array.dtype.str.encode("ascii") + str(array.shape).encode("ascii") + b":")
        digest.update(array.tobytes())
    elif isinstance(value, pd.DataFrame):
        digest.update(b"D")
        _feed(digest, [str(column) for column in value.columns])
        for column in value.columns:
            _feed(digest, value[column].to_numpy())
    elif isinstance(value, pd.Series):
        digest.update(b"S")
        _feed(digest, value.to_numpy())
    elif isinstance(value, dict):
        digest.update(b"d" + str(len(value)).encode("ascii") + b":")
        for key in sorted(value, key=str):
            _feed(digest, str(key))
            _feed(digest, value[key])
    elif isinstance(value, (list, tuple)):
        digest.update(b"l" + str(len(value)).encode("ascii") + b":")
        for item in value:
            _feed(digest, item)
    else:
        raise TypeError(f"data_digest cannot digest a {type(value).__name__}")


def data_digest(*values):
    """sha256 of the data a figure shows: arrays by dtype, shape and bytes; tables, dicts and lists item by item.

    Parameters
    ----------
    *values
        None, bool, int, float (NaN allowed), str, bytes, numpy arrays and
        scalars, pandas DataFrames and Series, and dicts, lists and tuples of
        these.

    Returns
    -------
    str
        Hex digest. Equal data (``1`` and ``np.int64(1)``; two NaNs) gives
        equal digests; a changed value, shape, dtype or order does not.

    Examples
    --------
    >>> data_digest([1.0, float("nan")]) == data_digest([1.0, float("nan")])
    True
    >>> data_digest(np.array([1, 2])) == data_digest(np.array([2, 1]))
    False
    """
    digest = hashlib.sha256()
    _feed(digest, list(values))
    return digest.hexdigest()


def save_publication_files(figure, paths):
    """Write one figure to every publication file, laid out once.

    Parameters
    ----------
    figure : matplotlib.figure.Figure
    paths : sequence of str
        The publication files, each format by its suffix (PNG at 300 dpi,
        SVG and PDF with text kept as text; ``foldwise.data.fileio.save_figure``).

    Notes
    -----
    The first save runs the figure's layout engine; the layout is then
    frozen (``set_layout_engine("none")``) so the other formats draw with
    the same axes positions instead of laying the figure out again.
    """
    for number, path in enumerate(paths):
        save_figure(figure, path)
        if number == 0 and figure.get_layout_engine() is not None:
            figure.set_layout_engine("none")


def save_preview(figure, preview_path):
    """Write the figure's screen preview (PNG at :data:`PREVIEW_DPI`, 256 colours), the image the page embeds.

    The figure is drawn once on an Agg canvas and its pixels go straight to
    Pillow: ``savefig`` would draw a figure with a layout engine twice (a
    dry run to lay it out, then the picture) and encode a PNG that is
    decoded again to reduce its colours. The pixels are the ones ``savefig``
    gives at the same dpi (``tests/test_report.py`` compares them). A figure
    drawn again keeps its Agg canvas (and the renderer's cache of text
    metrics): the pixels are those of a new canvas (tested).
    """
    canvas_class = _preview_canvas_class()
    figure.set_dpi(PREVIEW_DPI)
    # A figure drawn again (reused for another preview) keeps its canvas, whose renderer caches the text metrics.
    canvas = figure.canvas if isinstance(figure.canvas, canvas_class) else canvas_class(figure)
    canvas.draw()
    write_bytes_atomic(preview_path, _palette_png(np.asarray(canvas.buffer_rgba())))


# Text layouts and glyph bitmaps of the preview canvas (:func:`_preview_canvas_class`), kept for one report job.
_TEXT_CACHE = {"layouts": {}, "bitmaps": {}, "metrics": {}}


def clear_text_cache():
    """Forget the preview canvas's text layouts and glyph bitmaps (the report job calls it at its start)."""
    for cache in _TEXT_CACHE.values():
        cache.clear()


@functools.lru_cache(maxsize=None)
def _preview_canvas_class():
    """An Agg canvas whose renderer reuses text layouts and glyph bitmaps across texts, draws and figures.

    Agg draws a text by shaping the string (``FT2Font._layout``, ~16 us per
    character) and rendering every glyph with FreeType at the glyph's
    position (``_render_glyph``, ~28 us each), for every text on every draw:
    about a fifth of the previews' CPU, though the previews repeat the same
    tick labels, axis labels and legends at the same sizes. This renderer
    keeps both for the job's lifetime:

    - a layout per (font, size, dpi, string, hinting, features, language):
      the shaped glyphs and their offsets, which depend on nothing else;
    - a glyph bitmap per (font, size, dpi, glyph, angle, hinting,
      antialiasing, position modulo one pixel): FreeType renders the outline
      moved by the glyph's position in 1/64 pixel, so a glyph at the same
      fraction of a pixel gives the same bitmap moved by whole pixels
      (``tests/test_report.py`` compares the canvas's pixels with a plain
      Agg canvas's, bit for bit).

    It also answers Text's question for a font's line metrics
    (``_get_font_height_metrics``, matplotlib's own computation from the
    font's tables) once per font, size and dpi. Everything else (paths,
    markers, images, mathtext) is Agg's own code. The
    drawing reproduces matplotlib's ``RendererAgg._draw_text_glyphs_and_boxes``
    (matplotlib 3.11, as locked) with the two look-ups in front. The report
    job empties both at its start (:func:`clear_text_cache`), so a job's cost
    does not depend on what its process drew before.
    """
    from matplotlib import font_manager
    from matplotlib.backends.backend_agg import FigureCanvasAgg, RendererAgg, get_hinting_flag
    from matplotlib.font_manager import get_font
    from matplotlib.ft2font import RenderMode

    layouts, bitmaps, metrics = _TEXT_CACHE["layouts"], _TEXT_CACHE["bitmaps"], _TEXT_CACHE["metrics"]

    class PreviewRenderer(RendererAgg):
        def _get_font_height_metrics(self, prop):
            # The hook Text._get_layout asks first: the font's line metrics, read from its OS/2 or hhea table by
            # matplotlib's own computation (text.py), once per font, size and dpi instead of twice per text and draw.
            font = get_font(font_manager.fontManager._find_fonts_by_props(prop))
            size = prop.get_size_in_points()
            key = (font, size, self.dpi)
            if key not in metrics:
                metrics[key] = (None, None, None)  # no table: Text measures "lp" instead, as without this hook
                for table_name, gap_key, ascent_key, descent_key in (
                        ("OS/2", "sTypoLineGap", "sTypoAscender", "sTypoDescender"),
                        ("hhea", "lineGap", "ascent", "descent")):
                    table = font.get_sfnt_table(table_name)
                    if table is None:
                        continue
                    scale = 1 / font.get_sfnt_table("head")["unitsPerEm"] * size * self.dpi / 72
                    metrics[key] = (table[ascent_key] * scale, -table[descent_key] * scale, table[gap_key] * scale)
                    break
            return metrics[key]

        def draw_text(self, gc, x, y, s, prop, angle, ismath=False, mtext=None):
            if ismath:
                return super().draw_text(gc, x, y, s, prop, angle, ismath=ismath, mtext=mtext)
            font = self._prepare_font(prop)
            size = prop.get_size_in_points()
            flags = get_hinting_flag()
            features = mtext.get_fontfeatures() if mtext is not None else None
            language = mtext.get_language() if mtext is not None else None
            try:
                key = (font, size, self.dpi, s, flags, features, language)
                items = layouts.get(key)
            except TypeError:  # features or language given as a list: not a key, shaped every time
                key, items = None, None
            if items is None:
                items = font._layout(s, flags=flags, features=features, language=language)
                if key is not None:
                    layouts[key] = items
            self._draw_glyphs(gc, x, y, angle, [(item.ft_object, size, item.glyph_index, item.x, item.y)
                                                for item in items])

        def _draw_glyphs(self, gc, x, y, angle, glyphs):
            # y is downwards; FreeType's y is upwards (as in RendererAgg._draw_text_glyphs_and_boxes).
            cos = math.cos(math.radians(angle))
            sin = math.sin(math.radians(angle))
            load_flags = get_hinting_flag()
            antialiased = bool(gc.get_antialiased())
            height = self.height
            matrix = None
            for font, size, glyph_index, dx, dy in glyphs:
                x64 = round(0x40 * (x + dx * cos - dy * sin))
                y64 = round(0x40 * (height - y + dx * sin + dy * cos))
                key = (font, size, self.dpi, glyph_index, angle, load_flags, antialiased, x64 & 0x3F, y64 & 0x3F)
                cached = bitmaps.get(key)
                if cached is None:
                    if matrix is None:
                        matrix = (0x10000 * np.array([[cos, -sin], [sin, cos]])).round().astype(int)
                    font.set_size(size, self.dpi)
                    font._set_transform(matrix, [x64, y64])
                    bitmap = font._render_glyph(glyph_index, load_flags,
                                                RenderMode.NORMAL if antialiased else RenderMode.MONO)
                    buffer = bitmap.buffer  # an array of its own (not FreeType's slot)
                    if not antialiased:
                        buffer *= 0xFF
                    # The bitmap's corner relative to the whole pixel the glyph starts in.
                    cached = bitmaps[key] = (buffer, bitmap.left - (x64 >> 6), bitmap.top - (y64 >> 6))
                buffer, left, top = cached
                # draw_text_image's y is downwards and names the bitmap's bottom side.
                self._renderer.draw_text_image(buffer, left + (x64 >> 6),
                                               int(height) - (top + (y64 >> 6)) + buffer.shape[0], 0, gc)

    class PreviewCanvas(FigureCanvasAgg):
        def get_renderer(self):
            width, height = self.get_width_height(physical=True)
            key = width, height, self.figure.dpi
            if self._lastKey != key:
                self.renderer = PreviewRenderer(width, height, self.figure.dpi)
                self._lastKey = key
            return self.renderer

    return PreviewCanvas


def _palette_png(pixels):
    """An image as a 256-colour PNG (deterministic): ~2.7x smaller than RGBA, so the page stays small.

    ``pixels`` is an RGBA or RGB uint8 array, or PNG bytes. Written by Pillow
    with the pHYs chunk of :data:`PREVIEW_DPI` and no text or time chunk
    (measured on the benchmark's 45 previews: 2.66 MB RGBA, 0.99 MB with 256
    colours).
    """
    from PIL import Image  # Pillow: matplotlib's own PNG writer

    if isinstance(pixels, bytes):
        with Image.open(io.BytesIO(pixels)) as image:
            pixels = np.asarray(image.convert("RGB"))
    pixels = np.asarray(pixels)
    if pixels.shape[2] == 4:  # RGBA to RGB by Pillow: a fifth of numpy's strided copy (0.3 ms against 1.4 ms)
        picture = Image.frombuffer("RGBA", (pixels.shape[1], pixels.shape[0]), np.ascontiguousarray(pixels), "raw",
                                   "RGBA", 0, 1).convert("RGB")
    else:
        picture = Image.fromarray(np.ascontiguousarray(pixels))
    # The 256 colours are chosen (median cut) from every 3rd pixel of every 3rd row, then every pixel takes its
    # nearest: a third of the cost of a median cut over every pixel (measured on a 5-panel curve preview: 0.015 s
    # against 0.032 s), with a mean error of 2.5/255 per pixel.
    colours = Image.fromarray(np.ascontiguousarray(pixels[::3, ::3, :3])).quantize(colors=256)
    palette = picture.quantize(palette=colours, dither=Image.Dither.NONE)
    buffer = io.BytesIO()
    palette.save(buffer, format="png", dpi=(PREVIEW_DPI, PREVIEW_DPI), compress_level=PNG_COMPRESS_LEVEL)
    return buffer.getvalue()
