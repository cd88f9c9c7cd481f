"""Dissimilarities between condition patterns: cross-validated and plain.

Conditions are compared pair by pair in a fixed order: ``condition_pairs``
lists the upper triangle row by row, ``(0, 1), (0, 2), ..., (1, 2), ...``;
every vector of dissimilarities in foldwise uses that order.
"""

import numpy as np

from foldwise.errors import InputError

__all__ = ["DISTANCES", "BIASED_DISTANCES", "condition_pairs", "square_form", "condition_patterns",
           "crossvalidated_distances", "correlation_distances", "distances", "classical_mds", "fold_selections",
           "swept_distances"]

#: ``crossnobis`` (with noise normalisation) and ``euclidean_cv`` (without) are
#: cross-validated and unbiased; ``correlation`` is not cross-validated and
#: biased by noise (labelled as such in every output).
DISTANCES = ("crossnobis", "euclidean_cv", "correlation")
BIASED_DISTANCES = ("correlation",)


def _fail(field, problem, fix, file=None):
    raise InputError(file, field, problem, fix)


def condition_pairs(n_conditions):
    """Row and column indices of the upper triangle (``i < j``), row by row.

    >>> [tuple(map(int, pair)) for pair in zip(*condition_pairs(3))]
    [(0, 1), (0, 2), (1, 2)]
    """
    return np.triu_indices(int(n_conditions), k=1)


def square_form(values, n_conditions):
    """Symmetric ``(..., n, n)`` matrices with zero diagonal from ``(..., n_pairs)`` vectors."""
    values = np.asarray(values, dtype=np.float64)
    rows, columns = condition_pairs(n_conditions)
    square = np.zeros(values.shape[:-1] + (n_conditions, n_conditions))
    square[..., rows, columns] = values
    square[..., columns, rows] = values
    return square


def condition_patterns(patterns, conditions, runs, wanted, file=None):
    """Average the patterns of each wanted condition within each run.

    Parameters
    ----------
    patterns : array_like, shape (n_patterns, n_voxels)
    conditions, runs : array_like, shape (n_patterns,)
        Condition and run label of each pattern.
    wanted : sequence of str
        Conditions in the order the dissimilarities use.
    file : str, optional
        Named in the error when a condition is missing from a run.

    Returns
    -------
    ndarray, shape (n_runs, n_wanted, n_voxels)
        Runs in sorted order of their labels.
    """
    patterns = np.asarray(patterns, dtype=np.float64)
    conditions, runs = np.asarray(conditions).astype(str), np.asarray(runs).astype(str)
    run_names = np.unique(runs)
    out = np.empty((run_names.size, len(wanted), patterns.shape[1]))
    for r, run in enumerate(run_names):
        for c, condition in enumerate(wanted):
            rows = (runs == run) & (conditions == condition)
            if not rows.any():
                _fail("condition", f"condition {condition!r} has no pattern in run {run}",
                      "leave the run out or drop the condition from the geometry analysis", file)
            out[r, c] = patterns[rows].mean(axis=0)
    return out


def _check_run_patterns(run_patterns):
    values = np.asarray(run_patterns, dtype=np.float64)
    if values.ndim != 3 or values.shape[0] < 2 or values.shape[1] < 2 or values.shape[2] < 1:
        _fail("patterns", f"expected (n_runs >= 2, n_conditions >= 2, n_voxels >= 1), got shape {values.shape}",
              "give two or more runs and two or more conditions")
    return values


