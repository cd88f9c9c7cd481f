"""Least-squares estimation of activity patterns from one run.

Estimators: ordinary least squares (OLS), AR(1) prewhitened least squares,
least squares - all (LSA: every trial in one model) and least squares -
separate (LSS: one model per trial). Every estimator works on whole arrays:
label-free work (factorisations of the design, whitened designs, the small
per-trial models of LSS) is done once, and the data meet it in a few matrix
products per block of voxels. Voxels are processed in blocks of
``CHUNK_VOXELS`` columns so that float64 copies of the data stay small; a
block boundary never changes a voxel's result beyond rounding.
"""

from dataclasses import dataclass, replace

import numpy as np
import pandas as pd
from numpy.polynomial.polynomial import polyval
from scipy.linalg import solve_triangular

from foldwise.glm.design import PATTERN_MODES, DesignMatrix, build_design
from foldwise.errors import InputError
from foldwise.glm.hrf import DERIVATIVE_CHOICES

__all__ = [
    "NOISE_MODELS",
    "SERIAL_CORRELATION_CHOICES",
    "STATISTICS",
    "GLM_SETTING_KEYS",
    "AR1_LIMIT",
    "AR1_STEP",
    "CHUNK_VOXELS",
    "NOISE_FLOOR",
    "PRODUCTS_RESOLUTION",
    "LinearFit",
    "PatternEstimate",
    "fit_ols",
    "ar1_moment_table",
    "ar1_coefficients",
    "bin_ar1",
    "whiten_ar1",
    "fit_ar1",
    "fit_lss",
    "estimate_patterns",
]

#: Estimators of :func:`fit_lss` (OLS, or AR(1) prewhitening).
NOISE_MODELS = ("ols", "ar1")
#: Accepted values of ``glm.serial_correlation``, and the estimator each selects: residuals taken as
#: independent over scans (OLS), or AR(1) prewhitening.
SERIAL_CORRELATION_CHOICES = {"ignore": "ols", "ar1_whiten": "ar1"}
STATISTICS = ("beta", "t")
#: The keys of the ``glm`` config section that :func:`estimate_patterns` reads.
GLM_SETTING_KEYS = ("hrf_derivatives", "highpass_s", "serial_correlation", "pattern_mode", "statistic", "conditions",
                    "hrf_steps_per_scan")
#: Estimated AR(1) coefficients are clipped to [-AR1_LIMIT, AR1_LIMIT]: the
#: whitening filter then stays well conditioned (1 / sqrt(1 - rho^2) <= 2.3);
#: common practice, no source.
AR1_LIMIT = 0.9
#: ... and rounded to multiples of AR1_STEP, so voxels whose coefficients
#: round alike share one whitened design (common practice, no source).
AR1_STEP = 0.02
#: Voxels per block of float64 work (2048 x 200 scans = 3.3 MB, so a block stays in cache between its products and
#: sums). Measured on a 59,448-voxel, 186-scan run against 8192: AR(1) 0.14 s instead of 0.17 s, OLS 0.056 s instead
#: of 0.062 s, LSS 0.24 s instead of 0.26 s, and the same patterns and residual variances bit for bit there.
CHUNK_VOXELS = 2048
#: A residual root-sum-of-squares below this fraction of the data's is
#: float64 rounding, not noise: its variance is reported as 0 and its t as 0.
NOISE_FLOOR = 1e-10
_FIRST_SCAN_CHOICES = ("keep", "drop")
_ESTIMABLE_TOLERANCE = 1e-8
# A trial whose part outside its model's condition sums is below this fraction
# of its size adds no direction (e.g. the only trial of its condition).
_OWN_PART_TOLERANCE = 1e-10
# CholeskyQR2 is used when the Cholesky factor's diagonal spans less than
# this ratio (condition number well below 1e6); the SVD otherwise.
_CHOLESKY_DIAGONAL_RATIO = 1e-6


@dataclass(frozen=True, eq=False)
class LinearFit:
    """Result of one least-squares estimator over many voxels.

    Attributes
    ----------
    betas : numpy.ndarray
        ``(n_coefficients, n_voxels)`` float64: every design column for
        :func:`fit_ols` and :func:`fit_ar1`; the trials' own (canonical)
        coefficients for :func:`fit_lss`.
    t_values : numpy.ndarray or None
        ``(n_patterns, n_voxels)`` t-values of the pattern columns (None if
        not requested).
    residual_variance : numpy.ndarray
        ``(n_voxels,)`` residual sum of squares over residual degrees of
        freedom (of the whitened model under AR(1); of the all-trials model
        for LSS).
    dof : numpy.ndarray
        ``(n_patterns,)`` int residual degrees of freedom behind each t-value.
    rho : numpy.ndarray or None
        ``(n_voxels,)`` AR(1) coefficient each voxel was whitened with.
    """

    betas: np.ndarray
    t_values: object
    residual_variance: np.ndarray
    dof: np.ndarray
    rho: object = None


@dataclass(frozen=True, eq=False)
class PatternEstimate:
    """Patterns of one run (see :func:`estimate_patterns`).

    Attributes
    ----------
    patterns : numpy.ndarray
        ``(n_patterns, n_voxels)`` float64 betas or t-values.
    table : pandas.DataFrame
        One row per pattern: ``condition``, ``trial_index``, ``onset_s``.
    design : foldwise.glm.design.DesignMatrix
        The design the patterns come from (trial-wise for LSS).
    residual_variance : numpy.ndarray
        ``(n_voxels,)`` float64.
    dof : numpy.ndarray
        ``(n_patterns,)`` int degrees of freedom of each pattern's t-value.
    rho : numpy.ndarray or None
        ``(n_voxels,)`` AR(1) coefficients used (None under OLS).
    """

    patterns: np.ndarray
    table: pd.DataFrame
    design: DesignMatrix
    residual_variance: np.ndarray
    dof: np.ndarray
    rho: object = None


def _cholesky_qr2(matrix):
    """``(Q, R)`` with ``matrix = Q R`` by CholeskyQR2, or None when the matrix is not clearly of full rank.

    Two Cholesky factorisations of small Gram matrices (Fukaya et al. 2014,
    IEEE ScalA workshop, from memory): several times faster than an SVD for
    tall matrices, and orthogonal to rounding after the second pass when the
    condition number is well below 1e8. Used only when the smallest diagonal
    entry of the first factor exceeds ``_CHOLESKY_DIAGONAL_RATIO`` times the
    largest.
    """
    if matrix.shape[1] == 0 or matrix.shape[1] > matrix.shape[0]:
        return None
    try:
        first = np.linalg.cholesky(matrix.T @ matrix)
        diagonal = np.diag(first)
        if not diagonal.min() > _CHOLESKY_DIAGONAL_RATIO * diagonal.max():
            return None
        basis = solve_triangular(first, matrix.T, lower=True).T
        second = np.linalg.cholesky(basis.T @ basis)
    except np.linalg.LinAlgError:
        return None
    return solve_triangular(second, basis.T, lower=True).T, second.T @ first.T


