"""The study report's result figures (matplotlib) and the numbers behind them (pure functions).

Everything here takes arrays, tables and strings and returns figures or text;
the report job (``foldwise.jobs.report``) reads the files and writes the page.
Figures are built without pyplot (no global figure state; matplotlib is imported
when a figure is drawn, not when this module is) and use the
colour-blind-safe palette of Okabe & Ito (2008, "Color Universal Design";
hex values from memory), with labels in words and units on every axis.
"""

import functools
import math

import numpy as np
import pandas as pd

from foldwise.contract import count_label, parse_count
from foldwise.errors import InputError
# The catalogue lives in a module of its own, importable without matplotlib (Snakemake reads it at every start).
from foldwise.report.catalogue import CAPTIONS, FIGURE_FORMATS, FIGURES_DIR, analysis_rois, figure_catalogue, figure_plan

__all__ = [
    "OKABE_ITO",
    "FIGURE_FORMATS",
    "FIGURES_DIR",
    "CAPTIONS",
    "figure_catalogue",
    "figure_plan",
    "analysis_rois",
    "curve_directions",
    "direction_label",
    "voxel_count_positions",
    "curve_data",
    "choose_confusion_count",
    "confusion_matrix",
    "trials_per_condition",
    "SEARCHLIGHT_QUANTITY",
    "best_slices",
    "grid_axes_mm",
    "roi_overlay",
    "curve_figure",
    "group_confusion",
    "confusion_figure",
    "comparison_data",
    "comparison_figure",
    "searchlight_clusters",
    "reproduce_commands",
    "manifest_summary",
]

# Okabe & Ito (2008), "Color Universal Design" (hex values from memory).
OKABE_ITO = {
    "black": "#000000", "orange": "#E69F00", "sky blue": "#56B4E9", "bluish green": "#009E73",
    "yellow": "#F0E442", "blue": "#0072B2", "vermillion": "#D55E00", "reddish purple": "#CC79A7",
}
_ROI_COLOURS = ("orange", "sky blue", "bluish green", "vermillion", "blue", "reddish purple")
_PANEL_COLOURS = ("blue", "orange", "bluish green", "reddish purple")
_BRAIN_OUTLINE = OKABE_ITO["yellow"]
_SLICE_NAMES = ("sagittal", "coronal", "axial")
_CONFUSION_COLUMNS_MAX = 6
# Display window of grey images: 1st-99th percentile inside the brain (common practice, no source).
_WINDOW_PERCENTILES = (1.0, 99.0)
_FONT_SIZE = 9
_STAR_ROW, _STAR_HEADROOM = 0.96, 0.06  # axes fraction of the significance row; room for it (proportion)
_OUTLINE_UPSAMPLING = 4  # mask outlines follow voxel edges to within 1/8 voxel
# Voxel images: square voxels in the PNG (Agg draws "none" as nearest neighbour), and the SVG and PDF hold the
# image itself at its own size with no smoothing (matplotlib's "none"), instead of a copy resampled at 300 dpi.
_VOXELS = "none"


# -- directions and curves -----------------------------------------------------------

def curve_directions(analysis):
    """The directions drawn side by side in an analysis's curve figure.

    Parameters
    ----------
    analysis : dict
        One analysis entry of the config.

    Returns
    -------
    list of str
        ``["within"]``, or for the sets A and B of a cross analysis
        ``["A->A", "B->B", "A->B", "B->A", "A<->B"]`` (within A, within B,
        both transfers, then their mean), named as in the group tables.

    Examples
    --------
    >>> curve_directions({"kind": "cross", "sets": {"seen": {}, "heard": {}}})
    ['seen->seen', 'heard->heard', 'seen->heard', 'heard->seen', 'seen<->heard']
    """
    if analysis.get("kind") != "cross":
        return ["within"]
    sets = list(analysis.get("sets") or {})
    if len(sets) != 2:
        raise InputError(None, f"analyses[{analysis.get('name')}].sets", f"a cross analysis needs two sets, got {sets!r}",
                         "give exactly two sets")
    first, second = sets
    return [f"{first}->{first}", f"{second}->{second}", f"{first}->{second}", f"{second}->{first}", f"{first}<->{second}"]


def direction_label(direction):
    """A direction's name on the page and in figures: the same name as in the tables and the terminal.

    The plain-language reading (``foldwise.report.page.direction_tooltip``)
    goes into tooltips and captions, never in place of the name.

    Examples
    --------
    >>> direction_label("seen->heard"), direction_label("seen<->heard"), direction_label("within")
    ('seen->heard', 'seen<->heard', 'within')
    """
    return str(direction)


def voxel_count_positions(counts, roi_mean_voxels):
    """Where each voxel count sits on the log axis, and its tick label; ``all`` comes last.

    Parameters
    ----------
    counts : sequence of str or int
        Requested voxel counts; ``"all"`` means the whole ROI.
    roi_mean_voxels : float
        The ROI's mean size over subjects (voxels).

    Returns
    -------
    positions : ndarray of float
        A number count at its value; ``all`` at the ROI's mean size, or 1.5
        times the largest number count when that is larger, so ``all`` is
        always rightmost.
    labels : list of str
        The count, or ``"all (N)"`` with N the rounded mean size.

    Examples
    --------
    >>> positions, labels = voxel_count_positions(["10", "all"], 136.4)
    >>> positions.tolist(), labels
    ([10.0, 136.4], ['10', 'all (136)'])
    >>> voxel_count_positions(["10", "200", "all"], 136.4)[0].tolist()
    [10.0, 200.0, 300.0]
    """
    if not math.isfinite(roi_mean_voxels) or roi_mean_voxels <= 0:
        raise InputError(None, "roi_mean_voxels", f"the ROI's mean voxel count must be positive, got {roi_mean_voxels!r}",
                         "check the ROI voxel-count tables")
    numbers = {}
    for count in counts:
        try:
            value = parse_count(count)
        except ValueError:
            raise InputError(None, "n_voxels", f"voxel count {str(count)!r} is neither a whole number nor 'all'",
                             "rerun the decoding and group stages") from None
        if value == "all":
            continue
        if value < 1:
            raise InputError(None, "n_voxels", f"voxel count {value} is below 1", "rerun the decoding and group stages")
        numbers[count_label(value)] = float(value)
    all_position = max(float(roi_mean_voxels), 1.5 * max(numbers.values(), default=0.0))
    positions, labels = [], []
    for count in counts:
        text = count_label(parse_count(count))
        if text == "all":
            positions.append(all_position)
            labels.append(f"all ({int(round(roi_mean_voxels))})")
        else:
            positions.append(numbers[text])
            labels.append(text)
    return np.asarray(positions, dtype=np.float64), labels


