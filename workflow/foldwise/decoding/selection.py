"""Voxel scores and rankings computed from a fold's training patterns only.

Every function here sees training patterns and (for the label-dependent
scores) training labels; none of them is ever handed held-out data, so a
ranking cannot carry information from the test run into training. The
label-dependent scores (``f``, ``stability``) accept a stack of label vectors
(one per permutation) and score them all in one pass of matrix products;
the label-free ones (``signal``, ``none``) are computed once per fold and
reused for every permutation, because relabeling cannot change them.

A ranking lists voxel indices by descending score, ties broken by the lower
voxel index, so the same scores always give the same ranking.
"""

import numpy as np

from foldwise.decoding.classifiers import one_hot
from foldwise.errors import InputError

__all__ = [
    "SELECTION_METHODS",
    "LABEL_FREE_METHODS",
    "signal_scores",
    "f_scores",
    "stability_scores",
    "random_order",
    "rank_voxels",
    "top_ranked",
]

SELECTION_METHODS = ("signal", "f", "stability", "none")
LABEL_FREE_METHODS = ("signal", "none")


def _as_patterns(patterns, what="training patterns"):
    array = np.asarray(patterns, dtype=np.float64)
    if array.ndim != 2 or array.shape[0] == 0 or array.shape[1] == 0:
        raise InputError(None, what, f"expected a non-empty (n_patterns, n_voxels) array, got shape {array.shape}",
                         "pass one row per pattern and one column per voxel")
    if not np.all(np.isfinite(array)):
        raise InputError(None, what, "the patterns contain NaN or infinite values", "mask out voxels without data before decoding")
    return array


def _as_label_rows(labels, n_patterns, n_classes):
    """Labels as an (n_label_sets, n_patterns) int array; flag whether the input was 1-D."""
    array = np.asarray(labels)
    single = array.ndim == 1
    rows = array[np.newaxis] if single else array
    if rows.ndim != 2 or rows.shape[1] != n_patterns:
        raise InputError(None, "labels", f"expected {n_patterns} labels per row, got shape {array.shape}",
                         "pass one class index per training pattern (or one row of them per permutation)")
    if not np.issubdtype(rows.dtype, np.integer) or rows.size and (rows.min() < 0 or rows.max() >= n_classes):
        raise InputError(None, "labels", f"labels must be integers in [0, {n_classes}), got values {np.unique(rows)[:10].tolist()}",
                         "encode classes as 0 .. n_classes-1")
    return rows.astype(np.int64), single


def signal_scores(train_patterns):
    """Label-free voxel score: how reliably a voxel responds across all training patterns.

    Parameters
    ----------
    train_patterns : array_like, shape (n_train, n_voxels)
        Training patterns (betas or t-values, i.e. already relative to the
        implicit baseline of the GLM), before any z-scoring.

    Returns
    -------
    ndarray, shape (n_voxels,)
        ``|mean / (sd / sqrt(n))|``: the absolute one-sample t statistic of
        each voxel against zero (``sd`` with ``n - 1`` degrees of freedom); 0
        where the voxel is constant.

    Notes
    -----
    The score uses no labels, so it picks voxels that respond to the task as a
    whole without favouring any class distinction, and can be computed once
    per fold for every permutation.

    **Absolute, not signed.** A voxel reliably *below* baseline (a consistent
    deactivation) responds to the stimuli as much as one reliably above it,
    and its pattern carries class information just as well; the sign of a
    beta is only a convention of the GLM contrast. A signed t would drop
    every deactivated voxel and, after per-pattern demeaning, keep only the
    voxels above the ROI mean. ``|t|`` treats both tails alike.

    The statistic must be computed on data that are *not* z-scored on the
    training fold: z-scoring removes the voxel mean this score measures.

    It equals ``abs(scipy.stats.ttest_1samp(train_patterns, 0).statistic)``
    (Student 1908, Biometrika 6:1-25).

    Examples
    --------
    >>> signal_scores([[1.0, 0.5], [3.0, -0.5]]).round(3).tolist()
    [2.0, 0.0]
    """
    patterns = _as_patterns(train_patterns)
    n_train = patterns.shape[0]
    if n_train < 2:
        raise InputError(None, "training patterns", f"the signal score needs at least 2 training patterns, got {n_train}",
                         "add runs or patterns")
    mean = patterns.mean(axis=0)
    sd = patterns.std(axis=0, ddof=1)
    scores = np.zeros_like(mean)
    varying = sd > 0
    scores[varying] = np.abs(mean[varying] / (sd[varying] / np.sqrt(n_train)))
    return scores


