"""Fold-aware decoding curves, permutation nulls and cross-decoding.

One fold, in order (everything fitted on the training patterns only):

1. optional per-pattern demeaning: each pattern minus its own mean over the
   ROI's voxels. It uses that pattern alone, never another pattern, so it
   cannot carry held-out information into training (no leak);
2. z-scoring: mean and SD of every voxel from the training patterns, the same
   transform applied to the test patterns (as ``StandardScaler``);
3. voxel scores and a ranking from the training patterns (``signal`` on the
   demeaned but unscaled patterns, since z-scoring removes the mean it
   measures; ``f`` and ``stability`` on the z-scored ones, which they are
   invariant to; ``none`` a random order);
4. for each requested voxel count (an int, or ``"all"``; a count beyond the
   ROI uses every voxel and records ``n_used``) fit the classifier on the
   top-ranked voxels and predict the held-out patterns.

The permutation null relabels the patterns within runs (runs are the
exchangeability blocks; run x set blocks in cross-decoding) *once* per
permutation, and that one label vector is used for training and testing in
every fold (:mod:`foldwise.decoding.permutations`: small spaces are
enumerated exactly, larger ones drawn), and reruns the whole fold loop per permutation,
label-dependent selection included; only label-free work (demeaning, the
scaler, ``signal``/``none`` rankings, Gram matrices of label-free selections)
is computed once per fold and shared by all permutations and counts. The real
labels are row 0 of the label stack, so observed and null scores come out of
the same computation.
"""

from dataclasses import dataclass

import numpy as np

from foldwise import contract
from foldwise.decoding import classifiers as clf
from foldwise.errors import InputError
from foldwise.decoding.folds import held_out_runs, make_folds
from foldwise.decoding.permutations import block_codes, draw_relabelings, null_relabelings, smallest_p
from foldwise.decoding.selection import (LABEL_FREE_METHODS, SELECTION_METHODS, f_scores, random_order, rank_voxels, signal_scores, stability_scores,
                        top_ranked)

__all__ = [
    "DirectionScores",
    "DecodeResult",
    "demean_patterns",
    "fit_scaler",
    "apply_scaler",
    "resolve_counts",
    "permute_within_runs",
    "accuracy",
    "balanced_accuracy",
    "confusion_counts",
    "cross_directions",
    "decode_curve",
    "permutation_null",
    "decode_cross",
]

# Elements of the largest per-chunk work array (~32 MB of float64); only shapes decide it, so chunking is deterministic.
_CHUNK_ELEMENTS = 1 << 22
_VAR_SMOOTHING = 1e-9  # GaussianNB's default
_CENTROID_CLASSIFIERS = ("correlation_centroid", "gaussian_nb")


@dataclass(frozen=True)
class DirectionScores:
    """Scores of one decoding direction (``within``, ``A->B``, ...).

    Attributes
    ----------
    accuracy, balanced_accuracy : ndarray, shape (n_folds, n_counts)
        Per fold and requested count (real labels).
    n_train, n_test : ndarray of int, shape (n_folds,)
    confusion : ndarray of int, shape (n_counts, n_classes, n_classes)
        ``[count, true, predicted]``, summed over folds.
    null_accuracy, null_balanced_accuracy : ndarray, shape (n_permutations, n_counts)
        Fold-mean scores under each permutation.
    predictions : ndarray of int or None, shape (n_counts, n_patterns)
        Predicted class of every pattern the direction tests (-1 elsewhere).
    """

    accuracy: np.ndarray
    balanced_accuracy: np.ndarray
    n_train: np.ndarray
    n_test: np.ndarray
    confusion: np.ndarray
    null_accuracy: np.ndarray
    null_balanced_accuracy: np.ndarray
    predictions: np.ndarray | None = None


@dataclass(frozen=True)
class DecodeResult:
    """Everything one decoding run produced.

    Attributes
    ----------
    voxel_counts : tuple
        The requested counts, as given (ints and ``"all"``).
    n_used : ndarray of int, shape (n_counts,)
        Voxels actually used for each requested count.
    n_voxels : int
        Voxels in the ROI.
    n_classes : int
    test_runs : list of list
        Held-out runs of each fold.
    directions : dict of str to DirectionScores
        ``{"within": ...}`` or the five cross-decoding directions.
    rankings : dict of str to ndarray, shape (n_folds, n_voxels)
        Training-fold voxel ranking (real labels) per training set
        (``"within"`` for plain decoding, else the set name).
    voxel_scores : dict of str to ndarray or None
        The scores behind each ranking (None for selection ``none``).
    permuted_labels : ndarray of int, shape (n_null, n_patterns)
        The null's relabelings (one label vector per permutation, used for
        training and testing alike). With ``null_exact`` every distinct
        relabeling once, the actual labeling first.
    states : dict of str to list of dict, or None
        With ``keep_state``: per training set and fold, the training-side
        state (scaler, scores, ranking, fitted model per count).
    n_not_converged : int
        Logistic-regression fits that stopped before converging.
    null_exact : bool
        The null lists the whole relabeling space (p is then
        ``#{null >= observed} / n_null``), else it holds random draws
        (``(1 + #{null >= observed}) / (1 + n_null)``).
    n_relabelings : int
        Distinct relabelings the design allows (up to class renaming where
        that leaves scores unchanged); 0 without a null.
    p_min : float
        The smallest p-value the null can give (NaN without a null).
    """

    voxel_counts: tuple
    n_used: np.ndarray
    n_voxels: int
    n_classes: int
    test_runs: list
    directions: dict
    rankings: dict
    voxel_scores: dict
    permuted_labels: np.ndarray
    states: dict | None = None
    n_not_converged: int = 0
    null_exact: bool = False
    n_relabelings: int = 0
    p_min: float = float("nan")


