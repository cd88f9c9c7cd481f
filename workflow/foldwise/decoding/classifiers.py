"""Multiclass classifiers, batched over label vectors (permutations) where the math allows.

Shapes used throughout:

- ``train_labels`` is ``(n_label_sets, n_train)`` of class indices ``0 .. K-1``
  (row 0 the real labels, the other rows permutations) or ``(n_train,)``;
- patterns are ``(n, n_voxels)`` shared by every label set, or
  ``(n_batch, n, n_voxels)`` with ``n_batch`` equal to 1 or ``n_label_sets``
  (one voxel selection per label set, as label-dependent selection gives);
- Gram matrices ``Z Z'`` of z-scored patterns are ``(n, n)`` or ``(n_batch, n, n)``.

The fast classifiers (correlation to centroids, shrinkage LDA, Gaussian naive
Bayes) fit every label set at once: class centroids for all permutations are
one product of a one-hot label tensor ``(n_label_sets, K, n_train)`` with the
training data. The linear SVM calls libsvm once per label set on a
precomputed Gram matrix, and the L2 logistic regression calls scikit-learn
once per label set.

Class imbalance (several conditions mapped to one class, unequal trial
counts): every classifier treats the classes as equally likely. Shrinkage
LDA and Gaussian naive Bayes use equal priors; correlation to centroids has
no prior; the SVM and the logistic regression use balanced class weights
``n / (K n_c)`` (scikit-learn's ``class_weight="balanced"``), which equal 1
when the classes are equal. So on noise, predictions do not pile onto the
majority class, and balanced accuracy stays at chance.
"""

import threading
import warnings

import numpy as np

from foldwise.errors import InputError

# scikit-learn is imported inside the two functions that call it (the linear
# SVM and the logistic regression): importing it costs about 0.7 s of CPU per
# job process, which a decode job with another classifier never needs.

__all__ = [
    "CLASSIFIERS",
    "BATCHED_CLASSIFIERS",
    "one_hot",
    "class_means",
    "correlation_centroid_predict",
    "gaussian_nb_fit",
    "gaussian_nb_predict",
    "gaussian_nb_terms",
    "gaussian_nb_predict_terms",
    "ledoit_wolf_shrinkage",
    "shrinkage_lda_fit",
    "shrinkage_lda_fit_gram",
    "shrinkage_lda_predict",
    "linear_svm_fit_predict",
    "logistic_l2_fit_predict",
]

CLASSIFIERS = ("linear_svm", "logistic_l2", "shrinkage_lda", "correlation_centroid", "gaussian_nb")
BATCHED_CLASSIFIERS = ("shrinkage_lda", "correlation_centroid", "gaussian_nb")

# libsvm settings exactly as sklearn.svm.SVC(kernel="precomputed") passes them (scikit-learn 1.9 defaults).
_SVC_SETTINGS = {"svm_type": 0, "kernel": "precomputed", "nu": 0.0, "probability": 0, "degree": 3, "shrinking": 1,
                 "tol": 1e-3, "cache_size": 200.0, "coef0": 0.0, "gamma": 0.0, "epsilon": 0.0, "max_iter": -1}


# -- argument checks -----------------------------------------------------------
def _label_rows(labels, n_classes):
    array = np.asarray(labels)
    single = array.ndim == 1
    rows = array[np.newaxis] if single else array
    if rows.ndim != 2 or not np.issubdtype(rows.dtype, np.integer):
        raise InputError(None, "labels", f"expected integer class indices of shape (n,) or (n_label_sets, n), got {array.dtype} {array.shape}",
                         "encode classes as 0 .. n_classes-1")
    if isinstance(n_classes, bool) or not isinstance(n_classes, (int, np.integer)) or n_classes < 2:
        raise InputError(None, "n_classes", f"need at least 2 classes, got {n_classes!r}", "define two or more classes")
    if rows.size and (rows.min() < 0 or rows.max() >= n_classes):
        raise InputError(None, "labels", f"labels must lie in [0, {n_classes}), got values {np.unique(rows)[:10].tolist()}",
                         "encode classes as 0 .. n_classes-1")
    return rows.astype(np.int64), single


def _n_classes_of(labels):
    """Enough classes to hold every label (for fits that do not need K up front)."""
    array = np.asarray(labels)
    top = int(array.max()) + 1 if array.size and np.issubdtype(array.dtype, np.integer) else 2
    return max(top, 2)


def _batched(patterns, n_label_sets, n_rows, what):
    """Patterns as (n_batch, n, p) float64 with n_batch 1 or n_label_sets."""
    array = np.asarray(patterns, dtype=np.float64)
    if array.ndim == 2:
        array = array[np.newaxis]
    if array.ndim != 3 or array.shape[0] not in (1, n_label_sets) or (n_rows is not None and array.shape[1] != n_rows):
        raise InputError(None, what, f"expected shape (n, n_voxels) or ({n_label_sets} or 1, n, n_voxels) with n = {n_rows}, got {np.shape(patterns)}",
                         "pass one row per pattern (and one batch per label set, or a single shared batch)")
    if not np.all(np.isfinite(array)):
        raise InputError(None, what, "the patterns contain NaN or infinite values", "remove voxels without data")
    return array