def f_scores(train_patterns, train_labels, n_classes, class_means=None):
    """Between-class one-way ANOVA F of every voxel, for one or many label vectors.

    Parameters
    ----------
    train_patterns : array_like, shape (n_train, n_voxels)
        Training patterns (raw or z-scored: F is unchanged by a per-voxel
        affine rescaling, so both orders of selection and scaling agree).
    train_labels : array_like of int, shape (n_train,) or (n_label_sets, n_train)
        Class indices; a 2-D array scores every row (e.g. every permutation)
        in one pass.
    n_classes : int
        Number of classes.
    class_means : array_like, shape (n_classes, n_voxels) or (n_label_sets, n_classes, n_voxels), optional
        The class means of ``train_patterns`` under these labels, if the caller
        has them already (a classifier built on centroids reuses them);
        computed here otherwise.

    Returns
    -------
    ndarray, shape (n_voxels,) or (n_label_sets, n_voxels)
        ``F = (SS_between / (k - 1)) / (SS_within / (n - k))`` with ``k`` the
        number of classes present; 0 for a constant voxel (where
        ``sklearn.feature_selection.f_classif`` gives NaN), ``inf`` for a
        voxel with no within-class variance.

    Notes
    -----
    Fisher's one-way analysis of variance (Fisher 1925, Statistical Methods
    for Research Workers); the same statistic as ``scipy.stats.f_oneway``.
    ``SS_between = sum_k n_k (m_k - m)^2`` and ``SS_within = SS_total -
    SS_between``; the class means of every label vector are one matrix
    product of a one-hot label tensor with the patterns.
    """
    patterns = _as_patterns(train_patterns)
    rows, single = _as_label_rows(train_labels, patterns.shape[0], n_classes)
    n_train = patterns.shape[0]
    overall = patterns.mean(axis=0)
    centred = patterns - overall
    total_ss = np.einsum("nv,nv->v", centred, centred)  # label-free
    counts = one_hot(rows, n_classes).sum(axis=1)  # (L, K)
    if class_means is None:
        means = _class_means_of(patterns, rows, n_classes, counts)
    else:
        means = np.asarray(class_means, dtype=np.float64)
        means = means[np.newaxis] if means.ndim == 2 else means
        if means.shape != (rows.shape[0], n_classes, patterns.shape[1]):
            raise InputError(None, "class_means", f"expected shape {(rows.shape[0], n_classes, patterns.shape[1])}, got {means.shape}",
                             "pass the class means of these patterns and labels")
    deviations = means - overall
    between_ss = np.einsum("lkv,lkv,lk->lv", deviations, deviations, counts)
    with np.errstate(divide="ignore", invalid="ignore"):
        within_ss = np.maximum(total_ss - between_ss, 0.0)
        n_present = (counts > 0).sum(axis=1)[:, None]
        scores = (between_ss / (n_present - 1)) / (within_ss / (n_train - n_present))
    scores = np.where(np.isnan(scores), 0.0, scores)
    return scores[0] if single else scores


def _class_means_of(patterns, rows, n_classes, counts):
    """Class means (L, K, V) by one (L*K, n) @ (n, V) product; 0 for absent classes."""
    weights = one_hot(rows, n_classes).transpose(0, 2, 1)
    with np.errstate(divide="ignore", invalid="ignore"):
        weights *= np.where(counts > 0, 1.0 / counts, 0.0)[:, :, np.newaxis]
    n_rows = rows.shape[0]
    return (weights.reshape(n_rows * n_classes, -1) @ patterns).reshape(n_rows, n_classes, -1)