# -- preprocessing -------------------------------------------------------------------
def demean_patterns(patterns):
    """Subtract from each pattern its own mean across voxels.

    Parameters
    ----------
    patterns : array_like, shape (n_patterns, n_voxels)

    Returns
    -------
    ndarray, shape (n_patterns, n_voxels)

    Notes
    -----
    Each row is changed using only that row, so demeaning before the
    train/test split is no leak. It removes a pattern-wide offset (e.g. a
    stronger overall response to one modality), common practice in pattern
    analysis (no single source).
    """
    array = np.asarray(patterns, dtype=np.float64)
    if array.ndim != 2:
        raise InputError(None, "patterns", f"expected (n_patterns, n_voxels), got shape {array.shape}", "pass a 2-D array")
    return array - array.mean(axis=1, keepdims=True)


def fit_scaler(train_patterns):
    """Per-voxel mean and scale of the training patterns (z-scoring).

    Parameters
    ----------
    train_patterns : array_like, shape (n_train, n_voxels)

    Returns
    -------
    mean, scale : ndarray, shape (n_voxels,)
        ``scale`` is the population SD, set to 1 for (near-)constant voxels.

    Notes
    -----
    The arithmetic of ``sklearn.preprocessing.StandardScaler`` (corrected
    two-pass variance of Chan, Golub & LeVeque 1983, Am. Statistician
    37:242-247; the same near-constant test), so the scaled values are the
    ones a scikit-learn pipeline sees.
    """
    array = np.asarray(train_patterns, dtype=np.float64)
    if array.ndim != 2 or array.shape[0] < 1:
        raise InputError(None, "training patterns", f"expected (n_train, n_voxels) with n_train >= 1, got shape {array.shape}",
                         "pass one row per training pattern")
    n_train = array.shape[0]
    mean = array.sum(axis=0) / n_train
    centred = array - mean
    correction = centred.sum(axis=0)
    variance = ((centred**2).sum(axis=0) - correction**2 / n_train) / n_train
    eps = np.finfo(np.float64).eps
    constant = variance <= n_train * eps * variance + (n_train * mean * eps) ** 2
    scale = np.sqrt(variance)
    scale[constant] = 1.0
    return mean, scale


def apply_scaler(patterns, mean, scale):
    """``(patterns - mean) / scale`` with a scaler from :func:`fit_scaler`."""
    array = np.asarray(patterns, dtype=np.float64)
    if array.ndim != 2 or array.shape[1] != np.shape(mean)[0]:
        raise InputError(None, "patterns", f"shape {array.shape} does not match a scaler of {np.shape(mean)[0]} voxels", "scale the same voxels")
    return (array - mean) / scale


def resolve_counts(voxel_counts, n_voxels):
    """Voxels used for each requested count.

    Parameters
    ----------
    voxel_counts : sequence of int or "all"
        Checked once, before any job (the schema and
        :func:`foldwise.study.check_meaning`): whole numbers of at least 1
        or ``"all"``, each once, increasing; trusted here.
    n_voxels : int
        Voxels in the ROI.

    Returns
    -------
    n_used : ndarray of int, shape (n_counts,)
        ``min(count, n_voxels)``, ``n_voxels`` for ``"all"``.
    too_large : list
        The requested counts larger than the ROI.

    Examples
    --------
    >>> n_used, too_large = resolve_counts([10, 500, "all"], 300)
    >>> n_used.tolist(), too_large
    ([10, 300, 300], [500])
    """
    if isinstance(n_voxels, bool) or not isinstance(n_voxels, (int, np.integer)) or n_voxels < 1:
        raise InputError(None, "n_voxels", f"the ROI must hold at least one voxel, got {n_voxels!r}", "check the ROI mask")
    used = [int(n_voxels) if count == "all" else min(int(count), int(n_voxels)) for count in voxel_counts]
    too_large = [count for count in voxel_counts if count != "all" and count > n_voxels]
    return np.asarray(used, dtype=np.int64), too_large


def permute_within_runs(labels, run_labels, n_permutations, rng):
    """Relabel the patterns within each run (runs as exchangeability blocks).

    Parameters
    ----------
    labels : array_like of int, shape (n_patterns,)
    run_labels : array_like, shape (n_patterns,)
        Block of each pattern (the run; for cross-decoding, run and set).
    n_permutations : int
    rng : numpy.random.Generator
        The only source of randomness; the same generator state gives the
        same relabelings, whatever the data.

    Returns
    -------
    ndarray of int, shape (n_permutations, n_patterns)
        Row ``k`` is permutation ``k + 1``: within every block, a uniformly
        random reordering of that block's labels (class counts per run kept).

    Notes
    -----
    Permuting only within runs respects the dependence of patterns within a
    run (Nichols & Holmes 2002, Human Brain Mapping 15:1-25, on
    exchangeability blocks).
    """
    array = np.asarray(labels)
    runs = np.asarray(run_labels)
    if array.ndim != 1 or runs.shape != array.shape:
        raise InputError(None, "labels", f"labels {array.shape} and runs {runs.shape} must be 1-D and match", "pass one label and run per pattern")
    if isinstance(n_permutations, bool) or not isinstance(n_permutations, (int, np.integer)) or n_permutations < 0:
        raise InputError(None, "n_permutations", f"expected a non-negative integer, got {n_permutations!r}", "set n_permutations >= 0")
    if n_permutations and not isinstance(rng, np.random.Generator):
        raise InputError(None, "rng", f"expected a numpy.random.Generator, got {type(rng).__name__}", "pass np.random.default_rng(seed)")
    return draw_relabelings(array, runs, int(n_permutations), rng)


