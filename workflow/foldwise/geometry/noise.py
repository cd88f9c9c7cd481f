"""Noise normalisation of condition patterns, fold by fold, from GLM residuals.

For fold ``k`` (test run ``k``) the weighting ``W_k`` that enters the
cross-validated distance is estimated from the residuals of the *other*
runs only, so nothing of the test run's noise shapes its own weighting.

* ``none``: ``W_k = I``.
* ``univariate``: ``W_k = diag(1 / s_k^2)``, ``s_k^2`` each voxel's mean
  squared residual over the training runs' scans.
* ``multivariate``: ``W_k = Sigma_k^-1``, ``Sigma_k`` the Ledoit-Wolf
  shrinkage estimate of the residual covariance of the training runs' scans
  (Ledoit & Wolf 2004, J Multivar Anal 88:365-411; used for RSA by Walther et
  al. 2016, NeuroImage 137:188-200).

Residuals are taken as centred (``assume_centered``): a GLM with a constant
or drift regressors per run leaves residuals of mean zero in every run.
"""

from dataclasses import dataclass

import numpy as np
from scipy import linalg

from foldwise.errors import InputError

__all__ = ["NORMALISATIONS", "ledoit_wolf_covariance", "ledoit_wolf_from_gram", "FoldNoise", "fold_noise", "univariate_weights"]

NORMALISATIONS = ("none", "univariate", "multivariate")


def _fail(field, problem, fix):
    raise InputError(None, field, problem, fix)


def ledoit_wolf_from_gram(sample_gram, n_features):
    """Ledoit-Wolf shrinkage of centred data, from its sample Gram matrix ``X X'``.

    Parameters
    ----------
    sample_gram : array_like, shape (n_samples, n_samples)
        ``X X'`` of the data ``X`` (n_samples, n_features), taken as centred.
    n_features : int

    Returns
    -------
    shrinkage : float
        In [0, 1].
    mu : float
        ``trace(S) / n_features`` with ``S = X' X / n_samples``; the estimate is
        ``(1 - shrinkage) S + shrinkage mu I``.

    Notes
    -----
    Ledoit & Wolf (2004), J Multivar Anal 88:365-411, in the form
    scikit-learn's ``ledoit_wolf_shrinkage`` computes it. Every term it needs
    follows from ``K = X X'``: ``trace(S) = trace(K) / n``, ``||S||_F^2 =
    ||K||_F^2 / n^2`` and ``sum_t ||x_t||^4 = sum_t K_tt^2``, so the estimate
    costs ``n^2`` memory rather than ``p^2`` when there are fewer scans than voxels.
    """
    gram = np.asarray(sample_gram, dtype=np.float64)
    return _ledoit_wolf_terms(np.diag(gram), np.einsum("ij,ij->", gram, gram), n_features)


def _ledoit_wolf_terms(squared_norms, gram_frobenius, n_features):
    """Shrinkage and mu from each sample's squared norm and ``||X'X||_F^2`` (= ``||X X'||_F^2``)."""
    n_samples = squared_norms.size
    mu = squared_norms.sum() / (n_samples * n_features)
    frobenius_s = gram_frobenius / n_samples ** 2
    beta = (np.sum(squared_norms ** 2) / n_samples - frobenius_s) / (n_features * n_samples)
    delta = (frobenius_s - n_features * mu ** 2) / n_features
    beta = min(beta, delta)
    shrinkage = 0.0 if beta == 0 else float(beta / delta)
    return shrinkage, float(mu)


def ledoit_wolf_covariance(residuals):
    """The Ledoit-Wolf covariance of centred residuals (``(n_scans, n_voxels)`` -> ``(n_voxels, n_voxels)``).

    Equals ``sklearn.covariance.LedoitWolf(assume_centered=True).fit(residuals).covariance_``.
    """
    values = np.asarray(residuals, dtype=np.float64)
    shrinkage, mu = ledoit_wolf_from_gram(values @ values.T, values.shape[1])
    covariance = (1.0 - shrinkage) * (values.T @ values) / values.shape[0]
    covariance[np.diag_indices_from(covariance)] += shrinkage * mu
    return covariance


