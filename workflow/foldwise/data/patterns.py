"""The pattern set of one subject: every run's pattern image and table, read as one.

The GLM step writes, per run, a 4D image (one volume per pattern) and a table
(columns ``foldwise.contract.PATTERN_TABLE_COLUMNS``, one row per volume).
Every step that reads patterns -- decoding, the searchlight, the design
self-check -- reads a subject's runs through this module, so sessions, tasks,
volume order and grids are handled one way everywhere:

- a pattern's ``run`` is ``<session>_<run_id>`` when the run has a session
  (two sessions may both hold a ``run-1``), else ``run_id``;
- its ``task`` is the ``task-<label>`` inside the run id (runs of a task
  other than the study's main one carry it), ``None`` for the main task;
- rows come sorted by run, then volume, whatever the order of the files;
- voxels come in C order of the mask they are read through.

This module is named by :mod:`foldwise.contract` as the reader of the pattern
set; it is kept out of the contract so that the steps that never read
patterns do not carry it in their code key.
"""

from dataclasses import dataclass

import numpy as np
import pandas as pd

from foldwise.contract import GRID_TOLERANCE_MM, read_table
from foldwise.data.fileio import load_nifti
from foldwise.decoding.folds import task_of_run
from foldwise.errors import InputError
from foldwise.masks.build import same_grid

__all__ = ["PatternSet", "pattern_run_labels", "plain_subject", "files_label", "read_pattern_tables", "read_pattern_set",
           "analysis_task_rows"]


@dataclass(frozen=True)
class PatternSet:
    """One subject's patterns inside a mask.

    Attributes
    ----------
    patterns : ndarray of float64, shape (n_patterns, n_voxels)
        Voxels in C order of the mask; rows sorted by run, then volume.
    table : pandas.DataFrame
        One row per pattern, same order: the pattern table's columns plus
        ``run``, ``task`` and ``source`` (the table's path).
    coordinates : ndarray of int, shape (n_voxels, 3)
        Grid indices ``i, j, k`` of the voxels.
    """

    patterns: np.ndarray
    table: pd.DataFrame
    coordinates: np.ndarray


def plain_subject(value):
    """A subject label without ``sub-`` (``"sub-01"`` and ``"01"`` name one subject)."""
    text = str(value)
    return text[4:] if text.startswith("sub-") else text


def files_label(paths):
    """Names a list of pattern tables in a message: the first, and how many more."""
    paths = [str(path) for path in _as_list(paths)]
    return paths[0] if len(paths) == 1 else f"{paths[0]} (and {len(paths) - 1} more pattern tables)"


def pattern_run_labels(table):
    """The run of every row of a pattern table: ``ses-<session>_<run>`` when the row has a session, else ``run_id``.

    The GLM step writes ``session`` ``2`` with ``run_id`` ``ses-2_run-01``
    (:func:`foldwise.data.bids.make_run_id`): that run id is kept as it is. A
    table whose run ids lack the session (``run-01`` in sessions ``1`` and
    ``2``) gets it in front, so two sessions' ``run-01`` stay two runs and
    ``leave_one_session_out`` finds the session
    (:func:`foldwise.decoding.folds.session_of_run`).

    >>> import pandas as pd
    >>> pattern_run_labels(pd.DataFrame({"session": ["2", "2", "ses-1", None], "run_id": ["ses-2_run-01", "run-01", "run-01", "run-03"]}))
    ['ses-2_run-01', 'ses-2_run-01', 'ses-1_run-01', 'run-03']
    """
    labels = []
    for session, run in zip(table["session"], table["run_id"]):
        run = str(run)
        if pd.isna(session) or str(session).strip() in ("", "n/a"):
            labels.append(run)
            continue
        session_part = str(session) if str(session).startswith("ses-") else f"ses-{session}"
        labels.append(run if run.startswith(f"{session_part}_") else f"{session_part}_{run}")
    return labels


def analysis_task_rows(table, analysis, pattern_tasks=None):
    """Which rows of a pattern set come from the task an analysis reads for their condition.

    Two tasks may use one condition name; the condition alone does not say
    which task's runs an analysis decodes, the row's ``task`` does. Decoding,
    the searchlight and the design self-check all narrow a subject's rows
    here, before they pick rows by condition.

    Parameters
    ----------
    table : pandas.DataFrame
        A pattern set's table (``condition`` and ``task`` columns, as
        :func:`read_pattern_tables` returns it).
    analysis : dict
        An ``analyses`` entry: ``kind``, and ``sets`` (set -> class -> condition) for ``cross``.
    pattern_tasks : dict, optional
        ``{"within": task}`` or ``{set name: task}`` (the study's
        ``pattern_tasks`` of the analysis); ``None`` is the main task, and
        so is every part when ``pattern_tasks`` is omitted.

    Returns
    -------
    ndarray of bool, shape (n_rows,)
        True where the row's task is the task of its condition's part of the
        analysis (for a condition outside a cross analysis's sets: the main task).

    >>> import pandas as pd
    >>> table = pd.DataFrame({"condition": ["seen", "seen", "heard"], "task": [None, "beacon", None]})
    >>> analysis_task_rows(table, {"kind": "within"}).tolist()
    [True, False, True]
    >>> analysis_task_rows(table, {"kind": "within"}, {"within": "beacon"}).tolist()
    [False, True, False]
    """
    tasks = pattern_tasks or {}
    part_of = {}
    if analysis["kind"] == "cross":
        part_of = {str(condition): set_name for set_name, classes in analysis["sets"].items() for condition in classes.values()}
    wanted = [tasks.get(part_of.get(condition, "within")) for condition in table["condition"].astype(str)]
    have = [None if pd.isna(task) else str(task) for task in table["task"]]
    return np.array([row_task == want for row_task, want in zip(have, wanted)], dtype=bool)