def curve_data(group_rows, subject_rows, roi_mean_voxels, alpha):
    """The numbers behind one decoding-curve panel (one ROI, one direction).

    Parameters
    ----------
    group_rows : pandas.DataFrame
        Rows of the group table for this ROI and direction (``n_voxels``,
        ``mean``, ``ci_low``, ``ci_high``, ``chance``, ``p_fwe``).
    subject_rows : pandas.DataFrame
        Rows of the subjects' summaries for this ROI and direction
        (``subject``, ``n_voxels``, ``n_used``, ``balanced_accuracy``).
    roi_mean_voxels : float
        The ROI's mean size (where ``all`` is drawn when no count exceeds it).
    alpha : float
        Level for the markers: a cell is marked where ``p_fwe < alpha``.

    Returns
    -------
    dict
        ``counts`` (str), ``x``, ``labels``, ``mean``, ``ci_low``, ``ci_high``,
        ``chance``, ``significant`` (bool), ``capped`` (bool: the ROI held fewer
        voxels than requested for at least one subject), ``subjects``,
        ``scores`` (n_subjects x n_counts, NaN where missing) and ``dropped``
        (counts left out because every subject used all its voxels there, so
        the point would repeat ``all``); sorted by ``x`` with ``all`` last.
    """
    if group_rows.empty:
        raise InputError(None, "roi, direction", "the group table has no row for this ROI and direction",
                         "rerun the group stage")
    counts = [str(value) for value in group_rows["n_voxels"]]
    if len(set(counts)) != len(counts):
        raise InputError(None, "n_voxels", f"duplicate voxel counts in the group table: {counts}", "rerun the group stage")
    # The columns as Python lists (the values itertuples gives, without building a namedtuple class per call: ~1 ms).
    row_counts = [str(value) for value in subject_rows["n_voxels"].tolist()]
    row_subjects = [str(value) for value in subject_rows["subject"].tolist()]
    row_used = subject_rows["n_used"].tolist()
    used = {}
    for count, subject, n_used in zip(row_counts, row_subjects, row_used):
        used.setdefault(count, {})[subject] = int(n_used)
    whole = used.get("all", {})
    # A count every subject's ROI is too small for repeats 'all' exactly: drawn once, as 'all'.
    dropped = [count for count in counts if count != "all" and "all" in counts and whole
               and count in used and all(used[count].get(subject) == size for subject, size in whole.items())]
    keep = np.array([count not in dropped for count in counts])
    group_rows = group_rows[keep]
    counts = [count for count in counts if count not in dropped]
    x, labels = voxel_count_positions(counts, roi_mean_voxels)
    order = np.argsort(x, kind="stable")

    def column(name):
        return pd.to_numeric(group_rows[name], errors="coerce").to_numpy(dtype=np.float64)[order]

    subjects = sorted({str(subject) for subject in subject_rows["subject"]})
    position = {counts[index]: rank for rank, index in enumerate(order)}
    scores = np.full((len(subjects), len(counts)), np.nan)
    capped = np.zeros(len(counts), dtype=bool)
    subject_index = {subject: row for row, subject in enumerate(subjects)}
    for count, subject, n_used, score in zip(row_counts, row_subjects, row_used,
                                            subject_rows["balanced_accuracy"].tolist()):
        if count not in position:
            continue
        scores[subject_index[subject], position[count]] = float(score)
        if count != "all" and int(n_used) < parse_count(count):
            capped[position[count]] = True
    p_fwe = column("p_fwe")
    return {
        "counts": [counts[index] for index in order], "x": x[order], "labels": [labels[index] for index in order],
        "mean": column("mean"), "ci_low": column("ci_low"), "ci_high": column("ci_high"), "chance": column("chance"),
        "significant": np.isfinite(p_fwe) & (p_fwe < alpha), "capped": capped, "subjects": subjects, "scores": scores,
        "dropped": dropped,
    }


def choose_confusion_count(configured, available, roi_mean_voxels):
    """The voxel count whose confusion matrices the report shows.

    Parameters
    ----------
    configured : int or str
        ``report.confusion_n_voxels``.
    available : sequence of str
        The counts with results.
    roi_mean_voxels : float
        The ROI's mean size (``all`` is compared as this many voxels).

    Returns
    -------
    chosen : str
    exact : bool
        False when the configured count was not available and the nearest
        one (on the log scale; ties go to the smaller count) was chosen.

    Examples
    --------
    >>> choose_confusion_count(100, ["10", "50", "all"], 140.0)
    ('all', False)
    >>> choose_confusion_count("all", ["10", "all"], 140.0)
    ('all', True)
    """
    available = [count_label(parse_count(count)) for count in available]
    if not available:
        raise InputError(None, "n_voxels", "no voxel count has confusion matrices", "rerun the decoding stage")
    wanted = count_label(parse_count(configured))
    if wanted in available:
        return wanted, True
    positions, _ = voxel_count_positions(available, roi_mean_voxels)
    target = voxel_count_positions([wanted], roi_mean_voxels)[0][0]
    distance = np.abs(np.log(positions) - np.log(target))
    ranking = sorted(range(len(available)), key=lambda index: (round(float(distance[index]), 12), positions[index]))
    return available[ranking[0]], False


def confusion_matrix(rows, classes):
    """A confusion matrix (true class x predicted class) from long-format rows.

    Parameters
    ----------
    rows : pandas.DataFrame or dict of numpy arrays
        ``true_class``, ``predicted_class``, ``count`` of one direction and count.
    classes : sequence of str
        Class order of rows and columns.

    Returns
    -------
    ndarray of int64, shape (n_classes, n_classes)

    Examples
    --------
    >>> rows = pd.DataFrame({"true_class": ["a", "a", "b"], "predicted_class": ["a", "b", "b"], "count": [3, 1, 4]})
    >>> confusion_matrix(rows, ["a", "b"]).tolist()
    [[3, 1], [0, 4]]
    >>> confusion_matrix({name: rows[name].to_numpy() for name in rows}, ["a", "b"]).tolist()
    [[3, 1], [0, 4]]
    """
    index = {name: position for position, name in enumerate(classes)}
    matrix = np.zeros((len(classes), len(classes)), dtype=np.int64)
    # Python lists, each value as str() gives it (what astype(str) gives, without two pandas conversions per call).
    for true_class, predicted, count in zip(map(str, rows["true_class"].tolist()),
                                            map(str, rows["predicted_class"].tolist()), rows["count"].tolist()):
        if true_class not in index or predicted not in index:
            unknown = true_class if true_class not in index else predicted
            raise InputError(None, "true_class, predicted_class", f"class {unknown!r} is not among the analysis's classes "
                             f"({', '.join(classes)})", "rerun the decoding stage with the current config")
        matrix[index[true_class], index[predicted]] += int(count)
    return matrix


def trials_per_condition(event_tables):
    """Trials of each condition per run, summarised over runs.

    Parameters
    ----------
    event_tables : sequence of pandas.DataFrame
        One events table (with ``trial_type``) per run.

    Returns
    -------
    pandas.DataFrame
        ``condition``, ``min_per_run``, ``max_per_run``, ``runs_with_trials``,
        sorted by condition; a run without a condition counts as 0.

    Examples
    --------
    >>> runs = [pd.DataFrame({"trial_type": ["a", "a", "b"]}), pd.DataFrame({"trial_type": ["a", "b", "b"]})]
    >>> trials_per_condition(runs).to_dict("list")
    {'condition': ['a', 'b'], 'min_per_run': [1, 1], 'max_per_run': [2, 2], 'runs_with_trials': [2, 2]}
    """
    counts = [table["trial_type"].astype(str).value_counts() for table in event_tables]
    conditions = sorted(set().union(*[set(count.index) for count in counts])) if counts else []
    per_run = np.array([[int(count.get(condition, 0)) for condition in conditions] for count in counts],
                       dtype=np.int64).reshape(len(counts), len(conditions))
    return pd.DataFrame({
        "condition": conditions,
        "min_per_run": per_run.min(axis=0).tolist() if len(counts) else [],
        "max_per_run": per_run.max(axis=0).tolist() if len(counts) else [],
        "runs_with_trials": (per_run > 0).sum(axis=0).tolist() if len(counts) else [],
    })