def _check_present(counts):
    if np.any(counts == 0):
        row, klass = np.argwhere(counts == 0)[0]
        raise InputError(None, "labels", f"label set {int(row)} has no training pattern of class {int(klass)}",
                         "train on folds that contain every class")


def _squeeze(result, single):
    return result[0] if single else result


# -- shared pieces ---------------------------------------------------------------
def one_hot(labels, n_classes):
    """One-hot encoding of class indices.

    Parameters
    ----------
    labels : array_like of int, shape (..., n)
        Class indices in ``range(n_classes)``.
    n_classes : int
        Number of classes.

    Returns
    -------
    ndarray of float64, shape (..., n, n_classes)

    Examples
    --------
    >>> one_hot([1, 0], 2).tolist()
    [[0.0, 1.0], [1.0, 0.0]]
    """
    array = np.asarray(labels)
    if not np.issubdtype(array.dtype, np.integer) or (array.size and (array.min() < 0 or array.max() >= n_classes)):
        raise InputError(None, "labels", f"labels must be integers in [0, {n_classes}), got {np.unique(array)[:10].tolist()}",
                         "encode classes as 0 .. n_classes-1")
    return (array[..., np.newaxis] == np.arange(n_classes)).astype(np.float64)


def class_means(train_patterns, train_labels, n_classes):
    """Class centroids for every label set, as one batched matrix product.

    Parameters
    ----------
    train_patterns : array_like, shape (n_train, p) or (n_batch, n_train, p)
    train_labels : array_like of int, shape (n_train,) or (n_label_sets, n_train)
    n_classes : int

    Returns
    -------
    ndarray, shape (n_classes, p) or (n_label_sets, n_classes, p)
        ``(Y' / counts) @ X`` with ``Y`` the one-hot label tensor.
    """
    rows, single = _label_rows(train_labels, n_classes)
    patterns = _batched(train_patterns, rows.shape[0], rows.shape[1], "training patterns")
    weights = one_hot(rows, n_classes).transpose(0, 2, 1)  # (L, K, n)
    counts = weights.sum(axis=2)
    _check_present(counts)
    weights /= counts[:, :, np.newaxis]
    if patterns.shape[0] == 1:  # one shared design: a single (L*K, n) @ (n, p) product
        means = (weights.reshape(-1, rows.shape[1]) @ patterns[0]).reshape(rows.shape[0], n_classes, -1)
    else:
        means = np.matmul(weights, patterns)
    return _squeeze(means, single)


# -- nested voxel counts -----------------------------------------------------------
def _check_counts(counts, n_features):
    """Sorted prefix lengths 1..n_features (None: the whole feature axis)."""
    if counts is None:
        return np.array([n_features], dtype=np.int64), True
    array = np.asarray(counts)
    if array.ndim != 1 or array.size == 0 or not np.issubdtype(array.dtype, np.integer) or array.min() < 1 or array.max() > n_features \
            or np.any(np.diff(array) <= 0):
        raise InputError(None, "counts", f"expected increasing prefix lengths from 1 to {n_features}, got {np.asarray(counts).tolist()}",
                         "pass sorted, unique voxel counts no larger than the number of voxels")
    return array.astype(np.int64), False


def _prefix_sums(values, counts):
    """Sums over the first ``k`` entries of the last axis, for every ``k`` in counts: shape (..., n_counts)."""
    starts = np.concatenate([[0], counts[:-1]])
    block_sums = np.add.reduceat(values[..., :counts[-1]], starts, axis=-1)  # one sum per block between counts
    return np.cumsum(block_sums, axis=-1)


def _prefix_products(tests, weights, counts):
    """``tests[..., :k] @ weights[..., :k]'`` for every k, grown block by block: (L, n_counts, n_test, K)."""
    total = None
    stacked, start = [], 0
    for count in counts:
        block = np.matmul(tests[:, :, start:count], weights[:, :, start:count].transpose(0, 2, 1))
        total = block if total is None else total + block
        stacked.append(total)
        start = count
    return np.stack(stacked, axis=1)