def stability_scores(train_patterns, train_labels, train_runs, n_classes):
    """Across-run stability of each voxel's class profile, for one or many label vectors.

    Parameters
    ----------
    train_patterns : array_like, shape (n_train, n_voxels)
        Training patterns.
    train_labels : array_like of int, shape (n_train,) or (n_label_sets, n_train)
        Class indices (a 2-D array scores every row in one pass).
    train_runs : array_like, shape (n_train,)
        Run of each training pattern.
    n_classes : int
        Number of classes.

    Returns
    -------
    ndarray, shape (n_voxels,) or (n_label_sets, n_voxels)
        For each voxel, the mean Pearson correlation over all pairs of
        training runs of its vector of per-class means (one value per class).

    Notes
    -----
    Stability-based voxel selection (Pereira, Mitchell & Botvinick 2009,
    NeuroImage 45:S199-S209): a voxel whose class profile repeats from run
    to run is kept. Runs lacking a class are left out of the pairs (their
    profile is undefined); a profile that is constant across classes has an
    undefined correlation, counted as 0. The mean over pairs uses
    ``sum_{r<s} u_r.u_s = (|sum_r u_r|^2 - sum_r |u_r|^2) / 2`` with ``u_r``
    the centred, unit-length profile of run ``r``, so no loop over pairs or
    voxels is needed.

    Raises
    ------
    InputError
        If fewer than two training runs contain every class.
    """
    patterns = _as_patterns(train_patterns)
    rows, single = _as_label_rows(train_labels, patterns.shape[0], n_classes)
    runs = np.asarray(train_runs)
    if runs.shape != (patterns.shape[0],):
        raise InputError(None, "run_id", f"expected one run per training pattern ({patterns.shape[0]}), got shape {runs.shape}",
                         "pass the run of every training pattern")
    _, run_index = np.unique(runs, return_inverse=True)
    n_runs = int(run_index.max()) + 1
    cell = run_index[np.newaxis, :] * n_classes + rows  # (L, n): run-by-class cell of each pattern
    indicator = one_hot(cell, n_runs * n_classes)  # (L, n, R*K)
    counts = indicator.sum(axis=1)  # (L, R*K)
    with np.errstate(divide="ignore", invalid="ignore"):
        means = np.matmul(indicator.transpose(0, 2, 1), patterns) / counts[:, :, None]
    n_rows, n_voxels = rows.shape[0], patterns.shape[1]
    profiles = means.reshape(n_rows, n_runs, n_classes, n_voxels)
    complete = (counts.reshape(n_rows, n_runs, n_classes) > 0).all(axis=2)  # (L, R)
    n_complete = complete.sum(axis=1)
    if n_complete.min() < 2:
        raise InputError(None, "condition", f"stability selection needs two or more training runs that contain every class; found {int(n_complete.min())}",
                         "use more runs per fold, or selection 'signal' or 'f'")
    profiles = np.where(complete[:, :, None, None], profiles, 0.0)
    profiles = profiles - profiles.mean(axis=2, keepdims=True)
    norms = np.sqrt(np.einsum("lrkv,lrkv->lrv", profiles, profiles))
    with np.errstate(divide="ignore", invalid="ignore"):
        units = np.where(norms[:, :, None, :] > 0, profiles / norms[:, :, None, :], 0.0)
    summed = units.sum(axis=1)  # (L, K, V)
    pair_sums = (np.einsum("lkv,lkv->lv", summed, summed) - np.einsum("lrkv,lrkv->lv", units, units)) / 2.0
    scores = pair_sums / (n_complete * (n_complete - 1) / 2.0)[:, None]
    return scores[0] if single else scores


