"""Geometry searchlight: cross-validated distances and model fits in every sphere, batched.

The cross-validated distance of a sphere is a sum over its voxels of a
per-voxel term (with no or univariate noise normalisation), so the terms are
computed once for the whole brain and summed over every sphere with one
sparse product (:func:`foldwise.searchlight.engine.neighbourhood_sums`).
Multivariate normalisation would need a covariance per sphere and is not
offered here (the config check refuses it).
"""

import numpy as np

from foldwise.errors import InputError
from foldwise.geometry.compare import compare
from foldwise.geometry.distances import condition_pairs
from foldwise.searchlight.engine import neighbourhood_sums

__all__ = ["SEARCHLIGHT_NORMALISATIONS", "voxel_distance_terms", "sphere_distances", "sphere_model_fits"]

SEARCHLIGHT_NORMALISATIONS = ("none", "univariate")


def voxel_distance_terms(run_patterns, inverse_variance=None):
    """Per-voxel contributions to the cross-validated distance of every condition pair.

    Parameters
    ----------
    run_patterns : array_like, shape (n_runs, n_conditions, n_voxels)
    inverse_variance : array_like, shape (n_runs, n_voxels), optional
        Fold ``k``'s univariate weights (from the other runs' residuals),
        as :func:`foldwise.geometry.noise.fold_noise` makes them.

    Returns
    -------
    ndarray, shape (n_pairs, n_voxels)
        Summed over a set of voxels and divided by ``n_runs`` times their
        number, the cross-validated distance of that set
        (:func:`foldwise.geometry.distances.crossvalidated_distances`).
    """
    values = np.asarray(run_patterns, dtype=np.float64)
    n_runs = values.shape[0]
    if values.ndim != 3 or n_runs < 2:
        raise InputError(None, "patterns", f"expected (n_runs >= 2, n_conditions, n_voxels), got {values.shape}",
                         "give two or more runs")
    rows, columns = condition_pairs(values.shape[1])
    differences = values[:, rows] - values[:, columns]
    total = differences.sum(axis=0)
    if inverse_variance is None:
        return (total * total - np.einsum("rpv,rpv->pv", differences, differences)) / (n_runs - 1)
    weights = np.asarray(inverse_variance, dtype=np.float64)
    terms = np.zeros(total.shape)
    for fold in range(n_runs):
        terms += (total - differences[fold]) * (weights[fold] * differences[fold])
    return terms / (n_runs - 1)


def sphere_distances(run_patterns, spheres, inverse_variance=None):
    """Cross-validated distances in every sphere: ``(n_centres, n_pairs)``."""
    terms = voxel_distance_terms(run_patterns, inverse_variance)
    n_runs = np.asarray(run_patterns).shape[0]
    return (neighbourhood_sums(terms, spheres) / (n_runs * spheres.sizes[None, :])).T


def sphere_model_fits(run_patterns, spheres, model_vectors, comparison, inverse_variance=None):
    """Every model's fit in every sphere: ``(n_centres, n_models)``.

    Spheres whose distances are all equal (no spread) get NaN for Pearson and
    Spearman and 0 for Kendall's tau-a.
    """
    return compare(sphere_distances(run_patterns, spheres, inverse_variance), model_vectors, comparison)