# -- correlation to class centroids ----------------------------------------------
def correlation_centroid_predict(centroids, test_patterns, counts=None, return_correlations=False):
    """Assign each test pattern to the class whose centroid it correlates with most.

    Parameters
    ----------
    centroids : array_like, shape (K, p) or (n_label_sets, K, p)
        Training-class mean patterns (see :func:`class_means`), voxels in rank order.
    test_patterns : array_like, shape (n_test, p) or (n_batch, n_test, p)
        ``n_batch`` 1 or ``n_label_sets``; voxels in the same order.
    counts : sequence of int, optional
        Increasing prefix lengths: classify with the first ``k`` voxels for
        every ``k`` (nested voxel counts) in one pass. Default: all ``p``.
    return_correlations : bool
        Also return the correlations.

    Returns
    -------
    predictions : ndarray of int64, shape ([n_label_sets,] [n_counts,] n_test)
        The counts axis is present only when ``counts`` is given.
    correlations : ndarray, shape (..., n_test, K), only if ``return_correlations``
        Pearson correlation over voxels of each test pattern with each centroid.

    Notes
    -----
    The correlation classifier of Haxby et al. (2001, Science 293:2425-2430).
    The correlation over the first ``k`` voxels comes from running sums
    (``sum x``, ``sum x^2``, ``sum m``, ``sum m^2`` and block-wise products
    ``sum x m``), so all nested counts cost one pass over the voxels. An
    undefined correlation (a constant pattern or centroid, e.g. a single
    voxel) counts as 0; ties go to the lower class index (``argmax``).
    """
    array = np.asarray(centroids, dtype=np.float64)
    single = array.ndim == 2
    means = array[np.newaxis] if single else array
    if means.ndim != 3:
        raise InputError(None, "centroids", f"expected shape (K, p) or (L, K, p), got {array.shape}", "pass class_means output")
    tests = _batched(test_patterns, means.shape[0], None, "test patterns")
    if tests.shape[2] != means.shape[2]:
        raise InputError(None, "test patterns", f"{tests.shape[2]} voxels, but the centroids have {means.shape[2]}", "select the same voxels")
    prefix, whole = _check_counts(counts, means.shape[2])
    sizes = prefix.astype(np.float64)
    sum_m, sum_mm = _prefix_sums(means, prefix), _prefix_sums(means**2, prefix)  # (L, K, C)
    sum_x, sum_xx = _prefix_sums(tests, prefix), _prefix_sums(tests**2, prefix)  # (B, n_test, C)
    sum_xm = _prefix_products(tests, means, prefix)  # (L, C, n_test, K)
    sum_m, sum_mm = sum_m.transpose(0, 2, 1)[:, :, np.newaxis, :], sum_mm.transpose(0, 2, 1)[:, :, np.newaxis, :]  # (L, C, 1, K)
    sum_x, sum_xx = sum_x.transpose(0, 2, 1)[:, :, :, np.newaxis], sum_xx.transpose(0, 2, 1)[:, :, :, np.newaxis]  # (B, C, n, 1)
    k = sizes[np.newaxis, :, np.newaxis, np.newaxis]
    covariance = sum_xm - sum_x * sum_m / k
    spread = np.maximum(sum_xx - sum_x**2 / k, 0.0) * np.maximum(sum_mm - sum_m**2 / k, 0.0)
    with np.errstate(divide="ignore", invalid="ignore"):
        correlations = covariance / np.sqrt(spread)
    correlations = np.where(np.isfinite(correlations) & (spread > 0), correlations, 0.0)
    predictions = np.argmax(correlations, axis=3).astype(np.int64)  # (L, C, n_test)
    if whole:
        predictions, correlations = predictions[:, 0], correlations[:, 0]
    if return_correlations:
        return _squeeze(predictions, single), _squeeze(correlations, single)
    return _squeeze(predictions, single)


# -- Gaussian naive Bayes ----------------------------------------------------------
def gaussian_nb_fit(train_patterns, train_labels, n_classes, var_smoothing=1e-9):
    """Per-class means and variances of a Gaussian naive Bayes model, for every label set.

    Parameters
    ----------
    train_patterns : array_like, shape (n_train, p) or (n_batch, n_train, p)
    train_labels : array_like of int, shape (n_train,) or (n_label_sets, n_train)
    n_classes : int
    var_smoothing : float
        Added variance, as a fraction of the largest per-voxel variance of the
        training patterns (scikit-learn's ``GaussianNB.var_smoothing``).

    Returns
    -------
    theta, var : ndarray, shape (K, p) or (n_label_sets, K, p)
        Class means and (population) class variances plus the smoothing term.

    Notes
    -----
    As ``sklearn.naive_bayes.GaussianNB`` (class variances with ``1/n_c``;
    ``epsilon = var_smoothing * max_v var(X[:, v])``); equal priors are
    applied in :func:`gaussian_nb_predict`. Variances for all label sets come
    from one product with the squared patterns (``E[x^2] - E[x]^2``, clipped
    at 0).
    """
    if not np.isscalar(var_smoothing) or not var_smoothing >= 0:
        raise InputError(None, "var_smoothing", f"expected a non-negative number, got {var_smoothing!r}", "use 1e-9 (scikit-learn's default)")
    rows, single = _label_rows(train_labels, n_classes)
    patterns = _batched(train_patterns, rows.shape[0], rows.shape[1], "training patterns")
    theta = class_means(patterns, rows, n_classes)
    second = class_means(patterns**2, rows, n_classes)
    epsilon = var_smoothing * patterns.var(axis=1).max(axis=1)  # (n_batch,): label-free
    var = np.maximum(second - theta**2, 0.0) + epsilon[:, np.newaxis, np.newaxis]
    return _squeeze(theta, single), _squeeze(var, single)


