"""Localizer-defined ROIs: a contrast t map from the localizer task's own GLM, cut to a size inside an anatomical constraint.

A functional region of interest is defined per subject from an independent
localizer task: the voxels that respond most to a contrast of the
localizer's conditions, inside an anatomical constraint (atlas labels, an
image or a sphere), either the ``top_k`` voxels by t or every voxel at or
above a t threshold. Only the localizer's runs enter the fit, so the region
is independent of the data it is later decoded from.

Taking, per subject, the most responsive voxels inside a constraint region
is the group-constrained subject-specific idea of Fedorenko et al. (2010)
and Julian et al. (2012); here the constraint is given (atlas, image or
sphere) rather than derived from the group's overlap.

References
----------
Fedorenko, E., Hsieh, P.-J., Nieto-Castanon, A., Whitfield-Gabrieli, S. &
Kanwisher, N. (2010). New method for fMRI investigations of language:
defining ROIs functionally in individual subjects. Journal of
Neurophysiology 104, 1177-1194.

Julian, J. B., Fedorenko, E., Webster, J. & Kanwisher, N. (2012). An
algorithmic method for functionally defining regions of interest in the
ventral visual pathway. NeuroImage 60, 2357-2364.
"""

import difflib
import re

import numpy as np

from foldwise.errors import InputError

__all__ = ["stack_run_designs", "contrast_vector", "contrast_t", "select_localizer_voxels"]


def stack_run_designs(matrices, names, shared):
    """One design for several runs: shared event columns, run-specific nuisance columns.

    Parameters
    ----------
    matrices : sequence of ndarray
        Each run's ``(n_scans_r, n_columns_r)`` design.
    names : sequence of sequence of str
        Each run's column names.
    shared : sequence of str
        The column names estimated once across runs (the event regressors);
        a shared name absent from a run is a zero column in that run.

    Returns
    -------
    matrix : ndarray, shape (sum of n_scans_r, len(shared) + sum of nuisance columns)
        Shared columns first (in ``shared`` order), then each run's other
        columns (drifts, confounds, intercept) in a block of their own.
    column_names : list of str
        Shared names, then ``r<k>_<name>`` for run ``k``'s own columns.

    Notes
    -----
    This is the usual fixed-effects model over runs: each run keeps its own
    mean, drifts and confounds, and one response per condition is estimated
    from all runs together.
    """
    shared = list(shared)
    own = [[j for j, name in enumerate(run_names) if name not in shared] for run_names in names]
    n_rows = sum(matrix.shape[0] for matrix in matrices)
    n_columns = len(shared) + sum(len(columns) for columns in own)
    stacked = np.zeros((n_rows, n_columns))
    column_names = list(shared)
    row, column = 0, len(shared)
    for index, (matrix, run_names, run_own) in enumerate(zip(matrices, names, own)):
        rows = slice(row, row + matrix.shape[0])
        positions = {name: j for j, name in enumerate(run_names)}
        for k, name in enumerate(shared):
            if name in positions:
                stacked[rows, k] = matrix[:, positions[name]]
        stacked[rows, column:column + len(run_own)] = matrix[:, run_own]
        column_names += [f"r{index}_{run_names[j]}" for j in run_own]
        row += matrix.shape[0]
        column += len(run_own)
    return stacked, column_names


def contrast_vector(column_names, weights, where="contrast"):
    """The contrast over design columns from weights by condition name.

    Parameters
    ----------
    column_names : sequence of str
    weights : dict
        Condition name -> weight (e.g. ``{"lit": 1, "dark": -1}``).
    where : str
        The config key, named in messages.

    Returns
    -------
    ndarray of float64, shape (len(column_names),)

    Raises
    ------
    InputError
        If a condition is not a column, or every weight is 0.
    """
    names = list(column_names)
    vector = np.zeros(len(names))
    for condition, weight in weights.items():
        if condition not in names:
            shared = [name for name in names if not re.match(r"r\d+_", name)]
            close = difflib.get_close_matches(condition, shared, n=1)
            hint = f"; did you mean '{close[0]}'?" if close else ""
            raise InputError(None, where, f"the localizer contrast names '{condition}', which is not a condition of the localizer's "
                                          f"events (its event regressors: {', '.join(shared[:12])}{hint})",
                             "name conditions of the localizer task in the contrast")
        vector[names.index(condition)] = float(weight)
    if not np.any(vector):
        raise InputError(None, where, "every contrast weight is 0", "give the contrast non-zero weights, e.g. {on: 1, off: -1}")
    return vector