def _as_list(paths):
    return [paths] if isinstance(paths, str) else list(paths)


def _read_run_table(path, subject):
    table = read_table("patterns_table", path)
    subjects = {plain_subject(value) for value in table["subject"]}
    if subjects != {plain_subject(subject)}:
        raise InputError(path, "subject", f"the table belongs to subject(s) {sorted(subjects)}, this job reads subject {subject}",
                         "pass this subject's pattern files only")
    runs = pattern_run_labels(table)
    return table.assign(run=runs, task=[task_of_run(run) for run in runs], source=str(path), condition=table["condition"].astype(str))


def _run_order(tables, table_paths):
    """The tables as one, and the row order that sorts it by run, then volume (refusing a run held by two tables)."""
    table = pd.concat(tables, ignore_index=True)
    # one table per run: a run in two tables (or one table passed twice) would count its patterns twice
    tables_of_run = {}
    for index, frame in enumerate(tables):
        for run in dict.fromkeys(frame["run"]):
            tables_of_run.setdefault(run, []).append(index)
    repeated = [run for run, owners in tables_of_run.items() if len(owners) > 1]
    if repeated:
        raise InputError(files_label(table_paths), "run_id", f"run {repeated[0]} appears in more than one pattern table", "pass each run once")
    order = table.assign(volume=pd.to_numeric(table["volume"])).sort_values(["run", "volume"], kind="stable").index.to_numpy()
    return table, order


def read_pattern_tables(table_paths, subject):
    """One subject's pattern tables as one table, without the images (the design of the subject's runs).

    Parameters
    ----------
    table_paths : str or list of str
        The subject's per-run pattern tables.
    subject : str
        The subject they must belong to (with or without ``sub-``).

    Returns
    -------
    pandas.DataFrame
        Rows sorted by run, then volume, with ``run``, ``task`` and ``source`` added.
    """
    table_paths = _as_list(table_paths)
    table, order = _run_order([_read_run_table(path, subject) for path in table_paths], table_paths)
    return table.iloc[order].reset_index(drop=True)


def read_pattern_set(image_paths, table_paths, subject, mask, affine, mask_path):
    """One subject's patterns inside ``mask``, every run read and checked the same way.

    Parameters
    ----------
    image_paths, table_paths : str or list of str
        Per-run 4D pattern images and their tables, in the same order.
    subject : str
        The subject the files must belong to.
    mask : ndarray of bool, shape (I, J, K)
        The voxels to read (a brain or ROI mask, read by its own reader).
    affine : array_like, shape (4, 4)
        The mask's voxel-to-world affine; every image must lie on its grid
        (voxel centres within ``foldwise.contract.GRID_TOLERANCE_MM``).
    mask_path : str
        The mask's file, named in messages.

    Returns
    -------
    PatternSet

    Raises
    ------
    InputError
        Unequal numbers of images and tables, an image off the mask's grid,
        a table whose rows do not number the image's volumes from 0, another
        subject's table, a run held by two tables, or non-finite values
        inside the mask.
    """
    image_paths, table_paths = _as_list(image_paths), _as_list(table_paths)
    if not image_paths or len(image_paths) != len(table_paths):
        raise InputError(None, "inputs", f"{len(image_paths)} pattern images but {len(table_paths)} tables",
                         "pass one table per pattern image, in the same order")
    blocks, tables = [], []
    for image_path, table_path in zip(image_paths, table_paths):
        table = _read_run_table(table_path, subject)
        image = load_nifti(image_path, what="pattern image")
        if len(image.shape) not in (3, 4) or tuple(image.shape[:3]) != tuple(mask.shape):
            raise InputError(image_path, "dim", f"the pattern image has shape {tuple(image.shape)}, the mask ({mask_path}) {tuple(mask.shape)}",
                             "compute the patterns and the mask on the subject's one grid")
        if not same_grid(image.shape[:3], image.affine, mask.shape, affine, GRID_TOLERANCE_MM):
            raise InputError(image_path, "affine", f"the patterns' voxel centres lie more than {GRID_TOLERANCE_MM:g} mm from the mask's "
                             f"({mask_path}): another space or another grid", "compute the patterns and the mask on the subject's one grid")
        data = np.asanyarray(image.dataobj)  # as stored (float32 from the GLM step): only the mask's voxels become float64 below
        data = data[..., np.newaxis] if data.ndim == 3 else data
        n_volumes = data.shape[3]
        if len(table) != n_volumes:
            raise InputError(table_path, "volume", f"{len(table)} rows but {image_path} has {n_volumes} volumes",
                             "write one table row per pattern volume")
        volumes = pd.to_numeric(table["volume"], errors="coerce").to_numpy()
        if not np.array_equal(volumes, np.arange(n_volumes)):
            raise InputError(table_path, "volume", f"expected 0 .. {n_volumes - 1} in order, got {table['volume'].tolist()[:8]}",
                             "number the volumes from 0 in file order")
        inside = np.asarray(data[mask], dtype=np.float64).T  # (n_volumes, n_voxels), voxels in C order of the mask
        if not np.all(np.isfinite(inside)):
            raise InputError(image_path, "data", f"the patterns hold NaN or infinite values inside the mask ({mask_path})",
                             "re-estimate the patterns, or leave those voxels out of the mask")
        blocks.append(inside)
        tables.append(table)
    table, order = _run_order(tables, table_paths)
    return PatternSet(patterns=np.vstack(blocks)[order], table=table.iloc[order].reset_index(drop=True), coordinates=np.argwhere(mask))