def gaussian_nb_predict(theta, var, test_patterns, counts=None):
    """Equal-prior Gaussian naive Bayes predictions for every label set.

    Parameters
    ----------
    theta, var : array_like, shape (K, p) or (n_label_sets, K, p)
        Output of :func:`gaussian_nb_fit` (variances already smoothed), voxels in rank order.
    test_patterns : array_like, shape (n_test, p) or (n_batch, n_test, p)
    counts : sequence of int, optional
        Increasing prefix lengths: classify with the first ``k`` voxels for
        every ``k`` in one pass. Default: all ``p``.

    Returns
    -------
    ndarray of int64, shape ([n_label_sets,] [n_counts,] n_test)
        ``argmax_c  -1/2 sum_v [log(2 pi var_cv) + (x_v - theta_cv)^2 / var_cv]``;
        the counts axis only when ``counts`` is given.

    Notes
    -----
    The joint log-likelihood of ``GaussianNB._joint_log_likelihood`` without
    the (equal) log prior, expanded as ``x^2 . (1/var) - 2 x . (theta/var) +
    const`` so every label set and every nested count is scored by running
    sums and block-wise matrix products.
    """
    theta = np.asarray(theta, dtype=np.float64)
    var = np.asarray(var, dtype=np.float64)
    single = theta.ndim == 2
    if theta.shape != var.shape or theta.ndim not in (2, 3) or np.any(var <= 0):
        raise InputError(None, "var", f"theta {theta.shape} and var {var.shape} must match and variances be positive", "pass gaussian_nb_fit output")
    if single:
        theta, var = theta[np.newaxis], var[np.newaxis]
    tests = _batched(test_patterns, theta.shape[0], None, "test patterns")
    if tests.shape[2] != theta.shape[2]:
        raise InputError(None, "test patterns", f"{tests.shape[2]} voxels, but the model has {theta.shape[2]}", "select the same voxels")
    prefix, whole = _check_counts(counts, theta.shape[2])
    predictions = gaussian_nb_predict_terms(gaussian_nb_terms(theta, var), tests, prefix)
    return _squeeze(predictions[:, 0] if whole else predictions, single)


def gaussian_nb_terms(theta, var):
    """Per-voxel pieces of the Gaussian log-likelihood, computed once and sliced per voxel count.

    Parameters
    ----------
    theta, var : ndarray, shape (n_label_sets, K, p)
        Class means and smoothed class variances.

    Returns
    -------
    ndarray, shape (3, n_label_sets, K, p)
        ``1/var``, ``theta/var`` and ``log(2 pi var) + theta^2/var``; any voxel
        subset's terms are a selection along the last axis.
    """
    terms = np.empty((3,) + theta.shape)
    precision, weighted, constant = terms
    np.divide(1.0, var, out=precision)
    np.multiply(theta, precision, out=weighted)
    np.multiply(var, 2.0 * np.pi, out=constant)
    np.log(constant, out=constant)
    constant += theta * weighted
    return terms


def gaussian_nb_predict_terms(terms, tests, prefix):
    """Equal-prior naive Bayes predictions from :func:`gaussian_nb_terms` for nested voxel counts.

    Parameters
    ----------
    terms : ndarray, shape (3, n_label_sets, K, p)
        Voxels in rank order.
    tests : ndarray, shape (n_batch, n_test, p)
        Test patterns, voxels in the same order; ``n_batch`` 1 or ``n_label_sets``.
    prefix : ndarray of int
        Increasing voxel counts (prefix lengths).

    Returns
    -------
    ndarray of int64, shape (n_label_sets, n_counts, n_test)
    """
    precision, weighted, constant = terms
    quadratic = _prefix_products(tests**2, precision, prefix)  # (L, C, n_test, K)
    linear = _prefix_products(tests, weighted, prefix)
    constant = _prefix_sums(constant, prefix)  # (L, K, C)
    log_likelihood = -0.5 * (constant.transpose(0, 2, 1)[:, :, np.newaxis, :] + quadratic) + linear
    return np.argmax(log_likelihood, axis=3).astype(np.int64)


# -- shrinkage LDA -------------------------------------------------------------------
def _ledoit_wolf_from_moments(trace_sum, frobenius_sq, row_norm4_sum, n_samples, n_features):
    """Ledoit-Wolf shrinkage and target scale from moments of centred data (all batched).

    ``trace_sum = tr(X'X)``, ``frobenius_sq = ||X'X||_F^2 = ||XX'||_F^2``,
    ``row_norm4_sum = sum_s ||x_s||^4``; the formula of
    ``sklearn.covariance.ledoit_wolf_shrinkage`` with ``assume_centered=True``.
    """
    n, p = float(n_samples), float(n_features)
    mu = trace_sum / (n * p)
    delta_ = frobenius_sq / n**2  # ||S||_F^2
    beta = (row_norm4_sum / n - delta_) / (p * n)
    delta = (delta_ - 2.0 * mu * trace_sum / n + p * mu**2) / p  # ||S - mu I||_F^2 / p
    beta = np.minimum(beta, delta)
    with np.errstate(divide="ignore", invalid="ignore"):
        shrinkage = np.where(beta == 0, 0.0, beta / delta)
    if n_features == 1:  # one feature: shrinkage changes nothing (sklearn returns 0)
        shrinkage = np.zeros_like(shrinkage)
    return shrinkage, mu