class _Factor:
    """A factorisation of a design with everything OLS needs, computed once.

    ``u`` is an orthonormal basis of the column space (rank ``rank``),
    ``coefficients_from_z`` maps ``z = u' y`` to the (minimum-norm)
    coefficients, ``variance_factors`` is the diagonal of ``(X'X)^+`` and
    ``estimable`` flags the columns whose coefficient is estimable. Full-rank,
    well-conditioned designs use CholeskyQR2; others the thin SVD with
    numpy's ``matrix_rank`` tolerance.
    """

    def __init__(self, matrix):
        self.n_rows = matrix.shape[0]
        factors = _cholesky_qr2(matrix)
        if factors is not None:
            basis, upper = factors
            inverse = solve_triangular(upper, np.eye(upper.shape[0]))
            self.rank = matrix.shape[1]
            self.u = np.ascontiguousarray(basis)
            self.coordinates = upper
            self.coefficients_from_z = inverse  # beta = R^-1 (Q' y)
            self.variance_factors = np.einsum("ij,ij->i", inverse, inverse)  # diag of R^-1 R^-T
            self.estimable = np.ones(matrix.shape[1], dtype=bool)
            return
        u, s, vt = np.linalg.svd(matrix, full_matrices=False)
        tolerance = (s[0] if s.size else 0.0) * max(matrix.shape) * np.finfo(np.float64).eps  # numpy.linalg.matrix_rank's rule
        rank = int(np.count_nonzero(s > tolerance))
        self.rank = rank
        self.u = np.ascontiguousarray(u[:, :rank])
        self.coordinates = s[:rank, None] * vt[:rank]  # u' X
        scaled = vt[:rank] / s[:rank, None]
        self.coefficients_from_z = np.ascontiguousarray(scaled.T)  # beta = V S^-1 (u' y)
        self.variance_factors = np.einsum("ij,ij->j", scaled, scaled)  # diag of (X'X)^+
        self.estimable = np.einsum("ij,ij->j", vt[:rank], vt[:rank]) > 1.0 - _ESTIMABLE_TOLERANCE


def _column_label(index, column_names):
    return f"design column {index}" + (f" ({column_names[index]})" if column_names is not None else "")


def _check_design(design_matrix):
    design = np.asarray(design_matrix, dtype=np.float64)
    if design.ndim != 2 or design.shape[1] < 1 or not np.all(np.isfinite(design)):
        raise InputError(None, "design_matrix", f"need a finite 2-D (scans x regressors) array (got shape {design.shape})",
                         "build it with foldwise.glm.design.build_design")
    return design


def _check_bold(bold_2d, n_scans):
    bold = np.asarray(bold_2d)
    if bold.ndim != 2 or not np.issubdtype(bold.dtype, np.number) or bold.shape[0] != n_scans:
        raise InputError(None, "bold_2d", f"need a numeric (scans x voxels) array with {n_scans} rows (got shape {bold.shape}, "
                         f"dtype {bold.dtype})", "pass the masked BOLD data with one row per volume")
    if not np.all(np.isfinite(bold)):
        raise InputError(None, "bold_2d", "the data contain NaN or infinite values inside the mask",
                         "fix the preprocessed BOLD or exclude those voxels from the brain mask")
    return bold


def _check_columns(columns, n_columns, field):
    if columns is None:
        return np.arange(n_columns)
    index = np.asarray(columns)
    if index.ndim != 1 or not np.issubdtype(index.dtype, np.integer) or (index.size and (index.min() < 0 or index.max() >= n_columns)):
        raise InputError(None, field, f"must be integer column indices in [0, {n_columns}) (got {columns!r})",
                         "pass DesignMatrix.pattern_columns")
    return index.astype(np.int64)


def _check_first_scan(first_scan):
    if first_scan not in _FIRST_SCAN_CHOICES:
        raise InputError(None, "first_scan", f"unknown choice {first_scan!r}", "use 'keep' (Prais-Winsten) or 'drop'")


def _float64_block(bold, columns, centre=False):
    """Columns of the (already checked) data as float64, optionally minus each column's mean."""
    block = np.array(bold[:, columns], dtype=np.float64)
    if centre:
        block -= block.mean(axis=0)
    return block


def _voxel_blocks(n_voxels):
    for start in range(0, n_voxels, CHUNK_VOXELS):
        yield slice(start, min(start + CHUNK_VOXELS, n_voxels))


def _t_values(betas, variance):
    """beta / sqrt(variance); 0 where the variance is 0 (a voxel without residual noise)."""
    t = np.zeros_like(betas)
    np.divide(betas, np.sqrt(variance), out=t, where=variance > 0)
    return t


def _above_rounding(residual_sum_of_squares, data_sum_of_squares):
    """Residual sums of squares, set to 0 where they are rounding error of the data.

    A voxel the model fits exactly (e.g. a constant voxel) leaves residuals of
    float64 rounding size; dividing by them would give meaningless t-values.
    Below ``(NOISE_FLOOR * ||y||)^2`` the residual counts as none.
    """
    floor = NOISE_FLOOR ** 2 * data_sum_of_squares
    return np.where(residual_sum_of_squares > floor, residual_sum_of_squares, 0.0)


def _ols_block(factor, data, pattern_columns, with_t):
    """OLS on one block of float64 data: betas, residual variance, t of the pattern columns."""
    z = factor.u.T @ data
    betas = factor.coefficients_from_z @ z
    residuals = data - factor.u @ z
    residual_variance = (_above_rounding(np.einsum("ij,ij->j", residuals, residuals), np.einsum("ij,ij->j", data, data))
                         / (factor.n_rows - factor.rank))
    t = None
    if with_t:
        t = _t_values(betas[pattern_columns], factor.variance_factors[pattern_columns][:, None] * residual_variance[None, :])
    return betas, residual_variance, t


def _require_estimable(factor, pattern_columns, column_names):
    bad = [int(j) for j in pattern_columns if not factor.estimable[j]]
    if bad:
        raise InputError(None, ", ".join(_column_label(j, column_names) for j in bad),
                         "pattern regressor(s) not estimable: a linear combination of the other regressors",
                         "check the events for duplicated or overlapping trials and the confounds for copies of event regressors")
    if factor.n_rows - factor.rank < 1:
        raise InputError(None, "design", f"rank {factor.rank} leaves no residual degrees of freedom for {factor.n_rows} scans",
                         "use fewer regressors per run")


def fit_ols(design_matrix, bold_2d, pattern_columns=None, with_t=True, column_names=None):
    """Ordinary least squares for all voxels with one factorisation of the design.

    Parameters
    ----------
    design_matrix : array_like
        ``(n_scans, n_regressors)``.
    bold_2d : array_like
        ``(n_scans, n_voxels)`` data (any float dtype; estimation in float64).
    pattern_columns : array_like of int, optional
        Columns whose t-values are wanted (default: every column).
    with_t : bool, optional
        Compute t-values (default True).
    column_names : sequence of str, optional
        Names used in error messages only.

    Returns
    -------
    LinearFit
        ``betas`` for every column; ``t_values`` for ``pattern_columns``.

    Notes
    -----
    A full-rank, well-conditioned design is factorised ``X = Q R``
    (CholeskyQR2): ``beta = R^-1 Q' y`` and ``[(X'X)^-1]_jj`` is the squared
    norm of row j of ``R^-1``. Otherwise the thin SVD ``X = U S V'`` (rank
    ``r``, small singular values dropped by numpy's ``matrix_rank``
    tolerance) gives the minimum-norm ``beta = V S^-1 U' y`` and
    ``[(X'X)^+]_jj = sum_k V_jk^2 / s_k^2``. Either way the residual variance
    is ``||y - U U' y||^2 / (T - r)`` and ``t_j = beta_j / sqrt(sigma^2
    [(X'X)^+]_jj)`` (e.g. Seber & Lee 2003, Linear Regression Analysis, ch. 3
    and 4). A pattern column outside the row space of ``X`` (not estimable)
    is an error.
    """
    design = _check_design(design_matrix)
    bold = _check_bold(bold_2d, design.shape[0])
    columns = _check_columns(pattern_columns, design.shape[1], "pattern_columns")
    factor = _Factor(design)
    _require_estimable(factor, columns, column_names)
    n_voxels = bold.shape[1]
    betas = np.empty((design.shape[1], n_voxels))
    residual_variance = np.empty(n_voxels)
    t_values = np.empty((columns.size, n_voxels)) if with_t else None
    for block in _voxel_blocks(n_voxels):
        betas[:, block], residual_variance[block], t = _ols_block(factor, _float64_block(bold, block), columns, with_t)
        if with_t:
            t_values[:, block] = t
    dof = np.full(columns.size, factor.n_rows - factor.rank, dtype=np.int64)
    return LinearFit(betas=betas, t_values=t_values, residual_variance=residual_variance, dof=dof, rho=None)


