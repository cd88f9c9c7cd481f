"""Figures of geometry analyses: group mean matrices, 2-D scaling of the conditions, model fits.

Built without pyplot (no global figure state); saved through
``foldwise.data.fileio.save_figure`` so the files hold no time stamp.
"""

import numpy as np
from matplotlib.figure import Figure

from foldwise.geometry.distances import classical_mds

__all__ = ["matrix_figure", "mds_figure", "fits_figure"]


def _panels(n_panels, width_per_panel=2.6, height=2.6):
    figure = Figure(figsize=(width_per_panel * n_panels + 0.6, height))
    axes = [figure.add_subplot(1, n_panels, index + 1) for index in range(n_panels)]
    return figure, axes


def matrix_figure(matrices, conditions, title, value_label):
    """Heatmaps of the group mean dissimilarity matrix of each ROI, conditions on both axes.

    Parameters
    ----------
    matrices : dict
        ROI name -> ``(n, n)`` array.
    conditions : sequence of str
    title, value_label : str
    """
    figure, axes = _panels(len(matrices), 2.8, 3.0)
    for ax, (roi, matrix) in zip(axes, matrices.items()):
        image = ax.imshow(matrix, cmap="viridis", interpolation="nearest")
        ax.set_xticks(range(len(conditions)))
        ax.set_yticks(range(len(conditions)))
        ax.set_xticklabels(conditions, rotation=90, fontsize=5)
        ax.set_yticklabels(conditions, fontsize=5)
        ax.set_title(roi, fontsize=7)
        bar = figure.colorbar(image, ax=ax, fraction=0.046, pad=0.04)
        bar.ax.tick_params(labelsize=5)
        bar.set_label(value_label, fontsize=5)
    figure.suptitle(title, fontsize=8)
    figure.subplots_adjust(bottom=0.3, wspace=0.6)
    return figure


def mds_figure(matrices, conditions, title):
    """Each ROI's conditions placed in 2-D by classical scaling of its group mean matrix."""
    figure, axes = _panels(len(matrices))
    for ax, (roi, matrix) in zip(axes, matrices.items()):
        coordinates = classical_mds(np.nan_to_num(matrix))
        ax.scatter(coordinates[:, 0], coordinates[:, 1], s=12, color="0.2")
        for (x, y), label in zip(coordinates, conditions):
            ax.annotate(label, (x, y), fontsize=5, xytext=(2, 2), textcoords="offset points")
        ax.set_title(roi, fontsize=7)
        ax.tick_params(labelsize=5)
        ax.set_aspect("equal", adjustable="datalim")
    figure.suptitle(title, fontsize=8)
    figure.subplots_adjust(wspace=0.4, bottom=0.15)
    return figure


def fits_figure(rois, models, mean_fit, subject_fits, ceilings, significant, title, fit_label):
    """Model fits per ROI: group mean bars, subject dots, the noise-ceiling band and significance marks.

    Parameters
    ----------
    rois, models : sequence of str
    mean_fit : ndarray, shape (n_rois, n_models)
    subject_fits : ndarray, shape (n_subjects, n_rois, n_models)
    ceilings : ndarray, shape (n_rois, 2)
        Lower and upper bound.
    significant : ndarray of bool, shape (n_rois, n_models)
        Marked with an asterisk (family-wise corrected).
    title, fit_label : str
    """
    figure, axes = _panels(len(rois), 2.4, 2.8)
    positions = np.arange(len(models))
    spread = np.linspace(-0.15, 0.15, subject_fits.shape[0]) if subject_fits.shape[0] > 1 else np.zeros(1)
    top = np.nanmax(np.abs(np.concatenate([subject_fits.ravel(), ceilings.ravel()]))) if subject_fits.size else 1.0
    for r, (ax, roi) in enumerate(zip(axes, rois)):
        ax.axhspan(ceilings[r, 0], ceilings[r, 1], color="0.85", zorder=0, label="noise ceiling")
        ax.bar(positions, mean_fit[r], width=0.6, color="0.55", zorder=1)
        for m in positions:
            ax.scatter(m + spread, subject_fits[:, r, m], s=5, color="0.1", zorder=2)
            if significant[r, m]:
                ax.text(m, 1.05 * top, "*", ha="center", va="bottom", fontsize=9)
        ax.axhline(0.0, color="0.3", linewidth=0.5)
        ax.set_xticks(positions)
        ax.set_xticklabels(models, rotation=45, ha="right", fontsize=5)
        ax.set_ylim(-1.1 * top, 1.25 * top)
        ax.tick_params(axis="y", labelsize=5)
        ax.set_title(roi, fontsize=7)
    axes[0].set_ylabel(fit_label, fontsize=6)
    figure.suptitle(title, fontsize=8)
    figure.subplots_adjust(bottom=0.35, wspace=0.4)
    return figure