def ledoit_wolf_shrinkage(residuals):
    """Ledoit-Wolf shrinkage intensity of centred data (batched over leading axes).

    Parameters
    ----------
    residuals : array_like, shape (..., n_samples, n_features)
        Centred data (here: patterns minus their class mean).

    Returns
    -------
    shrinkage : ndarray, shape (...)
        The weight ``delta`` of ``(1 - delta) S + delta mu I``.
    mu : ndarray, shape (...)
        ``tr(S) / p`` with ``S = X'X / n``.

    Notes
    -----
    Ledoit & Wolf (2004), "A well-conditioned estimator for large-dimensional
    covariance matrices", J. Multivariate Analysis 88:365-411; computed as
    ``sklearn.covariance.ledoit_wolf_shrinkage(X, assume_centered=True)``.
    """
    data = np.asarray(residuals, dtype=np.float64)
    if data.ndim < 2 or data.shape[-2] < 1 or data.shape[-1] < 1:
        raise InputError(None, "residuals", f"expected (..., n_samples, n_features), got {data.shape}", "pass centred data")
    n, p = data.shape[-2:]
    squared_norms = np.einsum("...np,...np->...n", data, data)
    small = data @ np.swapaxes(data, -1, -2) if n <= p else np.swapaxes(data, -1, -2) @ data
    frobenius_sq = np.einsum("...ij,...ij->...", small, small)
    return _ledoit_wolf_from_moments(squared_norms.sum(axis=-1), frobenius_sq, (squared_norms**2).sum(axis=-1), n, p)


def _check_shrinkage(shrinkage):
    if shrinkage is not None and (not np.isscalar(shrinkage) or isinstance(shrinkage, bool) or not 0.0 <= shrinkage <= 1.0):
        raise InputError(None, "shrinkage", f"expected None (Ledoit-Wolf) or a number in [0, 1], got {shrinkage!r}", "use None")


def shrinkage_lda_fit(train_patterns, train_labels, n_classes, shrinkage=None):
    """Linear discriminant analysis with a shrunk pooled within-class covariance (feature space).

    Parameters
    ----------
    train_patterns : array_like, shape (n_train, p) or (n_batch, n_train, p)
    train_labels : array_like of int, shape (n_train,) or (n_label_sets, n_train)
    n_classes : int
    shrinkage : None or float in [0, 1]
        None: the Ledoit-Wolf intensity of the pooled residuals; a number: fixed.

    Returns
    -------
    dict
        ``coef`` (..., K, p), ``intercept`` (..., K), ``shrinkage`` (...):
        the discriminant ``x . coef_c + intercept_c`` (equal priors).

    Notes
    -----
    Pooled within-class covariance ``S = R'R / n`` of the residuals ``R`` (each
    pattern minus its class mean; every pattern weighs the same), shrunk
    towards ``mu I`` (Ledoit & Wolf 2004, J. Multivariate Analysis
    88:365-411); discriminant ``w_c = Sigma^-1 m_c``, ``b_c = -m_c' w_c / 2``
    (Duda, Hart & Stork 2001, Pattern Classification, 2nd ed., ch. 2.6).

    scikit-learn's ``LinearDiscriminantAnalysis(solver="lsqr")`` pools
    differently: it estimates each class's covariance separately and averages
    them weighted by the priors. With a *fixed* shrinkage, balanced classes
    and equal priors the two coincide; with ``shrinkage="auto"`` scikit-learn
    also standardises each class and picks a Ledoit-Wolf intensity per class,
    so its estimate differs from this pooled one.

    Cost is ``O(p^3)`` per label set: use :func:`shrinkage_lda_fit_gram` when
    ``p`` exceeds the number of training patterns.
    """
    _check_shrinkage(shrinkage)
    rows, single = _label_rows(train_labels, n_classes)
    patterns = _batched(train_patterns, rows.shape[0], rows.shape[1], "training patterns")
    n_train, n_features = patterns.shape[1:]
    means = class_means(patterns, rows, n_classes)  # (L, K, p)
    residuals = patterns - np.matmul(one_hot(rows, n_classes), means)  # (L, n, p)
    scatter = np.matmul(residuals.transpose(0, 2, 1), residuals) / n_train  # (L, p, p)
    if shrinkage is None:
        delta, mu = ledoit_wolf_shrinkage(residuals)
    else:
        delta = np.full(rows.shape[0], float(shrinkage))
        mu = np.trace(scatter, axis1=1, axis2=2) / n_features
    covariance = (1.0 - delta)[:, None, None] * scatter + (delta * mu)[:, None, None] * np.eye(n_features)
    try:
        coef = np.linalg.solve(covariance, means.transpose(0, 2, 1))
    except np.linalg.LinAlgError:  # a singular covariance: minimum-norm least squares, as sklearn's lsqr solver
        coef = np.stack([np.linalg.lstsq(cov, mean.T, rcond=None)[0] for cov, mean in zip(covariance, means)])
    coef = coef.transpose(0, 2, 1)
    intercept = -0.5 * np.einsum("lkp,lkp->lk", means, coef)
    model = {"kind": "primal", "coef": coef, "intercept": intercept, "shrinkage": delta}
    return {key: (_squeeze(value, single) if key != "kind" else value) for key, value in model.items()}


