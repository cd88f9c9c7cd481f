"""The report's quality-check images, drawn directly into pixels: numpy for the image, Pillow for the text and the PNG.

A quality check is a picture of images (slices of the mean BOLD image with
the brain mask or an ROI, the residual variance): a plotting library costs
more to import and lay out than such a picture is worth, so it is composed
here, as ``foldwise.glm.design_image`` composes a run's design. Slices go
through the planes with the most voxels of the mask they show
(``foldwise.report.figures.best_slices``), oriented so that coordinates grow
to the right and upwards (``grid_axes_mm``), each voxel a block of pixels of
its size in mm; the subject's left is marked L when the horizontal axis is
the world x axis. Colours: Okabe & Ito (2008) for masks, viridis for the
residual variance (anchors below), grey for the mean image (1st to 99th
percentile inside the brain). Every function returns a 256-colour PNG with
no time stamp: the same arguments give the same bytes.
"""

import io

import numpy as np

from foldwise.errors import InputError
from foldwise.glm.design_image import font_px
from foldwise.report.drawing import PNG_COMPRESS_LEVEL
from foldwise.report.figures import (OKABE_ITO, _ROI_COLOURS, _SLICE_NAMES, _oriented, _take, _window, best_slices,
                                     grid_axes_mm, roi_overlay)

__all__ = ["VIRIDIS_ANCHORS", "viridis_lookup", "mask_edges", "brain_mask_png", "roi_masks_png", "resvar_png",
           "roi_colour"]

# viridis (van der Walt & Smith 2015, matplotlib's default colour map): 17 equally spaced colours of its
# 256-entry table, taken from matplotlib 3.x; linear interpolation between them stays within 6/255 of the
# table (tests/test_report_images.py compares it with matplotlib's).
VIRIDIS_ANCHORS = ("#440154", "#48186a", "#472d7b", "#424086", "#3b528b", "#33638d", "#2c728e", "#26828e", "#21918c",
                   "#1fa088", "#28ae80", "#3fbc73", "#5ec962", "#84d44b", "#addc30", "#d8e219", "#fde725")
_FILL_OPACITY = 0.55  # an ROI's fill over the mean image: the anatomy stays visible underneath (common practice, no source)
_OUTSIDE_GREY = 217  # 0.85 of white: voxels outside the brain in the residual-variance map
_PANEL_PX = 220  # the longest side of a slice panel (pixels); about a third of the page's width per panel
_GAP_PX, _MARGIN_PX = 14, 12
_TEXT_PX = {"title": 17, "panel": 13, "legend": 13, "row": 14}
_BLACK = (0, 0, 0)


def _rgb(colour):
    return tuple(int(colour[i:i + 2], 16) for i in (1, 3, 5))


def roi_colour(index):
    """The Okabe-Ito colour of the ``index``-th ROI of the config (as the result figures colour it), 8-bit RGB."""
    return _rgb(OKABE_ITO[_ROI_COLOURS[index % len(_ROI_COLOURS)]])


def viridis_lookup(n_levels=256):
    """``(n_levels, 3)`` uint8: viridis, interpolated linearly between :data:`VIRIDIS_ANCHORS`."""
    anchors = np.array([_rgb(colour) for colour in VIRIDIS_ANCHORS], dtype=np.float64)
    where = np.linspace(0.0, 1.0, len(anchors))
    levels = np.linspace(0.0, 1.0, n_levels)
    return np.stack([np.interp(levels, where, anchors[:, k]) for k in range(3)], axis=1).round().astype(np.uint8)


def mask_edges(mask):
    """The pixels of ``mask`` with a 4-neighbour outside it (the image border counts as outside): its outline.

    Examples
    --------
    >>> mask_edges(np.ones((3, 3), dtype=bool)).astype(int).tolist()
    [[1, 1, 1], [1, 0, 1], [1, 1, 1]]
    """
    mask = np.asarray(mask, dtype=bool)
    padded = np.pad(mask, 1)
    inner = padded[:-2, 1:-1] & padded[2:, 1:-1] & padded[1:-1, :-2] & padded[1:-1, 2:]
    return mask & ~inner


