"""Job: one subject's dissimilarity matrices in every ROI of a geometry analysis, and each model's fit."""

import json

import numpy as np
import pandas as pd

from foldwise.contract import GEOMETRY_DISTANCE_COLUMNS, GEOMETRY_FIT_COLUMNS
from foldwise.data.fileio import write_tsv
from foldwise.errors import InputError
from foldwise.geometry.compare import compare
from foldwise.geometry.distances import condition_pairs, distances, square_form
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
    """Dissimilarities and model fits of one ROI (arrays in, arrays out).

    Parameters
    ----------
    run_patterns : ndarray, shape (n_runs, n_conditions, n_voxels)
    residual_runs : list of ndarray, each (n_scans_r, n_voxels)
    geometry : dict
        The analysis' ``geometry`` entry (``distance``, ``noise_normalisation``, ``comparison``).
    models : ndarray, shape (n_models, n_pairs)

    Returns
    -------
    dissimilarity : ndarray, shape (n_pairs,)
    fits : ndarray, shape (n_models,)
    """
    normalisation = effective_normalisation(geometry)
    noise = fold_noise(normalisation, residual_runs if normalisation != "none" else None, run_patterns.shape[2])
    dissimilarity = distances(run_patterns, geometry["distance"], noise)
    return dissimilarity, compare(dissimilarity, models, geometry["comparison"])[0]


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
    for roi in analysis["rois"]:
        voxels = np.asarray(index["rois"][roi], dtype=np.int64)
        run_patterns = betas[:, chosen][:, :, voxels]
        residual_runs = [residuals[start:end][:, voxels].astype(np.float64) for start, end in zip(bounds[:-1], bounds[1:])]
        dissimilarity, fits = roi_geometry(run_patterns, residual_runs, geometry, models)
        for pair, (a, b) in enumerate(zip(rows, columns)):
            long_rows.append((subject, analysis["name"], roi, voxels.size, geometry["distance"], normalisation, conditions[a], conditions[b],
                              dissimilarity[pair]))
        for condition, values in zip(conditions, square_form(dissimilarity, len(conditions))):
            square_rows.append([subject, analysis["name"], roi, condition, *values])
        for name, fit in zip(model_names, fits):
            fit_rows.append((subject, analysis["name"], roi, voxels.size, name, geometry["comparison"], fit))
        log.info("sub-%s %s: %d voxels, fits %s", subject, roi, voxels.size, ", ".join(f"{n}={f:.3f}" for n, f in zip(model_names, fits)))
    write_tsv(outputs["distances"], pd.DataFrame(long_rows, columns=list(GEOMETRY_DISTANCE_COLUMNS)))
    write_tsv(outputs["matrices"], pd.DataFrame(square_rows, columns=["subject", "analysis", "roi", "condition", *conditions]))
    write_tsv(outputs["fits"], pd.DataFrame(fit_rows, columns=list(GEOMETRY_FIT_COLUMNS)))