def shrinkage_lda_fit_gram(train_gram, train_labels, n_classes, n_features, shrinkage=None):
    """The same LDA fitted from the training Gram matrix ``Z Z'`` (for ``p > n``).

    Parameters
    ----------
    train_gram : array_like, shape (n_train, n_train) or (n_batch, n_train, n_train)
        Inner products of the (z-scored) training patterns over the selected voxels.
    train_labels : array_like of int, shape (n_train,) or (n_label_sets, n_train)
    n_classes : int
    n_features : int
        Number of selected voxels ``p`` (enters the Ledoit-Wolf formula).
    shrinkage : None or float in [0, 1]

    Returns
    -------
    dict
        ``dual`` (..., n_train, K) and ``intercept`` (..., K), with
        ``coef_c = Z' dual_c``, so the discriminant of a test pattern ``x`` is
        ``(x Z') dual_c + intercept_c``; and ``shrinkage``.

    Notes
    -----
    Every quantity of :func:`shrinkage_lda_fit` is an inner product of
    patterns: with ``H`` the within-class centring matrix, the residual Gram
    is ``R R' = H G H``, which gives ``tr S``, ``||S||_F`` and the Ledoit-Wolf
    intensity, and the Woodbury identity
    ``(a I + b R'R)^-1 = (I - b R'(a I + b R R')^-1 R) / a`` (``a = delta mu``,
    ``b = (1 - delta) / n``) turns the ``p x p`` solve into an ``n x n`` one
    (Woodbury 1950, Memorandum Report 42, Princeton). A zero ``a`` (no
    shrinkage) uses the pseudo-inverse ``S^+ = n R'(R R')^{+2} R``, the
    minimum-norm solution sklearn's lstsq gives.
    """
    _check_shrinkage(shrinkage)
    rows, single = _label_rows(train_labels, n_classes)
    n_label_sets, n_train = rows.shape
    gram = _batched(train_gram, n_label_sets, n_train, "training Gram matrix")
    if gram.shape[2] != n_train:
        raise InputError(None, "training Gram matrix", f"expected square ({n_train}, {n_train}) blocks, got {gram.shape}", "pass Z @ Z.T")
    if isinstance(n_features, bool) or not isinstance(n_features, (int, np.integer)) or n_features < 1:
        raise InputError(None, "n_features", f"expected a positive integer, got {n_features!r}", "pass the number of selected voxels")
    indicator = one_hot(rows, n_classes)  # (L, n, K)
    counts = indicator.sum(axis=1)
    _check_present(counts)
    weights = indicator / counts[:, np.newaxis, :]  # E = Y D^-1
    projector = np.matmul(weights, indicator.transpose(0, 2, 1))  # P = E Y': class-mean operator
    gram_projected = gram - np.matmul(projector, gram)  # H G
    residual_gram = gram_projected - np.matmul(gram_projected, projector)  # H G H
    residual_gram = (residual_gram + residual_gram.transpose(0, 2, 1)) / 2.0
    diagonal = np.einsum("lii->li", residual_gram)
    trace_sum = diagonal.sum(axis=1)
    if shrinkage is None:
        frobenius_sq = np.einsum("lij,lij->l", residual_gram, residual_gram)
        delta, mu = _ledoit_wolf_from_moments(trace_sum, frobenius_sq, (diagonal**2).sum(axis=1), n_train, n_features)
    else:
        delta = np.full(n_label_sets, float(shrinkage))
        mu = trace_sum / (n_train * n_features)
    ridge = delta * mu
    slope = (1.0 - delta) / n_train
    gram_weights = np.matmul(np.broadcast_to(gram, (n_label_sets, n_train, n_train)), weights)  # G E
    centred_gram_weights = gram_weights - np.matmul(projector, gram_weights)  # H G E = R m_c
    dual = np.empty_like(weights)
    regular = ridge > 0
    if regular.any():
        system = ridge[regular, None, None] * np.eye(n_train) + slope[regular, None, None] * residual_gram[regular]
        solved = np.linalg.solve(system, centred_gram_weights[regular])
        centred_solved = solved - np.matmul(projector[regular], solved)  # H A^-1 H G E
        dual[regular] = (weights[regular] - slope[regular, None, None] * centred_solved) / ridge[regular, None, None]
    for row in np.flatnonzero(~regular):  # unshrunk and rank-deficient: the minimum-norm solution
        # H G H has K structurally zero eigenvalues that rounding lifts to ~eps * ||G||: cut at 1e-10.
        pseudo = np.linalg.pinv(residual_gram[row] / n_train, rtol=1e-10, hermitian=True)
        inner = pseudo @ pseudo @ centred_gram_weights[row] / n_train
        dual[row] = inner - projector[row] @ inner
    intercept = -0.5 * np.einsum("lnk,lnk->lk", gram_weights, dual)
    model = {"kind": "dual", "dual": dual, "intercept": intercept, "shrinkage": delta}
    return {key: (_squeeze(value, single) if key != "kind" else value) for key, value in model.items()}


