"""Job: one subject's dissimilarity matrices in every ROI of a geometry analysis, and each model's fit."""

import json

import numpy as np
import pandas as pd

from foldwise.contract import GEOMETRY_DISTANCE_COLUMNS, GEOMETRY_FIT_COLUMNS
from foldwise.data.fileio import write_tsv
from foldwise.errors import InputError
from foldwise.geometry.compare import compare
from foldwise.geometry.distances import condition_pairs, distances, square_form, swept_distances
from foldwise.geometry.models import model_vectors
from foldwise.geometry.noise import fold_noise
from foldwise.geometry.wiring import effective_normalisation

__all__ = ["run", "roi_geometry"]


def _load(inputs):
    try:
        with open(inputs["index"], encoding="utf-8") as handle:
            index = json.load(handle)
        betas = np.load(inputs["betas"], allow_pickle=False)
        residuals = np.load(inputs["residuals"], allow_pickle=False)
    except (OSError, ValueError) as error:
        raise InputError(inputs["index"], "file", f"the geometry patterns cannot be read ({error})", "rerun the geometry_patterns step") from None
    return index, betas, residuals


def roi_geometry(run_patterns, residual_runs, geometry, models):
    """Dissimilarities and model fits of one ROI at every voxel count (arrays in, arrays out).

    Parameters
    ----------
    run_patterns : ndarray, shape (n_runs, n_conditions, n_voxels)
    residual_runs : list of ndarray, each (n_scans_r, n_voxels)
    geometry : dict
        The analysis' ``geometry`` entry (``distance``, ``noise_normalisation``,
        ``comparison``, ``voxel_counts``).
    models : ndarray, shape (n_models, n_pairs)

    Returns
    -------
    dissimilarity : ndarray, shape (n_counts, n_pairs)
    fits : ndarray, shape (n_counts, n_models)
    n_used : ndarray of int, shape (n_counts,)
        Voxels used per fold.
    """
    counts = list(geometry.get("voxel_counts") or ["all"])
    normalisation = effective_normalisation(geometry)
    n_voxels = run_patterns.shape[2]
    if counts == ["all"]:  # no selection: one weighting per fold for every pair (the fast path)
        noise = fold_noise(normalisation, residual_runs if normalisation != "none" else None, n_voxels)
        dissimilarity = distances(run_patterns, geometry["distance"], noise)[None, :]
        used = np.array([n_voxels])
    else:
        dissimilarity, used = swept_distances(run_patterns, residual_runs, normalisation, counts)
    return dissimilarity, compare(dissimilarity, models, geometry["comparison"]), used


def run(inputs, outputs, settings, log):
    """Write the long and square dissimilarity tables and the model fits of one subject."""
    analysis, subject = settings["analysis"], settings["subject"]
    geometry = analysis["geometry"]
    conditions = list(geometry["conditions"])
    index, betas, residuals = _load(inputs)
    missing = [condition for condition in conditions if condition not in index["conditions"]]
    if missing:
        raise InputError(inputs["index"], "conditions", f"no betas for {', '.join(missing)}", "rerun the geometry_patterns step")
    models = model_vectors(conditions, geometry.get("features") or {}, geometry["models"])
    model_names = [model["name"] for model in geometry["models"]]
    chosen = [index["conditions"].index(condition) for condition in conditions]
    bounds = np.r_[0, np.cumsum(index["n_scans"])]
    rows, columns = condition_pairs(len(conditions))
    normalisation = effective_normalisation(geometry)
    long_rows, square_rows, fit_rows = [], [], []
    counts = list(geometry.get("voxel_counts") or ["all"])
    for roi in analysis["rois"]:
        voxels = np.asarray(index["rois"][roi], dtype=np.int64)
        run_patterns = betas[:, chosen][:, :, voxels]
        residual_runs = [residuals[start:end][:, voxels].astype(np.float64) for start, end in zip(bounds[:-1], bounds[1:])]
        dissimilarity, fits, used = roi_geometry(run_patterns, residual_runs, geometry, models)
        for c, count in enumerate(counts):
            for pair, (a, b) in enumerate(zip(rows, columns)):
                long_rows.append((subject, analysis["name"], roi, count, used[c], geometry["distance"], normalisation, conditions[a],
                                  conditions[b], dissimilarity[c, pair]))
            for condition, values in zip(conditions, square_form(dissimilarity[c], len(conditions))):
                square_rows.append([subject, analysis["name"], roi, count, used[c], condition, *values])
            for name, fit in zip(model_names, fits[c]):
                fit_rows.append((subject, analysis["name"], roi, count, used[c], name, geometry["comparison"], fit))
            log.info("sub-%s %s, %s voxels (%d used): fits %s", subject, roi, count, used[c],
                     ", ".join(f"{n}={f:.3f}" for n, f in zip(model_names, fits[c])))
    write_tsv(outputs["distances"], pd.DataFrame(long_rows, columns=list(GEOMETRY_DISTANCE_COLUMNS)))
    write_tsv(outputs["matrices"], pd.DataFrame(square_rows, columns=["subject", "analysis", "roi", "n_voxels", "n_used", "condition", *conditions]))
    write_tsv(outputs["fits"], pd.DataFrame(fit_rows, columns=list(GEOMETRY_FIT_COLUMNS)))