def contrast_t(design, data, contrast):
    """OLS t statistic of one contrast at every voxel.

    Parameters
    ----------
    design : ndarray, shape (n_scans, n_columns)
    data : ndarray, shape (n_scans, n_voxels)
    contrast : ndarray, shape (n_columns,)

    Returns
    -------
    t : ndarray of float64, shape (n_voxels,)
        ``c'b / sqrt(s2 * c'(X'X)^+ c)``; 0 where the residual variance is 0.
    dof : int
        ``n_scans - rank(X)``.

    Raises
    ------
    InputError
        If the contrast is not estimable (it has a part outside the row
        space of the design, e.g. a condition with no events) or no
        residual degree of freedom is left.

    Notes
    -----
    The ordinary least-squares t for a linear contrast of the
    coefficients, with ``(X'X)^+`` the pseudo-inverse; tested against
    statsmodels' ``OLS(...).fit().t_test`` (tests/test_datasets.py). Every
    voxel shares the design, so one SVD serves all voxels. The noise is
    taken as white (no AR model): the t ranks voxels for the ROI and is not
    used as a p-value.
    """
    design = np.asarray(design, dtype=np.float64)
    data = np.asarray(data, dtype=np.float64)
    contrast = np.asarray(contrast, dtype=np.float64)
    u, singular, vt = np.linalg.svd(design, full_matrices=False)
    tolerance = singular.max() * max(design.shape) * np.finfo(np.float64).eps
    keep = singular > tolerance
    rank = int(keep.sum())
    dof = design.shape[0] - rank
    if dof < 1:
        raise InputError(None, "localizer design", f"{design.shape[1]} regressors (rank {rank}) for {design.shape[0]} scans leave no "
                                                   "residual degree of freedom", "give the localizer more runs or fewer confounds")
    u, singular, vt = u[:, keep], singular[keep], vt[keep]
    # Estimable iff c lies in the row space of X (spanned by the kept right singular vectors).
    in_row_space = vt.T @ (vt @ contrast)
    if np.linalg.norm(contrast - in_row_space) > 1e-8 * max(1.0, np.linalg.norm(contrast)):
        raise InputError(None, "localizer contrast", "the contrast is not estimable from the localizer design "
                                                     "(a condition it weights has no events, or is confounded with others)",
                         "check that every contrast condition occurs in the localizer runs")
    projected = u.T @ data  # (rank, n_voxels)
    effect = (contrast @ vt.T / singular) @ projected  # c' V S^-1 U' y = c'b
    residual_ss = np.maximum(np.einsum("ij,ij->j", data, data) - np.einsum("ij,ij->j", projected, projected), 0.0)
    variance_factor = float(np.sum((vt @ contrast / singular) ** 2))  # c'(X'X)^+ c
    standard_error = np.sqrt(residual_ss / dof * variance_factor)
    t = np.divide(effect, standard_error, out=np.zeros_like(effect), where=standard_error > 0)
    return t, dof


def select_localizer_voxels(t_values, constraint, top_k=None, t_threshold=None, min_voxels=1, subject=None, roi=None):
    """The localizer ROI: inside the constraint, the ``top_k`` voxels by t, or every voxel with t at or above a threshold.

    Parameters
    ----------
    t_values : ndarray, shape (n_voxels,)
        The contrast t of each voxel (e.g. of the brain mask).
    constraint : ndarray of bool, shape (n_voxels,)
        The anatomical constraint (already inside the brain mask).
    top_k : int or None
        Keep this many voxels (exactly one of ``top_k`` and ``t_threshold``).
    t_threshold : float or None
        Keep the voxels with ``t >= t_threshold``.
    min_voxels : int
        Fewer kept voxels is an error.
    subject, roi : str or None
        Named in messages.

    Returns
    -------
    ndarray of bool, shape (n_voxels,)

    Raises
    ------
    InputError
        If the constraint holds fewer than ``top_k`` voxels, or fewer than
        ``min_voxels`` pass the threshold.

    Notes
    -----
    Ties at the ``top_k`` boundary go to the lower voxel index (a stable
    sort), so the region is the same on every machine. ``top_k`` fixes the
    size across subjects (common in group-constrained subject-specific
    analyses; Julian et al. 2012 use a top percentage); a threshold lets the
    size follow the subject's effect.
    """
    t_values = np.asarray(t_values, dtype=np.float64)
    constraint = np.asarray(constraint, dtype=bool)
    who = f"subject {subject}, ROI {roi}: " if subject is not None else ""
    candidates = np.flatnonzero(constraint)
    chosen = np.zeros(t_values.shape, dtype=bool)
    if top_k is not None:
        if candidates.size < top_k:
            raise InputError(None, "localizer.top_k", f"{who}the anatomical constraint holds {candidates.size} voxels in the brain, "
                                                      f"fewer than top_k = {top_k}", "lower top_k or widen the constraint")
        order = np.argsort(-t_values[candidates], kind="stable")
        chosen[candidates[order[:top_k]]] = True
    else:
        chosen[candidates[t_values[candidates] >= t_threshold]] = True
    if chosen.sum() < min_voxels:
        raise InputError(None, "localizer.t_threshold", f"{who}{int(chosen.sum())} voxels of the constraint reach t >= {t_threshold:g}, "
                                                        f"fewer than min_voxels = {min_voxels}",
                         "lower the threshold, use top_k, or check the localizer contrast")
    return chosen
