"""Job: one subject's localizer-defined ROI (the localizer task's own GLM, a contrast t, a size rule inside a constraint).

Only the localizer task's runs are read, so the region does not depend on the
main task's data (tests/test_datasets.py changes the main task's data and
checks the mask is byte-identical).
"""

import numpy as np

from foldwise.data.bids import load_bold, read_events, read_tr_s
from foldwise.data.fileio import load_nifti, save_nifti, write_json
from foldwise.errors import InputError
from foldwise.glm.design import build_design
from foldwise.contract import GRID_TOLERANCE_MM, read_brain_mask
from foldwise.jobs.glm import _masked_time_series, _unmask, drop_initial, run_nuisance
from foldwise.jobs.roi_mask import defined_region
from foldwise.masks.build import restrict_to_brain, same_grid
from foldwise.masks.localizer import contrast_t, contrast_vector, select_localizer_voxels, stack_run_designs

__all__ = ["run", "localizer_model"]

_DEFAULT_MIN_VOXELS = 10  # the schema's default, for entries not filled by validation


def localizer_model(runs, brain_flat, settings, log):
    """The localizer's stacked design and masked data over its runs.

    Parameters
    ----------
    runs : sequence of dict
        ``bold``, ``events``, ``sidecar`` and (when confounds or flagged
        volumes are configured) ``confounds`` of each localizer run.
    brain_flat : ndarray of bool
        The brain mask, flattened in NIfTI (Fortran) order.
    settings : dict
        ``glm`` (``hrf_derivatives``, ``highpass_s``, ``hrf_steps_per_scan``),
        ``confounds``, ``drop_initial_volumes``, ``condition_column``.
    log : logging.Logger

    Returns
    -------
    design : ndarray, shape (scans over runs, columns)
    names : list of str
    data : ndarray of float64, shape (scans over runs, brain voxels)

    Notes
    -----
    Each run's per-condition design is built as the main GLM builds it
    (:func:`foldwise.glm.design.build_design`: same HRF, drifts, confounds,
    dropped initial volumes); the runs are then stacked with shared
    condition columns and run-specific nuisance columns
    (:func:`foldwise.masks.localizer.stack_run_designs`).
    """
    voxels = np.flatnonzero(brain_flat)
    glm = settings["glm"]
    matrices, names, blocks, conditions = [], [], [], []
    for run in runs:
        bold, affine, header = load_bold(run["bold"])
        n_scans = bold.shape[3]
        if int(np.prod(bold.shape[:3])) != brain_flat.size:
            raise InputError(run["bold"], "dim", f"the localizer run's grid {bold.shape[:3]} differs from the brain mask's",
                             "give the localizer runs on the main runs' grid (same space)")
        tr_s = read_tr_s(run["sidecar"], header, run["bold"])
        events = read_events(run["events"], n_scans, tr_s, settings["condition_column"])
        confound_names, confounds, n_drop = run_nuisance(run.get("confounds"), list(settings["confounds"]),
                                                         settings["drop_initial_volumes"], n_scans)
        data = _masked_time_series(bold, voxels).astype(np.float64)
        del bold
        data, events, confounds, confound_names = drop_initial(data, events, confounds, confound_names, n_drop, tr_s)
        design = build_design(events, data.shape[0], tr_s, [], "per_condition", glm["hrf_derivatives"], glm["highpass_s"],
                              confounds, confound_names, glm["hrf_steps_per_scan"])
        event_columns = [design.names[j] for j in design.pattern_blocks.ravel()]
        conditions += [name for name in event_columns if name not in conditions]
        matrices.append(design.matrix)
        names.append(design.names)
        blocks.append(data)
        log.info("localizer run %s: %d volumes kept, conditions %s", run["bold"], data.shape[0], ", ".join(event_columns))
    design, column_names = stack_run_designs(matrices, names, conditions)
    return design, column_names, np.concatenate(blocks, axis=0)


def run(inputs, outputs, params, log):
    """Write ``mask`` (uint8), ``tmap`` (float32 contrast t in the brain) and ``info`` (JSON) for one subject's localizer ROI.

    Parameters
    ----------
    inputs : dict
        ``bold``, ``events``, ``sidecar`` (lists over the localizer runs),
        ``confounds`` (list, when configured), ``brain_mask``, and what the
        constraint reads (``atlas`` + ``atlas_labels``, or ``image``).
    params : dict
        ``roi`` (the entry), ``subject``, ``glm``, ``confounds``,
        ``drop_initial_volumes``, ``condition_column``.
    """
    entry, subject = params["roi"], params["subject"]
    name, spec = entry["name"], entry["localizer"]
    min_voxels = int(entry.get("min_voxels", _DEFAULT_MIN_VOXELS))
    brain, affine = read_brain_mask(inputs["brain_mask"])
    shape = brain.shape
    brain_flat = brain.ravel(order="F")

    bolds = list(inputs["bold"]) if not isinstance(inputs["bold"], str) else [inputs["bold"]]
    listed = {key: (list(inputs[key]) if not isinstance(inputs[key], str) else [inputs[key]]) for key in ("events", "sidecar", "confounds")
              if key in inputs}
    runs = [{"bold": bold, **{key: values[index] for key, values in listed.items()}} for index, bold in enumerate(bolds)]
    for run_files in runs:
        image = load_nifti(run_files["bold"], what="localizer BOLD")
        if not same_grid(image.shape[:3], image.affine, shape, affine, GRID_TOLERANCE_MM):
            raise InputError(run_files["bold"], "affine", f"the localizer run's grid (shape {image.shape[:3]}) differs from the brain mask's "
                                                         f"(shape {shape})", "give the localizer runs in the same space as the main task's runs")
    design, names, data = localizer_model(runs, brain_flat, params, log)
    where = f"rois[{name}].localizer.contrast"
    try:
        contrast = contrast_vector(names, spec["contrast"], where)
        t_values, dof = contrast_t(design, data, contrast)
        constraint, source = defined_region(spec["within"], inputs, shape, affine, name)
        constraint = restrict_to_brain(constraint, brain, min_voxels, subject, name, source_file=source)
        chosen = select_localizer_voxels(t_values, constraint.ravel(order="F")[brain_flat], top_k=spec.get("top_k"),
                                         t_threshold=spec.get("t_threshold"), min_voxels=min_voxels, subject=subject, roi=name)
    except InputError as error:
        if error.file is not None:
            raise
        raise InputError(bolds[0], error.field, error.problem, error.fix) from None
    voxels = np.flatnonzero(brain_flat)
    mask = np.zeros(brain_flat.size, dtype=np.uint8)
    mask[voxels[chosen]] = 1
    save_nifti(outputs["mask"], mask.reshape(shape, order="F"), affine, dtype=np.uint8)
    if "tmap" in outputs:
        save_nifti(outputs["tmap"], _unmask(t_values, voxels, shape), affine)
    write_json(outputs["info"], {"roi": name, "subject": subject, "n_voxels": int(chosen.sum()), "min_voxels": min_voxels,
                                 "definition": entry, "localizer_runs": len(runs), "dof": int(dof),
                                 "constraint_voxels": int(constraint.sum()),
                                 "t_min_kept": float(np.min(t_values[chosen])), "t_max": float(np.max(t_values[chosen]))})