@dataclass(frozen=True, eq=False)
class FoldNoise:
    """Label-free noise weighting of every fold, ready to apply.

    Attributes
    ----------
    kind : str
        One of :data:`NORMALISATIONS`.
    inverse_variance : ndarray or None
        ``(n_runs, n_voxels)`` for ``univariate``.
    factors : list or None
        Per fold, what :meth:`apply` needs for ``multivariate``.
    """

    kind: str
    inverse_variance: object = None
    factors: object = None

    def apply(self, fold, vectors):
        """``W_fold @ v`` for each row ``v`` of ``vectors`` (``(n_vectors, n_voxels)``)."""
        if self.kind == "none":
            return vectors
        if self.kind == "univariate":
            return vectors * self.inverse_variance[fold]
        mode, payload = self.factors[fold]
        if mode == "isotropic":
            return vectors / payload
        if mode == "voxel":  # Cholesky of Sigma_k
            return linalg.cho_solve(payload, vectors.T, check_finite=False).T
        # Woodbury in sample space: Sigma^-1 = (I - X' (a/b I + X X')^-1 X) / a
        training, cholesky, a_value = payload
        projected = training @ vectors.T
        return (vectors - (training.T @ linalg.cho_solve(cholesky, projected, check_finite=False)).T) / a_value


def _split_runs(residuals, n_voxels):
    if not isinstance(residuals, (list, tuple)) or not residuals:
        _fail("residuals", "need one (n_scans, n_voxels) residual array per run", "pass the residuals of every run")
    arrays = [np.asarray(block, dtype=np.float64) for block in residuals]
    for array in arrays:
        if array.ndim != 2 or array.shape[1] != n_voxels or array.shape[0] < 2:
            _fail("residuals", f"expected (n_scans >= 2, {n_voxels}) per run, got {array.shape}",
                  "pass the residuals of the same voxels as the patterns")
    return arrays