def crossvalidated_distances(run_patterns, noise=None):
    """Cross-validated squared distances of every condition pair, per voxel.

    Parameters
    ----------
    run_patterns : array_like, shape (n_runs, n_conditions, n_voxels)
        Condition patterns estimated in each run separately.
    noise : foldwise.geometry.noise.FoldNoise, optional
        Fold-wise weighting ``W_k`` (default: none, i.e. cross-validated
        Euclidean).

    Returns
    -------
    ndarray, shape (n_pairs,)
        ``d_ij = 1/(R V) sum_k  mean_{m != k}(delta_m)' W_k delta_k`` with
        ``delta_r = b_i^r - b_j^r`` the pattern difference in run ``r``,
        ``R`` runs, ``V`` voxels; pairs as in :func:`condition_pairs`.

    Notes
    -----
    Crossnobis estimator (Walther et al. 2016, NeuroImage 137:188-200;
    Nili et al. 2014, PLoS Comput Biol 10:e1003553): the product of two
    differences whose noise is independent has expectation ``delta' W delta``,
    so the estimate is unbiased (0 in expectation when the conditions do not
    differ) and may be negative. Leave-one-run-out form: fold ``k`` tests run
    ``k`` against the mean of the other runs, weighted by ``W_k``, which is
    estimated from the other runs' residuals only. With ``W_k = I`` this
    equals the mean over all ordered run pairs ``m != n`` of
    ``delta_m' delta_n / V``, computed here without a loop over pairs as
    ``(|sum_r delta_r|^2 - sum_r |delta_r|^2) / (R (R - 1) V)``.
    """
    values = _check_run_patterns(run_patterns)
    n_runs, n_conditions, n_voxels = values.shape
    rows, columns = condition_pairs(n_conditions)
    differences = values[:, rows] - values[:, columns]  # (R, P, V)
    total = differences.sum(axis=0)
    if noise is None or noise.kind == "none":
        own = np.einsum("rpv,rpv->p", differences, differences)
        return (np.einsum("pv,pv->p", total, total) - own) / (n_runs * (n_runs - 1) * n_voxels)
    out = np.zeros(rows.size)
    for fold in range(n_runs):  # one weighting per fold; all pairs at once
        training_mean = (total - differences[fold]) / (n_runs - 1)
        out += np.einsum("pv,pv->p", training_mean, noise.apply(fold, differences[fold]))
    return out / (n_runs * n_voxels)


def correlation_distances(run_patterns):
    """One minus Pearson's r between the run-averaged condition patterns (biased by noise).

    Parameters
    ----------
    run_patterns : array_like, shape (n_runs, n_conditions, n_voxels)

    Returns
    -------
    ndarray, shape (n_pairs,)

    Notes
    -----
    The classic RSA dissimilarity (Kriegeskorte, Mur & Bandettini 2008,
    Front Syst Neurosci 2:4). Not cross-validated: noise pushes every value
    towards 1, more so the noisier the data, so it is positive even when
    conditions do not differ (Walther et al. 2016). NaN for a constant pattern.
    """
    values = _check_run_patterns(run_patterns)
    mean = values.mean(axis=0)
    centred = mean - mean.mean(axis=1, keepdims=True)
    norms = np.linalg.norm(centred, axis=1)
    with np.errstate(invalid="ignore", divide="ignore"):
        unit = centred / norms[:, None]
    rows, columns = condition_pairs(values.shape[1])
    return 1.0 - np.einsum("pv,pv->p", unit[rows], unit[columns])


def distances(run_patterns, distance, noise=None):
    """Dispatch: ``crossnobis`` / ``euclidean_cv`` (cross-validated) or ``correlation``."""
    if distance == "correlation":
        return correlation_distances(run_patterns)
    if distance == "euclidean_cv":
        return crossvalidated_distances(run_patterns, None)
    if distance == "crossnobis":
        return crossvalidated_distances(run_patterns, noise)
    _fail("distance", f"unknown distance {distance!r}", f"use one of {', '.join(DISTANCES)}")