def _shift_sum(matrix):
    """D1 @ matrix with D1 = (S + S') / 2 and S the lag-1 shift (ones below the diagonal)."""
    shifted = np.zeros_like(matrix)
    shifted[1:] += matrix[:-1]
    shifted[:-1] += matrix[1:]
    return 0.5 * shifted


def ar1_moment_table(design_matrix, grid_step=0.001, grid_limit=0.99):
    """Expected lag-1 autocorrelation of OLS residuals under AR(1) noise, on a grid.

    Parameters
    ----------
    design_matrix : array_like
        ``(n_scans, n_regressors)`` design whose OLS residuals are used.
    grid_step : float, optional
        Spacing of the grid of true coefficients (default 0.001).
    grid_limit : float, optional
        The grid spans ``[-grid_limit, grid_limit]`` (default 0.99).

    Returns
    -------
    rho_grid : numpy.ndarray
        True AR(1) coefficients.
    expected_ratio : numpy.ndarray
        ``E[sum_t r_t r_(t-1)] / E[sum_t r_t^2]`` for residuals ``r = M y``
        of AR(1) noise with each coefficient (non-decreasing).

    Notes
    -----
    With the residual-forming matrix ``M = I - X X^+``, ``D1`` half the sum
    of the lag-1 shift and its transpose and the AR(1) correlation
    ``R_ij = rho^|i-j|``, ``E[r' A r] = sigma^2 tr(A M R M)``, so the ratio
    is ``tr(M D1 M R) / tr(M R) = sum_k rho^k n_k / sum_k rho^k m_k`` where
    ``m_k`` and ``n_k`` are the sums of the k-th diagonals of ``M`` and
    ``M D1 M``: one ``T x T`` product per design, then polynomials. This is
    the bias correction of Worsley et al. (2002), NeuroImage 15:1-15, who
    relate residual to true autocovariances through ``M`` (we quote their
    idea from memory); here the expectation uses every lag of the AR(1)
    correlation instead of a truncated one.
    """
    design = _check_design(design_matrix)
    for value, field in ((grid_step, "grid_step"), (grid_limit, "grid_limit")):
        if not (np.isscalar(value) and np.isfinite(value) and 0 < value < 1):
            raise InputError(None, field, f"must be in (0, 1) (got {value!r})", "use the defaults")
    factor = _Factor(design)
    n_scans = design.shape[0]
    residual_forming = np.eye(n_scans) - factor.u @ factor.u.T
    lag_products = residual_forming @ _shift_sum(residual_forming)
    scan = np.arange(n_scans)
    lag = np.abs(scan[:, None] - scan[None, :]).ravel()
    diagonal_sums_m = np.bincount(lag, weights=residual_forming.ravel(), minlength=n_scans)
    diagonal_sums_n = np.bincount(lag, weights=lag_products.ravel(), minlength=n_scans)
    rho_grid = np.arange(-round(grid_limit / grid_step), round(grid_limit / grid_step) + 1) * grid_step
    # Horner's rule: sum_k rho^k c_k for every grid value, one pass per lag
    expected_ratio = polyval(rho_grid, diagonal_sums_n) / polyval(rho_grid, diagonal_sums_m)
    return rho_grid, np.maximum.accumulate(expected_ratio)


def _lag_sums(values):
    """Per column: sum_t v_t^2 and sum_t v_t v_(t-1) (over t >= 1)."""
    return np.einsum("ij,ij->j", values, values), np.einsum("ij,ij->j", values[1:], values[:-1])


def _lag_ratio(residuals):
    """Plain lag-1 autocorrelation sum r_t r_(t-1) / sum r_t^2 per column (0 without variance)."""
    lag0, lag1 = _lag_sums(residuals)
    ratio = np.zeros_like(lag0)
    np.divide(lag1, lag0, out=ratio, where=lag0 > 0)
    return ratio


def ar1_coefficients(residuals, design_matrix):
    """Bias-corrected AR(1) coefficients of OLS residuals, per voxel.

    Parameters
    ----------
    residuals : array_like
        ``(n_scans, n_voxels)`` OLS residuals of ``design_matrix``.
    design_matrix : array_like
        ``(n_scans, n_regressors)``.

    Returns
    -------
    numpy.ndarray
        ``(n_voxels,)`` float64: the coefficient whose expected residual
        autocorrelation (:func:`ar1_moment_table`) equals the observed one,
        by linear interpolation in the table; within ``[-0.99, 0.99]``; 0 for
        voxels without residual variance. Not binned (see :func:`bin_ar1`).

    Notes
    -----
    Residuals are autocorrelated even for white noise, because ``M`` mixes
    neighbouring scans: the plain estimate ``sum r_t r_(t-1) / sum r_t^2``
    is biased (for a typical design with drifts, by about -0.05 at 200
    scans). Matching its expectation through ``M`` removes that bias
    (Worsley et al. 2002, NeuroImage 15:1-15); what remains is the O(1/T)
    bias of a ratio estimator.
    """
    design = _check_design(design_matrix)
    values = np.asarray(residuals, dtype=np.float64)
    if values.ndim == 1:
        values = values[:, None]
    if values.ndim != 2 or values.shape[0] != design.shape[0]:
        raise InputError(None, "residuals", f"need {design.shape[0]} rows (one per scan), got shape {values.shape}",
                         "pass the OLS residuals of this design")
    rho_grid, expected_ratio = ar1_moment_table(design)
    return np.interp(_lag_ratio(values), expected_ratio, rho_grid)


def bin_ar1(rho, step=AR1_STEP, limit=AR1_LIMIT):
    """Clip AR(1) coefficients to ``[-limit, limit]`` and round them to multiples of ``step``.

    Parameters
    ----------
    rho : array_like
        Estimated coefficients.
    step : float, optional
        Bin width (default ``AR1_STEP``).
    limit : float, optional
        Clip bound, ``0 < limit < 1`` (default ``AR1_LIMIT`` = 0.9).

    Returns
    -------
    numpy.ndarray
        Binned coefficients (float64), exact multiples ``k * step``.

    Notes
    -----
    Rounding costs at most ``step / 2`` in the coefficient, far below its
    sampling error (about ``1 / sqrt(n_scans)``, i.e. 0.07 for 200 scans),
    and lets voxels of one bin share a whitened design (common practice, no
    source).

    Examples
    --------
    >>> bin_ar1([0.234, -0.97, 0.5049], step=0.01).tolist()
    [0.23, -0.9, 0.5]
    """
    if not (np.isscalar(step) and np.isfinite(step) and 0 < step < 1):
        raise InputError(None, "step", f"must be in (0, 1) (got {step!r})", "pass a bin width such as 0.01")
    if not (np.isscalar(limit) and np.isfinite(limit) and 0 < limit < 1):
        raise InputError(None, "limit", f"must be in (0, 1) (got {limit!r})", "pass a clip bound such as 0.9")
    values = np.asarray(rho, dtype=np.float64)
    if not np.all(np.isfinite(values)):
        raise InputError(None, "rho", "AR(1) coefficients must be finite", "estimate them with ar1_coefficients")
    levels = np.round(np.clip(values, -limit, limit) / step)
    return levels * step


