"""GLM residuals of a run for noise normalisation (the model the betas come from)."""

import numpy as np
from scipy import linalg

from foldwise.glm.estimate import whiten_ar1

__all__ = ["glm_residuals"]


def _residualise(design, data):
    basis = linalg.orth(design)  # orthonormal basis of the design's span (rank-deficient designs too)
    return data - basis @ (basis.T @ data)


def glm_residuals(design_matrix, bold_2d, rho=None):
    """Residuals of a least-squares fit, prewhitened when the fit was AR(1).

    Parameters
    ----------
    design_matrix : array_like, shape (n_scans, n_regressors)
    bold_2d : array_like, shape (n_scans, n_voxels)
    rho : array_like, shape (n_voxels,), optional
        The AR(1) coefficient each voxel was whitened with
        (``PatternEstimate.rho``); None for OLS.

    Returns
    -------
    ndarray of float64, shape (n_scans, n_voxels)
        ``(I - P) y`` with ``P`` the projection onto the (whitened) design:
        the residuals whose variance the GLM reports, so that their
        covariance describes the noise of the betas up to a factor per
        condition (Walther et al. 2016, NeuroImage 137:188-200).
        Voxels that share a coefficient are whitened and projected together.
    """
    design = np.asarray(design_matrix, dtype=np.float64)
    data = np.asarray(bold_2d, dtype=np.float64)
    if rho is None:
        return _residualise(design, data)
    rho = np.asarray(rho, dtype=np.float64)
    residuals = np.empty_like(data)
    for level in np.unique(rho):
        columns = np.flatnonzero(rho == level)
        residuals[:, columns] = _residualise(whiten_ar1(design, level), whiten_ar1(data[:, columns], level))
    return residuals
