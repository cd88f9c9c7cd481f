"""Job: the activity patterns of one subject, run by run (GLM betas or t-values).

One job per subject fits every run the GLM step covers (each task and
session), so a subject pays the process start and the imports once instead
of once per run. Each run is a part of the job's memo
(:func:`foldwise.provenance.memo.part_memo`): when Snakemake reruns the job
because one run's files changed, the other runs are restored, not refitted.
Every run keeps its own output files (patterns, table, design, figure,
residual variance, facts), as the steps that read them expect.
"""

import numpy as np
import pandas as pd

from foldwise.data.bids import (confound_table_columns, count_flagged_initial_volumes, read_confounds, read_events, read_tr_s,
                                require_4d, select_confound_columns)
from foldwise.errors import InputError
from foldwise.data.fileio import ByteBuffer, load_stored, masked_float32, save_nifti, write_bytes_atomic, write_json, write_tsv
from foldwise.glm.design_image import design_png
from foldwise.glm.estimate import estimate_patterns
from foldwise import contract
from foldwise.contract import GRID_TOLERANCE_MM  # one tolerance for every grid comparison
from foldwise.masks.build import same_grid
from foldwise.provenance.memo import part_memo

__all__ = ["GRID_TOLERANCE_MM", "TABLE_COLUMNS", "RUN_INPUTS", "run", "run_one", "run_settings", "design_labels"]

TABLE_COLUMNS = contract.PATTERN_TABLE_COLUMNS  # defined once, in the data contract
RUN_INPUTS = ("bold", "events", "sidecar", "confounds")  # one file per run (lists in the job's inputs); the mask is the subject's
_MAX_LABELS = 24


def _load_mask(path, shape, affine, read=None):
    """The subject's brain mask (the contract's one reader, or ``read()``), refused unless it lies on the run's BOLD grid."""
    mask, mask_affine = read() if read is not None else contract.read_brain_mask(path)
    if not same_grid(mask.shape, mask_affine, shape, affine, GRID_TOLERANCE_MM):
        raise InputError(path, "affine", f"the brain mask's grid (shape {mask.shape}) differs from the BOLD grid (shape {tuple(shape)})",
                         "make the brain mask on this subject's BOLD grid (same shape and affine)")
    return mask


def _masked_time_series(bold, voxels):
    """``(scans, voxels)`` float32 of the given voxels (flat indices in NIfTI's Fortran order).

    NIfTI data are Fortran-ordered, so the reshape is a view in which each scan
    is one contiguous row; gathering columns row by row is several times
    faster than boolean indexing of the 4D array.
    """
    n_scans = bold.shape[3]
    by_scan = bold.reshape(-1, n_scans, order="F").T
    return np.take(by_scan, voxels, axis=1)


def _unmask(values, voxels, shape):
    """Scatter ``(voxels,)`` or ``(k, voxels)`` values into a float32 grid ``shape`` (+ ``(k,)``), zeros elsewhere.

    Built as ``(k, grid)`` rows so each volume's scatter is contiguous; the
    transpose is then the Fortran-ordered 4D array NIfTI stores, without a copy.
    """
    rows = np.atleast_2d(np.asarray(values, dtype=np.float32))
    by_volume = np.zeros((rows.shape[0], int(np.prod(shape))), dtype=np.float32)
    by_volume[:, voxels] = rows
    grid = by_volume.T.reshape(tuple(shape) + (rows.shape[0],), order="F")
    return grid[..., 0] if np.ndim(values) == 1 else grid


def _file_at_fault(field, inputs, confound_names):
    """The input file behind a problem the science reports by field only."""
    if field.startswith("glm"):
        return "the study config"
    if field == "bold_2d":
        return inputs["bold"]
    if field in confound_names or field.startswith("confound"):
        return inputs.get("confounds")
    return inputs["events"]