def whiten_ar1(values, rho, first_scan="keep"):
    """Apply the AR(1) whitening filter along the first axis.

    Parameters
    ----------
    values : array_like
        ``(n_scans,)`` or ``(n_scans, n_columns)``.
    rho : float or array_like
        AR(1) coefficient, scalar or one per column, ``|rho| < 1``.
    first_scan : {"keep", "drop"}
        ``keep``: Prais-Winsten, the first scan is scaled by
        ``sqrt(1 - rho^2)`` (T rows out); ``drop``: Cochrane-Orcutt, the
        first scan is dropped (T - 1 rows out).

    Returns
    -------
    numpy.ndarray
        ``w_0 = sqrt(1 - rho^2) y_0`` (keep only) and ``w_t = y_t - rho y_{t-1}``.

    Notes
    -----
    With ``keep`` the filter is the exact inverse square root of the AR(1)
    correlation matrix ``rho^|i - j|`` up to the factor ``1 / (1 - rho^2)``,
    so least squares on whitened data is exact GLS (Prais & Winsten 1954,
    Cowles Commission Discussion Paper 383; Cochrane & Orcutt 1949, JASA
    44:32-61).
    """
    _check_first_scan(first_scan)
    array = np.asarray(values, dtype=np.float64)
    coefficient = np.asarray(rho, dtype=np.float64)
    if array.ndim not in (1, 2) or array.shape[0] < 2:
        raise InputError(None, "values", f"need (scans,) or (scans, columns) with >= 2 scans (got shape {array.shape})",
                         "pass one row per scan")
    if coefficient.ndim > 1 or (coefficient.ndim == 1 and (array.ndim != 2 or coefficient.size != array.shape[1])):
        raise InputError(None, "rho", f"need a scalar or one coefficient per column (got shape {coefficient.shape})",
                         "pass one AR(1) coefficient per column")
    if not np.all(np.abs(coefficient) < 1):
        raise InputError(None, "rho", f"AR(1) coefficients must lie in (-1, 1) (got {coefficient!r})", "clip them with bin_ar1")
    whitened = np.empty_like(array)
    np.multiply(array[:-1], -coefficient, out=whitened[1:])
    whitened[1:] += array[1:]
    if first_scan == "drop":
        return whitened[1:]
    np.multiply(array[:1], np.sqrt(1.0 - coefficient ** 2), out=whitened[:1])
    return whitened


def _data_pass(bold, noise_design=None, design=None):
    """One pass over contiguous blocks of the data: what the AR(1) fits need from it.

    Returns ``(ratio, products)``. ``ratio``: the plain lag-1 autocorrelation
    of each voxel's OLS residuals under ``noise_design``, from the residuals
    themselves (None without it). ``products`` (None without ``design``):
    :class:`_DataProducts` of the data, each voxel minus its mean, with
    ``design`` (any matrix of the run's rows) and with itself, from which
    :func:`fit_ar1` gets the coefficients and every whitened fit without
    forming residuals or whitening the data.
    """
    n_voxels = bold.shape[1]
    noise = None if noise_design is None else _Factor(noise_design)
    ratio = None if noise is None else np.empty(n_voxels)
    products = None
    if design is not None:
        # [X, X shifted down + X shifted up]: X'y and sum_(t>=1) (x_t y_(t-1) + x_(t-1) y_t) in one product
        neighbours = np.zeros_like(design)
        neighbours[1:] += design[:-1]
        neighbours[:-1] += design[1:]
        stacked = np.ascontiguousarray(np.hstack([design, neighbours]).T)
        n_columns = design.shape[1]
        products = _DataProducts(*(np.empty((n_columns, n_voxels)) for _ in range(2)), *(np.empty(n_voxels) for _ in range(6)))
    for block in _voxel_blocks(n_voxels):
        data = _float64_block(bold, block)
        if noise is not None:
            ratio[block] = _lag_ratio(data - noise.u @ (noise.u.T @ data))
        if products is not None:
            products.mean[block] = data.mean(axis=0)
            data -= products.mean[block]
            both = stacked @ data
            products.cross[:, block], products.lag_cross[:, block] = both[:n_columns], both[n_columns:]
            products.square[block], products.lag_square[block] = _lag_sums(data)
            products.total[block], products.first[block], products.last[block] = data.sum(axis=0), data[0], data[-1]
    return ratio, products


@dataclass
class _DataProducts:
    """Products of one run's centred data ``y - mean(y)`` (per voxel) with its design ``X`` and with itself."""

    cross: np.ndarray  # X'y, (regressors, voxels)
    lag_cross: np.ndarray  # sum_(t>=1) (x_t y_(t-1) + x_(t-1) y_t)
    square: np.ndarray  # y'y
    lag_square: np.ndarray  # sum_(t>=1) y_t y_(t-1)
    total: np.ndarray  # sum_t y_t (zero up to rounding)
    first: np.ndarray  # y_0
    last: np.ndarray  # y_(T-1)
    mean: np.ndarray  # the mean taken off each voxel

    def columns(self, rows):
        """The products with some of the matrix's columns (the voxels' own sums are shared)."""
        return replace(self, cross=self.cross[rows], lag_cross=self.lag_cross[rows])


def _residual_lag_ratio(noise_design, products, bold):
    """:func:`_lag_ratio` of each voxel's OLS residuals under ``noise_design``, from the products with it.

    With ``u = X C`` orthonormal, ``z = C' X'y`` and ``beta = C z``, the
    residuals ``r = y - X beta`` have ``sum r_t^2 = y'y - ||z||^2`` and
    ``sum_(t>=1) r_t r_(t-1) = sum y_t y_(t-1) - beta' L + beta' H beta`` with
    ``L`` the products' ``lag_cross`` and ``H`` the symmetric part of
    ``sum_(t>=1) x_t x_(t-1)'``. The data are centred, which leaves the
    residuals unchanged as the constant is in the span of ``X``. Voxels whose
    residual sum of squares is below ``PRODUCTS_RESOLUTION`` of the data's
    (exact fits, constant voxels) get the ratio of their explicit residuals.
    """
    factor = _Factor(noise_design)
    z = factor.coefficients_from_z.T @ products.cross
    beta = factor.coefficients_from_z @ z
    neighbours = noise_design[1:].T @ noise_design[:-1]
    lag0 = products.square - np.einsum("ij,ij->j", z, z)
    lag1 = (products.lag_square - np.einsum("ij,ij->j", beta, products.lag_cross)
            + np.einsum("ij,ij->j", beta, 0.5 * (neighbours + neighbours.T) @ beta))
    ratio = np.zeros_like(lag0)
    np.divide(lag1, lag0, out=ratio, where=lag0 > 0)
    unresolved = lag0 <= PRODUCTS_RESOLUTION * products.square
    if unresolved.any():
        ratio[unresolved] = _data_pass(bold[:, unresolved], noise_design=noise_design)[0]
    return ratio


def _binned_rho(noise_design, ratio):
    """Bias-corrected (:func:`ar1_moment_table`), binned AR(1) coefficients from the residual lag ratios."""
    rho_grid, expected_ratio = ar1_moment_table(noise_design)
    return bin_ar1(np.interp(ratio, expected_ratio, rho_grid))


def _estimate_rho(rho_design, bold):
    """Bias-corrected, binned AR(1) coefficients from the OLS residuals of ``rho_design``."""
    return _binned_rho(rho_design, _data_pass(bold, noise_design=rho_design)[0])


def _noise_design(design, rho_design):
    """The design whose OLS residuals give the AR(1) coefficients (default: ``design``), checked."""
    noise_design = design if rho_design is None else _check_design(rho_design)
    if noise_design.shape[0] != design.shape[0]:
        raise InputError(None, "rho_design", f"has {noise_design.shape[0]} rows, the design {design.shape[0]}",
                         "pass a design of the same run")
    return noise_design


def _voxel_rho(design, bold, rho, rho_design):
    """The AR(1) coefficient of every voxel: ``rho`` checked, or estimated from the residuals of ``rho_design`` (default: ``design``)."""
    if rho is not None:
        return _check_rho(rho, bold.shape[1])
    return _estimate_rho(_noise_design(design, rho_design), bold)