class _Slicer:
    """Slices of one grid as pixel panels: orientation, the pixels of each voxel, panel titles."""

    def __init__(self, affine, shape, panel_px=_PANEL_PX):
        self.coordinates, self.flips, self.names = grid_axes_mm(affine, shape)
        steps = [abs(c[1] - c[0]) if len(c) > 1 else 1.0 for c in self.coordinates]
        extents = [len(c) * step for c, step in zip(self.coordinates, steps)]
        self.steps = steps
        self.px_per_mm = panel_px / max(extents)  # one scale for every panel: sizes compare across panels

    def orient(self, volume):
        return _oriented(np.asarray(volume), self.flips)

    def voxels(self, volume, axis, index):
        """The slice ``index`` across ``axis`` at voxel resolution (top row: the largest vertical coordinate)."""
        return _take(volume, axis, index)[::-1]  # rows: vertical axis, top = largest

    def upsample(self, values, axis):
        """A slice (2D, or 2D with channels) of the plane across ``axis`` as pixels: each voxel a block of its size in mm."""
        horizontal, vertical = [a for a in range(3) if a != axis]
        width = max(1, int(round(len(self.coordinates[horizontal]) * self.steps[horizontal] * self.px_per_mm)))
        height = max(1, int(round(len(self.coordinates[vertical]) * self.steps[vertical] * self.px_per_mm)))
        columns = np.minimum(((np.arange(width) + 0.5) * values.shape[1] / width).astype(np.int64), values.shape[1] - 1)
        rows = np.minimum(((np.arange(height) + 0.5) * values.shape[0] / height).astype(np.int64), values.shape[0] - 1)
        return values[rows][:, columns]

    def pixels(self, volume, axis, index):
        """The slice ``index`` across ``axis`` as a pixel array (top row: the largest vertical coordinate)."""
        return self.upsample(self.voxels(volume, axis, index), axis)

    def title(self, axis, index):
        return f"{_SLICE_NAMES[axis]}, {self.names[axis]} = {self.coordinates[axis][index]:g} mm"

    def sides(self, axis):
        """True when the panel's horizontal axis is the world x axis (L and R can be marked)."""
        return [a for a in range(3) if a != axis][0] == 0 and self.names[0] == "x"

    def orientation_text(self):
        parts = []
        for axis in range(3):
            horizontal, vertical = [a for a in range(3) if a != axis]
            parts.append(f"{_SLICE_NAMES[axis]}: {self.names[horizontal]} to the right, {self.names[vertical]} up")
        return "Slices: " + "; ".join(parts) + " (mm; L = the subject's left)."


def _grey(slice_values, low, high):
    """Grey levels of a slice in the display window, as float RGB in [0, 1]."""
    shown = np.clip((np.nan_to_num(slice_values, nan=low) - low) / (high - low), 0.0, 1.0)
    return np.repeat(shown[..., None], 3, axis=2)


def _paint_edges(rgb, mask, colour, width_px=1):
    """Paint the outline of ``mask`` into ``rgb`` (uint8, in place) in ``colour`` (8-bit RGB)."""
    edges = mask_edges(mask)
    for _ in range(width_px - 1):  # thicken inwards: the outline stays on the mask's own voxels
        edges |= mask_edges(mask & ~edges)
    rgb[edges] = np.asarray(colour, dtype=np.uint8)
    return rgb


def _to_bytes(rgb):
    return (np.clip(rgb, 0.0, 1.0) * 255.0 + 0.5).astype(np.uint8)


def _text_size(text, size):
    left, top, right, bottom = font_px(size).getbbox(text)
    return right - left, bottom - top


def _wrap(text, width_px, size):
    """``text`` broken into lines no wider than ``width_px`` (at word boundaries; a longer word keeps its own line)."""
    lines, current = [], ""
    for word in text.split():
        candidate = f"{current} {word}" if current else word
        if current and _text_size(candidate, size)[0] > width_px:
            lines.append(current)
            current = word
        else:
            current = candidate
    return lines + ([current] if current else [])