def shrinkage_lda_predict(model, test_patterns=None, test_gram=None):
    """Predictions of a fitted shrinkage LDA for every label set.

    Parameters
    ----------
    model : dict
        From :func:`shrinkage_lda_fit` (needs ``test_patterns``) or
        :func:`shrinkage_lda_fit_gram` (needs ``test_gram``).
    test_patterns : array_like, shape (n_test, p) or (n_batch, n_test, p)
    test_gram : array_like, shape (n_test, n_train) or (n_batch, n_test, n_train)
        Inner products of test with training patterns over the selected voxels.

    Returns
    -------
    ndarray of int64, shape (n_test,) or (n_label_sets, n_test)
        ``argmax_c`` of the discriminant (equal priors; ties to the lower class).
    """
    if not isinstance(model, dict) or model.get("kind") not in ("primal", "dual"):
        raise InputError(None, "model", "not a shrinkage LDA model", "pass the output of shrinkage_lda_fit or shrinkage_lda_fit_gram")
    intercept = np.asarray(model["intercept"])
    single = intercept.ndim == 1
    intercept = intercept[np.newaxis] if single else intercept
    if model["kind"] == "primal":
        if test_patterns is None:
            raise InputError(None, "test_patterns", "a feature-space model needs the test patterns", "pass test_patterns")
        coef = np.asarray(model["coef"])
        coef = coef[np.newaxis] if single else coef
        tests = _batched(test_patterns, coef.shape[0], None, "test patterns")
        decision = np.matmul(tests, coef.transpose(0, 2, 1))
    else:
        if test_gram is None:
            raise InputError(None, "test_gram", "a Gram-space model needs the test-by-training Gram matrix", "pass test_gram")
        dual = np.asarray(model["dual"])
        dual = dual[np.newaxis] if single else dual
        grams = _batched(test_gram, dual.shape[0], None, "test Gram matrix")
        decision = np.matmul(grams, dual)
    decision = decision + intercept[:, np.newaxis, :]
    return _squeeze(np.argmax(decision, axis=2).astype(np.int64), single)


# -- linear SVM ------------------------------------------------------------------------
def _svm_one(train_gram, labels, test_gram, C):
    """One libsvm fit and predict on a precomputed kernel, exactly as SVC does."""
    present, encoded = np.unique(labels, return_inverse=True)
    if present.size < 2:
        raise InputError(None, "labels", f"a linear SVM needs two classes in training, got {present.tolist()}", "train on folds with every class")
    targets = encoded.astype(np.float64)
    try:  # scikit-learn's own libsvm binding: the very routines SVC.fit/predict call, minus per-call validation
        from sklearn.svm import _libsvm
    except ImportError:  # pragma: no cover - a scikit-learn without the private module falls back to SVC
        _libsvm = None
    if _libsvm is None:  # pragma: no cover - fallback path
        from sklearn.svm import SVC

        model = SVC(kernel="precomputed", C=C, class_weight="balanced").fit(train_gram, targets)
        raw = model.predict(test_gram)
        fitted = {"support": model.support_, "dual_coef": model.dual_coef_, "intercept": model.intercept_}
    else:
        _libsvm.set_verbosity_wrap(0)  # as SVC(verbose=False): libsvm prints nothing
        # balanced class weights n / (K n_c), as SVC(class_weight="balanced") passes them: unequal classes weigh alike
        class_weight = encoded.size / (present.size * np.bincount(encoded).astype(np.float64))
        support, vectors, n_support, dual_coef, intercept, prob_a, prob_b, _, _ = _libsvm.fit(
            train_gram, targets, C=C, class_weight=class_weight, sample_weight=np.empty(0), random_seed=0, **_SVC_SETTINGS)
        predict_settings = {key: _SVC_SETTINGS[key] for key in ("svm_type", "kernel", "degree", "coef0", "gamma", "cache_size")}
        raw = _libsvm.predict(test_gram, support, vectors, n_support, dual_coef, intercept, prob_a, prob_b, **predict_settings)
        fitted = {"support": support, "dual_coef": dual_coef, "intercept": intercept}
    return present[raw.astype(np.int64)], fitted