def _check_rho(rho, n_voxels):
    values = np.asarray(rho, dtype=np.float64)
    if values.ndim == 0:
        values = np.full(n_voxels, float(values))
    if values.shape != (n_voxels,) or not np.all(np.abs(values) < 1):
        raise InputError(None, "rho", f"need one coefficient in (-1, 1) per voxel (got shape {values.shape})",
                         "pass a scalar or an array of n_voxels coefficients")
    return values


def _by_noise_level(bold, voxel_rho, solve, n_beta_rows, n_t_rows, with_t, first_scan="keep", centre=False):
    """Run ``solve(level, data)`` on blocks of voxels that share one AR(1) coefficient.

    ``voxel_rho`` None: plain blocks, no whitening (``level`` None). Else the
    voxels are sorted by coefficient once, so each level is a contiguous run
    of columns, whitened with its coefficient and solved in blocks of at most
    ``CHUNK_VOXELS``; results are put back in the input order. ``solve``
    returns (betas, residual variance, t or None) for its block. ``centre``
    subtracts each voxel's mean first (only valid when the nuisance columns
    span the constant, so no reported coefficient changes).
    """
    n_voxels = bold.shape[1]
    betas = np.empty((n_beta_rows, n_voxels))
    residual_variance = np.empty(n_voxels)
    t_values = np.empty((n_t_rows, n_voxels)) if with_t else None
    if voxel_rho is None:
        order, runs = None, [(None, 0, n_voxels)]
    else:
        order = np.argsort(voxel_rho, kind="stable")
        levels = voxel_rho[order]
        starts = np.flatnonzero(np.r_[True, levels[1:] != levels[:-1]])
        runs = [(float(levels[start]), start, end) for start, end in zip(starts, np.r_[starts[1:], n_voxels])]
    for level, run_start, run_end in runs:
        for start in range(run_start, run_end, CHUNK_VOXELS):
            block = slice(start, min(start + CHUNK_VOXELS, run_end))
            target = block if order is None else order[block]  # these voxels, in the input order
            # Each block gathers its own columns: no sorted copy of the whole run (a run-sized allocation).
            data = _float64_block(bold, target, centre)
            if level is not None:
                data = whiten_ar1(data, level, first_scan)
            betas[:, target], residual_variance[target], t = solve(level, data)
            if with_t:
                t_values[:, target] = t
    return betas, residual_variance, t_values


def fit_ar1(design_matrix, bold_2d, pattern_columns=None, with_t=True, rho=None, rho_design=None, first_scan="keep",
            column_names=None):
    """AR(1) prewhitened least squares, voxels with equal coefficients solved together.

    Parameters
    ----------
    design_matrix : array_like
        ``(n_scans, n_regressors)``.
    bold_2d : array_like
        ``(n_scans, n_voxels)``.
    pattern_columns : array_like of int, optional
        Columns whose t-values are wanted (default: every column).
    with_t : bool, optional
        Compute t-values (default True).
    rho : float or array_like, optional
        Fixed coefficient(s), scalar or per voxel, used as given. Default:
        estimate them (:func:`ar1_coefficients` on the OLS residuals of
        ``rho_design``) and bin them (:func:`bin_ar1`).
    rho_design : array_like, optional
        Design whose OLS residuals give the coefficients (default: the
        design itself).
    first_scan : {"keep", "drop"}
        Whitening variant (:func:`whiten_ar1`); ``keep`` (Prais-Winsten,
        the default) is exact GLS; ``drop`` matches ``statsmodels`` GLSAR.
    column_names : sequence of str, optional
        Names used in error messages only.

    Returns
    -------
    LinearFit
        ``rho`` holds the coefficient each voxel was whitened with;
        ``residual_variance`` is that of the whitened residuals (the
        innovation variance), with ``T - rank`` (keep) or ``T - 1 - rank``
        (drop) degrees of freedom.

    Notes
    -----
    For each distinct coefficient the whitened design is factorised once.
    When the design spans the constant (every design foldwise builds) and
    has few columns, the data are not whitened: one pass over them gives the products of the
    centred data with the design, with the design's lag-1 neighbours and
    with themselves, and every voxel's whitened fit follows from those
    through the tridiagonal ``W'W`` of its coefficient
    (:func:`_fit_from_products`), as do its coefficient's OLS residual
    autocorrelations (:func:`_residual_lag_ratio`); the mean goes back into
    the betas through ``X c = 1``. A voxel whose residual the products cannot
    resolve (an exact or near-exact fit, see ``PRODUCTS_RESOLUTION``), and
    every voxel of a design without the constant or with more than a quarter
    as many columns as scans (a trial-wise design, where whitening is the
    cheaper route), is solved from its whitened data with the OLS algebra of
    :func:`fit_ols` instead.
    """
    design = _check_design(design_matrix)
    bold = _check_bold(bold_2d, design.shape[0])
    columns = _check_columns(pattern_columns, design.shape[1], "pattern_columns")
    _check_first_scan(first_scan)
    voxel_rho = None if rho is None else _check_rho(rho, bold.shape[1])
    noise_design = None if rho is not None else _noise_design(design, rho_design)
    unwhitened = _Factor(design)
    _require_estimable(unwhitened, columns, column_names)
    whitened_factors = {}

    def factor_of(level):
        if level not in whitened_factors:  # one factorisation per coefficient
            whitened_factors[level] = _Factor(whiten_ar1(design, level, first_scan))
        return whitened_factors[level]

    def solve(level, data):
        return _ols_block(factor_of(level), data, columns, with_t)

    # The products route costs about k^2 per voxel where whitening costs k T (k columns, T scans): measured on
    # 60,000 voxels x 200 scans, 0.08 s against 0.15 s at k = 18, even around k = 50-60, slower beyond. It also
    # needs the constant in the design's span.
    constant = _constant_coefficients(design) if 4 * design.shape[1] <= design.shape[0] else None
    if constant is None:  # a wide design (trial-wise), or no constant: whiten the data instead
        voxel_rho = voxel_rho if voxel_rho is not None else _estimate_rho(noise_design, bold)
        betas, residual_variance, t_values = _by_noise_level(bold, voxel_rho, solve, design.shape[1], columns.size, with_t,
                                                             first_scan=first_scan)
    else:
        # One pass gives the products with the design and, when the coefficients are estimated, with their design;
        # the coefficients come from those products if that design also spans the constant, else from residuals.
        same = noise_design is None or noise_design is design or np.array_equal(noise_design, design)
        from_products = noise_design is not None and (same or _constant_coefficients(noise_design) is not None)
        matrix = design if same else np.hstack([design, noise_design])
        ratio, products = _data_pass(bold, None if from_products or noise_design is None else noise_design, matrix)
        noise_products = products if same else products.columns(slice(design.shape[1], None))
        products = products if same else products.columns(slice(0, design.shape[1]))
        if voxel_rho is None:
            ratio = _residual_lag_ratio(noise_design, noise_products, bold) if from_products else ratio
            voxel_rho = _binned_rho(noise_design, ratio)
        betas, residual_variance, t_values, unresolved = _fit_from_products(design, products, voxel_rho, factor_of, columns,
                                                                            with_t, first_scan, constant)
        if unresolved.any():  # (near-)exact fits: from their whitened data, as the products cannot resolve them
            redo = _by_noise_level(bold[:, unresolved], voxel_rho[unresolved], solve, design.shape[1], columns.size, with_t,
                                   first_scan=first_scan)
            betas[:, unresolved], residual_variance[unresolved] = redo[0], redo[1]
            if with_t:
                t_values[:, unresolved] = redo[2]
    dof = design.shape[0] - (first_scan == "drop") - unwhitened.rank  # whitening keeps the rank
    return LinearFit(betas=betas, t_values=t_values, residual_variance=residual_variance,
                     dof=np.full(columns.size, dof, dtype=np.int64), rho=voxel_rho)