def _compose(title, rows, legend=(), footer=(), colourbar=None):
    """Lay out rows of panels under a title, with a legend, footer lines and an optional colour bar; PNG bytes.

    Parameters
    ----------
    title : str
    rows : sequence of (str or None, sequence of (str, uint8 array (h, w, 3), bool))
        Row label, then each panel's title, pixels and whether to mark L and R.
    legend : sequence of (RGB, str, str)
        Swatch colour, ``"line"`` or ``"fill"``, text.
    footer : sequence of str
    colourbar : (uint8 array (n, 3), float, float) or None
        Colour table and the values of its ends (ticks: both ends and the middle).
    """
    from PIL import Image, ImageDraw

    label_width = max([_text_size(line, _TEXT_PX["row"])[0] for label, _ in rows if label for line in label.split("\n")]
                      or [0])
    label_width = label_width + _GAP_PX if label_width else 0
    panel_title_px = _TEXT_PX["panel"] + 6
    row_widths = [sum(p.shape[1] for _, p, _ in panels) + _GAP_PX * (len(panels) - 1) for _, panels in rows]
    row_heights = [max(p.shape[0] for _, p, _ in panels) + panel_title_px for _, panels in rows]
    bar_width = 0
    if colourbar is not None:
        tick_texts = [f"{value:.3g}" for value in (colourbar[2], (colourbar[1] + colourbar[2]) / 2, colourbar[1])]
        bar_width = _GAP_PX + 16 + 6 + max(_text_size(text, _TEXT_PX["legend"])[0] for text in tick_texts)
    legend_height = (_TEXT_PX["legend"] + 8) if legend else 0
    width = _MARGIN_PX * 2 + label_width + max(row_widths) + bar_width
    lines = [line for text in footer for line in _wrap(text, width - 2 * _MARGIN_PX, _TEXT_PX["legend"])]
    title_height = _TEXT_PX["title"] + 12
    height = (_MARGIN_PX + title_height + sum(row_heights) + _GAP_PX * (len(rows) - 1) + legend_height
              + len(lines) * (_TEXT_PX["legend"] + 5) + _MARGIN_PX)
    canvas = np.full((height, width, 3), 255, dtype=np.uint8)
    y = _MARGIN_PX + title_height
    placed = []  # (x, y, panel title, L/R marks, panel width, panel height) for the text pass
    for (label, panels), row_height in zip(rows, row_heights):
        x = _MARGIN_PX + label_width
        for panel_title, pixels, sides in panels:
            top = y + panel_title_px
            canvas[top:top + pixels.shape[0], x:x + pixels.shape[1]] = pixels
            placed.append((x, y, panel_title, sides, pixels.shape[1], pixels.shape[0]))
            x += pixels.shape[1] + _GAP_PX
        y += row_height + _GAP_PX
    if colourbar is not None:
        table, low, high = colourbar
        bar_left = _MARGIN_PX + label_width + max(row_widths) + _GAP_PX
        bar_top, bar_bottom = _MARGIN_PX + title_height + panel_title_px, _MARGIN_PX + title_height + row_heights[0]
        levels = np.linspace(len(table) - 1, 0, bar_bottom - bar_top).round().astype(np.int64)  # top: the largest value
        canvas[bar_top:bar_bottom, bar_left:bar_left + 16] = table[levels][:, None, :]
    image = Image.fromarray(canvas, mode="RGB")
    draw = ImageDraw.Draw(image)
    draw.text((width / 2, _MARGIN_PX), title, font=font_px(_TEXT_PX["title"]), fill=_BLACK, anchor="mt")
    y = _MARGIN_PX + title_height
    for (label, _), row_height in zip(rows, row_heights):
        if label:
            label_lines = label.split("\n")
            middle = y + panel_title_px + (row_height - panel_title_px) / 2
            for number, line in enumerate(label_lines):
                offset = (number - (len(label_lines) - 1) / 2) * (_TEXT_PX["row"] + 4)
                draw.text((_MARGIN_PX, middle + offset), line, font=font_px(_TEXT_PX["row"]), fill=_BLACK, anchor="lm")
        y += row_height + _GAP_PX
    for x, top, panel_title, sides, panel_width, panel_height in placed:
        draw.text((x + panel_width / 2, top + 2), panel_title, font=font_px(_TEXT_PX["panel"]), fill=_BLACK, anchor="mt")
        if sides:
            for position, text, anchor in ((x + 3, "L", "lt"), (x + panel_width - 3, "R", "rt")):
                draw.text((position, top + panel_title_px + 3), text, font=font_px(_TEXT_PX["panel"]), fill=(255, 255, 255),
                          anchor=anchor, stroke_width=2, stroke_fill=(38, 38, 38))
    if colourbar is not None:
        for text, fraction in zip(tick_texts, (0.0, 0.5, 1.0)):
            draw.text((bar_left + 16 + 6, bar_top + fraction * (bar_bottom - bar_top - 1)), text,
                      font=font_px(_TEXT_PX["legend"]), fill=_BLACK, anchor="lm")
    y = height - _MARGIN_PX - len(lines) * (_TEXT_PX["legend"] + 5) - legend_height
    x = _MARGIN_PX
    for colour, style, text in legend:
        middle = y + _TEXT_PX["legend"] / 2
        if style == "line":
            draw.rectangle((x, middle - 1, x + 22, middle + 1), fill=tuple(colour))
        else:
            draw.rectangle((x, middle - 6, x + 22, middle + 6), fill=tuple(colour), outline=tuple(colour))
        draw.text((x + 28, middle), text, font=font_px(_TEXT_PX["legend"]), fill=_BLACK, anchor="lm")
        x += 28 + _text_size(text, _TEXT_PX["legend"])[0] + 24
    y += legend_height
    for line in lines:
        draw.text((_MARGIN_PX, y), line, font=font_px(_TEXT_PX["legend"]), fill=_BLACK, anchor="lt")
        y += _TEXT_PX["legend"] + 5
    # 256 colours (Pillow's fast octree, deterministic): about 0.6 times the bytes of RGB, for a page that embeds
    # every quality check (measured on the benchmark's ROI figure: 211 kB RGB, 85 kB with 256 colours); the zlib
    # level of the previews (foldwise.report.drawing.PNG_COMPRESS_LEVEL says what it costs).
    buffer = io.BytesIO()
    image.quantize(colors=256, method=Image.Quantize.FASTOCTREE).save(buffer, format="PNG",
                                                                      compress_level=PNG_COMPRESS_LEVEL)
    return buffer.getvalue()