def _null_label_rows(classes, blocks, n_permutations, rng, n_classes):
    """Label rows for one pass of the fold loop: row 0 the real labels, the null's rows after it.

    Returns ``(label_rows, null_start, exact, space)``: the null is
    ``label_rows[null_start:]``. An exactly enumerated null starts at row 0
    (its first relabeling is the actual one), a drawn null at row 1.
    """
    if isinstance(n_permutations, bool) or not isinstance(n_permutations, (int, np.integer)) or n_permutations < 0:
        raise InputError(None, "n_permutations", f"expected a non-negative integer, got {n_permutations!r}", "set n_permutations >= 0")
    if n_permutations and not isinstance(rng, np.random.Generator):
        raise InputError(None, "rng", f"expected a numpy.random.Generator, got {type(rng).__name__}", "pass np.random.default_rng(seed)")
    relabeled, exact, space = null_relabelings(classes, blocks, int(n_permutations), rng, n_classes)
    if exact:
        return relabeled, 0, True, space
    return np.vstack([classes[np.newaxis], relabeled]), 1, False, space


# -- metrics --------------------------------------------------------------------------
def accuracy(true_labels, predicted):
    """Share of correct predictions (over the last axis; ``predicted`` may be batched)."""
    truth, guess = np.asarray(true_labels), np.asarray(predicted)
    if truth.shape[-1:] != guess.shape[-1:] or truth.shape[-1] == 0:
        raise InputError(None, "predictions", f"shapes {truth.shape} and {guess.shape} do not match", "pass one prediction per test pattern")
    return (truth == guess).mean(axis=-1)


def balanced_accuracy(true_labels, predicted, n_classes=None):
    """Mean per-class recall over the classes present in ``true_labels``.

    Parameters
    ----------
    true_labels : array_like of int, shape (..., n_test)
    predicted : array_like of int, shape (..., n_test)
        Broadcast against ``true_labels`` (e.g. a stack of permutations).
    n_classes : int, optional
        Number of classes (default: the largest label + 1).

    Returns
    -------
    ndarray or float
        Shape of the broadcast leading axes.

    Notes
    -----
    Equal to ``sklearn.metrics.balanced_accuracy_score`` (Brodersen et al.
    2010, ICPR, "The balanced accuracy and its posterior distribution"); with
    balanced classes it equals accuracy.

    Examples
    --------
    >>> float(balanced_accuracy([0, 0, 0, 1], [0, 0, 0, 0]))
    0.5
    """
    truth, guess = np.broadcast_arrays(np.asarray(true_labels), np.asarray(predicted))
    if truth.shape[-1] == 0:
        raise InputError(None, "predictions", "no test patterns", "test on at least one pattern")
    n_classes = int(max(truth.max(), guess.max())) + 1 if n_classes is None else int(n_classes)
    recalls, present = [], []
    for klass in range(n_classes):
        members = truth == klass
        count = members.sum(axis=-1)
        hits = (members & (guess == klass)).sum(axis=-1)
        with np.errstate(divide="ignore", invalid="ignore"):
            recalls.append(np.where(count > 0, hits / count, 0.0))
        present.append(count > 0)
    recalls, present = np.stack(recalls, axis=-1), np.stack(present, axis=-1)
    return recalls.sum(axis=-1) / present.sum(axis=-1)


def confusion_counts(true_labels, predicted, n_classes):
    """``counts[true, predicted]`` of one prediction vector (ints, shape (n_classes, n_classes))."""
    truth, guess = np.asarray(true_labels, dtype=np.int64), np.asarray(predicted, dtype=np.int64)
    if truth.shape != guess.shape or truth.ndim != 1:
        raise InputError(None, "predictions", f"shapes {truth.shape} and {guess.shape} must be equal and 1-D", "pass one prediction per test pattern")
    return np.bincount(truth * n_classes + guess, minlength=n_classes * n_classes).reshape(n_classes, n_classes)


cross_directions = contract.cross_directions  # the direction names are part of the data contract


# -- options ------------------------------------------------------------------------
@dataclass(frozen=True)
class _Options:
    classifier: str
    selection: str
    demean: bool
    svm_c: float
    logistic_c: float


def _options(classifier, selection, demean_patterns, svm_c, logistic_c):
    if classifier not in clf.CLASSIFIERS:
        raise InputError(None, "classifier", f"unknown classifier {classifier!r}", f"use one of {', '.join(clf.CLASSIFIERS)}")
    if selection not in SELECTION_METHODS:
        raise InputError(None, "selection", f"unknown selection {selection!r}", f"use one of {', '.join(SELECTION_METHODS)}")
    for name, value in (("svm_c", svm_c), ("logistic_c", logistic_c)):
        if isinstance(value, bool) or not isinstance(value, (int, float, np.floating, np.integer)) or not value > 0:
            raise InputError(None, name, f"expected a positive number, got {value!r}", f"set {name} > 0 (default 1)")
    if not isinstance(demean_patterns, (bool, np.bool_)):
        raise InputError(None, "demean_patterns", f"expected true or false, got {demean_patterns!r}", "set demean_patterns to true or false")
    return _Options(classifier, selection, bool(demean_patterns), float(svm_c), float(logistic_c))