#: A voxel whose whitened residual sum of squares, computed from the products, is below this fraction of its
#: whitened (centred) sum of squares is refitted from its whitened data: the difference of two sums loses about
#: -log10 of that fraction in digits, so below 1e-6 (a fit explaining 99.9999 % of the centred data) it is not
#: trusted to the precision the t-values are reported with. Real noisy voxels stay far above it.
PRODUCTS_RESOLUTION = 1e-6


def _constant_coefficients(design):
    """The minimum-norm ``c`` with ``X c = 1`` (the constant in the design's span), or None when the span lacks it."""
    ones = np.ones(design.shape[0])
    coefficients = np.linalg.lstsq(design, ones, rcond=None)[0]
    if np.linalg.norm(design @ coefficients - ones) > 1e-9 * np.sqrt(design.shape[0]):
        return None
    return coefficients


def _whitened_forms(rho, first_scan, cross, lag_cross, square, lag_square, first, last, first_row, last_row):
    """``X' W'W y`` and ``y' W'W y`` of AR(1) whitening with coefficient(s) ``rho`` (per voxel), from the products.

    ``W'W = (1 + rho^2) I - rho (S + S') - a e_0 e_0' - rho^2 e_(T-1) e_(T-1)'``
    with ``S`` the lag-1 shift, ``a = rho^2`` when the first scan is kept
    (Prais-Winsten) and ``a = 1`` when it is dropped (Cochrane-Orcutt):
    multiply out ``sum_t (w_t)^2`` of :func:`whiten_ar1`'s rows. With the first
    scan kept this is ``(1 - rho^2)`` times the inverse of the AR(1) correlation
    matrix, the tridiagonal matrix with 1 at both corners, ``1 + rho^2``
    inside and ``-rho`` beside the diagonal (e.g. Hamilton 1994, Time Series
    Analysis, ch. 5, from memory; tests/test_glm.py checks these forms against
    whitened data).
    """
    first_weight = rho ** 2 if first_scan == "keep" else np.ones_like(rho)
    last_weight = rho ** 2
    inside = 1.0 + rho ** 2
    design_form = None
    if cross is not None:
        design_form = (inside * cross - rho * lag_cross - first_row[:, None] * (first_weight * first)
                       - last_row[:, None] * (last_weight * last))
    data_form = inside * square - 2.0 * rho * lag_square - first_weight * first ** 2 - last_weight * last ** 2
    return design_form, data_form


def _fit_from_products(design, products, voxel_rho, factor_of, columns, with_t, first_scan, constant):
    """AR(1) fits of every voxel from its :class:`_DataProducts`, without whitening the data.

    With ``W`` the voxel's whitening filter and ``u = W X C`` the orthonormal
    basis of its whitened design (``C`` = ``coefficients_from_z``),
    ``z = u' W y = C' X'W'W y``, ``beta = C z`` and the residual sum of squares
    is ``y'W'W y - ||z||^2``: the quadratic forms come from the products
    (:func:`_whitened_forms`), the rest from one small factorisation per
    coefficient. The betas of the data as given are those of the centred
    data plus ``constant`` (``X c = 1``) times the voxel's mean. Returns
    betas, residual variance, t-values and the voxels to refit (see
    ``PRODUCTS_RESOLUTION``).
    """
    n_voxels = voxel_rho.size
    n_scans = design.shape[0]
    design_form, data_form = _whitened_forms(voxel_rho, first_scan, products.cross, products.lag_cross, products.square,
                                             products.lag_square, products.first, products.last, design[0], design[-1])
    # The rounding floor compares with the sum of squares of the whitened data as given (mean included).
    mean = products.mean
    _, raw_form = _whitened_forms(voxel_rho, first_scan, None, None, products.square + 2 * mean * products.total + n_scans * mean ** 2,
                                  products.lag_square + mean * (2 * products.total - products.first - products.last)
                                  + (n_scans - 1) * mean ** 2, products.first + mean, products.last + mean, None, None)
    # In the order of the coefficients, so that each level is a contiguous slice; back to the voxels' order at the end.
    order = np.argsort(voxel_rho, kind="stable")
    levels = voxel_rho[order]
    design_form, data_form, raw_form, mean = design_form[:, order], data_form[order], raw_form[order], mean[order]
    betas = np.empty((design.shape[1], n_voxels))
    residual_sum = np.empty(n_voxels)
    residual_variance = np.empty(n_voxels)
    t_values = np.empty((columns.size, n_voxels)) if with_t else None
    starts = np.flatnonzero(np.r_[True, levels[1:] != levels[:-1]])
    for start, end in zip(starts, np.r_[starts[1:], n_voxels]):
        level = slice(start, end)
        factor = factor_of(float(levels[start]))
        z = factor.coefficients_from_z.T @ design_form[:, level]
        betas[:, level] = factor.coefficients_from_z @ z + constant[:, None] * mean[None, level]
        residual_sum[level] = data_form[level] - np.einsum("ij,ij->j", z, z)
        residual_variance[level] = _above_rounding(residual_sum[level], raw_form[level]) / (factor.n_rows - factor.rank)
        if with_t:
            t_values[:, level] = _t_values(betas[columns, level], factor.variance_factors[columns][:, None] * residual_variance[None, level])
    unsorted = np.empty_like(order)
    unsorted[order] = np.arange(n_voxels)
    betas, residual_sum, residual_variance = betas[:, unsorted], residual_sum[unsorted], residual_variance[unsorted]
    t_values = t_values[:, unsorted] if with_t else None
    data_form = data_form[unsorted]
    unresolved = residual_sum <= PRODUCTS_RESOLUTION * data_form
    return betas, residual_variance, t_values, unresolved


def _check_blocks(pattern_blocks, pattern_groups, n_columns):
    blocks = np.asarray(pattern_blocks)
    if blocks.ndim == 1:
        blocks = blocks[:, None]
    if (blocks.ndim != 2 or blocks.shape[0] < 1 or not np.issubdtype(blocks.dtype, np.integer)
            or blocks.min() < 0 or blocks.max() >= n_columns or np.unique(blocks).size != blocks.size):
        raise InputError(None, "pattern_blocks", f"need distinct column indices in [0, {n_columns}), one row per trial "
                         f"(got shape {blocks.shape})", "pass DesignMatrix.pattern_blocks of a trial-wise design")
    labels = np.asarray(pattern_groups)
    if labels.shape != (blocks.shape[0],):
        raise InputError(None, "pattern_groups", f"need one condition label per trial ({blocks.shape[0]}), got shape {labels.shape}",
                         "pass the pattern table's condition column")
    _, group_index = np.unique(labels, return_inverse=True)
    return blocks.astype(np.int64), group_index.astype(np.int64)


def _lss_selection(group_index, n_basis):
    """Selection tensor G (n_trials, n_trials * n_basis, n_model_columns) of the LSS models.

    Model ``k`` has, for each basis function: trial k; the sum of the other
    trials of its condition; the sum of the trials of each other condition.
    """
    n_trials = group_index.size
    n_groups = int(group_index.max()) + 1
    same = group_index[:, None] == group_index[None, :]
    trial_level = np.zeros((n_trials, n_trials, n_groups + 1))
    trial_level[:, :, 0] = np.eye(n_trials)
    trial_level[:, :, 1] = same & ~np.eye(n_trials, dtype=bool)
    model, trial = np.nonzero(~same)
    other = group_index[trial]
    trial_level[model, trial, 2 + other - (other > group_index[model])] = 1.0
    selection = np.einsum("kjc,bd->kjbcd", trial_level, np.eye(n_basis))
    return selection.reshape(n_trials, n_trials * n_basis, (n_groups + 1) * n_basis)