def fold_noise(kind, residuals=None, n_voxels=None, only_fold=None):
    """The noise weighting of every leave-one-run-out fold.

    Parameters
    ----------
    kind : {"none", "univariate", "multivariate"}
    residuals : list of ndarray, optional
        One ``(n_scans_r, n_voxels)`` array of GLM residuals per run (not
        needed for ``none``).
    n_voxels : int, optional
        Number of voxels (checked against the residuals).
    only_fold : int, optional
        Prepare this fold's weighting only (the others are left empty), for
        a voxel set chosen per fold.

    Returns
    -------
    FoldNoise
        Fold ``k``'s weighting uses the residuals of every run but ``k``.

    Notes
    -----
    ``multivariate`` works in sample space when the training runs hold fewer
    scans than there are voxels: the sample Gram matrix of all runs is
    computed once, each fold takes its training block, and
    ``Sigma_k^-1 v`` follows from the Woodbury identity with an
    ``n_train x n_train`` Cholesky factor instead of a ``p x p`` one. With
    more scans than voxels the per-run voxel Gram matrices are summed and
    ``Sigma_k`` is factorised directly. Both are exact.
    """
    if kind not in NORMALISATIONS:
        _fail("noise_normalisation", f"unknown value {kind!r}", f"use one of {', '.join(NORMALISATIONS)}")
    if kind == "none":
        return FoldNoise("none")
    runs = _split_runs(residuals, n_voxels if n_voxels is not None else np.asarray(residuals[0]).shape[1])
    n_runs, width = len(runs), runs[0].shape[1]
    if n_runs < 2:
        _fail("residuals", "need at least two runs", "give the analysis two or more runs")
    scans = np.array([run.shape[0] for run in runs])
    if kind == "univariate":
        sums = [np.einsum("ij,ij->j", run, run) for run in runs]
        # Summed over the other runs fold by fold (not total minus own): the test run cannot touch even the rounding.
        variance = np.stack([np.sum(sums[:fold] + sums[fold + 1:], axis=0) for fold in range(n_runs)])
        variance /= (scans.sum() - scans)[:, None]
        if np.any(variance <= 0):
            _fail("residuals", "a voxel has no residual variance in the training runs of some fold",
                  "drop constant voxels from the ROI (check the brain mask)")
        return FoldNoise("univariate", inverse_variance=1.0 / variance)
    bounds = np.r_[0, np.cumsum(scans)]
    stacked = np.concatenate(runs, axis=0)
    factors = []
    if scans.sum() - scans.min() <= width:
        gram = stacked @ stacked.T
        for fold in range(n_runs):
            if only_fold is not None and fold != only_fold:
                factors.append(None)
                continue
            keep = np.r_[0:bounds[fold], bounds[fold + 1]:bounds[-1]]
            block = gram[np.ix_(keep, keep)]
            shrinkage, mu = ledoit_wolf_from_gram(block, width)
            factors.append(_woodbury(stacked[keep], block, shrinkage, mu))
    else:
        grams = [run.T @ run for run in runs]
        squared_norms = [np.einsum("ij,ij->i", run, run) for run in runs]
        for fold in range(n_runs):
            if only_fold is not None and fold != only_fold:
                factors.append(None)
                continue
            training_gram = np.sum(grams[:fold] + grams[fold + 1:], axis=0)
            norms = np.concatenate(squared_norms[:fold] + squared_norms[fold + 1:])
            shrinkage, mu = _ledoit_wolf_terms(norms, np.einsum("ij,ij->", training_gram, training_gram), width)
            covariance = (1.0 - shrinkage) * training_gram / norms.size
            covariance[np.diag_indices_from(covariance)] += shrinkage * mu
            factors.append(("voxel", _cholesky(covariance)))
    return FoldNoise("multivariate", factors=factors)


def _cholesky(matrix):
    try:
        return linalg.cho_factor(matrix, lower=True, check_finite=False)
    except linalg.LinAlgError:
        _fail("residuals", "the residual covariance of the training runs is singular",
              "use univariate noise normalisation or fewer voxels")


def _woodbury(training, block, shrinkage, mu):
    n_samples = training.shape[0]
    a_value = shrinkage * mu
    if a_value <= 0:
        _fail("residuals", "the residual covariance of the training runs is singular (no shrinkage, fewer scans than voxels)",
              "use univariate noise normalisation or fewer voxels")
    if shrinkage >= 1.0:
        return ("isotropic", mu)
    b_value = (1.0 - shrinkage) / n_samples
    inner = block.copy()
    inner[np.diag_indices_from(inner)] += a_value / b_value
    return ("sample", (training, _cholesky(inner), a_value))


def univariate_weights(squared_sums, n_scans):
    """Fold-wise inverse residual variances from each run's residual sum of squares per voxel.

    Parameters
    ----------
    squared_sums : array_like, shape (n_runs, n_voxels)
        ``sum_t r_t^2`` of each run's residuals.
    n_scans : array_like, shape (n_runs,)

    Returns
    -------
    ndarray, shape (n_runs, n_voxels)
        Row ``k``: ``1 / s_k^2`` with ``s_k^2`` the mean squared residual over
        the scans of every run but ``k`` (the same as ``fold_noise("univariate",
        ...)``, from sums only, so a whole brain never holds every scan);
        0 where a voxel has no residual variance (it then adds nothing).
    """
    sums = np.asarray(squared_sums, dtype=np.float64)
    scans = np.asarray(n_scans, dtype=np.float64)
    n_runs = sums.shape[0]
    variance = np.stack([np.sum(np.concatenate([sums[:fold], sums[fold + 1:]]), axis=0) for fold in range(n_runs)])
    variance /= (scans.sum() - scans)[:, None]
    return np.divide(1.0, variance, out=np.zeros_like(variance), where=variance > 0)