def design_labels(design):
    """Tick labels of a design image: ``(column position, text)`` pairs.

    Per-condition designs label every column. Trial-wise designs label each
    condition's block of trial columns once, at its centre ("seen_round:
    15 trials"), and every other column by name. Beyond 24 labels every k-th
    is kept: more would be unreadable at this size.
    """
    labels = []
    nuisance = set(design.nuisance_columns.tolist())
    if design.pattern_mode == "per_condition":
        labels += [(float(j), design.names[j]) for j in design.pattern_blocks.ravel()]
    else:
        conditions = design.pattern_table["condition"].to_numpy(dtype=object)
        for condition in dict.fromkeys(conditions):  # table order
            columns = design.pattern_blocks[conditions == condition].ravel()
            labels.append((float(columns.mean()), f"{condition}: {int((conditions == condition).sum())} trials"))
    labels += [(float(j), design.names[j]) for j in sorted(nuisance)]
    labels.sort()
    step = max(1, int(np.ceil(len(labels) / _MAX_LABELS)))
    return labels[::step]


def run_nuisance(confounds_path, selectors, drop_initial_volumes, n_scans):
    """The confound columns and the count of initial volumes to drop for one run.

    Parameters
    ----------
    confounds_path : str or None
        The run's confounds table.
    selectors : sequence of str or dict
        ``dataset.confounds`` (see :func:`foldwise.data.bids.select_confound_columns`).
    drop_initial_volumes : int or dict
        A count, or ``{"flagged_by": prefix}``.
    n_scans : int
        Volumes in the run.

    Returns
    -------
    names : list of str
    values : ndarray or None
        ``(n_scans, len(names))``, all volumes (nothing dropped yet).
    n_drop : int
    """
    header = confound_table_columns(confounds_path) if confounds_path and (selectors or isinstance(drop_initial_volumes, dict)) else []
    names = select_confound_columns(header, selectors, confounds_path) if selectors else []
    values = read_confounds(confounds_path, names, n_scans) if names else None
    if isinstance(drop_initial_volumes, dict):
        prefix = drop_initial_volumes["flagged_by"]
        flag_columns = [column for column in header if column.startswith(prefix)]
        n_drop = count_flagged_initial_volumes(read_confounds(confounds_path, flag_columns, n_scans))
    else:
        n_drop = int(drop_initial_volumes)
    if n_drop > n_scans - 2:
        raise InputError(confounds_path if isinstance(drop_initial_volumes, dict) else "the study config", "dataset.drop_initial_volumes",
                         f"dropping {n_drop} initial volumes leaves fewer than 2 of the run's {n_scans}",
                         "lower dataset.drop_initial_volumes (or check the flag columns)")
    return names, values, n_drop


def drop_initial(bold_2d, events, confounds, confound_names, n_drop, tr_s):
    """Leave out the first ``n_drop`` volumes; drop confound columns that are then all zero.

    Times are counted from the first kept volume afterwards (event onsets
    move back by ``n_drop * tr_s``; an event that started earlier gets a
    negative onset and its tail is still modelled). A confound column that is
    zero on every kept volume (e.g. the spike column of a dropped volume)
    would be an empty regressor and is left out.

    Returns
    -------
    bold_2d, events, confounds (or None), confound_names
    """
    if n_drop:
        bold_2d = bold_2d[n_drop:]
        events = events.assign(onset=events["onset"] - n_drop * tr_s)
        if confounds is not None:
            confounds = confounds[n_drop:]
    if confounds is not None:
        silent = ~np.any(confounds != 0, axis=0)
        if silent.any():
            confounds = confounds[:, ~silent]
            confound_names = [name for name, keep in zip(confound_names, ~silent) if keep]
        if not confound_names:
            confounds = None
    return bold_2d, events, confounds, list(confound_names)


def run_facts(subject, session, run_id, confound_names, n_dropped_volumes, n_dropped_events_rows, n_scans_kept):
    """What the GLM of one run used and left out, for the report's quality table.

    Examples
    --------
    >>> run_facts("01", None, "run-01", ["motion_x"], 2, 1, 98)["n_dropped_initial_volumes"]
    2
    """
    return {"subject": str(subject), "session": "n/a" if session is None else str(session), "run_id": str(run_id),
            "confounds": [str(name) for name in confound_names], "n_dropped_initial_volumes": int(n_dropped_volumes),
            "n_dropped_events_rows": int(n_dropped_events_rows), "n_scans_kept": int(n_scans_kept)}