def _condition_sums(group_index, n_basis):
    """(n_trials * n_basis, n_conditions * n_basis) 0/1 matrix summing each condition's trials per basis function."""
    n_groups = int(group_index.max()) + 1
    membership = (group_index[:, None] == np.arange(n_groups)[None, :]).astype(np.float64)
    return np.kron(membership, np.eye(n_basis))


class _LSSOperator:
    """Label-free pieces of all LSS models of one (whitened) design.

    In the coordinates of an orthonormal basis of the residualised trial
    columns, model k spans its trial's own columns ``B_k`` and the condition
    sums ``S`` (its "other trials" regressor is its condition's sum minus
    trial k). With ``R_k = (I - P_S) B_k``, the coefficient of the canonical
    own column is ``w_k' z`` with ``w_k' = e_c' S^+ + (e_0' - e_c' S^+ B_k) R_k^+``
    (Frisch-Waugh-Lovell twice, undoing the reparametrisation from
    ``S_c - B_k`` to ``S_c``), and ``w_k' C_k = e_0'`` on model k's own
    regressors ``C_k`` certifies that the coefficient is estimable.
    """

    def __init__(self, design, blocks, group_index, selection, condition_sums, nuisance_columns, column_names):
        self.nuisance = _Factor(design[:, nuisance_columns])
        trial_regressors = design[:, blocks.ravel()]
        residualised = trial_regressors - self.nuisance.u @ (self.nuisance.u.T @ trial_regressors)  # Frisch-Waugh-Lovell
        trials = _Factor(residualised)
        self.trial_basis, coordinates, self.trial_rank = trials.u, trials.coordinates, trials.rank  # coordinates: (q, n_trials * n_basis)
        n_trials, n_basis = blocks.shape
        sums = _Factor(coordinates @ condition_sums)
        sums_pinv = sums.coefficients_from_z @ sums.u.T  # S^+, (n_conditions * n_basis, q)
        condition_rows = sums_pinv[group_index * n_basis]  # e_c' S^+ of each trial's condition (canonical)
        own_columns = coordinates.reshape(-1, n_trials, n_basis).transpose(1, 0, 2)  # B_k: (n_trials, q, n_basis)
        own_part = own_columns - np.matmul(sums.u, np.matmul(sums.u.T, own_columns))  # R_k
        own_u, own_s, own_vt = np.linalg.svd(own_part, full_matrices=False)
        own_valid = own_s > _OWN_PART_TOLERANCE * np.linalg.norm(own_columns, axis=(1, 2))[:, None]
        inverse_s = np.zeros_like(own_s)
        np.divide(1.0, own_s, out=inverse_s, where=own_valid)
        own_pinv = np.einsum("kjb,kj,kqj->kbq", own_vt, inverse_s, own_u)  # R_k^+
        correction = np.eye(n_basis)[0] - np.einsum("kq,kqb->kb", condition_rows, own_columns)
        self.weights = condition_rows + np.einsum("kb,kbq->kq", correction, own_pinv)  # beta_k = weights[k] @ z
        self.variance_factors = np.einsum("kq,kq->k", self.weights, self.weights)
        reproduced = np.einsum("ka,kap->kp", self.weights @ coordinates, selection)  # w_k' C_k
        target = np.zeros(selection.shape[2])
        target[0] = 1.0
        estimable = np.max(np.abs(reproduced - target), axis=1) < _ESTIMABLE_TOLERANCE ** 0.5
        if not np.all(estimable):
            bad = np.flatnonzero(~estimable)
            names = [_column_label(int(blocks[k, 0]), column_names) for k in bad]
            raise InputError(None, ", ".join(names), "trial regressor(s) not estimable in their LSS model",
                             "check the events for duplicated trials (same onset and condition)")
        # Explained sums of squares: the shared condition sums plus each trial's own part.
        self.shared_projector = np.ascontiguousarray(sums.u.T)
        self.n_basis = n_basis
        self.own_projectors = np.ascontiguousarray((own_u * own_valid[:, None, :]).transpose(0, 2, 1).reshape(-1, own_u.shape[1]))
        n_rows = design.shape[0]
        self.dof = n_rows - self.nuisance.rank - sums.rank - own_valid.sum(axis=1)
        self.dof_all_trials = n_rows - self.nuisance.rank - self.trial_rank
        if self.dof.min() < 1 or self.dof_all_trials < 1:
            raise InputError(None, "design", "the trial-wise model leaves no residual degrees of freedom",
                             "use fewer trials per run or per_condition patterns")

    def apply(self, data, with_t):
        # U is orthogonal to the nuisance columns, so U' y = U' y_r, and
        # ||y_r||^2 = ||y||^2 - ||N' y||^2 (data centred when the nuisance spans
        # the constant, so the subtraction loses no precision to the baseline).
        nuisance_part = self.nuisance.u.T @ data
        z = self.trial_basis.T @ data
        betas = self.weights @ z
        data_sum_of_squares = np.einsum("ij,ij->j", data, data)
        total = np.maximum(data_sum_of_squares - np.einsum("ij,ij->j", nuisance_part, nuisance_part), 0.0)
        explained_all = np.einsum("ij,ij->j", z, z)
        residual_variance = _above_rounding(np.maximum(total - explained_all, 0.0), data_sum_of_squares) / self.dof_all_trials
        t = None
        if with_t:
            shared = self.shared_projector @ z
            own = (self.own_projectors @ z).reshape(betas.shape[0], self.n_basis, -1)
            explained = np.einsum("ij,ij->j", shared, shared)[None, :] + np.einsum("kbv,kbv->kv", own, own)
            trial_rss = _above_rounding(np.maximum(total[None, :] - explained, 0.0), data_sum_of_squares[None, :])
            t = _t_values(betas, self.variance_factors[:, None] * trial_rss / self.dof[:, None])
        return betas, residual_variance, t