def random_order(n_voxels, rng):
    """A random voxel ranking (selection ``none``), drawn from the generator passed in.

    Parameters
    ----------
    n_voxels : int
        Number of voxels.
    rng : numpy.random.Generator
        The only source of randomness.

    Returns
    -------
    ndarray of int64, shape (n_voxels,)
        A permutation of ``range(n_voxels)``.
    """
    if not isinstance(rng, np.random.Generator):
        raise InputError(None, "rng", f"expected a numpy.random.Generator, got {type(rng).__name__}",
                         "pass np.random.default_rng(seed)")
    if isinstance(n_voxels, bool) or not isinstance(n_voxels, (int, np.integer)) or n_voxels < 1:
        raise InputError(None, "n_voxels", f"expected a positive integer, got {n_voxels!r}", "pass the ROI's voxel count")
    return rng.permutation(int(n_voxels)).astype(np.int64)


def top_ranked(scores, n_top):
    """The first ``n_top`` entries of :func:`rank_voxels`, without sorting every voxel.

    Parameters
    ----------
    scores : array_like, shape (..., n_voxels)
    n_top : int
        How many top-ranked voxels to return (1 .. n_voxels).

    Returns
    -------
    ndarray of int64, shape (..., n_top)
        Identical to ``rank_voxels(scores)[..., :n_top]``, ties included.

    Notes
    -----
    A partition finds the ``n_top``-th best score; every voxel scoring better
    is kept, and of the voxels tied with it the lowest indices fill the
    remaining places, which is exactly the stable sort's tie-break. Only the
    kept voxels are then sorted. Used for the many permutation rankings.
    """
    array = np.asarray(scores, dtype=np.float64)
    if array.ndim == 0 or array.shape[-1] == 0:
        raise InputError(None, "scores", f"expected at least one voxel score, got shape {array.shape}", "pass one score per voxel")
    n_voxels = array.shape[-1]
    if isinstance(n_top, bool) or not isinstance(n_top, (int, np.integer)) or not 1 <= n_top <= n_voxels:
        raise InputError(None, "n_top", f"expected an integer from 1 to {n_voxels}, got {n_top!r}", "ask for at most every voxel")
    if n_top == n_voxels:
        return rank_voxels(array)
    keys = np.where(np.isnan(array), np.inf, -array)
    flat = keys.reshape(-1, n_voxels)
    candidates = np.argpartition(flat, n_top - 1, axis=1)[:, n_top - 1:n_top]
    threshold = np.take_along_axis(flat, candidates, axis=1)  # the n_top-th smallest key of each row
    better = flat < threshold
    tied = flat == threshold
    places_left = n_top - better.sum(axis=1, keepdims=True)
    chosen = better | (tied & (np.cumsum(tied, axis=1) <= places_left))
    kept = np.nonzero(chosen)[1].reshape(flat.shape[0], n_top)  # in index order within each row
    order = np.argsort(np.take_along_axis(flat, kept, axis=1), axis=1, kind="stable")
    return np.take_along_axis(kept, order, axis=1).astype(np.int64).reshape(array.shape[:-1] + (n_top,))


def rank_voxels(scores):
    """Voxel indices by descending score, ties broken by the lower index.

    Parameters
    ----------
    scores : array_like, shape (..., n_voxels)
        Voxel scores; NaN ranks last.

    Returns
    -------
    ndarray of int64, same shape
        ``ranking[..., r]`` is the voxel at rank ``r`` (0 = best).

    Examples
    --------
    >>> rank_voxels([0.5, 2.0, 0.5, np.nan]).tolist()
    [1, 0, 2, 3]
    """
    array = np.asarray(scores, dtype=np.float64)
    if array.ndim == 0 or array.shape[-1] == 0:
        raise InputError(None, "scores", f"expected at least one voxel score, got shape {array.shape}", "pass one score per voxel")
    keys = np.where(np.isnan(array), np.inf, -array)
    # A stable sort keeps equal scores in index order: a deterministic tie-break.
    return np.argsort(keys, axis=-1, kind="stable").astype(np.int64)
