"""Job: one subject's geometry searchlight -- every model's fit in the sphere around every brain voxel."""

import numpy as np
import pandas as pd

from foldwise.contract import read_brain_mask
from foldwise.data.fileio import save_nifti, write_tsv
from foldwise.geometry.models import model_vectors
from foldwise.geometry.noise import univariate_weights
from foldwise.geometry.wiring import searchlight_normalisation
from foldwise.jobs.geometry_patterns import fit_runs
from foldwise.searchlight.engine import sphere_neighbourhoods
from foldwise.searchlight.geometry import sphere_model_fits

__all__ = ["run", "MODEL_VOLUME_COLUMNS"]

MODEL_VOLUME_COLUMNS = ("volume", "model", "comparison", "noise_normalisation")


def run(inputs, outputs, settings, log):
    """Fit the per-condition GLM on every brain voxel, then every model's fit per sphere.

    Outputs: ``map`` (4D float32 NIfTI, one volume per model, 0 outside the
    brain and where a sphere's distances do not vary) and ``models`` (TSV:
    volume -> model).
    """
    geometry = settings["analysis"]["geometry"]
    brain, affine = read_brain_mask(inputs["mask"])
    coordinates = np.argwhere(brain)  # the searchlight engine's voxel order (C order of the mask)
    voxels = np.ravel_multi_index(coordinates.T, brain.shape, order="F")  # the GLM's flat indices
    betas, sums, scans = [], [], []
    for run_betas, run_residuals in fit_runs(inputs, settings, voxels, log):
        betas.append(run_betas)
        sums.append(np.einsum("ij,ij->j", run_residuals, run_residuals))
        scans.append(run_residuals.shape[0])
    normalisation = searchlight_normalisation(geometry)
    weights = univariate_weights(np.stack(sums), scans) if normalisation == "univariate" else None
    models = model_vectors(list(geometry["conditions"]), geometry.get("features") or {}, geometry["models"])
    spheres = sphere_neighbourhoods(brain, affine, float(settings["radius_mm"]))
    fits = sphere_model_fits(np.stack(betas), spheres, models, geometry["comparison"], weights)
    fits = np.nan_to_num(fits, nan=0.0)
    volumes = np.zeros(brain.shape + (models.shape[0],), dtype=np.float32)
    volumes[tuple(coordinates.T)] = fits
    save_nifti(outputs["map"], volumes, affine)
    names = [model["name"] for model in geometry["models"]]
    write_tsv(outputs["models"], pd.DataFrame({"volume": np.arange(len(names)), "model": names, "comparison": geometry["comparison"],
                                               "noise_normalisation": normalisation}, columns=list(MODEL_VOLUME_COLUMNS)))
    log.info("sub-%s: %d spheres (radius %.1f mm, median %d voxels), %s normalisation", settings["subject"], spheres.n_centres,
             float(settings["radius_mm"]), int(np.median(spheres.sizes)), normalisation)