def fit_lss(design_matrix, bold_2d, pattern_blocks, pattern_groups, with_t=True, noise_model="ols", rho=None,
            rho_design=None, column_names=None):
    """Least squares - separate: one model per trial, without refitting the data per trial.

    Parameters
    ----------
    design_matrix : array_like
        ``(n_scans, n_regressors)`` trial-wise design (one block of basis
        columns per trial, e.g. ``build_design(..., pattern_mode="lss")``).
    bold_2d : array_like
        ``(n_scans, n_voxels)``.
    pattern_blocks : array_like of int
        ``(n_trials, n_basis)`` columns of each trial, canonical first.
        Every other column is nuisance.
    pattern_groups : array_like
        ``(n_trials,)`` condition label of each trial.
    with_t : bool, optional
        Compute t-values (default True).
    noise_model : {"ols", "ar1"}
        ``ar1``: whiten with per-voxel binned coefficients (estimated from
        the OLS residuals of ``rho_design``, default the design itself,
        unless ``rho`` is given), then the same algebra per bin.
    rho : float or array_like, optional
        Fixed AR(1) coefficient(s) (``noise_model="ar1"`` only).
    rho_design : array_like, optional
        Design for the AR(1) estimate (e.g. the per-condition design).
    column_names : sequence of str, optional
        Names used in error messages only.

    Returns
    -------
    LinearFit
        ``betas`` and ``t_values`` ``(n_trials, n_voxels)``: each trial's
        canonical coefficient in its own model; ``residual_variance`` of the
        model with every trial (the LSA model), which the algebra gives for
        free; ``dof`` per trial.

    Notes
    -----
    Model ``k`` holds trial ``k``, the other trials of its condition as one
    regressor, each other condition as one regressor, and the nuisance
    columns: the "LSS-N" form (N = one regressor per condition for the other
    trials), named so by Abdulrahman & Henson 2016 (NeuroImage 125:756-766).
    Mumford et al. 2012 (NeuroImage 59:2636-2643) introduced least-squares-
    separate with all other trials in a single regressor (the "LSS-1" form);
    the per-condition variant appears in Turner et al. 2012 (NeuroImage
    62:1429-1438). Attributions from memory. By the
    Frisch-Waugh-Lovell theorem the trial coefficients and their covariance
    equal those of the regression of the nuisance-residualised data on the
    nuisance-residualised trial regressors. All of those lie in the span of
    the residualised trial columns, with orthonormal basis ``U`` (``q``
    columns), so with ``z = U' y_r`` model ``k`` is a ``q x p`` problem:
    ``beta_k = w_k' z`` and ``RSS_k = ||y_r||^2 - ||Q_k' z||^2`` (``Q_k``
    an orthonormal basis of model k's regressors in those coordinates),
    with ``T - rank(N) - rank(model k)`` degrees of freedom. Because the
    "other trials" regressor is the condition's sum minus trial k, model k
    spans trial k plus every condition's sum; ``||Q_k' z||^2`` is then the
    part explained by the condition sums (shared by all models) plus that of
    trial k's component orthogonal to them. The data meet the models in a
    few products per block of voxels: ``N' y``, ``U' y`` (``U`` is orthogonal
    to ``N``, so ``U' y = U' y_r``), then ``q``-dimensional ones.
    """
    design = _check_design(design_matrix)
    bold = _check_bold(bold_2d, design.shape[0])
    blocks, group_index = _check_blocks(pattern_blocks, pattern_groups, design.shape[1])
    if noise_model not in NOISE_MODELS:
        raise InputError(None, "glm.noise_model", f"unknown noise model {noise_model!r}", f"use one of {', '.join(NOISE_MODELS)}")
    if noise_model == "ols" and rho is not None:
        raise InputError(None, "rho", "AR(1) coefficients given with noise_model 'ols'", "pass noise_model='ar1' or no rho")
    in_block = np.zeros(design.shape[1], dtype=bool)
    in_block[blocks.ravel()] = True
    nuisance_columns = np.flatnonzero(~in_block)
    selection = _lss_selection(group_index, blocks.shape[1])
    condition_sums = _condition_sums(group_index, blocks.shape[1])
    voxel_rho = None
    if noise_model == "ar1":
        voxel_rho = _voxel_rho(design, bold, rho, rho_design)
    base = _LSSOperator(design, blocks, group_index, selection, condition_sums, nuisance_columns, column_names)
    operators = {None: base}

    def solve(level, data):
        if level not in operators:  # one set of LSS models per coefficient
            operators[level] = _LSSOperator(whiten_ar1(design, level), blocks, group_index, selection, condition_sums,
                                            nuisance_columns, column_names)
        return operators[level].apply(data, with_t)

    constant = np.ones((design.shape[0], 1))
    nuisance = base.nuisance.u
    spans_constant = np.linalg.norm(constant - nuisance @ (nuisance.T @ constant)) < 1e-8 * np.sqrt(design.shape[0])
    betas, residual_variance, t_values = _by_noise_level(bold, voxel_rho, solve, blocks.shape[0], blocks.shape[0], with_t,
                                                         centre=bool(spans_constant))
    return LinearFit(betas=betas, t_values=t_values, residual_variance=residual_variance,
                     dof=base.dof.astype(np.int64), rho=voxel_rho)


def _check_settings(glm_settings):
    if not isinstance(glm_settings, dict):
        raise InputError(None, "glm", f"expected a mapping of GLM settings (got {type(glm_settings).__name__})",
                         "pass the glm section of the validated config")
    missing = [key for key in GLM_SETTING_KEYS if key not in glm_settings]
    unknown = sorted(set(glm_settings) - set(GLM_SETTING_KEYS))
    if missing or unknown:
        problem = "; ".join(part for part in (f"missing key(s) {missing}" if missing else "",
                                              f"unknown key(s) {unknown}" if unknown else "") if part)
        raise InputError(None, "glm", problem, f"give exactly the keys {', '.join(GLM_SETTING_KEYS)} (the config schema fills defaults)")
    choices = {"serial_correlation": tuple(SERIAL_CORRELATION_CHOICES), "statistic": STATISTICS, "pattern_mode": PATTERN_MODES,
               "hrf_derivatives": DERIVATIVE_CHOICES}
    for key, allowed in choices.items():
        if glm_settings[key] not in allowed:
            raise InputError(None, f"glm.{key}", f"unknown choice {glm_settings[key]!r}", f"use one of {', '.join(allowed)}")
    return glm_settings


def estimate_patterns(bold_2d, events, tr_s, glm_settings, confounds, confound_names):
    """Estimate the activity patterns (betas or t-values) of one run.

    Parameters
    ----------
    bold_2d : array_like
        ``(n_scans, n_voxels)`` BOLD data of the voxels to fit.
    events : pandas.DataFrame
        ``onset``, ``duration`` (seconds), ``trial_type``.
    tr_s : float
        Repetition time in seconds.
    glm_settings : dict
        The ``glm`` config keys: ``hrf_derivatives``, ``highpass_s``,
        ``serial_correlation``, ``pattern_mode``, ``statistic``, ``conditions``,
        ``hrf_steps_per_scan``.
    confounds : array_like or None
        ``(n_scans, n_confounds)``.
    confound_names : sequence of str
        Names of the confound columns.

    Returns
    -------
    PatternEstimate

    Notes
    -----
    ``per_condition`` and ``lsa`` fit one model (:func:`fit_ols` or
    :func:`fit_ar1`); ``lss`` fits one model per trial (:func:`fit_lss`),
    under AR(1) with coefficients from the OLS residuals of the
    per-condition design of the same run (fewer parameters than the
    trial-wise design, so a steadier estimate). If ``conditions`` is empty,
    every trial type of the events (sorted) is a condition. A requested
    condition with no events in this run gives no pattern row here
    (``design.missing_conditions`` lists it); a run without any requested
    condition is an error.
    """
    settings = _check_settings(glm_settings)
    bold = np.asarray(bold_2d)
    if bold.ndim != 2:
        raise InputError(None, "bold_2d", f"need a (scans x voxels) array (got shape {bold.shape})", "pass the masked BOLD data")
    design_arguments = dict(events=events, n_scans=bold.shape[0], tr_s=tr_s, conditions=list(settings["conditions"]),
                            hrf_derivatives=settings["hrf_derivatives"], highpass_s=settings["highpass_s"],
                            confounds=confounds, confound_names=confound_names, oversampling=settings["hrf_steps_per_scan"])
    design = build_design(pattern_mode=settings["pattern_mode"], **design_arguments)
    if design.pattern_columns.size == 0:
        raise InputError(None, "trial_type", f"none of the conditions {list(settings['conditions'])} occurs in this run",
                         "check glm.conditions against the trial types of the events file")
    with_t = settings["statistic"] == "t"
    noise_model = SERIAL_CORRELATION_CHOICES[settings["serial_correlation"]]
    if settings["pattern_mode"] == "lss":
        rho_design = None
        if noise_model == "ar1":
            rho_design = build_design(pattern_mode="per_condition", **design_arguments).matrix
        fit = fit_lss(design.matrix, bold, design.pattern_blocks, design.pattern_table["condition"].to_numpy(dtype=object).astype(str),
                      with_t=with_t, noise_model=noise_model, rho_design=rho_design, column_names=design.names)
        betas = fit.betas
    else:
        fitter = fit_ols if noise_model == "ols" else fit_ar1
        fit = fitter(design.matrix, bold, design.pattern_columns, with_t=with_t, column_names=design.names)
        betas = fit.betas[design.pattern_columns]
    patterns = fit.t_values if with_t else betas
    return PatternEstimate(patterns=patterns, table=design.pattern_table.copy(), design=design,
                           residual_variance=fit.residual_variance, dof=fit.dof, rho=fit.rho)
