"""Job: per-condition betas and GLM residuals of one subject's runs, on the voxels of the geometry ROIs only."""

import io

import numpy as np

from foldwise.contract import GRID_TOLERANCE_MM, read_brain_mask, read_roi_mask
from foldwise.data.bids import load_bold, read_events, read_tr_s
from foldwise.data.fileio import write_bytes_atomic, write_json
from foldwise.errors import InputError
from foldwise.geometry.residuals import glm_residuals
from foldwise.glm.estimate import estimate_patterns
from foldwise.jobs.glm import drop_initial, run_nuisance
from foldwise.masks.build import same_grid

__all__ = ["run", "save_npy", "fit_runs"]


def save_npy(path, array):
    """Write an array as .npy atomically (the format holds no time stamp)."""
    buffer = io.BytesIO()
    np.save(buffer, np.ascontiguousarray(array), allow_pickle=False)
    write_bytes_atomic(path, buffer.getvalue())


def _roi_columns(brain, affine, roi_paths, roi_names):
    """Union of the ROI masks (Fortran-order flat voxel indices, as the GLM job uses) and each ROI's columns in it."""
    masks = []
    for path in roi_paths:
        inside, roi_affine = read_roi_mask(path)  # the one reader: 3-D, 0/1, not empty
        if not same_grid(inside.shape, roi_affine, brain.shape, affine, GRID_TOLERANCE_MM):
            raise InputError(path, "affine", "the ROI mask's grid differs from the brain mask's", "rebuild the ROI masks of this subject")
        masks.append(inside)
    union = np.logical_or.reduce(masks) & brain
    voxels = np.flatnonzero(union.ravel(order="F"))
    position = {voxel: column for column, voxel in enumerate(voxels)}
    columns = {name: [position[v] for v in np.flatnonzero((mask & brain).ravel(order="F"))] for name, mask in zip(roi_names, masks)}
    return voxels, columns


def fit_runs(inputs, settings, voxels, log):
    """Per run: ``(betas (n_conditions, n_voxels), residuals (n_scans, n_voxels))`` of the per-condition GLM on ``voxels``.

    ``voxels`` are flat indices in NIfTI's (Fortran) order; conditions in
    ``settings["conditions"]`` order. The study's GLM settings apply, except
    that patterns are always betas per condition.
    """
    glm_settings = {**settings["glm"], "pattern_mode": "per_condition", "statistic": "beta"}
    conditions = list(settings["conditions"])
    confound_paths = inputs.get("confounds") or [None] * len(inputs["bold"])
    for bold_path, events_path, sidecar, confounds_path, run_id in zip(inputs["bold"], inputs["events"], inputs["sidecars"],
                                                                        confound_paths, settings["run_ids"]):
        bold, _, header = load_bold(bold_path)
        n_scans = bold.shape[3]
        tr_s = read_tr_s(sidecar, header, bold_path)
        events = read_events(events_path, n_scans, tr_s, settings.get("condition_column", "trial_type"))
        names, confounds, n_drop = run_nuisance(confounds_path, list(settings.get("confounds") or []),
                                                settings.get("drop_initial_volumes", 0), n_scans)
        bold_2d = bold.reshape(-1, n_scans, order="F")[voxels].T.astype(np.float64)
        del bold
        bold_2d, events, confounds, names = drop_initial(bold_2d, events, confounds, names, n_drop, tr_s)
        estimate = estimate_patterns(bold_2d, events, tr_s, glm_settings, confounds, names)
        fitted = list(estimate.table["condition"])
        missing = [condition for condition in conditions if condition not in fitted]
        if missing:
            raise InputError(events_path, "trial_type", f"condition(s) {', '.join(missing)} have no events in this run",
                             "a geometry analysis needs every condition in every run; leave the run out (dataset.exclude_subjects) or drop the condition")
        log.info("sub-%s %s: %d scans, %d geometry voxels", settings["subject"], run_id, bold_2d.shape[0], voxels.size)
        yield estimate.patterns[[fitted.index(condition) for condition in conditions]], glm_residuals(estimate.design.matrix, bold_2d, estimate.rho)


def run(inputs, outputs, settings, log):
    """Fit every run's per-condition GLM on the geometry voxels; keep betas and residuals.

    Outputs: ``betas`` (.npy, float64, runs x conditions x voxels),
    ``residuals`` (.npy, float32, all runs' scans stacked x voxels), ``index``
    (JSON: run ids, scans per run, conditions, voxel indices, each ROI's
    columns).
    """
    conditions = list(settings["conditions"])
    brain, affine = read_brain_mask(inputs["mask"])
    voxels, roi_columns = _roi_columns(brain, affine, list(inputs["roi_masks"]), list(settings["rois"]))
    for name, columns in roi_columns.items():
        if len(columns) < 2:
            raise InputError(inputs["roi_masks"][list(roi_columns).index(name)], "mask", f"ROI {name} holds {len(columns)} voxel(s) in the brain",
                             "give the geometry analysis ROIs of two or more voxels")
    betas, residuals, scans = [], [], []
    for run_betas, run_residuals in fit_runs(inputs, settings, voxels, log):
        betas.append(run_betas)
        residuals.append(run_residuals.astype(np.float32))
        scans.append(int(run_residuals.shape[0]))
    save_npy(outputs["betas"], np.stack(betas))
    save_npy(outputs["residuals"], np.concatenate(residuals, axis=0))
    write_json(outputs["index"], {"subject": settings["subject"], "run_ids": list(settings["run_ids"]), "n_scans": scans,
                                  "conditions": conditions, "voxel_indices_fortran": voxels.tolist(), "rois": roi_columns})