def _check_grid(what, volume, shape):
    if np.shape(volume) != tuple(shape):
        raise InputError(None, what, f"shape {np.shape(volume)} differs from the mean image's {tuple(shape)}",
                         "build every image of a subject on one grid (rerun the masks stage)")


def brain_mask_png(mean_image, brain_mask, affine, title):
    """A subject's brain mask (yellow outline) over its mean image, three slices through the brain's fullest planes.

    Parameters
    ----------
    mean_image : array_like, 3D
    brain_mask : array_like of bool, 3D
    affine : array_like, shape (4, 4)
    title : str

    Returns
    -------
    bytes
        PNG.
    """
    mean_image = np.asarray(mean_image, dtype=np.float64)
    _check_grid("brain mask", brain_mask, mean_image.shape)
    slicer = _Slicer(affine, mean_image.shape)
    mean, brain = slicer.orient(mean_image), slicer.orient(np.asarray(brain_mask, dtype=bool))
    low, high = _window(mean[brain] if brain.any() else mean)
    outline = _rgb(OKABE_ITO["yellow"])
    panels = []
    for axis, index in enumerate(best_slices(brain)):
        # grey levels turned into bytes per voxel, then each voxel becomes its block of pixels (the same bytes as
        # per pixel: both steps work value by value), then the outline is painted in pixels
        rgb = slicer.upsample(_to_bytes(_grey(slicer.voxels(mean, axis, index), low, high)), axis)
        _paint_edges(rgb, slicer.pixels(brain, axis, index), outline, 2)
        panels.append((slicer.title(axis, index), rgb, slicer.sides(axis)))
    return _compose(title, [(None, panels)], legend=[(outline, "line", "brain mask (outline)")],
                    footer=[f"{int(brain.sum())} voxels in the brain mask. " + slicer.orientation_text()])