# -- one fold ------------------------------------------------------------------------
def _take_columns(matrix, ranking, stop, start=0):
    """``matrix[:, ranking[b, start:stop]]`` for every row ``b``: shape (n_batch, n, stop - start)."""
    return np.take(matrix, ranking[:, start:stop], axis=1).transpose(1, 0, 2)


def _gram_prefixes(z_train, z_test, ranking, counts):
    """Gram matrices over the top-k voxels, grown block by block: G_k = G_prev + X[:, new] X[:, new]'."""
    n_batch = ranking.shape[0]
    train_gram = np.zeros((n_batch, z_train.shape[0], z_train.shape[0]))
    test_gram = np.zeros((n_batch, z_test.shape[0], z_train.shape[0]))
    prefixes, start = [], 0
    for count in counts:
        if count > start:
            block_train = _take_columns(z_train, ranking, count, start)
            block_test = _take_columns(z_test, ranking, count, start)
            update = np.matmul(block_train, block_train.transpose(0, 2, 1))
            train_gram = train_gram + (update + update.transpose(0, 2, 1)) / 2.0  # exactly symmetric, as a kernel must be
            test_gram = test_gram + np.matmul(block_test, block_train.transpose(0, 2, 1))
        prefixes.append((train_gram, test_gram))
        start = count
    return prefixes


def _whole_roi_resources(z_train, z_test, classifier):
    """Label-free pieces for the count that uses every ROI voxel (its voxel order is irrelevant)."""
    n_train, n_voxels = z_train.shape
    resources = {"test": z_test[np.newaxis]}
    if classifier == "linear_svm" or (classifier == "shrinkage_lda" and n_voxels > n_train):
        gram = z_train @ z_train.T
        resources["gram"] = ((gram + gram.T)[np.newaxis] / 2.0, (z_test @ z_train.T)[np.newaxis])
    if classifier == "shrinkage_lda" and n_voxels <= n_train:
        resources["train"] = z_train[np.newaxis]
    return resources


def _ranked_resources(z_train, z_test, ranking, partial_counts, classifier):
    """Pieces for the counts below the ROI size, from the top-ranked voxels (label-free given a ranking)."""
    n_train = z_train.shape[0]
    resources = {"ranking": ranking}
    if not partial_counts:
        return resources
    top = int(partial_counts[-1])
    if classifier in ("correlation_centroid", "gaussian_nb"):
        resources["test"] = _take_columns(z_test, ranking, top)
    if classifier == "linear_svm" or (classifier == "shrinkage_lda" and top > n_train):
        resources["grams"] = _gram_prefixes(z_train, z_test, ranking, partial_counts)
    if classifier == "shrinkage_lda":
        primal = [count for count in partial_counts if count <= n_train]
        if primal:
            resources["train_primal"] = _take_columns(z_train, ranking, primal[-1])
            resources["test_primal"] = _take_columns(z_test, ranking, primal[-1])
    return resources


def _predict_counts(z_train, z_test, rows, counts, n_classes, options, ranked, whole, keep_state):
    """Predictions (n_rows, n_counts, n_test) for a chunk of label rows; row 0's fitted models if asked.

    Counts below the ROI size use the top of ``ranked["ranking"]``; the
    whole-ROI count uses the voxels in index order (a set, not a ranking).
    """
    n_rows, (n_train, n_voxels), n_test = rows.shape[0], z_train.shape, z_test.shape[0]
    predictions = np.empty((n_rows, len(counts), n_test), dtype=np.int64)
    models, n_not_converged = [], 0
    name = options.classifier
    partial = [count for count in counts if count < n_voxels]
    if name in ("correlation_centroid", "gaussian_nb"):
        # class statistics of every voxel once per chunk; the ranked copy's prefixes serve every nested count
        theta = ranked["class_means"] if "class_means" in ranked else clf.class_means(z_train, rows, n_classes)
        if name == "gaussian_nb":
            # One smoothing term per fold: GaussianNB's var_smoothing times the largest training variance of
            # the ROI. After z-scoring every non-constant voxel has variance 1, so any selected subset gives
            # the same term (to the last bit of rounding) and per-voxel terms can be summed over prefixes.
            epsilon = _VAR_SMOOTHING * z_train.var(axis=0).max()
            variance = clf.class_means(z_train**2, rows, n_classes)
            variance -= theta**2
            np.maximum(variance, 0.0, out=variance)
            variance += epsilon
            statistics = clf.gaussian_nb_terms(theta, variance)  # (3, L, K, V)
        else:
            statistics = theta[np.newaxis]  # (1, L, K, V)
        ranked_statistics = None
        if partial:
            ranking = ranked["ranking"][:, :partial[-1]]
            if ranking.shape[0] == 1:  # one shared ranking: a plain column selection
                ranked_statistics = statistics[..., ranking[0]]
            else:
                ranked_statistics = np.take_along_axis(statistics, ranking[np.newaxis, :, np.newaxis, :], axis=3)
            if name == "gaussian_nb":
                predictions[:, :len(partial)] = clf.gaussian_nb_predict_terms(ranked_statistics, ranked["test"], np.asarray(partial))
            else:
                predictions[:, :len(partial)] = clf.correlation_centroid_predict(ranked_statistics[0], ranked["test"], counts=partial)
        if len(partial) < len(counts):
            if name == "gaussian_nb":
                predictions[:, -1] = clf.gaussian_nb_predict_terms(statistics, whole["test"], np.array([n_voxels]))[:, 0]
            else:
                predictions[:, -1] = clf.correlation_centroid_predict(theta, whole["test"])
        if keep_state:
            for count in counts:
                source = statistics if count == n_voxels else ranked_statistics
                if name == "gaussian_nb":
                    precision, weighted = source[0, 0, :, :count], source[1, 0, :, :count]
                    models.append({"theta": weighted / precision, "var": 1.0 / precision})
                else:
                    models.append({"centroids": source[0, 0, :, :count]})
        return predictions, models, n_not_converged
    for position, count in enumerate(counts):
        is_whole = count == n_voxels
        if name == "shrinkage_lda":
            if count <= n_train:  # few voxels: the p x p covariance in feature space
                train_part = whole["train"] if is_whole else ranked["train_primal"][:, :, :count]
                test_part = whole["test"] if is_whole else ranked["test_primal"][:, :, :count]
                fitted = clf.shrinkage_lda_fit(train_part, rows, n_classes)
                predictions[:, position] = clf.shrinkage_lda_predict(fitted, test_patterns=test_part)
                model = {}
            else:  # more voxels than patterns: the same model from the n x n Gram matrix
                train_gram, test_gram = whole["gram"] if is_whole else ranked["grams"][position]
                fitted = clf.shrinkage_lda_fit_gram(train_gram, rows, n_classes, int(count))
                predictions[:, position] = clf.shrinkage_lda_predict(fitted, test_gram=test_gram)
                model = {"train_gram": train_gram[0]}
            model.update({key: (value if key == "kind" else value[0]) for key, value in fitted.items()})
        elif name == "linear_svm":
            train_gram, test_gram = whole["gram"] if is_whole else ranked["grams"][position]
            result = clf.linear_svm_fit_predict(train_gram, rows, test_gram, C=options.svm_c, return_models=keep_state)
            predictions[:, position] = result[0] if keep_state else result
            model = dict(result[1][0], train_gram=train_gram[0]) if keep_state else None
        else:  # logistic_l2: scikit-learn per fit, on the selected voxels in index order (as SelectKBest keeps them)
            if is_whole:
                train_sel, test_sel = z_train, z_test
            else:
                selected = np.sort(ranked["ranking"][:, :count], axis=1)
                train_sel, test_sel = _take_columns(z_train, selected, count), _take_columns(z_test, selected, count)
            outcome = clf.logistic_l2_fit_predict(train_sel, rows, test_sel, C=options.logistic_c, return_models=keep_state)
            predictions[:, position] = outcome[0]
            n_not_converged += outcome[1]
            model = outcome[2][0] if keep_state else None
        if keep_state:
            models.append(model)
    return predictions, models, n_not_converged


