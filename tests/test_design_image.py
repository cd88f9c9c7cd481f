"""The run's design image, drawn into pixels by foldwise.glm.design_image, against the same figure drawn by matplotlib.

Reference: matplotlib (a general-purpose plotting library from the package
registry), drawing the figure the GLM job drew before (4 x 3 inches at
300 dpi, the design in the axes box (0.36, 0.14, 0.6, 0.76), the BrBG
colour map from -1 to 1, nearest-neighbour image, regressor names at 4 pt,
scan numbers at 5 pt, "scan" at 6 pt, the title at 7 pt). The colour
table, the scan ticks and the picture itself are compared with it.
"""

import io

import numpy as np
import pytest

matplotlib = pytest.importorskip("matplotlib")

from matplotlib.backends.backend_agg import FigureCanvasAgg  # noqa: E402
from matplotlib.figure import Figure  # noqa: E402
from PIL import Image  # noqa: E402

from foldwise.glm.design_image import design_png, diverging_lookup, scan_ticks  # noqa: E402


def _matplotlib_design_figure(matrix, labels, title):
    """The design figure as matplotlib draws it (the GLM job's earlier drawing, kept here as the reference)."""
    values = np.asarray(matrix, dtype=np.float64)
    scale = np.max(np.abs(values), axis=0)
    shown = np.divide(values, scale, out=np.zeros_like(values), where=scale > 0).T
    figure = Figure(figsize=(4, 3))
    axes = figure.add_axes((0.36, 0.14, 0.6, 0.76))
    axes.imshow(shown, aspect="auto", cmap="BrBG", interpolation="nearest", vmin=-1, vmax=1)
    axes.set_yticks([position for position, _ in labels])
    axes.set_yticklabels([text for _, text in labels], fontsize=4)
    axes.tick_params(axis="x", labelsize=5)
    axes.set_xlabel("scan", fontsize=6)
    axes.set_title(title, fontsize=7)
    return figure


def _pixels(png):
    return np.asarray(Image.open(io.BytesIO(png)).convert("RGBA")).astype(np.int64)


def _matplotlib_png(matrix, labels, title):
    buffer = io.BytesIO()
    _matplotlib_design_figure(matrix, labels, title).savefig(buffer, format="png", dpi=300, metadata={"Software": None})
    return buffer.getvalue()


def _lantern_design(n_scans, seed=3):
    """An invented design: three event-like regressors, two slow drifts, one motion-like trace, an intercept."""
    rng = np.random.default_rng(seed)
    scans = np.arange(n_scans)
    events = np.zeros((n_scans, 3))
    for column in range(3):
        for onset in rng.choice(n_scans - 8, size=max(2, n_scans // 30), replace=False):
            events[onset:onset + 6, column] += np.hanning(8)[1:7]
    drifts = np.stack([np.cos(np.pi * (scans + 0.5) * k / n_scans) for k in (1, 2)], axis=1)
    motion = np.cumsum(rng.normal(scale=0.05, size=(n_scans, 1)), axis=0)
    matrix = np.hstack([events, drifts, motion, np.ones((n_scans, 1))])
    names = ["seen_round", "seen_square", "heard_star", "lowfreq_cos_01", "lowfreq_cos_02", "trans_x", "intercept"]
    return matrix, [(float(j), name) for j, name in enumerate(names)]


def test_colour_table_equals_matplotlibs_brbg():
    expected = matplotlib.colormaps["BrBG"](np.linspace(0.0, 1.0, 256), bytes=True)[:, :3]
    assert np.array_equal(diverging_lookup(), expected)


@pytest.mark.parametrize("n_scans", [12, 37, 80, 100, 186, 200, 333, 600, 1200])
def test_scan_ticks_are_those_matplotlib_picks_for_the_same_axes(n_scans):
    matrix, labels = _lantern_design(n_scans)
    figure = _matplotlib_design_figure(matrix, labels, "ticks")
    FigureCanvasAgg(figure).draw()
    axes = figure.axes[0]
    low, high = sorted(axes.get_xlim())
    expected = [tick for tick in axes.get_xticks() if low <= tick <= high]
    assert scan_ticks(n_scans) == pytest.approx(expected)


@pytest.mark.parametrize("n_scans", [80, 186])
def test_the_picture_matches_the_matplotlib_figure(n_scans):
    matrix, labels = _lantern_design(n_scans)
    title = f"sub-01 run-01: per_condition design ({n_scans} scans)"
    ours, reference = _pixels(design_png(matrix, labels, title)), _pixels(_matplotlib_png(matrix, labels, title))
    assert ours.shape == reference.shape == (900, 1200, 4)  # 4 x 3 inches at 300 dpi
    differs = np.abs(ours - reference).max(axis=2) > 0
    # The design itself (inside the frame): the same colour in every pixel but a few along cell edges.
    assert differs[100:765, 440:1145].mean() < 0.01
    # Everything else (text antialiasing, the frame's and ticks' sub-pixel placement) differs only slightly:
    # a few per cent of pixels, a small mean difference.
    assert differs.mean() < 0.05 and np.abs(ours - reference).mean() < 4.0
    # The text sits where matplotlib puts it: dark pixels left of the frame (regressor names), below it (scan numbers,
    # "scan") and above it (title) cover the same rows and columns within a few pixels.
    for region in (np.s_[80:780, :420], np.s_[790:900, 400:1200], np.s_[:80, 400:1200]):
        ours_dark, reference_dark = ours[region][..., :3].sum(axis=2) < 300, reference[region][..., :3].sum(axis=2) < 300
        for axis in (0, 1):
            ours_span, reference_span = np.flatnonzero(ours_dark.any(axis=axis)), np.flatnonzero(reference_dark.any(axis=axis))
            assert abs(ours_span[0] - reference_span[0]) <= 8 and abs(ours_span[-1] - reference_span[-1]) <= 8


def test_the_picture_is_reproducible_and_records_its_resolution():
    matrix, labels = _lantern_design(60)
    first, second = design_png(matrix, labels, "again"), design_png(matrix, labels, "again")
    assert first == second
    image = Image.open(io.BytesIO(first))
    assert image.mode == "RGB" and image.info["dpi"] == pytest.approx((300, 300), abs=0.01)
    assert b"tIME" not in first and b"Software" not in first  # no time stamp, no writer name