def classical_mds(squared_dissimilarities, n_dimensions=2):
    """Coordinates whose squared Euclidean distances best match a squared-dissimilarity matrix.

    Parameters
    ----------
    squared_dissimilarities : array_like, shape (n, n)
        Symmetric, zero diagonal; crossnobis and cross-validated Euclidean
        estimates are squared distances already (negative estimates allowed).
    n_dimensions : int

    Returns
    -------
    ndarray, shape (n, n_dimensions)
        Zero where the doubly centred matrix has no positive eigenvalue.

    Notes
    -----
    Classical (Torgerson 1952, Psychometrika 17:401-419) scaling:
    ``B = -1/2 J D J`` with the centring matrix ``J``; coordinates are the
    leading eigenvectors scaled by the square roots of their eigenvalues.
    """
    values = np.asarray(squared_dissimilarities, dtype=np.float64)
    n = values.shape[0]
    centring = np.eye(n) - 1.0 / n
    inner = -0.5 * centring @ values @ centring
    eigenvalues, eigenvectors = np.linalg.eigh((inner + inner.T) / 2)
    order = np.argsort(eigenvalues)[::-1][:n_dimensions]
    # Fix each axis' sign (largest entry positive) so the figure is the same on every machine.
    vectors = eigenvectors[:, order]
    vectors *= np.where(vectors[np.argmax(np.abs(vectors), axis=0), np.arange(vectors.shape[1])] < 0, -1.0, 1.0)
    return vectors * np.sqrt(np.maximum(eigenvalues[order], 0.0))


def fold_selections(run_patterns, counts):
    """The voxels each leave-one-run-out fold keeps for each voxel count, chosen from the other runs only.

    Parameters
    ----------
    run_patterns : array_like, shape (n_runs, n_conditions, n_voxels)
    counts : sequence of int or "all"

    Returns
    -------
    list (per count) of list (per fold) of ndarray of int64
        Fold ``k``'s voxels: the top ``count`` by the label-free signal score
        (:func:`foldwise.decoding.selection.signal_scores`, |t| of the
        response to every condition) of the patterns of every run but ``k``;
        every voxel for ``"all"`` or a count at or above the ROI's size.

    Notes
    -----
    The test run's patterns never enter its own fold's choice, so the
    distance of fold ``k`` multiplies the training runs' differences with a
    test-run difference whose noise played no part in picking the voxels:
    under no true difference the estimate stays 0 in expectation.
    """
    from foldwise.decoding.selection import rank_voxels, signal_scores  # decoding's ranking, one definition

    values = _check_run_patterns(run_patterns)
    n_runs, _, n_voxels = values.shape
    rankings = [rank_voxels(signal_scores(np.concatenate([values[:k], values[k + 1:]]).reshape(-1, n_voxels)))
                for k in range(n_runs)]
    out = []
    for count in counts:
        size = n_voxels if count == "all" else min(int(count), n_voxels)
        out.append([np.sort(ranking[:size]) for ranking in rankings])
    return out


def swept_distances(run_patterns, residual_runs, kind, counts):
    """Cross-validated distances at every voxel count, voxels chosen fold by fold (:func:`fold_selections`).

    Parameters
    ----------
    run_patterns : array_like, shape (n_runs, n_conditions, n_voxels)
    residual_runs : list of ndarray or None
        Per run ``(n_scans, n_voxels)`` residuals (not needed for ``none``).
    kind : {"none", "univariate", "multivariate"}
        Noise normalisation, estimated per fold from the training runs'
        residuals of that fold's voxels.
    counts : sequence of int or "all"

    Returns
    -------
    distances : ndarray, shape (n_counts, n_pairs)
        ``1/R sum_k  mean_{m != k}(delta_m[v_k])' W_k delta_k[v_k] / |v_k|``.
    n_used : ndarray of int, shape (n_counts,)
        Voxels per fold (the same in every fold).
    """
    from foldwise.geometry.noise import fold_noise

    values = _check_run_patterns(run_patterns)
    n_runs, n_conditions, _ = values.shape
    rows, columns = condition_pairs(n_conditions)
    differences = values[:, rows] - values[:, columns]
    total = differences.sum(axis=0)
    selections = fold_selections(values, counts)
    out = np.zeros((len(counts), rows.size))
    used = np.zeros(len(counts), dtype=np.int64)
    for c, per_fold in enumerate(selections):
        for fold, voxels in enumerate(per_fold):
            noise = fold_noise(kind, None if kind == "none" else [run[:, voxels] for run in residual_runs], voxels.size, only_fold=fold)
            training_mean = (total[:, voxels] - differences[fold][:, voxels]) / (n_runs - 1)
            out[c] += np.einsum("pv,pv->p", training_mean, noise.apply(fold, differences[fold][:, voxels])) / voxels.size
        out[c] /= n_runs
        used[c] = per_fold[0].size
    return out, used