def _decode_fold(train_patterns, train_rows, train_runs, test_patterns, counts, n_classes, options, selection_rng, keep_state):
    """Predict the test patterns of one fold for every label row and voxel count.

    Only ``train_patterns``, ``train_rows`` and ``train_runs`` reach the
    scaler, the selection and the fits; ``test_patterns`` are only demeaned
    (each by its own mean, if asked), scaled with the training scaler and
    predicted. ``counts`` are sorted and unique.

    Returns
    -------
    predictions : ndarray, shape (n_rows, n_counts, n_test)
    scores, ranking : the real labels' voxel scores (None for ``none``) and full ranking
    state : dict or None
    n_not_converged : int
    """
    if options.demean:
        train_patterns, test_patterns = demean_patterns(train_patterns), demean_patterns(test_patterns)
    mean, scale = fit_scaler(train_patterns)
    z_train = apply_scaler(train_patterns, mean, scale)
    z_test = apply_scaler(test_patterns, mean, scale)
    n_rows, n_train = train_rows.shape
    n_voxels = z_train.shape[1]
    partial = [int(count) for count in counts if count < n_voxels]
    whole = _whole_roi_resources(z_train, z_test, options.classifier) if counts[-1] == n_voxels else None
    label_free = options.selection in LABEL_FREE_METHODS
    if label_free:  # one ranking for every label row: its pieces are computed once per fold
        if options.selection == "signal":
            scores_row0 = signal_scores(train_patterns)
            ranking_row0 = rank_voxels(scores_row0)
        else:
            scores_row0, ranking_row0 = None, random_order(n_voxels, selection_rng)
        shared = _ranked_resources(z_train, z_test, ranking_row0[np.newaxis, :partial[-1] if partial else 0], partial, options.classifier)
        chunk = max(1, min(n_rows, _CHUNK_ELEMENTS // (n_voxels * 4 * n_classes)))
    else:
        chunk = max(1, min(n_rows, _CHUNK_ELEMENTS // (n_voxels * (n_train + z_test.shape[0] + 4 * n_classes))))
    predictions = np.empty((n_rows, len(counts), z_test.shape[0]), dtype=np.int64)
    state, n_not_converged = None, 0
    for start in range(0, n_rows, chunk):
        rows = train_rows[start:start + chunk]
        if label_free:
            ranked = shared
        else:  # label-dependent: scores and rankings of every row of the chunk, never reused
            if options.selection == "f":
                # centroid classifiers need the class means anyway: compute them once for both
                means = clf.class_means(z_train, rows, n_classes) if options.classifier in _CENTROID_CLASSIFIERS else None
                chunk_scores = f_scores(z_train, rows, n_classes, class_means=means)
            else:
                chunk_scores = stability_scores(z_train, rows, train_runs, n_classes)
            top = top_ranked(chunk_scores, partial[-1]) if partial else np.empty((rows.shape[0], 0), dtype=np.int64)
            ranked = _ranked_resources(z_train, z_test, top, partial, options.classifier)
            if options.selection == "f" and means is not None:
                ranked["class_means"] = means
            if start == 0:
                scores_row0 = chunk_scores[0]
                ranking_row0 = rank_voxels(scores_row0)
        keep = keep_state and start == 0
        predictions[start:start + chunk], models, failed = _predict_counts(z_train, z_test, rows, counts, n_classes, options, ranked, whole, keep)
        n_not_converged += failed
        if keep:
            state = {"mean": mean, "scale": scale, "scores": scores_row0, "ranking": ranking_row0, "models": models}
    return predictions, scores_row0, ranking_row0, state, n_not_converged


# -- the fold loop ------------------------------------------------------------------
def _check_inputs(patterns, labels, run_labels, n_classes):
    data = np.asarray(patterns, dtype=np.float64)
    if data.ndim != 2 or data.shape[0] < 2 or data.shape[1] < 1:
        raise InputError(None, "patterns", f"expected (n_patterns, n_voxels) with at least 2 patterns, got shape {data.shape}",
                         "pass one row per pattern and one column per ROI voxel")
    if not np.all(np.isfinite(data)):
        raise InputError(None, "patterns", "the patterns contain NaN or infinite values", "mask out voxels without data")
    classes = np.asarray(labels)
    if classes.shape != (data.shape[0],) or not np.issubdtype(classes.dtype, np.integer) or classes.min() < 0:
        raise InputError(None, "labels", f"expected {data.shape[0]} non-negative integer labels, got {classes.dtype} {classes.shape}",
                         "encode classes as 0 .. n_classes-1")
    runs = np.asarray(run_labels)
    if runs.shape != (data.shape[0],):
        raise InputError(None, "run_id", f"expected {data.shape[0]} run labels, got shape {runs.shape}", "pass the run of every pattern")
    n_classes = int(classes.max()) + 1 if n_classes is None else int(n_classes)
    if n_classes < 2 or classes.max() >= n_classes:
        raise InputError(None, "labels", f"need labels in [0, n_classes) with n_classes >= 2, got n_classes {n_classes} and labels {np.unique(classes).tolist()}",
                         "define two or more classes")
    return data, classes.astype(np.int64), runs, n_classes


def _fold_means(scores_by_fold):
    """(n_folds, n_rows, n_counts) -> fold means per row."""
    return np.mean(scores_by_fold, axis=0)


def decode_curve(patterns, labels, run_labels, voxel_counts, *, folds=None, n_classes=None, classifier="linear_svm",
                 selection="signal", demean_patterns=False, svm_c=1.0, logistic_c=1.0, n_permutations=0, rng=None,
                 selection_rng=None, keep_state=False):
    """Cross-validated decoding accuracy as a function of the number of selected voxels.

    Parameters
    ----------
    patterns : array_like, shape (n_patterns, n_voxels)
        One row per pattern (betas or t-values of one ROI).
    labels : array_like of int, shape (n_patterns,)
        Class index of each pattern.
    run_labels : array_like, shape (n_patterns,)
        Run of each pattern (folds and permutation blocks).
    voxel_counts : sequence of int or "all"
        Requested counts; each is capped at the ROI size.
    folds : list of (train_idx, test_idx), optional
        Default: leave one run out (:func:`foldwise.decoding.folds.make_folds`).
    n_classes : int, optional
        Default: the largest label + 1.
    classifier : {"linear_svm", "logistic_l2", "shrinkage_lda", "correlation_centroid", "gaussian_nb"}
    selection : {"signal", "f", "stability", "none"}
    demean_patterns : bool
        Subtract each pattern's mean over voxels first.
    svm_c, logistic_c : float
        Penalties of the SVM and the logistic regression.
    n_permutations : int
        Permutations of the labels within runs for the null (0: none).
    rng : numpy.random.Generator, optional
        Draws the permutations (required when ``n_permutations > 0``).
    selection_rng : numpy.random.Generator, optional
        Draws the random voxel orders of selection ``none`` (one per fold).
    keep_state : bool
        Keep each fold's training-side state (scaler, scores, ranking, models).

    Returns
    -------
    DecodeResult
        With ``directions["within"]``.

    Notes
    -----
    The null relabels *all* patterns within runs, so both the training and
    the held-out labels of a fold are the permuted ones: the analysis is
    rerun on relabeled data, selection included (Nichols & Holmes 2002,
    Human Brain Mapping 15:1-25): every label-dependent step is redone for
    each relabeling, or the null would be too narrow. When the design allows
    no more distinct relabelings than requested, the null lists each once
    (the actual one first) and the p-value is ``#{null >= observed} /
    n_null``; otherwise the relabelings are drawn and the p-value of an
    observed fold-mean score is ``(1 + #{null >= observed}) / (1 +
    n_permutations)`` (Hemerik & Goeman 2018, JRSS-B 80:137-155; Phipson &
    Smyth 2010, Stat. Appl. Genet. Mol. Biol. 9:39).
    """
    options = _options(classifier, selection, demean_patterns, svm_c, logistic_c)
    data, classes, runs, n_classes = _check_inputs(patterns, labels, run_labels, n_classes)
    folds = make_folds(runs) if folds is None else folds
    label_rows, null_start, exact, space = _null_label_rows(classes, block_codes(runs), n_permutations, rng, n_classes)
    n_used, _ = resolve_counts(voxel_counts, data.shape[1])
    unique_counts, count_index = np.unique(n_used, return_inverse=True)
    fold_accuracy, fold_balanced, n_train, n_test, rankings, voxel_scores, states = [], [], [], [], [], [], []
    predicted = np.full((len(n_used), data.shape[0]), -1, dtype=np.int64)
    confusion = np.zeros((len(n_used), n_classes, n_classes), dtype=np.int64)
    n_not_converged = 0
    for train, test in folds:
        train, test = np.asarray(train), np.asarray(test)
        predictions, scores, ranking, state, failed = _decode_fold(data[train], label_rows[:, train], runs[train], data[test], unique_counts,
                                                                   n_classes, options, selection_rng, keep_state)
        predictions = predictions[:, count_index]  # (L, n_counts, n_test)
        truth = label_rows[:, test][:, np.newaxis, :]
        fold_accuracy.append(accuracy(truth, predictions))
        fold_balanced.append(balanced_accuracy(truth, predictions, n_classes))
        predicted[:, test] = predictions[0]
        for position in range(len(n_used)):
            confusion[position] += confusion_counts(classes[test], predictions[0, position], n_classes)
        n_train.append(train.size)
        n_test.append(test.size)
        rankings.append(ranking)
        voxel_scores.append(scores)
        states.append(state)
        n_not_converged += failed
    fold_accuracy, fold_balanced = np.stack(fold_accuracy), np.stack(fold_balanced)  # (n_folds, L, n_counts)
    within = DirectionScores(
        accuracy=fold_accuracy[:, 0], balanced_accuracy=fold_balanced[:, 0], n_train=np.asarray(n_train), n_test=np.asarray(n_test),
        confusion=confusion, null_accuracy=_fold_means(fold_accuracy[:, null_start:]),
        null_balanced_accuracy=_fold_means(fold_balanced[:, null_start:]), predictions=predicted)
    permuted = label_rows[null_start:]
    return DecodeResult(
        voxel_counts=tuple(voxel_counts), n_used=n_used, n_voxels=data.shape[1], n_classes=n_classes, test_runs=held_out_runs(runs, folds),
        directions={"within": within}, rankings={"within": np.stack(rankings)},
        voxel_scores={"within": None if selection == "none" else np.stack(voxel_scores)}, permuted_labels=permuted,
        states={"within": states} if keep_state else None, n_not_converged=n_not_converged, null_exact=exact,
        n_relabelings=space.n_distinct if n_permutations else 0, p_min=smallest_p(permuted.shape[0], exact, space))


def permutation_null(patterns, labels, run_labels, voxel_counts, n_permutations, rng, **options):
    """The permutation null of :func:`decode_curve` alone.

    Parameters
    ----------
    patterns, labels, run_labels, voxel_counts
        As for :func:`decode_curve`.
    n_permutations : int
        At least 1.
    rng : numpy.random.Generator
    **options
        Any keyword of :func:`decode_curve` (``folds``, ``classifier``, ...).

    Returns
    -------
    null_balanced_accuracy, null_accuracy : ndarray, shape (n_permutations, n_counts)
        Fold-mean scores of each relabeling.
    observed_balanced_accuracy : ndarray, shape (n_counts,)
        Fold-mean score of the real labels (from the same computation).
    """
    if isinstance(n_permutations, bool) or not isinstance(n_permutations, (int, np.integer)) or n_permutations < 1:
        raise InputError(None, "n_permutations", f"a null needs at least one permutation, got {n_permutations!r}", "set n_permutations >= 1")
    result = decode_curve(patterns, labels, run_labels, voxel_counts, n_permutations=n_permutations, rng=rng, **options)
    within = result.directions["within"]
    return within.null_balanced_accuracy, within.null_accuracy, within.balanced_accuracy.mean(axis=0)


def decode_cross(patterns, labels, set_index, run_labels, voxel_counts, *, set_names=("A", "B"), folds=None, n_classes=None,
                 classifier="linear_svm", selection="signal", demean_patterns=False, svm_c=1.0, logistic_c=1.0, n_permutations=0,
                 rng=None, selection_rng=None, keep_state=False):
    """Cross-decoding between two condition sets that share class labels.

    Parameters
    ----------
    patterns : array_like, shape (n_patterns, n_voxels)
    labels : array_like of int, shape (n_patterns,)
        Shared class index of each pattern (e.g. the shape, whether seen or heard).
    set_index : array_like of int, shape (n_patterns,)
        0 for set A, 1 for set B.
    run_labels : array_like, shape (n_patterns,)
    voxel_counts : sequence of int or "all"
    set_names : (str, str)
        Names of sets A and B (used in the direction names).
    folds : list of (train_idx, test_idx), optional
        Over all patterns; default leave one run out.
    n_classes, classifier, selection, demean_patterns, svm_c, logistic_c, n_permutations, rng, selection_rng, keep_state
        As for :func:`decode_curve`.

    Returns
    -------
    DecodeResult
        ``directions`` holds ``A->B`` (train on A's patterns of the training
        runs, test on B's patterns of the held-out runs), ``B->A``, ``A<->B``
        (the mean of the two; counts of both added; confusions summed),
        ``A->A`` and ``B->B`` (within-set decoding with the same folds).
        ``rankings`` and ``states`` are keyed by the training set's name.

    Notes
    -----
    Each fold fits one model per training set (scaler, selection and
    classifier from that set's training-run patterns only) and predicts the
    held-out runs' patterns of both sets, so ``A->B`` and ``A->A`` share a
    fit. For the null, the labels of *all* patterns are relabeled once per
    permutation within run-by-set blocks, and that one label vector serves
    as the training labels and as the held-out truth of every direction, as
    in plain decoding: permuting the training labels alone and testing
    against the true labels gives a null that is too narrow for ``A<->B``,
    ``A->A`` and ``B->B`` (a run trained with permuted labels in one fold is
    tested with its true labels in another). The blocks are ordered set
    A's runs first (:func:`foldwise.decoding.permutations.block_codes`), so
    ``A->A`` gets exactly the observed score and null of a within analysis
    of set A's patterns with the same folds and generator (when both nulls
    are drawn, or both enumerated).
    """
    options = _options(classifier, selection, demean_patterns, svm_c, logistic_c)
    data, classes, runs, n_classes = _check_inputs(patterns, labels, run_labels, n_classes)
    sets = np.asarray(set_index)
    if sets.shape != classes.shape or not np.isin(sets, (0, 1)).all() or np.unique(sets).size != 2:
        raise InputError(None, "sets", f"set_index must hold 0 (set A) and 1 (set B) for every pattern, got {np.unique(sets).tolist()}",
                         "give both sets patterns")
    if len(set_names) != 2 or set_names[0] == set_names[1]:
        raise InputError(None, "sets", f"expected two distinct set names, got {set_names!r}", "name the two sets differently")
    folds = make_folds(runs) if folds is None else folds
    label_rows, null_start, exact, space = _null_label_rows(classes, block_codes(runs, sets), n_permutations, rng, n_classes)
    n_used, _ = resolve_counts(voxel_counts, data.shape[1])
    unique_counts, count_index = np.unique(n_used, return_inverse=True)
    n_counts = len(n_used)
    pairs = [(train_set, test_set) for train_set in (0, 1) for test_set in (0, 1)]
    fold_acc = {pair: [] for pair in pairs}
    fold_bal = {pair: [] for pair in pairs}
    counts_train = {pair: [] for pair in pairs}
    counts_test = {pair: [] for pair in pairs}
    confusion = {pair: np.zeros((n_counts, n_classes, n_classes), dtype=np.int64) for pair in pairs}
    predicted = {pair: np.full((n_counts, data.shape[0]), -1, dtype=np.int64) for pair in pairs}
    rankings = {name: [] for name in set_names}
    voxel_scores = {name: [] for name in set_names}
    states = {name: [] for name in set_names}
    n_not_converged = 0
    for train, test in folds:
        train, test = np.asarray(train), np.asarray(test)
        for train_set in (0, 1):
            train_sel = train[sets[train] == train_set]
            if train_sel.size == 0:
                raise InputError(None, "sets", f"set {set_names[train_set]!r} has no pattern in the training runs of a fold", "give each set patterns in every run")
            predictions, scores, ranking, state, failed = _decode_fold(
                data[train_sel], label_rows[:, train_sel], runs[train_sel], data[test], unique_counts, n_classes, options, selection_rng, keep_state)
            predictions = predictions[:, count_index]
            n_not_converged += failed
            rankings[set_names[train_set]].append(ranking)
            voxel_scores[set_names[train_set]].append(scores)
            states[set_names[train_set]].append(state)
            for test_set in (0, 1):
                columns = np.flatnonzero(sets[test] == test_set)
                if columns.size == 0:
                    raise InputError(None, "sets", f"set {set_names[test_set]!r} has no pattern in a held-out run", "give each set patterns in every run")
                pair = (train_set, test_set)
                truth = label_rows[:, test[columns]][:, np.newaxis, :]  # one relabeling per row, for training and testing alike
                chosen = predictions[:, :, columns]
                fold_acc[pair].append(accuracy(truth, chosen))
                fold_bal[pair].append(balanced_accuracy(truth, chosen, n_classes))
                counts_train[pair].append(train_sel.size)
                counts_test[pair].append(columns.size)
                predicted[pair][:, test[columns]] = chosen[0]
                for position in range(n_counts):
                    confusion[pair][position] += confusion_counts(classes[test[columns]], chosen[0, position], n_classes)

    def scores_of(pair):
        acc, bal = np.stack(fold_acc[pair]), np.stack(fold_bal[pair])
        return DirectionScores(accuracy=acc[:, 0], balanced_accuracy=bal[:, 0], n_train=np.asarray(counts_train[pair]),
                               n_test=np.asarray(counts_test[pair]), confusion=confusion[pair], null_accuracy=_fold_means(acc[:, null_start:]),
                               null_balanced_accuracy=_fold_means(bal[:, null_start:]), predictions=predicted[pair])

    forward, backward, same_first, same_second = scores_of((0, 1)), scores_of((1, 0)), scores_of((0, 0)), scores_of((1, 1))
    both = DirectionScores(
        accuracy=(forward.accuracy + backward.accuracy) / 2.0, balanced_accuracy=(forward.balanced_accuracy + backward.balanced_accuracy) / 2.0,
        n_train=forward.n_train + backward.n_train, n_test=forward.n_test + backward.n_test, confusion=forward.confusion + backward.confusion,
        null_accuracy=(forward.null_accuracy + backward.null_accuracy) / 2.0,
        null_balanced_accuracy=(forward.null_balanced_accuracy + backward.null_balanced_accuracy) / 2.0, predictions=None)
    names = cross_directions(set_names)
    directions = dict(zip(names, (forward, backward, both, same_first, same_second)))
    return DecodeResult(
        voxel_counts=tuple(voxel_counts), n_used=n_used, n_voxels=data.shape[1], n_classes=n_classes, test_runs=held_out_runs(runs, folds),
        directions=directions, rankings={name: np.stack(value) for name, value in rankings.items()},
        voxel_scores={name: (None if selection == "none" else np.stack(value)) for name, value in voxel_scores.items()},
        permuted_labels=label_rows[null_start:], states=states if keep_state else None, n_not_converged=n_not_converged,
        null_exact=exact, n_relabelings=space.n_distinct if n_permutations else 0,
        p_min=smallest_p(label_rows.shape[0] - null_start, exact, space))