def run_settings(params, index):
    """The settings one run's fit reads: the subject job's settings with ``runs`` narrowed to run ``index``.

    These (with the run's input hashes) are the run's part identity, so a
    run added to or removed from the subject recomputes no other run.
    """
    run = params["runs"][index]
    settings = {key: value for key, value in params.items() if key != "runs"}
    return {**settings, "session": run["session"], "run_id": run["run_id"]}


def _nth(paths, index):
    return paths[index] if isinstance(paths, (list, tuple)) else paths


class _SubjectMask:
    """The subject's brain mask, read once for all its runs (only if a run is fitted)."""

    def __init__(self, path):
        self.path = path
        self._mask = None

    def read(self):
        if self._mask is None:
            self._mask = contract.read_brain_mask(self.path)
        return self._mask


def run(inputs, outputs, params, log):
    """Fit the GLM of every run of one subject inside the brain mask and write each run's patterns.

    Parameters
    ----------
    inputs : dict
        ``bold``, ``events``, ``sidecar`` and, when confounds are
        configured, ``confounds``: lists of paths, one per run in the order
        of ``params["runs"]``; ``mask``: the subject's brain mask.
    outputs : dict
        Lists of paths, one per run in the same order: ``patterns`` (4D
        float32 NIfTI, zeros outside the mask), ``table`` (TSV, one row per
        volume), ``design`` (TSV), ``design_png``, ``resvar`` (3D float32
        NIfTI), ``facts`` (JSON; see :func:`run_facts`).
    params : dict
        ``glm`` (the glm config), ``confounds`` (column names), ``subject``,
        ``runs`` (``[{"session", "run_id"}]``, session None without
        sessions), ``drop_initial_volumes``, ``condition_column``.
    log : logging.Logger
        Receives each run's lines (prefixed by subject and run) and a
        warning for each configured condition absent from a run.

    Notes
    -----
    Each run is a part of the job's memo, keyed on :func:`run_settings` and
    the content of the run's own files and the brain mask: a run whose
    identity is unchanged is restored (its warnings logged again), the
    others are fitted by :func:`run_one`.
    """
    parts = part_memo()
    mask = _SubjectMask(inputs["mask"])
    decoded, series = ByteBuffer(), ByteBuffer()  # every run is decoded and converted into the same memory (no fresh pages per run)
    for index, run_entry in enumerate(params["runs"]):
        run_inputs = {name: _nth(inputs[name], index) for name in RUN_INPUTS if name in inputs}
        run_inputs["mask"] = inputs["mask"]
        run_outputs = {name: _nth(paths, index) for name, paths in outputs.items()}
        settings = run_settings(params, index)
        identity = {"settings": settings, "inputs": {name: parts.file_hash(path) for name, path in sorted(run_inputs.items())}}
        if parts.restore(run_entry["run_id"], identity, run_outputs):
            log.info("sub-%s %s: restored from the content memo (its files and settings are unchanged)", params["subject"],
                     run_entry["run_id"])
            continue
        run_one(run_inputs, run_outputs, settings, log, read_mask=mask.read, buffers=(decoded, series))
        parts.store(run_entry["run_id"], identity, run_outputs)