def linear_svm_fit_predict(train_gram, train_labels, test_gram, C=1.0, return_models=False):
    """Linear C-SVM (one-vs-one multiclass) on precomputed Gram matrices, one fit per label set.

    Parameters
    ----------
    train_gram : array_like, shape (n_train, n_train) or (n_batch, n_train, n_train)
        ``Z Z'`` of the (z-scored) training patterns over the selected voxels.
    train_labels : array_like of int, shape (n_train,) or (n_label_sets, n_train)
    test_gram : array_like, shape (n_test, n_train) or (n_batch, n_test, n_train)
        ``Z_test Z'``.
    C : float
        Soft-margin penalty (> 0).
    return_models : bool
        Also return each fit's support indices, dual coefficients and intercepts.

    Returns
    -------
    predictions : ndarray of int64, shape (n_test,) or (n_label_sets, n_test)
    models : list of dict, only if ``return_models``

    Notes
    -----
    Support vector classification (Cortes & Vapnik 1995, Machine Learning
    20:273-297) solved by libsvm (Chang & Lin 2011, ACM TIST 2:27) with the
    settings ``sklearn.svm.SVC(kernel="linear", C=C, class_weight="balanced")``
    uses, so predictions equal SVC's (balanced weights ``n / (K n_c)``: with
    unequal training classes each class weighs alike, the SVM's form of equal
    priors; with equal classes every weight is 1): a linear kernel is the Gram matrix, which the caller builds
    once per fold and grows across nested voxel counts
    (``G_k = G_{k-1} + X[:, new] X[:, new]'``). scikit-learn's own libsvm
    binding is called directly, skipping SVC's per-call validation.
    """
    if not np.isscalar(C) or isinstance(C, bool) or not C > 0:
        raise InputError(None, "svm_c", f"C must be a positive number, got {C!r}", "set svm_c > 0 (default 1)")
    rows, single = _label_rows(train_labels, _n_classes_of(train_labels))
    n_label_sets, n_train = rows.shape
    grams = _batched(train_gram, n_label_sets, n_train, "training Gram matrix")
    tests = _batched(test_gram, n_label_sets, None, "test Gram matrix")
    if grams.shape[2] != n_train or tests.shape[2] != n_train:
        raise InputError(None, "Gram matrix", f"expected {n_train} training columns, got {grams.shape} and {tests.shape}", "pass Z @ Z.T and Z_test @ Z.T")
    shared = grams.shape[0] == 1
    train_block = np.ascontiguousarray(grams[0]) if shared else None
    test_block = np.ascontiguousarray(tests[0]) if tests.shape[0] == 1 else None
    predictions = np.empty((n_label_sets, tests.shape[1]), dtype=np.int64)
    models = []
    for row in range(n_label_sets):
        gram_row = train_block if shared else np.ascontiguousarray(grams[row])
        test_row = test_block if test_block is not None else np.ascontiguousarray(tests[row])
        predictions[row], fitted = _svm_one(gram_row, rows[row], test_row, float(C))
        if return_models:
            models.append(fitted)
    predictions = _squeeze(predictions, single)
    return (predictions, models) if return_models else predictions


# -- L2 logistic regression ------------------------------------------------------------
_WARNINGS_LOCK = threading.Lock()


def logistic_l2_fit_predict(train_patterns, train_labels, test_patterns, C=1.0, return_models=False):
    """L2-penalised (multinomial) logistic regression, one scikit-learn fit per label set.

    Parameters
    ----------
    train_patterns : array_like, shape (n_train, p) or (n_batch, n_train, p)
    train_labels : array_like of int, shape (n_train,) or (n_label_sets, n_train)
    test_patterns : array_like, shape (n_test, p) or (n_batch, n_test, p)
    C : float
        Inverse penalty strength (> 0).
    return_models : bool
        Also return each fit's ``coef`` and ``intercept``.

    Returns
    -------
    predictions : ndarray of int64, shape (n_test,) or (n_label_sets, n_test)
    n_not_converged : int
        Fits for which lbfgs reported that it stopped before converging.
    models : list of dict, only if ``return_models``

    Notes
    -----
    Calls ``sklearn.linear_model.LogisticRegression(C=C,
    class_weight="balanced")`` (lbfgs, its defaults; balanced weights so that
    unequal training classes do not tilt predictions toward the larger one),
    so predictions are scikit-learn's; its convergence warnings
    are counted rather than raised, for the caller to log.
    """
    from sklearn.exceptions import ConvergenceWarning
    from sklearn.linear_model import LogisticRegression

    if not np.isscalar(C) or isinstance(C, bool) or not C > 0:
        raise InputError(None, "logistic_c", f"C must be a positive number, got {C!r}", "set logistic_c > 0 (default 1)")
    rows, single = _label_rows(train_labels, _n_classes_of(train_labels))
    n_label_sets, n_train = rows.shape
    trains = _batched(train_patterns, n_label_sets, n_train, "training patterns")
    tests = _batched(test_patterns, n_label_sets, None, "test patterns")
    predictions = np.empty((n_label_sets, tests.shape[1]), dtype=np.int64)
    models, n_not_converged = [], 0
    for row in range(n_label_sets):
        if np.unique(rows[row]).size < 2:
            raise InputError(None, "labels", "logistic regression needs two classes in training", "train on folds with every class")
        # catch_warnings swaps process-wide state: decode jobs run in threads of Snakemake's process (local
        # profile), so one fit at a time records, or a thread would count another's warnings or lose its own.
        with _WARNINGS_LOCK, warnings.catch_warnings(record=True) as caught:
            warnings.simplefilter("always", ConvergenceWarning)
            model = LogisticRegression(C=float(C), class_weight="balanced").fit(trains[0 if trains.shape[0] == 1 else row], rows[row])
        n_not_converged += any(issubclass(item.category, ConvergenceWarning) for item in caught)
        predictions[row] = model.predict(tests[0 if tests.shape[0] == 1 else row])
        if return_models:
            models.append({"coef": model.coef_, "intercept": model.intercept_})
    predictions = _squeeze(predictions, single)
    return (predictions, n_not_converged, models) if return_models else (predictions, n_not_converged)