def roi_masks_png(roi, subjects, affine, colour, title):
    """One ROI in every subject: the ROI filled and outlined, the brain mask outlined, over each subject's mean image.

    Parameters
    ----------
    roi : str
        The ROI's name (legend).
    subjects : sequence of (str, ndarray, ndarray of bool, ndarray of bool)
        Per subject (one row each): its label, mean image, brain mask and
        the ROI's mask, on one grid.
    affine : array_like, shape (4, 4)
        The grid of the first subject (slices are labelled in its mm).
    colour : (int, int, int)
        The ROI's colour (:func:`roi_colour`).
    title : str

    Returns
    -------
    bytes
        PNG. Each row's slices go through the planes with the most ROI
        voxels of that subject (the brain's when the ROI is empty there).
    """
    if not subjects:
        raise InputError(None, "subjects", "no subject to draw", "pass at least one subject")
    slicer = _Slicer(affine, np.shape(subjects[0][1]), panel_px=_PANEL_PX if len(subjects) <= 10 else 160)
    brain_colour = _rgb(OKABE_ITO["yellow"])
    rows = []
    for label, mean_image, brain_mask, roi_mask in subjects:
        mean_image = np.asarray(mean_image, dtype=np.float64)
        _check_grid(f"brain mask of {label}", brain_mask, mean_image.shape)
        _check_grid(f"mask of ROI {roi} of {label}", roi_mask, mean_image.shape)
        if mean_image.shape != np.shape(subjects[0][1]):
            slicer = _Slicer(affine, mean_image.shape)
        mean, brain = slicer.orient(mean_image), slicer.orient(np.asarray(brain_mask, dtype=bool))
        mask = slicer.orient(np.asarray(roi_mask, dtype=bool))
        low, high = _window(mean[brain] if brain.any() else mean)
        panels = []
        for axis, index in enumerate(best_slices(mask if mask.any() else brain)):
            # the fill is composited voxel by voxel, then every voxel becomes its block of pixels; outlines are pixels
            roi_voxels = slicer.voxels(mask, axis, index)
            overlay = roi_overlay([roi_voxels], [tuple(np.asarray(colour) / 255.0) + (_FILL_OPACITY,)])
            rgb = _grey(slicer.voxels(mean, axis, index), low, high)
            # bytes per voxel before the blocks of pixels (the same bytes as per pixel, 8 times less to copy)
            rgb = slicer.upsample(_to_bytes(rgb * (1.0 - overlay[..., 3:]) + overlay[..., :3] * overlay[..., 3:]), axis)
            _paint_edges(rgb, slicer.pixels(brain, axis, index), brain_colour, 2)
            _paint_edges(rgb, slicer.upsample(roi_voxels, axis), colour, 1)
            panels.append((slicer.title(axis, index), rgb, slicer.sides(axis)))
        n_voxels = int(mask.sum())
        rows.append((f"{label}\n{n_voxels} voxels" if n_voxels else f"{label}\nempty", panels))
    return _compose(title, rows, legend=[(colour, "fill", f"ROI {roi} (filled, outlined)"),
                                         (brain_colour, "line", "brain mask (outline)")],
                    footer=[slicer.orientation_text()])


def resvar_png(residual_variance, brain_mask, affine, title):
    """The GLM residual variance inside the brain (viridis; grey outside), three slices through the brain's fullest planes.

    Parameters
    ----------
    residual_variance : array_like, 3D
    brain_mask : array_like of bool, 3D
    affine : array_like, shape (4, 4)
    title : str

    Returns
    -------
    bytes
        PNG; the colour range is the 1st to the 99th percentile inside the
        brain, its ends and middle written beside the colour bar.
    """
    values = np.asarray(residual_variance, dtype=np.float64)
    _check_grid("brain mask", brain_mask, values.shape)
    slicer = _Slicer(affine, values.shape)
    values, brain = slicer.orient(values), slicer.orient(np.asarray(brain_mask, dtype=bool))
    shown = np.where(brain & np.isfinite(values), values, np.nan)
    low, high = _window(shown)
    table = viridis_lookup()
    panels = []
    for axis, index in enumerate(best_slices(brain)):
        pixels = slicer.pixels(shown, axis, index)
        inside = np.isfinite(pixels)
        levels = np.clip(((np.nan_to_num(pixels, nan=low) - low) / (high - low) * (len(table) - 1)).round(), 0,
                         len(table) - 1).astype(np.int64)
        rgb = np.where(inside[..., None], table[levels], np.uint8(_OUTSIDE_GREY)).astype(np.uint8)
        panels.append((slicer.title(axis, index), rgb, slicer.sides(axis)))
    return _compose(title, [(None, panels)], colourbar=(table, low, high), footer=[
        "Colour: residual variance (squared BOLD signal units), 1st to 99th percentile inside the brain; "
        "outside the brain mask: grey.", slicer.orientation_text()])