# -- images --------------------------------------------------------------------------

def best_slices(mask):
    """Per axis, the slice index holding the most voxels of ``mask`` (ties: the lowest).

    Parameters
    ----------
    mask : array_like of bool, 3D

    Returns
    -------
    tuple of 3 int
        The middle of the grid along axes where the mask is empty.

    Examples
    --------
    >>> mask = np.zeros((4, 5, 6), dtype=bool); mask[1, 2:4, 3] = True
    >>> best_slices(mask)
    (1, 2, 3)
    """
    mask = np.asarray(mask, dtype=bool)
    if mask.ndim != 3:
        raise InputError(None, "mask", f"expected a 3D mask, got shape {mask.shape}", "pass one 3D volume")
    chosen = []
    for axis in range(3):
        other = tuple(a for a in range(3) if a != axis)
        per_slice = mask.sum(axis=other)
        chosen.append(int(np.argmax(per_slice)) if per_slice.any() else mask.shape[axis] // 2)
    return tuple(chosen)


def grid_axes_mm(affine, shape):
    """Millimetre coordinates of the voxel centres along each grid axis.

    Parameters
    ----------
    affine : array_like, shape (4, 4)
        Voxel-to-world affine.
    shape : sequence of 3 int

    Returns
    -------
    coordinates : list of 3 ndarray
        Increasing coordinates (mm) per axis.
    flips : tuple of 3 bool
        Axes to reverse so that the data follow the increasing coordinates.
    names : tuple of 3 str
        ``("x", "y", "z")`` world axes when the affine is axis-aligned (no
        rotation or shear), otherwise distances along the grid axes.

    Examples
    --------
    >>> coordinates, flips, names = grid_axes_mm(np.diag([-2.0, 2.0, 3.0, 1.0]), (3, 2, 2))
    >>> coordinates[0].tolist(), flips, names
    ([-4.0, -2.0, 0.0], (True, False, False), ('x', 'y', 'z'))
    """
    affine = np.asarray(affine, dtype=np.float64)
    linear = affine[:3, :3]
    off_diagonal = linear - np.diag(np.diag(linear))
    sizes = np.linalg.norm(linear, axis=0)
    if np.all(np.abs(off_diagonal) <= 1e-6 * np.max(sizes)) and np.all(np.abs(np.diag(linear)) > 0):
        coordinates, flips = [], []
        for axis in range(3):
            values = affine[axis, axis] * np.arange(shape[axis]) + affine[axis, 3]
            flips.append(bool(affine[axis, axis] < 0))
            coordinates.append(values[::-1] if flips[-1] else values)
        return coordinates, tuple(flips), ("x", "y", "z")
    coordinates = [sizes[axis] * np.arange(shape[axis]) for axis in range(3)]
    return coordinates, (False, False, False), tuple(f"distance along grid axis {axis + 1}" for axis in range(3))


def _oriented(volume, flips):
    for axis, flip in enumerate(flips):
        if flip:
            volume = np.flip(volume, axis=axis)
    return volume


def _slice_geometry(coordinates, names, axis, index):
    """(horizontal axis, vertical axis, extent, panel title) of the slice ``index`` across ``axis``."""
    horizontal, vertical = [a for a in range(3) if a != axis]
    h, v = coordinates[horizontal], coordinates[vertical]
    dh = (h[1] - h[0]) if len(h) > 1 else 1.0
    dv = (v[1] - v[0]) if len(v) > 1 else 1.0
    extent = (h[0] - dh / 2, h[-1] + dh / 2, v[0] - dv / 2, v[-1] + dv / 2)
    position = coordinates[axis][index]
    title = f"{_SLICE_NAMES[axis]}, {names[axis]} = {position:g} mm"
    return horizontal, vertical, extent, title


def _take(volume, axis, index):
    # A view (read only by its callers): np.take would first copy a flipped volume whole, for every slice.
    return volume[(slice(None),) * axis + (index,)].T  # rows: the vertical axis, for origin="lower"


def _window(values):
    finite = values[np.isfinite(values)]
    if finite.size == 0:
        return 0.0, 1.0
    low, high = np.percentile(finite, _WINDOW_PERCENTILES)
    return (float(low), float(high)) if high > low else (float(low), float(low) + 1.0)


def _label_axes(axes, names, horizontal, vertical):
    axes.set_xlabel(f"{names[horizontal]} (mm)", fontsize=_FONT_SIZE)
    axes.set_ylabel(f"{names[vertical]} (mm)", fontsize=_FONT_SIZE)
    axes.tick_params(labelsize=_FONT_SIZE - 1)


def _fine_axis(centres, factor):
    """Centres of a grid ``factor`` times finer than ``centres``, one fine cell beyond each end."""
    step = (centres[1] - centres[0]) if len(centres) > 1 else 1.0
    fine_step = step / factor
    start = centres[0] - step / 2 - fine_step / 2
    return start + fine_step * np.arange(len(centres) * factor + 2)


def _outline(axes, coordinates, horizontal, vertical, mask_slice, colour, width, factor=_OUTLINE_UPSAMPLING):
    """Outline a mask along its voxel edges (the mask is upsampled and zero-padded before contouring)."""
    if not mask_slice.any():
        return
    fine = np.pad(np.repeat(np.repeat(mask_slice, factor, axis=0), factor, axis=1), 1).astype(np.float64)
    axes.contour(_fine_axis(coordinates[horizontal], factor), _fine_axis(coordinates[vertical], factor), fine,
                 levels=[0.5], colors=[colour], linewidths=width)


def roi_overlay(mask_slices, colours):
    """The ROIs' fills of one slice as one RGBA image: each colour laid over the ones before it ("over" compositing).

    Parameters
    ----------
    mask_slices : sequence of 2D array_like of bool
        One mask slice per ROI, in drawing order.
    colours : sequence of RGBA tuples
        Fill colour (with its opacity) of each ROI.

    Returns
    -------
    numpy.ndarray, shape (rows, columns, 4)
        What drawing each ROI's fill as its own image, one over the other,
        shows (Porter & Duff 1984, "Compositing digital images", the over
        operator, non-premultiplied colours).

    Examples
    --------
    >>> overlay = roi_overlay([np.array([[True, False]]), np.array([[True, True]])],
    ...                       [(1.0, 0.0, 0.0, 0.5), (0.0, 0.0, 1.0, 0.5)])
    >>> overlay[0, 0].round(3).tolist(), overlay[0, 1].tolist()
    ([0.333, 0.0, 0.667, 0.75], [0.0, 0.0, 1.0, 0.5])
    """
    shape = np.shape(mask_slices[0]) if len(mask_slices) else (0, 0)
    colour_sum, alpha = np.zeros(tuple(shape) + (3,)), np.zeros(tuple(shape))
    for mask, colour in zip(mask_slices, colours):
        mask = np.asarray(mask, dtype=bool)
        top = float(colour[3])
        colour_sum[mask] = np.asarray(colour[:3]) * top + colour_sum[mask] * (1.0 - top)  # premultiplied over
        alpha[mask] = top + alpha[mask] * (1.0 - top)
    overlay = np.zeros(tuple(shape) + (4,))
    shown = alpha > 0
    overlay[shown, :3] = colour_sum[shown] / alpha[shown, None]
    overlay[..., 3] = alpha
    return overlay


SEARCHLIGHT_QUANTITY = "margin over chance"
SEARCHLIGHT_QUANTITY_UNIT = "balanced accuracy minus its chance level, proportion"


def _side_marks(axes, names, horizontal):
    """L and R at the panel's edges when the horizontal axis is the world x axis (x grows to the subject's right)."""
    if names[horizontal] != "x":
        return
    for position, text, align in ((0.01, "L", "left"), (0.99, "R", "right")):
        axes.text(position, 0.97, text, transform=axes.transAxes, ha=align, va="top", fontsize=_FONT_SIZE + 1,
                  fontweight="bold", color="white", bbox={"facecolor": "0.15", "edgecolor": "none", "pad": 1.5})


def searchlight_figure(mean_maps, p_fwe_maps, directions, background, brain_mask, affine, alpha, title):
    """Group searchlight maps thresholded at the corrected level, over the mean image, the same slices for every direction.

    Parameters
    ----------
    mean_maps, p_fwe_maps : array_like, 4D (x, y, z, direction)
        Group mean of the margin over chance (balanced accuracy minus chance),
        and its family-wise corrected p.
    directions : sequence of str
        One name per volume.
    background : array_like, 3D
        The anatomical underlay: the mean over subjects of their mean images.
    brain_mask : array_like of bool, 3D
    affine : array_like, shape (4, 4)
    alpha : float
        Voxels with ``p_fwe < alpha`` are coloured; the rest shows the underlay.
    title : str

    Returns
    -------
    matplotlib.figure.Figure

    Notes
    -----
    One row per direction, three orthogonal slices through the planes with
    the most significant voxels over all directions (the brain's when none
    survives), so rows can be compared. Axes in mm; L and R mark the sides.
    """
    from matplotlib import colormaps
    from matplotlib.figure import Figure
    from matplotlib.lines import Line2D
    from matplotlib.patches import Patch

    means = np.asarray(mean_maps, dtype=np.float64)
    p_fwe = np.asarray(p_fwe_maps, dtype=np.float64)
    if means.ndim != 4 or means.shape != p_fwe.shape or means.shape[3] != len(directions):
        raise InputError(None, "searchlight maps", f"shapes {means.shape} and {p_fwe.shape} do not fit {len(directions)} directions",
                         "rerun the searchlight_group job")
    coordinates, flips, names = grid_axes_mm(affine, means.shape[:3])
    anatomy = _oriented(np.asarray(background, dtype=np.float64), flips)
    brain = _oriented(np.asarray(brain_mask, dtype=bool), flips)
    low, high = _window(anatomy[brain] if brain.any() else anatomy)
    significant = _oriented(np.nan_to_num(p_fwe, nan=1.0) < alpha, flips) & brain[..., None]
    shown_values = np.where(significant, _oriented(means, flips), np.nan)
    limit = float(np.nanmax(np.abs(shown_values))) if np.isfinite(shown_values).any() else 0.1
    limit = limit if limit > 0 else 0.1
    slices = best_slices(significant.any(axis=3) if significant.any() else brain)
    colour_map = colormaps["PuOr_r"].with_extremes(bad=(0.0, 0.0, 0.0, 0.0))
    figure = Figure(figsize=(11, 3.2 * len(directions) + 0.8), layout="constrained")
    panels = np.atleast_2d(figure.subplots(len(directions), 3))
    image = None
    for row, direction in enumerate(directions):
        for axis, axes in enumerate(panels[row]):
            index = slices[axis]
            horizontal, vertical, extent, panel_title = _slice_geometry(coordinates, names, axis, index)
            axes.imshow(_take(anatomy, axis, index), cmap="gray", vmin=low, vmax=high, origin="lower", extent=extent,
                        interpolation=_VOXELS)
            image = axes.imshow(_take(shown_values[..., row], axis, index), cmap=colour_map, vmin=-limit, vmax=limit,
                                origin="lower", extent=extent, interpolation=_VOXELS)
            _outline(axes, coordinates, horizontal, vertical, _take(brain, axis, index), _BRAIN_OUTLINE, 0.8)
            _side_marks(axes, names, horizontal)
            axes.set_title(f"{direction_label(direction)}: {panel_title}", fontsize=_FONT_SIZE)
            _label_axes(axes, names, horizontal, vertical)
    if image is not None:
        bar = figure.colorbar(image, ax=panels, shrink=0.6)
        bar.set_label(f"{SEARCHLIGHT_QUANTITY} ({SEARCHLIGHT_QUANTITY_UNIT})", fontsize=_FONT_SIZE - 1)
        bar.ax.tick_params(labelsize=_FONT_SIZE - 1)
    handles = [Patch(facecolor=colour_map(0.85), label=f"coloured: p (family-wise corrected, voxel-wise maximum) < {alpha:g}"),
               Line2D([], [], color=_BRAIN_OUTLINE, linewidth=1.2, label="brain mask (outline)")]
    figure.legend(handles=handles, loc="outside lower center", ncols=2, fontsize=_FONT_SIZE, frameon=False)
    figure.suptitle(title, fontsize=_FONT_SIZE + 1)
    return figure


def searchlight_clusters(mean_maps, p_fwe_maps, directions, affine, alpha):
    """Clusters of corrected-significant searchlight centres, with size and peak in mm.

    Parameters
    ----------
    mean_maps, p_fwe_maps : array_like, 4D (x, y, z, direction)
    directions : sequence of str
    affine : array_like, shape (4, 4)
        Voxel-to-world affine (mm).
    alpha : float

    Returns
    -------
    pandas.DataFrame
        ``direction``, ``cluster`` (1 = largest), ``n_voxels_cluster``,
        ``volume_mm3``, ``peak_margin`` (the largest margin over chance in
        the cluster), ``peak_p_fwe``, ``peak_x_mm``, ``peak_y_mm``,
        ``peak_z_mm``; largest cluster first within each direction.

    Notes
    -----
    Clusters are face-, edge- or corner-connected voxels (26-neighbourhood,
    ``scipy.ndimage.label``; common practice, no source). The voxel volume
    is the absolute determinant of the affine's 3x3 part. The p-values are
    voxel-wise corrected; the table describes where the significant voxels
    lie, it is not a cluster-level test.

    Examples
    --------
    >>> maps = np.zeros((4, 4, 4, 1)); p = np.ones((4, 4, 4, 1)); p[1:3, 1, 1, 0] = 0.01; maps[2, 1, 1, 0] = 0.2
    >>> table = searchlight_clusters(maps, p, ["within"], np.diag([2.0, 2.0, 2.0, 1.0]), 0.05)
    >>> table[["n_voxels_cluster", "volume_mm3", "peak_x_mm"]].values.tolist()
    [[2.0, 16.0, 4.0]]
    """
    from scipy import ndimage

    means = np.asarray(mean_maps, dtype=np.float64)
    p_fwe = np.asarray(p_fwe_maps, dtype=np.float64)
    affine = np.asarray(affine, dtype=np.float64)
    voxel_mm3 = round(float(abs(np.linalg.det(affine[:3, :3]))), 6)  # 2 x 2 x 2 mm gives 8, not 7.999999
    columns = ["direction", "cluster", "n_voxels_cluster", "volume_mm3", "peak_margin", "peak_p_fwe",
               "peak_x_mm", "peak_y_mm", "peak_z_mm"]
    rows = []
    for index, direction in enumerate(directions):
        significant = np.nan_to_num(p_fwe[..., index], nan=1.0) < alpha
        labels, n_clusters = ndimage.label(significant, structure=np.ones((3, 3, 3), dtype=bool))
        if n_clusters == 0:
            continue
        sizes = np.bincount(labels.ravel(), minlength=n_clusters + 1)[1:]
        values = np.where(significant, np.nan_to_num(means[..., index], nan=-np.inf), -np.inf)
        peaks = ndimage.maximum_position(values, labels, index=np.arange(1, n_clusters + 1))
        order = sorted(range(n_clusters), key=lambda k: (-sizes[k], -values[peaks[k]], peaks[k]))
        for rank, k in enumerate(order, start=1):
            peak = peaks[k]
            world = affine @ np.array([*peak, 1.0])
            rows.append([direction, rank, float(sizes[k]), float(sizes[k]) * voxel_mm3, float(means[peak + (index,)]),
                         float(p_fwe[peak + (index,)]), float(world[0]), float(world[1]), float(world[2])])
    return pd.DataFrame(rows, columns=columns)


# -- results figures -------------------------------------------------------------------
#
# The result figures are laid out in inches computed from their own labels (widths measured in the font
# matplotlib draws with), not by a layout engine: constrained layout measures every text of a figure
# again on each draw, most of a preview's cost (benchmarks/bench_report.py). tests/test_report.py checks,
# for crowded cases, that every text lies inside the figure and that the legend overlaps no panel.

_LINE_IN = 1.25 / 72  # a text line's height per point of font size (inches; DejaVu Sans line spacing, common practice)
_PAD_IN = 0.06


@functools.lru_cache(maxsize=1)
def _measuring_font():
    from PIL import ImageFont

    from foldwise.glm.design_image import font_path  # DejaVu Sans, matplotlib's default font

    return ImageFont.truetype(font_path(), 100)


def _text_width_in(text, size_pt):
    """Width of ``text`` in DejaVu Sans (matplotlib's default font) at ``size_pt``, in inches."""
    return _measuring_font().getlength(str(text)) / 100.0 * size_pt / 72.0


def _rotated_drop_in(labels, size_pt, degrees):
    """How far rotated tick labels reach below their ticks (inches), with the tick and its pad."""
    angle = math.radians(degrees)
    longest = max((_text_width_in(label, size_pt) for label in labels), default=0.0)
    return longest * math.sin(angle) + size_pt * _LINE_IN * math.cos(angle) + 7.0 / 72  # tick 3.5 pt + pad 3.5 pt


def _legend_height_in(n_rows, size_pt):
    """A frameless legend's height: its rows (text and spacing) and its border padding (matplotlib's defaults)."""
    return n_rows * size_pt * 1.5 / 72 + 2 * 0.4 * size_pt / 72 + 0.5 * size_pt / 72


def _legend_width_in(texts, n_columns, size_pt):
    """A legend's width with ``n_columns`` (filled column by column, as matplotlib does): per column its widest text,
    the handle (2 em) and its pad (0.8 em), and 2 em between columns (matplotlib's defaults)."""
    n_rows = math.ceil(len(texts) / n_columns)
    columns = [texts[start:start + n_rows] for start in range(0, len(texts), n_rows)]
    em = size_pt / 72
    return (sum(max(_text_width_in(text, size_pt) for text in column) + 2.8 * em for column in columns)
            + 2.0 * em * (len(columns) - 1) + 0.8 * em)


def _place_panels(figure, n_panels, left_in, right_in, bottom_in, top_in, gap_in):
    """Lay out ``n_panels`` side by side with margins and gaps in inches (``subplots_adjust`` fractions)."""
    width, height = figure.get_size_inches()
    available = width - left_in - right_in
    panel_in = max((available - (n_panels - 1) * gap_in) / n_panels, 0.5)
    figure.subplots_adjust(left=left_in / width, right=1.0 - right_in / width, bottom=bottom_in / height,
                           top=1.0 - top_in / height, wspace=gap_in / panel_in if n_panels > 1 else 0.0)


_TOP_IN = 0.62  # suptitle and panel titles above the panels
# Panel titles placed at the top of their panel: where matplotlib's automatic placement puts them when no tick label
# or axis label is above the panel (none is), without measuring the axis's texts again on every draw.
_TITLE_Y = 1.0

def _score_limits(panels):
    values = [panel["scores"][np.isfinite(panel["scores"])] for panel in panels]
    values += [panel[key][np.isfinite(panel[key])] for panel in panels for key in ("mean", "ci_low", "ci_high", "chance")]
    values = np.concatenate(values) if values else np.array([])
    if values.size == 0:
        return 0.0, 1.0
    low, high = max(0.0, float(values.min()) - 0.05), min(1.0, float(values.max()) + 0.05)
    return (low, high) if high > low else (max(0.0, low - 0.05), min(1.0, high + 0.05))


def _held(pool, key, make):
    """The figure kept in ``pool`` under ``key``, made by ``make()`` when absent (no pool: always made)."""
    if pool is None:
        return make()
    if key not in pool:
        pool[key] = make()
    return pool[key]


def curve_figure(panels, title, alpha, pool=None):
    """Decoding curves: balanced accuracy against the number of voxels, one panel per direction.

    Parameters
    ----------
    panels : sequence of dict
        ``curve_data`` output plus ``label`` (direction in words).
    title : str
    alpha : float
        Shown in the legend of the significance markers.
    pool : dict, optional
        Figures kept for reuse: a figure with the same panels, subjects and
        alpha is taken from it and its artists' data, ticks, limits and
        layout replaced, instead of building a new figure, axes, ticks and
        legend (most of a preview's building cost). The picture is the one a
        new figure gives (``tests/test_report.py`` compares the pixels).
        The returned figure belongs to the pool: draw it before the next call.

    Returns
    -------
    matplotlib.figure.Figure
        Thin lines: single subjects; thick line and band: group mean and its
        95% confidence interval; dashed: chance; a row of stars along the top:
        ``p_fwe < alpha``;
        open circles: the ROI held fewer voxels than requested for at least
        one subject.
    """
    if not panels:
        raise InputError(None, "direction", "no direction to draw", "rerun the group stage")
    key = ("curve", tuple(panel["label"] for panel in panels), len(panels[0]["subjects"]), float(alpha))
    held = _held(pool, key, lambda: _curve_skeleton([panel["label"] for panel in panels], len(panels[0]["subjects"]),
                                                    alpha))
    _curve_update(held, panels, title)
    return held["figure"]


def _curve_skeleton(labels, n_subjects, alpha):
    """A curve figure's fixed parts (axes, artists without data, legend), for :func:`_curve_update` to fill in."""
    from matplotlib.figure import Figure
    from matplotlib.lines import Line2D
    from matplotlib.patches import Patch
    from matplotlib.ticker import NullLocator

    n_panels = len(labels)
    width = 6.6 if n_panels == 1 else 3.4 * n_panels
    n_columns = 2 if n_panels == 1 else 3
    figure = Figure(figsize=(width, 4.4))
    axes_list = np.atleast_1d(figure.subplots(1, n_panels, sharey=True, squeeze=False)[0])
    empty = np.array([1.0, 2.0]), np.array([np.nan, np.nan])
    artists = []
    for index, (axes, label) in enumerate(zip(axes_list, labels)):
        colour = OKABE_ITO[_PANEL_COLOURS[index % len(_PANEL_COLOURS)]]
        # Created in the order a figure drawn from scratch adds them (equal z-orders draw in that order).
        subject_lines = [axes.plot(*empty, color=colour, alpha=0.35, linewidth=0.8)[0] for _ in range(n_subjects)]
        band = axes.fill_between(*empty, empty[1], color=colour, alpha=0.2, linewidth=0)
        chance = axes.plot(*empty, color="0.3", linestyle="--", linewidth=1.0)[0]
        mean = axes.plot(*empty, color=colour, linewidth=2.0)[0]
        full = axes.scatter([], [], s=28, color=colour, zorder=3)
        capped = axes.scatter([], [], s=28, facecolors="white", edgecolors=colour, zorder=3)
        # A row of stars along the top, so they hide no point of the curve.
        stars = axes.scatter([], [], s=90, marker="*", color=OKABE_ITO["black"], transform=axes.get_xaxis_transform(),
                             zorder=4)
        divider = axes.axvline(1.0, color="0.6", linestyle=":", linewidth=0.8)
        axes.set_xscale("log")
        axes.xaxis.set_minor_locator(NullLocator())
        axes.tick_params(axis="y", labelsize=_FONT_SIZE - 1)
        axes.set_title(label, fontsize=_FONT_SIZE + 1, y=_TITLE_Y)
        axes.set_xlabel("number of voxels (log scale)", fontsize=_FONT_SIZE)
        axes.grid(True, axis="y", color="0.9", linewidth=0.6)
        artists.append({"subjects": subject_lines, "band": band, "chance": chance, "mean": mean, "full": full,
                        "capped": capped, "stars": stars, "divider": divider})
    axes_list[0].set_ylabel("balanced accuracy (proportion)", fontsize=_FONT_SIZE)
    grey = "0.35"
    handles = [
        Line2D([], [], color=grey, linewidth=2.0, marker="o", label=f"group mean ({n_subjects} subjects)"),
        Patch(facecolor=grey, alpha=0.25, label="95% confidence interval of the mean"),
        Line2D([], [], color=grey, alpha=0.5, linewidth=0.8, label="single subjects"),
        Line2D([], [], color="0.3", linestyle="--", linewidth=1.0, label="chance level"),
        Line2D([], [], color=OKABE_ITO["black"], marker="*", markersize=11, linestyle="none",
               label=f"p (family-wise corrected) < {alpha:g} (row at the top)"),
        Line2D([], [], color=grey, marker="o", markerfacecolor="white", linestyle="none",
               label="ROI smaller than the count for some subjects"),
    ]
    figure.legend(handles=handles, loc="lower center", bbox_to_anchor=(0.5, _PAD_IN / 4.4), ncols=n_columns,
                  fontsize=_FONT_SIZE - 1, frameon=False, borderaxespad=0.0)
    title = figure.suptitle("", fontsize=_FONT_SIZE + 2)
    return {"figure": figure, "axes": axes_list, "artists": artists, "title": title, "n_columns": n_columns}


def _curve_update(held, panels, title):
    """Put one ROI's curves into a figure from :func:`_curve_skeleton`: data, ticks, limits, layout and title."""
    figure, n_columns = held["figure"], held["n_columns"]
    labels = [label for panel in panels for label in panel["labels"]]
    legend_in = _legend_height_in(math.ceil(6 / n_columns), _FONT_SIZE - 1)
    first_label_in = max(_text_width_in(panel["labels"][0], _FONT_SIZE - 1) for panel in panels) * math.sin(math.pi / 4)
    _place_panels(figure, len(panels), left_in=0.72, right_in=0.2,
                  bottom_in=_PAD_IN + legend_in + _PAD_IN + _FONT_SIZE * _LINE_IN + 4.0 / 72
                  + _rotated_drop_in(labels, _FONT_SIZE - 1, 45), top_in=_TOP_IN,
                  gap_in=0.2 + first_label_in)
    low, high = _score_limits(panels)
    for axes, artists, panel in zip(held["axes"], held["artists"], panels):
        x = panel["x"]
        for line, scores in zip(artists["subjects"], panel["scores"]):
            line.set_data(x, scores)
        band = np.isfinite(panel["ci_low"]) & np.isfinite(panel["ci_high"])
        artists["band"].set_data(x, panel["ci_low"], panel["ci_high"], where=band)
        artists["band"].set_visible(bool(band.any()))
        artists["chance"].set_data(x, panel["chance"])
        artists["mean"].set_data(x, panel["mean"])
        full, capped = ~panel["capped"], panel["capped"]
        artists["full"].set_offsets(np.column_stack([x[full], panel["mean"][full]]))
        artists["capped"].set_offsets(np.column_stack([x[capped], panel["mean"][capped]]))
        significant = panel["significant"]
        artists["stars"].set_offsets(np.column_stack([x[significant], np.full(int(significant.sum()), _STAR_ROW)]))
        artists["stars"].set_visible(bool(significant.any()))
        # 'all' is a size of its own: set apart by a dotted line.
        divides = panel["counts"][-1] == "all" and len(x) > 1
        artists["divider"].set_xdata([math.sqrt(x[-2] * x[-1])] * 2 if divides else [1.0, 1.0])
        artists["divider"].set_visible(divides)
        axes.set_xticks(x)
        axes.set_xticklabels(panel["labels"], rotation=45, ha="right", fontsize=_FONT_SIZE - 1)
        axes.set_xlim(x.min() / 1.35, x.max() * 1.35)
        axes.set_ylim(low, high + _STAR_HEADROOM)
        axes.set_yticks([tick for tick in np.round(np.arange(0.0, 1.0001, 0.1), 1) if low <= tick <= high])
    held["title"].set_text(title)
    return figure


def group_confusion(matrices):
    """The group confusion matrix: the mean over subjects of each subject's row-normalised matrix.

    Parameters
    ----------
    matrices : sequence of ndarray, shape (n_classes, n_classes)
        Counts per subject (rows: true class, columns: predicted class).

    Returns
    -------
    ndarray of float, shape (n_classes, n_classes)
        Each row sums to 1 (NaN for a class no subject tested): the mean
        share of a true class's test samples given each prediction. Row
        normalisation before averaging weighs subjects equally, whatever
        their number of trials (common practice, no source).

    Examples
    --------
    >>> group_confusion([np.array([[3, 1], [0, 4]]), np.array([[1, 1], [2, 2]])]).tolist()
    [[0.625, 0.375], [0.25, 0.75]]
    """
    stack = np.asarray([np.asarray(matrix, dtype=np.float64) for matrix in matrices])
    totals = stack.sum(axis=2, keepdims=True)
    shares = np.divide(stack, totals, out=np.full(stack.shape, np.nan), where=totals > 0)
    with np.errstate(invalid="ignore"):
        counted = np.isfinite(shares).sum(axis=0)
        summed = np.nansum(shares, axis=0)
    return np.divide(summed, counted, out=np.full(summed.shape, np.nan), where=counted > 0)


def confusion_figure(shares, directions, classes, title, n_subjects, pool=None):
    """Group confusion matrices (mean of row-normalised subject matrices), one panel per direction.

    Parameters
    ----------
    shares : dict
        ``direction -> ndarray`` from :func:`group_confusion`.
    directions : sequence of str
    classes : sequence of str
    title : str
    n_subjects : int
    pool : dict, optional
        Figures kept for reuse (as in :func:`curve_figure`): a figure with the
        same directions, classes and number of subjects gets the new shares,
        cell numbers and title instead of being built again.

    Returns
    -------
    matplotlib.figure.Figure
        Colour and number: the mean share (percent) of a true class's test
        samples given each predicted class; rows sum to 100.
    """
    key = ("confusion", tuple(directions), tuple(classes), int(n_subjects))
    held = _held(pool, key, lambda: _confusion_skeleton(directions, classes, n_subjects))
    for direction, image, cells in zip(directions, held["images"], held["cells"]):
        values = np.asarray(shares[direction], dtype=np.float64)
        image.set_data(values)
        for (row, column), share in np.ndenumerate(values):
            cells[row][column].set_text("n/a" if not np.isfinite(share) else f"{100 * share:.0f}")
            cells[row][column].set_color("white" if not np.isfinite(share) or share < 0.55 else "black")
    held["title"].set_text(title)
    return held["figure"]


def _confusion_skeleton(directions, classes, n_subjects):
    """A confusion figure's fixed parts (panels, cell texts, colour bar), for :func:`confusion_figure` to fill in."""
    from matplotlib import colormaps
    from matplotlib.figure import Figure

    n_panels = len(directions)
    side = 0.42 * len(classes) + 1.0
    width, height = max(4.2, side * n_panels + 1.4), side + 1.5
    figure = Figure(figsize=(width, height))
    class_in = max(_text_width_in(name, _FONT_SIZE - 1) for name in classes)
    bar_label = [f"share of the true class's test samples", f"(mean of {n_subjects} subjects)"]
    right_in = 0.12 + 0.15 + 7.0 / 72 + _text_width_in("100", _FONT_SIZE - 1) + 0.1 + 2 * (_FONT_SIZE - 1) * _LINE_IN + 0.08
    bottom_in = _PAD_IN + _FONT_SIZE * _LINE_IN + 4.0 / 72 + _rotated_drop_in(classes, _FONT_SIZE - 1, 30)
    left_in = 0.08 + _FONT_SIZE * _LINE_IN + 4.0 / 72 + class_in + 7.0 / 72
    _place_panels(figure, n_panels, left_in=left_in, right_in=right_in, bottom_in=bottom_in, top_in=_TOP_IN - 0.06,
                  gap_in=class_in + 7.0 / 72 + 0.15)
    panels = np.atleast_1d(figure.subplots(1, n_panels, squeeze=False)[0])
    colour_map = colormaps["cividis"]
    images, cells = [], []
    blank = np.zeros((len(classes), len(classes)))
    for axes, direction in zip(panels, directions):
        images.append(axes.imshow(blank, cmap=colour_map, vmin=0.0, vmax=1.0, interpolation=_VOXELS))
        cells.append([[axes.text(column, row, "", ha="center", va="center", fontsize=_FONT_SIZE - 1)
                       for column in range(len(classes))] for row in range(len(classes))])
        axes.set_xticks(np.arange(len(classes)), classes, rotation=30, ha="right", fontsize=_FONT_SIZE - 1)
        axes.set_yticks(np.arange(len(classes)), classes, fontsize=_FONT_SIZE - 1)
        axes.set_xlabel("predicted class", fontsize=_FONT_SIZE)
        axes.set_title(direction_label(direction), fontsize=_FONT_SIZE, y=_TITLE_Y)
    panels[0].set_ylabel("true class", fontsize=_FONT_SIZE)
    # The colour bar in its own strip at the right, 85% of the panels' height (placed, not taken from the panels).
    bottom, top = bottom_in / height, 1.0 - (_TOP_IN - 0.06) / height
    bar_axes = figure.add_axes((1.0 - (right_in - 0.12) / width, bottom + 0.075 * (top - bottom), 0.15 / width,
                                0.85 * (top - bottom)))
    bar = figure.colorbar(images[-1], cax=bar_axes)
    bar.set_label("\n".join(bar_label), fontsize=_FONT_SIZE - 1)
    bar.ax.tick_params(labelsize=_FONT_SIZE - 1)
    title = figure.suptitle("", fontsize=_FONT_SIZE + 1)
    return {"figure": figure, "images": images, "cells": cells, "title": title}


def comparison_data(subject_rows, group_rows, rois, directions, count):
    """Per ROI and direction: subjects' scores, group mean, its CI and chance at one voxel count.

    Parameters
    ----------
    subject_rows : pandas.DataFrame
        The analysis's subject summaries (``subject``, ``roi``, ``direction``,
        ``n_voxels``, ``balanced_accuracy``).
    group_rows : pandas.DataFrame
        The analysis's group table.
    rois, directions : sequence of str
    count : str
        The voxel count shown.

    Returns
    -------
    list of dict
        One per direction: ``direction``, ``rois``, ``scores`` (list of
        arrays, one per ROI), ``mean``, ``ci_low``, ``ci_high``, ``chance``,
        ``significant`` (arrays over ROIs), ``shown_counts`` (the count each
        ROI is shown at).

    Notes
    -----
    An ROI smaller than ``count`` in every subject has no rows at it: the
    decoding step reports such counts once, as ``all`` (every voxel of the
    ROI, which is what ``count`` would select there). That ROI is shown at
    ``all``, and ``shown_counts`` says so.
    """
    panels = []
    subject_counts, group_counts = subject_rows["n_voxels"].astype(str), group_rows["n_voxels"].astype(str)
    group_rois = group_rows["roi"].astype(str)
    shown_counts = [count if ((group_rois == roi) & (group_counts == count)).any()
                    or not ((group_rois == roi) & (group_counts == "all")).any() else "all" for roi in rois]
    for direction in directions:
        panel = {"direction": direction, "rois": list(rois), "scores": [], "shown_counts": list(shown_counts)}
        for key in ("mean", "ci_low", "ci_high", "chance", "p_fwe"):
            panel[key] = np.full(len(rois), np.nan)
        for index, (roi, shown) in enumerate(zip(rois, shown_counts)):
            own = subject_rows[(subject_rows["direction"].astype(str) == direction) & (subject_counts == shown)
                               & (subject_rows["roi"].astype(str) == roi)]
            panel["scores"].append(pd.to_numeric(own["balanced_accuracy"], errors="coerce").to_numpy(dtype=np.float64))
            row = group_rows[(group_rows["direction"].astype(str) == direction) & (group_counts == shown) & (group_rois == roi)]
            if row.empty:
                raise InputError(None, "roi, direction, n_voxels", f"no group row for ROI {roi}, direction {direction}, "
                                 f"{count} voxels", "rerun the group stage")
            for key in ("mean", "ci_low", "ci_high", "chance", "p_fwe"):
                panel[key][index] = float(pd.to_numeric(row[key], errors="coerce").iloc[0])
        panels.append(panel)
    return panels


def comparison_figure(panels, title, alpha):
    """ROIs side by side at one voxel count: subjects as dots, group mean with its 95% CI, chance line.

    Parameters
    ----------
    panels : sequence of dict
        :func:`comparison_data` output.
    title : str
    alpha : float
        A star marks ``p_fwe < alpha``.

    Returns
    -------
    matplotlib.figure.Figure
    """
    from matplotlib.figure import Figure
    from matplotlib.lines import Line2D

    n_rois = len(panels[0]["rois"])
    width = max(4.6, (0.9 * n_rois + 1.2) * len(panels))
    figure = Figure(figsize=(width, 4.2))
    legend_texts = ["single subjects", "group mean and 95% confidence interval", "chance level",
                    f"p (family-wise corrected) < {alpha:g}"]
    n_columns = next(n for n in (4, 2, 1) if _legend_width_in(legend_texts, n, _FONT_SIZE - 1) <= width - 0.2)
    _place_panels(figure, len(panels), left_in=0.72, right_in=0.2,
                  bottom_in=_PAD_IN + _legend_height_in(4 // n_columns, _FONT_SIZE - 1) + _PAD_IN
                  + _FONT_SIZE * _LINE_IN + 7.0 / 72, top_in=_TOP_IN, gap_in=0.2)
    axes_list = np.atleast_1d(figure.subplots(1, len(panels), sharey=True, squeeze=False)[0])
    low, high = 1.0, 0.0
    for panel in panels:
        values = np.concatenate([*panel["scores"], panel["ci_low"], panel["ci_high"], panel["chance"]])
        values = values[np.isfinite(values)]
        if values.size:
            low, high = min(low, float(values.min())), max(high, float(values.max()))
    low, high = (max(0.0, low - 0.05), min(1.0, high + 0.05)) if high > low else (0.0, 1.0)
    for axes, panel in zip(axes_list, panels):
        # One artist per kind for all the ROIs of a panel (ROI by ROI, in order), not one per ROI: the ROIs' marks
        # lie a column apart and never overlap, so the picture is the same with a tenth of the artists to build.
        dots_x, dots_y, dots_colour = [], [], []
        for index, scores in enumerate(panel["scores"]):
            # Subjects spread sideways by rank, so equal scores stay visible (no random jitter).
            offsets = (np.argsort(np.argsort(scores)) / max(len(scores) - 1, 1) - 0.5) * 0.3 if len(scores) else scores
            dots_x.append(index + offsets)
            dots_y.append(scores)
            dots_colour += [OKABE_ITO[_ROI_COLOURS[index % len(_ROI_COLOURS)]]] * len(scores)
        axes.scatter(np.concatenate(dots_x), np.concatenate(dots_y), s=16, color=dots_colour or "none", alpha=0.75,
                     edgecolors="none", zorder=2)
        centres = np.arange(n_rois) + 0.32
        axes.errorbar(centres, panel["mean"], yerr=[panel["mean"] - panel["ci_low"], panel["ci_high"] - panel["mean"]],
                      fmt="D", color="black", markersize=5, capsize=3, linewidth=1.2, zorder=3)
        axes.hlines(panel["chance"], np.arange(n_rois) - 0.45, np.arange(n_rois) + 0.45, colors="0.3", linestyles="--",
                    linewidth=1.0)
        starred = np.isfinite(panel["p_fwe"]) & (panel["p_fwe"] < alpha)
        if starred.any():
            axes.scatter(centres[starred], np.full(int(starred.sum()), _STAR_ROW), s=80, marker="*", color="black",
                         transform=axes.get_xaxis_transform(), zorder=4)
        shown = panel.get("shown_counts") or [""] * n_rois
        mixed = len(set(shown)) > 1  # ROIs smaller than the count shown are shown with all their voxels: marked
        axes.set_xticks(np.arange(n_rois), [f"ROI {roi}" + (" (all)" if mixed and count == "all" else "")
                                            for roi, count in zip(panel["rois"], shown)], fontsize=_FONT_SIZE)
        axes.set_xlim(-0.6, n_rois - 0.4)
        axes.set_ylim(low, high + _STAR_HEADROOM)
        axes.set_title(direction_label(panel["direction"]), fontsize=_FONT_SIZE + 1, y=_TITLE_Y)
        axes.grid(True, axis="y", color="0.9", linewidth=0.6)
        axes.tick_params(axis="y", labelsize=_FONT_SIZE - 1)
    axes_list[0].set_ylabel("balanced accuracy (proportion)", fontsize=_FONT_SIZE)
    handles = [Line2D([], [], color="0.4", marker="o", linestyle="none", label=legend_texts[0]),
               Line2D([], [], color="black", marker="D", label=legend_texts[1]),
               Line2D([], [], color="0.3", linestyle="--", label=legend_texts[2]),
               Line2D([], [], color="black", marker="*", markersize=10, linestyle="none", label=legend_texts[3])]
    figure.legend(handles=handles, loc="lower center", bbox_to_anchor=(0.5, _PAD_IN / 4.2), ncols=n_columns,
                  fontsize=_FONT_SIZE - 1, frameon=False, borderaxespad=0.0)
    figure.suptitle(title, fontsize=_FONT_SIZE + 1)
    return figure


# -- provenance ------------------------------------------------------------------------

def reproduce_commands(config_file, dataset_source, overrides=()):
    """The commands that reproduce the study, as (description, command) pairs.

    Parameters
    ----------
    config_file : str or None
        The study config file (None: given to Snakemake with ``--configfile``).
    dataset_source : str
        ``demo`` or ``bids``.
    overrides : sequence of str, optional
        The run's command-line overrides, as Snakemake's ``--config`` took
        them (``set=a.b=1 c=2`` or ``key=value``); repeated in every command
        (``make`` passes dotted ones as ``SET=``; other forms only on the
        Snakemake command line).

    Returns
    -------
    list of (str, str)

    Examples
    --------
    >>> reproduce_commands("config/config.yaml", "demo")[0]
    ('the demo study, with the pinned environment', 'make demo')
    >>> reproduce_commands("studies/mine.yaml", "bids", ["set=study.seed=3"])[0][1]
    'make study CONFIG=studies/mine.yaml SET=study.seed=3'
    """
    import shlex

    overrides = [str(entry) for entry in overrides]
    default = config_file in (None, "", "config/config.yaml")
    settable = all(entry.startswith("set=") for entry in overrides)
    make_overrides = f" SET={shlex.quote(' '.join(entry[len('set='):] for entry in overrides))}" if overrides and settable else ""
    commands = []
    if settable:
        if default:
            what = "the demo study" if dataset_source == "demo" else "the study"
            commands.append((f"{what}, with the pinned environment", "make demo" + make_overrides))
        else:
            commands.append(("the study, with the pinned environment", f"make study CONFIG={config_file}" + make_overrides))
    if default:
        config_part = "--config config_file=config/config.yaml" if config_file else "--configfile <the study config>"
    else:
        config_part = f"--config config_file={config_file}"
    config_part += "".join(" " + shlex.quote(entry) for entry in overrides)
    commands.append(("the same with Snakemake directly" if settable else "the study, with Snakemake directly (its command-line overrides included)",
                     f".venv/bin/snakemake --profile config/profiles/local --cores 2 {config_part}"))
    commands.append(("recompute everything with the memo off and compare with these results", "make verify"
                     + ("" if default else f" CONFIG={config_file}")))
    return commands


def manifest_summary(records):
    """Jobs and output files per step, from the jobs' provenance records.

    Parameters
    ----------
    records : sequence of dict
        Provenance records (``step``, ``outputs``).

    Returns
    -------
    pandas.DataFrame
        ``step``, ``jobs``, ``output_files``, steps in first-seen order.

    Examples
    --------
    >>> manifest_summary([{"step": "glm", "outputs": [1, 2]}, {"step": "glm", "outputs": [3]}]).to_dict("list")
    {'step': ['glm'], 'jobs': [2], 'output_files': [3]}
    """
    steps = {}
    for record in records:
        step = str(record["step"])
        jobs, files = steps.get(step, (0, 0))
        steps[step] = (jobs + 1, files + len(record["outputs"]))
    return pd.DataFrame({"step": list(steps), "jobs": [value[0] for value in steps.values()],
                         "output_files": [value[1] for value in steps.values()]})