def run_one(inputs, outputs, params, log, read_mask=None, buffers=(None, None)):
    """Fit the GLM of one run inside the brain mask and write its patterns.

    Parameters
    ----------
    inputs : dict
        ``bold``, ``events``, ``sidecar``, ``mask`` and, when confounds are
        configured, ``confounds`` (paths).
    outputs : dict
        ``patterns`` (4D float32 NIfTI, zeros outside the mask), ``table``
        (TSV, one row per volume), ``design`` (TSV), ``design_png``,
        ``resvar`` (3D float32 NIfTI), ``facts`` (JSON: confounds used,
        initial volumes and events rows dropped; see :func:`run_facts`).
    params : dict
        ``glm`` (the glm config), ``confounds`` (column names), ``subject``,
        ``session`` (None without sessions), ``run_id``,
        ``drop_initial_volumes``, ``condition_column``.
    log : logging.Logger
        Receives a warning for each configured condition absent from the run.
    read_mask : callable, optional
        Returns ``(mask, affine)`` of ``inputs["mask"]`` (the subject job
        reads it once for all runs); default: read the file.
    buffers : pair of foldwise.data.fileio.ByteBuffer, optional
        Where the BOLD file is decoded and where its masked series is
        converted (the subject job passes one pair for all its runs);
        default: new memory.

    Notes
    -----
    The BOLD file is decoded once and only the mask's voxels are converted
    to float32 (:func:`foldwise.data.fileio.masked_float32`: the values
    :func:`foldwise.data.bids.load_bold` gives, without a float copy of the
    whole grid).
    """
    glm_settings = params["glm"]
    subject, session, run_id = params["subject"], params.get("session"), params["run_id"]

    image, stored = load_stored(inputs["bold"], what="BOLD image", buffer=buffers[0])
    require_4d(image, inputs["bold"])
    affine = np.asarray(image.affine, dtype=np.float64)
    n_scans = stored.shape[3]
    tr_s = read_tr_s(inputs["sidecar"], image.header, inputs["bold"])
    events = read_events(inputs["events"], n_scans, tr_s, params.get("condition_column", "trial_type"))
    n_unlabelled = int(events.attrs.get("n_unlabelled", 0))  # rows without a condition: counted, never dropped silently
    (log.warning if n_unlabelled else log.info)("sub-%s %s: %d events row(s) dropped for an n/a or empty %s", subject, run_id,
                                                 n_unlabelled, params.get("condition_column", "trial_type"))
    confound_names, confounds, n_drop = run_nuisance(inputs.get("confounds"), list(params.get("confounds") or []),
                                                     params.get("drop_initial_volumes", 0), n_scans)
    mask = _load_mask(inputs["mask"], stored.shape[:3], affine, read_mask)
    voxels = np.flatnonzero(mask.ravel(order="F"))
    bold_2d = masked_float32(image, stored, voxels, buffer=buffers[1])
    del image, stored  # the decoded file: the masked series is all the fit needs
    bold_2d, events, confounds, confound_names = drop_initial(bold_2d, events, confounds, confound_names, n_drop, tr_s)
    log.info("sub-%s %s: dropped %d initial volume(s); confounds: %s", subject, run_id, n_drop, ", ".join(confound_names) or "none")

    try:
        estimate = estimate_patterns(bold_2d, events, tr_s, glm_settings, confounds, confound_names)
    except InputError as error:
        if error.file is not None:
            raise
        raise InputError(_file_at_fault(error.field, inputs, confound_names), error.field, error.problem, error.fix) from None
    for condition in estimate.design.missing_conditions:
        log.warning("sub-%s %s: condition %r has no events in this run; no pattern for it here", subject, run_id, condition)

    n_patterns = estimate.patterns.shape[0]
    save_nifti(outputs["patterns"], _unmask(estimate.patterns, voxels, mask.shape), affine)
    save_nifti(outputs["resvar"], _unmask(estimate.residual_variance, voxels, mask.shape), affine)

    table = pd.DataFrame({
        "volume": np.arange(n_patterns, dtype=np.int64),
        "subject": str(subject),
        "session": "n/a" if session is None else str(session),
        "run_id": str(run_id),
        "condition": estimate.table["condition"].to_numpy(dtype=object),
        "trial_index": estimate.table["trial_index"].astype("Int64").array,
        "onset_s": estimate.table["onset_s"].to_numpy(dtype=np.float64),
    }, columns=list(TABLE_COLUMNS))
    write_tsv(outputs["table"], table)
    write_tsv(outputs["design"], pd.DataFrame(estimate.design.matrix, columns=list(estimate.design.names)))
    write_json(outputs["facts"], run_facts(subject, session, run_id, confound_names, n_drop, n_unlabelled, bold_2d.shape[0]))
    title = f"sub-{subject} {run_id}: {glm_settings['pattern_mode']} design"
    write_bytes_atomic(outputs["design_png"], design_png(estimate.design.matrix, design_labels(estimate.design), title))
