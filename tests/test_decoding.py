"""Tests of foldwise.decoding.curves and its job functions (jobs/decode.py, jobs/decode_gather.py).

Data are invented (the "lanterns" study: round, square and star lanterns, seen or
heard; ROIs ember, glow, hush) or simulated with known ground truth.
"""

import logging
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from scipy import linalg, stats
from sklearn.base import BaseEstimator, ClassifierMixin
from sklearn.covariance import ledoit_wolf
from sklearn.feature_selection import SelectKBest, f_classif
from sklearn.linear_model import LogisticRegression
from sklearn.metrics import accuracy_score, balanced_accuracy_score, confusion_matrix
from sklearn.model_selection import LeaveOneGroupOut, cross_val_predict
from sklearn.naive_bayes import GaussianNB
from sklearn.pipeline import Pipeline
from sklearn.preprocessing import FunctionTransformer, StandardScaler
from sklearn.svm import SVC

from foldwise.decoding import curves as decoding
from foldwise.errors import InputError
from foldwise.data.fileio import read_tsv, save_nifti, write_tsv
from foldwise.jobs import decode as decode_job
from foldwise.jobs import decode_gather

SHAPES = ("round", "square", "star")
ALL_CLASSIFIERS = ("linear_svm", "logistic_l2", "shrinkage_lda", "correlation_centroid", "gaussian_nb")


# -- invented data -------------------------------------------------------------------
def lantern_patterns(seed=0, n_runs=4, per_class=2, n_voxels=60, strength=0.6, n_classes=3):
    """Patterns of one ROI: a shape code in 30% of the voxels, a voxel-wise offset, noise."""
    rng = np.random.default_rng(seed)
    runs = np.repeat([f"run-{index:02d}" for index in range(1, n_runs + 1)], n_classes * per_class)
    labels = np.tile(np.repeat(np.arange(n_classes), per_class), n_runs)
    codes = rng.standard_normal((n_classes, n_voxels)) * (rng.random(n_voxels) < 0.3)
    patterns = rng.standard_normal((labels.size, n_voxels)) + strength * codes[labels] + rng.normal(3.0, 1.0, n_voxels)
    return patterns, labels, runs


class CorrelationReference(ClassifierMixin, BaseEstimator):
    """Haxby et al. 2001 rule in plain numpy, for the pipeline comparison."""

    def fit(self, X, y):
        self.classes_ = np.unique(y)
        self.centroids_ = np.stack([X[y == klass].mean(axis=0) for klass in self.classes_])
        return self

    def predict(self, X):
        return self.classes_[np.argmax([[np.corrcoef(row, centroid)[0, 1] for centroid in self.centroids_] for row in X], axis=1)]


class PooledLedoitWolfReference(ClassifierMixin, BaseEstimator):
    """LDA with sklearn.covariance.ledoit_wolf of the pooled residuals, equal priors (what our LDA should compute)."""

    def fit(self, X, y):
        self.classes_ = np.unique(y)
        means = np.stack([X[y == klass].mean(axis=0) for klass in self.classes_])
        covariance, _ = ledoit_wolf(X - means[np.searchsorted(self.classes_, y)], assume_centered=True)
        self.coef_ = linalg.lstsq(covariance, means.T)[0].T
        self.intercept_ = -0.5 * np.einsum("kp,kp->k", means, self.coef_)
        return self

    def predict(self, X):
        return self.classes_[np.argmax(X @ self.coef_.T + self.intercept_, axis=1)]


def _reference_estimator(classifier):
    return {"linear_svm": SVC(kernel="linear"), "logistic_l2": LogisticRegression(), "correlation_centroid": CorrelationReference(),
            "gaussian_nb": GaussianNB(priors=[1 / 3] * 3), "shrinkage_lda": PooledLedoitWolfReference()}[classifier]


def _absolute_t(X, y):
    """The signal score as scipy computes it: |one-sample t| (labels unused)."""
    return np.abs(stats.ttest_1samp(X, 0.0).statistic)


def _demean_rows(X):
    return X - X.mean(axis=1, keepdims=True)


# -- preprocessing and metrics -------------------------------------------------------
def test_fit_scaler_reproduces_standard_scaler_bit_for_bit():
    # Reference: sklearn.preprocessing.StandardScaler (mean_, scale_, transform), a constant voxel included.
    patterns, _, _ = lantern_patterns()
    patterns[:, 3] = 7.25
    mean, scale = decoding.fit_scaler(patterns)
    reference = StandardScaler().fit(patterns)
    np.testing.assert_array_equal(mean, reference.mean_)
    np.testing.assert_array_equal(scale, reference.scale_)
    np.testing.assert_array_equal(decoding.apply_scaler(patterns, mean, scale), reference.transform(patterns))
    assert scale[3] == 1.0


def test_demean_patterns_removes_each_patterns_own_mean():
    patterns, _, _ = lantern_patterns()
    demeaned = decoding.demean_patterns(patterns)
    np.testing.assert_allclose(demeaned.mean(axis=1), 0.0, atol=1e-12)
    np.testing.assert_allclose(decoding.demean_patterns(patterns[:1]), demeaned[:1])  # one row alone gives the same: no leak


def test_resolve_counts_caps_at_the_roi_and_reports_the_excess():
    n_used, too_large = decoding.resolve_counts([10, 500, "all", 40], 300)
    assert n_used.tolist() == [10, 300, 300, 40] and too_large == [500]
    # the counts themselves are checked once, before any job (tests/test_study.py); the ROI size is data, checked here
    for bad_size in (0, True, 2.5):
        with pytest.raises(InputError, match="at least one voxel"):
            decoding.resolve_counts([10, "all"], bad_size)


def test_metrics_equal_sklearn():
    # References: sklearn.metrics.balanced_accuracy_score, accuracy_score, confusion_matrix.
    rng = np.random.default_rng(1)
    for _ in range(20):
        truth = rng.integers(0, 3, 17)
        truth[:3] = [0, 1, 2]
        guess = rng.integers(0, 3, 17)
        assert decoding.balanced_accuracy(truth, guess, 3) == pytest.approx(balanced_accuracy_score(truth, guess), abs=1e-15)
        assert decoding.accuracy(truth, guess) == pytest.approx(accuracy_score(truth, guess), abs=1e-15)
        np.testing.assert_array_equal(decoding.confusion_counts(truth, guess, 3), confusion_matrix(truth, guess, labels=[0, 1, 2]))
    stacked = rng.integers(0, 3, (4, 17))
    np.testing.assert_allclose(decoding.balanced_accuracy(truth, stacked, 3), [balanced_accuracy_score(truth, row) for row in stacked])


def test_permutations_stay_within_runs_and_follow_the_generator():
    _, labels, runs = lantern_patterns(n_runs=5)
    permuted = decoding.permute_within_runs(labels, runs, 200, np.random.default_rng(3))
    assert permuted.shape == (200, labels.size)
    for run in np.unique(runs):
        members = runs == run
        np.testing.assert_array_equal(np.sort(permuted[:, members], axis=1), np.sort(np.tile(labels[members], (200, 1)), axis=1))
    np.testing.assert_array_equal(permuted, decoding.permute_within_runs(labels, runs, 200, np.random.default_rng(3)))
    assert len({row.tobytes() for row in permuted}) > 150  # relabelings vary
    # every pattern takes every label of its run about equally often (chi-square, 2 df per pattern; alpha 1e-3)
    counts = np.stack([(permuted == klass).sum(axis=0) for klass in range(3)])
    statistic = ((counts - 200 / 3) ** 2 / (200 / 3)).sum(axis=0)
    assert np.mean(statistic > stats.chi2.ppf(0.999, 2)) < 0.05


# -- the decode against a scikit-learn pipeline ------------------------------------------
@pytest.mark.parametrize("classifier", ALL_CLASSIFIERS)
@pytest.mark.parametrize("selection", ["f", "signal"])
def test_decode_curve_equals_a_sklearn_pipeline_for_every_count(classifier, selection):
    # Reference: Pipeline(SelectKBest -> StandardScaler -> classifier) refitted over LeaveOneGroupOut (runs).
    # SelectKBest sees unscaled data; f is scale-invariant and signal is computed on unscaled data, so the orders agree.
    patterns, labels, runs = lantern_patterns(seed=5)
    counts = [5, 10, 30, 100, "all"]
    result = decoding.decode_curve(patterns, labels, runs, counts, classifier=classifier, selection=selection)
    assert result.n_used.tolist() == [5, 10, 30, 60, 60]
    score = f_classif if selection == "f" else _absolute_t
    for position, count in enumerate(counts):
        pipe = Pipeline([("select", SelectKBest(score, k=min(count, 60) if count != "all" else "all")), ("scale", StandardScaler()),
                         ("classify", _reference_estimator(classifier))])
        expected = cross_val_predict(pipe, patterns, labels, groups=runs, cv=LeaveOneGroupOut())
        np.testing.assert_array_equal(result.directions["within"].predictions[position], expected, err_msg=f"count {count}")


@pytest.mark.parametrize("classifier", ["linear_svm", "correlation_centroid"])
def test_demeaning_equals_a_row_demeaning_step_in_the_pipeline(classifier):
    patterns, labels, runs = lantern_patterns(seed=6)
    result = decoding.decode_curve(patterns, labels, runs, [8, 25], classifier=classifier, selection="f", demean_patterns=True)
    for position, count in enumerate([8, 25]):
        pipe = Pipeline([("demean", FunctionTransformer(_demean_rows)), ("select", SelectKBest(f_classif, k=count)),
                         ("scale", StandardScaler()), ("classify", _reference_estimator(classifier))])
        expected = cross_val_predict(pipe, patterns, labels, groups=runs, cv=LeaveOneGroupOut())
        np.testing.assert_array_equal(result.directions["within"].predictions[position], expected)


def test_scores_and_confusion_follow_from_the_predictions():
    patterns, labels, runs = lantern_patterns(seed=7)
    result = decoding.decode_curve(patterns, labels, runs, [10, "all"], classifier="correlation_centroid")
    within = result.directions["within"]
    for fold, test_run in enumerate(result.test_runs):
        members = runs == test_run[0]
        for position in range(2):
            assert within.balanced_accuracy[fold, position] == pytest.approx(
                balanced_accuracy_score(labels[members], within.predictions[position, members]))
    np.testing.assert_array_equal(within.confusion[1], confusion_matrix(labels, within.predictions[1]))
    assert within.n_train.tolist() == [18] * 4 and within.n_test.tolist() == [6] * 4


def test_the_all_voxel_count_does_not_depend_on_the_selection_method():
    patterns, labels, runs = lantern_patterns(seed=8)
    reference = None
    for selection in ("signal", "f", "stability", "none"):
        result = decoding.decode_curve(patterns, labels, runs, [5, "all"], classifier="linear_svm", selection=selection,
                                       selection_rng=np.random.default_rng(0))
        predictions = result.directions["within"].predictions[1]
        reference = predictions if reference is None else reference
        np.testing.assert_array_equal(predictions, reference)


# -- the permutation null -----------------------------------------------------------
@pytest.mark.parametrize("classifier", ALL_CLASSIFIERS)
@pytest.mark.parametrize("selection", ["f", "stability"])
def test_each_null_value_is_a_full_rerun_on_relabeled_data(classifier, selection):
    # Label-dependent selection must be redone per permutation: null value k equals decoding the data relabeled by k.
    patterns, labels, runs = lantern_patterns(seed=9, n_voxels=30)
    counts = [4, 12, "all"]
    result = decoding.decode_curve(patterns, labels, runs, counts, classifier=classifier, selection=selection, n_permutations=3,
                                   rng=np.random.default_rng(17))
    within = result.directions["within"]
    for permutation, relabeled in enumerate(result.permuted_labels):
        rerun = decoding.decode_curve(patterns, relabeled, runs, counts, classifier=classifier, selection=selection)
        np.testing.assert_allclose(within.null_balanced_accuracy[permutation], rerun.directions["within"].balanced_accuracy.mean(axis=0))
        np.testing.assert_allclose(within.null_accuracy[permutation], rerun.directions["within"].accuracy.mean(axis=0))
    # the observed scores are unchanged by computing the null alongside
    alone = decoding.decode_curve(patterns, labels, runs, counts, classifier=classifier, selection=selection)
    np.testing.assert_allclose(within.balanced_accuracy, alone.directions["within"].balanced_accuracy)


def test_permutation_null_wrapper_matches_decode_curve():
    patterns, labels, runs = lantern_patterns(seed=10)
    null_balanced, null_accuracy, observed = decoding.permutation_null(patterns, labels, runs, [10], 5, np.random.default_rng(2),
                                                                       classifier="gaussian_nb")
    result = decoding.decode_curve(patterns, labels, runs, [10], classifier="gaussian_nb", n_permutations=5, rng=np.random.default_rng(2))
    np.testing.assert_array_equal(null_balanced, result.directions["within"].null_balanced_accuracy)
    np.testing.assert_array_equal(null_accuracy, result.directions["within"].null_accuracy)
    np.testing.assert_array_equal(observed, result.directions["within"].balanced_accuracy.mean(axis=0))


def test_permutation_p_values_are_calibrated_on_pure_noise():
    # 200 pure-noise datasets x 100 permutations (f selection redone per permutation, correlation classifier):
    # the share of p = (1 + #{null >= observed}) / (1 + n_perm) below 0.05 must fall in the binomial 99% interval
    # around 5% (scipy.stats.binom; Phipson & Smyth 2010 for the p-value).
    n_datasets, n_permutations = 200, 100
    rng = np.random.default_rng(20261201)
    runs = np.repeat(np.arange(6), 12)
    labels = np.tile(np.repeat(np.arange(3), 4), 6)
    below = 0
    for _ in range(n_datasets):
        patterns = rng.standard_normal((labels.size, 30))
        result = decoding.decode_curve(patterns, labels, runs, [10], classifier="correlation_centroid", selection="f",
                                       n_permutations=n_permutations, rng=rng)
        within = result.directions["within"]
        observed = within.balanced_accuracy.mean(axis=0)[0]
        p_value = (1 + np.sum(within.null_balanced_accuracy[:, 0] >= observed)) / (1 + n_permutations)
        below += p_value < 0.05
    low, high = stats.binom.interval(0.99, n_datasets, 0.05)
    assert low <= below <= high, f"{below} of {n_datasets} p-values below 0.05 (99% interval {low}-{high})"


# -- fold-awareness ----------------------------------------------------------------
def _assert_same_state(first, second, path="state"):
    if isinstance(first, dict):
        assert first.keys() == second.keys(), path
        for key in first:
            _assert_same_state(first[key], second[key], f"{path}.{key}")
    elif isinstance(first, (list, tuple)):
        assert len(first) == len(second), path
        for index, (a, b) in enumerate(zip(first, second)):
            _assert_same_state(a, b, f"{path}[{index}]")
    elif first is None or isinstance(first, str):
        assert first == second, path
    else:
        np.testing.assert_array_equal(first, second, err_msg=path)


def _states_equal(first, second):
    try:
        _assert_same_state(first, second)
    except AssertionError:
        return False
    return True


@pytest.mark.parametrize("classifier", ALL_CLASSIFIERS)
@pytest.mark.parametrize("selection", ["signal", "f", "stability", "none"])
@pytest.mark.parametrize("demean", [False, True])
def test_random_held_out_run_leaves_every_training_quantity_unchanged(classifier, selection, demean):
    # Replace the held-out run by random numbers: scaler, voxel scores, ranking, Gram matrices and fitted models
    # of that fold stay bit-identical; the folds that train on that run do change (so the check can fail).
    patterns, labels, runs = lantern_patterns(seed=12, n_voxels=40)
    counts = [5, 18, 30, "all"]
    options = {"classifier": classifier, "selection": selection, "demean_patterns": demean, "keep_state": True}
    clean = decoding.decode_curve(patterns, labels, runs, counts, selection_rng=np.random.default_rng(4), **options)
    noisy_patterns = patterns.copy()
    held_out = runs == "run-02"
    noisy_patterns[held_out] = np.random.default_rng(99).normal(0.0, 10.0, (held_out.sum(), 40))
    noisy = decoding.decode_curve(noisy_patterns, labels, runs, counts, selection_rng=np.random.default_rng(4), **options)
    fold = [runs_of_fold[0] for runs_of_fold in clean.test_runs].index("run-02")
    _assert_same_state(clean.states["within"][fold], noisy.states["within"][fold])
    assert clean.states["within"][fold]["models"], "the state must hold the fitted models"
    other = (fold + 1) % len(clean.test_runs)
    assert not _states_equal(clean.states["within"][other], noisy.states["within"][other])


def test_cross_training_state_ignores_both_sets_of_the_held_out_run():
    patterns, labels, sets, runs = _cross_patterns(shared=True, seed=13)
    options = {"classifier": "shrinkage_lda", "selection": "f", "keep_state": True, "set_names": ("seen", "heard")}
    clean = decoding.decode_cross(patterns, labels, sets, runs, [6, "all"], **options)
    noisy_patterns = patterns.copy()
    held_out = runs == "run-03"
    noisy_patterns[held_out] = np.random.default_rng(5).standard_normal((held_out.sum(), patterns.shape[1]))
    noisy = decoding.decode_cross(noisy_patterns, labels, sets, runs, [6, "all"], **options)
    for train_set in ("seen", "heard"):
        _assert_same_state(clean.states[train_set][2], noisy.states[train_set][2])


# -- cross-decoding ----------------------------------------------------------------------
def _cross_patterns(shared, seed=0, n_runs=6, per_class=2, n_voxels=50, strength=1.2):
    """Seen and heard lanterns: one shape code shared by both sets (ember-like), or one code per set on
    separate voxels (glow-like: what codes shape when seen says nothing about heard lanterns)."""
    rng = np.random.default_rng(seed)
    n_per_run = 2 * 3 * per_class
    runs = np.repeat([f"run-{index:02d}" for index in range(1, n_runs + 1)], n_per_run)
    sets = np.tile(np.repeat([0, 1], 3 * per_class), n_runs)
    labels = np.tile(np.repeat(np.arange(3), per_class), 2 * n_runs)
    first_half = np.arange(n_voxels) < n_voxels // 2
    seen_codes = rng.standard_normal((3, n_voxels)) * (1.0 if shared else first_half)
    heard_codes = seen_codes if shared else rng.standard_normal((3, n_voxels)) * ~first_half
    codes = np.where(sets[:, None] == 0, seen_codes[labels], heard_codes[labels])
    set_offset = np.where(sets[:, None] == 0, 0.0, 1.0) * rng.standard_normal(n_voxels)
    patterns = rng.standard_normal((labels.size, n_voxels)) + strength * codes + set_offset
    return patterns, labels, sets, runs


@pytest.mark.parametrize("classifier", ["correlation_centroid", "linear_svm"])
def test_a_shared_code_decodes_across_sets_and_a_set_specific_code_does_not(classifier):
    names = decoding.cross_directions(("seen", "heard"))
    assert names == ("seen->heard", "heard->seen", "seen<->heard", "seen->seen", "heard->heard")
    shared_scores, specific_scores = [], []
    for seed in range(10):  # ten independent simulated subjects
        shared = decoding.decode_cross(*_cross_patterns(True, seed), ["all"], set_names=("seen", "heard"), classifier=classifier)
        specific = decoding.decode_cross(*_cross_patterns(False, seed), ["all"], set_names=("seen", "heard"), classifier=classifier)
        assert tuple(shared.directions) == names
        shared_scores.append([scores.balanced_accuracy.mean() for scores in shared.directions.values()])
        specific_scores.append([scores.balanced_accuracy.mean() for scores in specific.directions.values()])
    shared_scores, specific_scores = np.array(shared_scores), np.array(specific_scores)
    assert shared_scores.mean(axis=0).min() > 0.8, shared_scores.mean(axis=0)  # every direction, across sets included
    assert specific_scores[:, 3:].mean(axis=0).min() > 0.8, specific_scores.mean(axis=0)  # within each set
    # across sets: at chance; one-sample t test across the ten subjects against 1/3 (scipy.stats.ttest_1samp)
    for column in (0, 1, 2):
        assert stats.ttest_1samp(specific_scores[:, column], 1 / 3).pvalue > 0.01, specific_scores[:, column]
    both = specific.directions["seen<->heard"]
    np.testing.assert_allclose(both.balanced_accuracy, (specific.directions["seen->heard"].balanced_accuracy
                                                        + specific.directions["heard->seen"].balanced_accuracy) / 2)
    assert both.n_test.tolist() == [12] * 6 and specific.directions["seen->heard"].n_train.tolist() == [30] * 6


def test_cross_null_uses_one_relabeling_for_training_and_testing():
    # Permutation k relabels every pattern once (within run x set blocks); null value k of every direction equals
    # decoding the data relabeled by k (training and held-out labels both the relabeled ones).
    patterns, labels, sets, runs = _cross_patterns(shared=True, seed=3, n_voxels=20)
    options = {"set_names": ("seen", "heard"), "classifier": "gaussian_nb", "selection": "f"}
    result = decoding.decode_cross(patterns, labels, sets, runs, [5, "all"], n_permutations=3, rng=np.random.default_rng(8), **options)
    assert not result.null_exact and result.permuted_labels.shape == (3, labels.size)
    for permutation, relabeled in enumerate(result.permuted_labels):
        # blocks are run x set: each keeps its labels
        for block in set(zip(runs, sets)):
            members = (runs == block[0]) & (sets == block[1])
            np.testing.assert_array_equal(np.sort(relabeled[members]), np.sort(labels[members]))
        rerun = decoding.decode_cross(patterns, relabeled, sets, runs, [5, "all"], **options)
        for direction, scores in result.directions.items():
            np.testing.assert_allclose(scores.null_balanced_accuracy[permutation],
                                       rerun.directions[direction].balanced_accuracy.mean(axis=0), err_msg=direction)
            np.testing.assert_allclose(scores.null_accuracy[permutation], rerun.directions[direction].accuracy.mean(axis=0))
    both = result.directions["seen<->heard"]
    np.testing.assert_allclose(both.null_balanced_accuracy, (result.directions["seen->heard"].null_balanced_accuracy
                                                             + result.directions["heard->seen"].null_balanced_accuracy) / 2)


@pytest.mark.parametrize("classifier", ["correlation_centroid", "linear_svm"])
def test_a_to_a_in_a_cross_analysis_equals_a_within_analysis_with_the_same_folds_and_seed(classifier):
    # The same accuracies must get the same p-value whether reached as A->A or as a within analysis of set A.
    patterns, labels, sets, runs = _cross_patterns(shared=False, seed=21, n_voxels=24)
    counts = [6, "all"]
    cross = decoding.decode_cross(patterns, labels, sets, runs, counts, set_names=("seen", "heard"), classifier=classifier,
                                  n_permutations=20, rng=np.random.default_rng(4))
    for set_number, direction in ((0, "seen->seen"), (1, "heard->heard")):
        members = sets == set_number
        within = decoding.decode_curve(patterns[members], labels[members], runs[members], counts, classifier=classifier,
                                       n_permutations=20, rng=np.random.default_rng(4))
        if set_number == 0:  # set A's blocks come first in the stream: the very same relabelings
            np.testing.assert_array_equal(cross.permuted_labels[:, members], within.permuted_labels)
            np.testing.assert_array_equal(cross.directions[direction].null_balanced_accuracy,
                                          within.directions["within"].null_balanced_accuracy)
        np.testing.assert_array_equal(cross.directions[direction].balanced_accuracy, within.directions["within"].balanced_accuracy)


def test_a_small_relabeling_space_is_enumerated_each_relabeling_once():
    # 2 classes x 4 runs, one pattern per class and run: 2**4 = 16 label vectors, 8 up to renaming the classes
    # (hand count; Hemerik & Goeman 2018, JRSS-B 80:137-155, for exact tests over a group of relabelings).
    rng = np.random.default_rng(2)
    runs = np.repeat(np.arange(4), 2)
    labels = np.tile([0, 1], 4)
    patterns = rng.standard_normal((8, 10)) + 1.5 * labels[:, None] * (np.arange(10) < 4)
    result = decoding.decode_curve(patterns, labels, runs, ["all"], classifier="correlation_centroid", n_permutations=100,
                                   rng=np.random.default_rng(0))
    assert result.null_exact and result.n_relabelings == 8
    relabeled = result.permuted_labels
    assert relabeled.shape == (8, 8)
    np.testing.assert_array_equal(relabeled[0], labels)  # the actual labeling is one of them
    renamed = np.where(relabeled[:, :1] == 0, relabeled, 1 - relabeled)  # canonical form up to class renaming
    assert len({tuple(row) for row in renamed}) == 8  # each of the 8 exactly once
    within = result.directions["within"]
    observed = within.balanced_accuracy.mean(axis=0)[0]
    p_value = np.mean(within.null_balanced_accuracy[:, 0] >= observed - 1e-12)
    assert np.isclose(p_value * 8, round(p_value * 8)) and p_value >= 1 / 8
    assert result.p_min == 1 / 8
    # asking for fewer permutations than the space holds draws them instead (with the identity counted apart)
    drawn = decoding.decode_curve(patterns, labels, runs, ["all"], classifier="correlation_centroid", n_permutations=5,
                                  rng=np.random.default_rng(0))
    assert not drawn.null_exact and drawn.permuted_labels.shape == (5, 8) and drawn.p_min == 1 / 6


@pytest.mark.parametrize("call", [
    lambda p, y, r: decoding.decode_curve(p, y, r, [5], classifier="forest"),
    lambda p, y, r: decoding.decode_curve(p, y, r, [5], selection="best"),
    lambda p, y, r: decoding.decode_curve(p, y, r, [5], svm_c=0),
    lambda p, y, r: decoding.decode_curve(p, y, r, [5], demean_patterns="yes"),
    lambda p, y, r: decoding.decode_curve(p, y, r, [5], n_permutations=3),
    lambda p, y, r: decoding.decode_curve(p, y.astype(float), r, [5]),
    lambda p, y, r: decoding.decode_curve(np.where(p > 4, np.nan, p), y, r, [5]),
    lambda p, y, r: decoding.decode_cross(p, y, np.zeros_like(y), r, [5]),
    lambda p, y, r: decoding.permutation_null(p, y, r, [5], 0, np.random.default_rng(0)),
])
def test_bad_arguments_raise_input_error(call):
    patterns, labels, runs = lantern_patterns()
    with pytest.raises(InputError):
        call(patterns, labels, runs)


# -- job functions on tiny NIfTI/TSV files -----------------------------------------------
GRID = (5, 4, 3)
AFFINE = np.diag([3.0, 3.0, 3.0, 1.0])
LANTERN_CONDITIONS = [f"{sense}_{shape}" for sense in ("seen", "heard") for shape in SHAPES]


def _lantern_subject(folder, subject="01", n_runs=4, conditions=LANTERN_CONDITIONS, seed=0, copy_to=None):
    """Per-run pattern images and tables; the 'ember' region carries a shared shape code.

    ``copy_to`` names a second region whose voxels get the ember voxels' exact values
    (for the joint-null test).
    """
    rng = np.random.default_rng(seed)
    ember = np.zeros(GRID, dtype=bool)
    ember[:2, :, :] = True  # 24 voxels
    codes = {shape: rng.standard_normal(ember.sum()) for shape in SHAPES}
    images, tables = [], []
    for run in range(1, n_runs + 1):
        data = rng.standard_normal(GRID + (len(conditions),)).astype(np.float32)
        for volume, condition in enumerate(conditions):
            data[ember, volume] += 1.5 * codes[condition.split("_")[1]]
        if copy_to is not None:
            data[copy_to] = data[ember]
        image_path = folder / f"sub-{subject}_run-{run:02d}_patterns.nii.gz"
        table_path = folder / f"sub-{subject}_run-{run:02d}_patterns.tsv"
        save_nifti(image_path, data, AFFINE)
        write_tsv(table_path, pd.DataFrame({"volume": range(len(conditions)), "subject": subject, "session": np.nan,
                                            "run_id": f"run-{run:02d}", "condition": conditions, "trial_index": np.nan, "onset_s": np.nan}))
        images.append(str(image_path))
        tables.append(str(table_path))
    return images, tables, ember


def _mask(folder, region, name):
    path = folder / f"roi-{name}_mask.nii.gz"
    save_nifti(path, region.astype(np.uint8), AFFINE, dtype=np.uint8)
    return str(path)


def _analysis(kind="within", **overrides):
    entry = {"name": "shape" if kind == "within" else "shape_seen_heard", "kind": kind, "selection": "signal",
             "voxel_counts": [5, 10, 100, "all"], "classifier": "correlation_centroid", "svm_c": 1.0, "logistic_c": 1.0,
             "demean_patterns": False, "folds": {"scheme": "leave_one_run_out", "n_groups": 2}, "n_permutations": 20}
    if kind == "within":
        entry["classes"] = {shape: [f"seen_{shape}"] for shape in SHAPES}
    else:
        entry["sets"] = {"seen": {shape: f"seen_{shape}" for shape in SHAPES}, "heard": {shape: f"heard_{shape}" for shape in SHAPES}}
    entry.update(overrides)
    return entry


def _outputs(folder, roi="ember"):
    return {"scores": str(folder / f"{roi}_scores.tsv"), "null": str(folder / f"{roi}_null.tsv.gz"),
            "rankings": str(folder / f"{roi}_rankings.tsv.gz"), "confusion": str(folder / f"{roi}_confusion.tsv")}


def _run_decode(tmp_path, analysis, roi="ember", region=None, images=None, tables=None, subject="01", seed=7, log=None, out=None):
    if images is None:
        images, tables, ember = _lantern_subject(tmp_path)
        region = ember if region is None else region
    inputs = {"patterns": images, "tables": tables, "masks": [_mask(tmp_path, region, roi)]}
    outputs = _outputs(out or tmp_path, roi)
    decode_job.run(inputs, {name: [path] for name, path in outputs.items()},  # the job's outputs: one file per ROI
                   {"analysis": analysis, "subject": subject, "rois": [roi], "seed": seed}, log or logging.getLogger("test"))
    return outputs


def test_decode_job_writes_the_contract_columns(tmp_path, caplog):
    with caplog.at_level(logging.INFO):
        outputs = _run_decode(tmp_path, _analysis(), log=logging.getLogger("test.decode"))
    # the count beyond the 24-voxel ROI: noted here, warned once per ROI by the group stage
    assert not [record for record in caplog.records if record.levelno >= logging.WARNING]
    assert any("100" in record.getMessage() for record in caplog.records)
    scores = read_tsv(outputs["scores"])
    assert list(scores.columns) == list(decode_job.SCORE_COLUMNS)
    assert scores["n_voxels"].tolist() == ["5"] * 4 + ["10"] * 4 + ["100"] * 4 + ["all"] * 4
    assert scores["n_used"].tolist() == [5] * 4 + [10] * 4 + [24] * 8
    assert scores["test_runs"].tolist()[:4] == ["run-01", "run-02", "run-03", "run-04"]
    assert (scores["n_train"] == 9).all() and (scores["n_test"] == 3).all() and (scores["direction"] == "within").all()
    assert scores.loc[scores["n_voxels"] == "all", "balanced_accuracy"].mean() > 0.6  # the ember code is there
    null = read_tsv(outputs["null"])
    assert list(null.columns) == list(decode_job.NULL_COLUMNS) and len(null) == 4 * 20
    assert null["permutation"].tolist()[:20] == list(range(1, 21))
    # the subject-level p of each count, recomputed from the written null (Phipson & Smyth 2010 form: drawn null)
    assert not scores["null_exact"].any() and np.allclose(scores["p_min"], 1 / 21)
    for count, rows in scores.groupby("n_voxels"):
        observed = rows["balanced_accuracy"].mean()
        values = null.loc[null["n_voxels"].astype(str) == count, "balanced_accuracy"].to_numpy()
        assert rows["p_perm"].iloc[0] == pytest.approx((1 + np.sum(values >= observed - 1e-6)) / 21, abs=1e-6)
    rankings = read_tsv(outputs["rankings"])
    assert list(rankings.columns) == list(decode_job.RANKING_COLUMNS) and len(rankings) == 4 * 24
    fold_one = rankings[rankings["fold"] == 1]
    assert sorted(fold_one["voxel_index"]) == list(range(24)) and fold_one["score"].is_monotonic_decreasing
    np.testing.assert_array_equal(fold_one[["i", "j", "k"]].to_numpy(), np.argwhere(np.zeros(GRID) == 0)[:24][fold_one["voxel_index"]])
    confusion = read_tsv(outputs["confusion"])
    assert list(confusion.columns) == list(decode_job.CONFUSION_COLUMNS) and len(confusion) == 4 * 9
    assert (confusion.groupby("n_voxels")["count"].sum() == 12).all()
    assert set(confusion["true_class"]) == set(SHAPES)


def test_decode_job_cross_analysis_and_zero_permutations(tmp_path):
    outputs = _run_decode(tmp_path, _analysis("cross", n_permutations=0, classifier="linear_svm", selection="f"))
    scores = read_tsv(outputs["scores"])
    # the sets keep the order the analysis entry gives them
    assert list(dict.fromkeys(scores["direction"])) == ["seen->heard", "heard->seen", "seen<->heard", "seen->seen", "heard->heard"]
    assert scores.loc[scores["direction"] == "seen<->heard", "n_test"].tolist() == [6] * 16
    rankings = read_tsv(outputs["rankings"])
    assert list(rankings.columns) == ["train_set", *decode_job.RANKING_COLUMNS] and set(rankings["train_set"]) == {"seen", "heard"}
    null = read_tsv(outputs["null"])
    assert null.empty and list(null.columns) == list(decode_job.NULL_COLUMNS)


def test_decode_job_is_byte_for_byte_deterministic(tmp_path):
    images, tables, ember = _lantern_subject(tmp_path)
    (tmp_path / "first").mkdir()
    (tmp_path / "second").mkdir()
    analysis = _analysis(selection="none")
    first = _run_decode(tmp_path, analysis, region=ember, images=images, tables=tables, out=tmp_path / "first")
    second = _run_decode(tmp_path, analysis, region=ember, images=images[::-1], tables=tables[::-1], out=tmp_path / "second")
    for key in first:  # the order of the input lists does not matter either
        assert Path(first[key]).read_bytes() == Path(second[key]).read_bytes(), key


def test_permutation_k_is_the_same_relabeling_in_every_roi_of_a_subject(tmp_path):
    # Two ROIs whose voxels hold identical values: with a joint (ROI-free) permutation stream their nulls coincide.
    twin = np.zeros(GRID, dtype=bool)
    twin[3:5, :, :] = True
    images, tables, ember = _lantern_subject(tmp_path, copy_to=twin)
    analysis = _analysis(selection="f", n_permutations=30)
    ember_null = read_tsv(_run_decode(tmp_path, analysis, "ember", ember, images, tables)["null"])
    twin_null = read_tsv(_run_decode(tmp_path, analysis, "glow", twin, images, tables)["null"])
    assert (twin_null["roi"] == "glow").all()
    pd.testing.assert_frame_equal(ember_null.drop(columns="roi"), twin_null.drop(columns="roi"))
    assert ember_null["balanced_accuracy"].nunique() > 3
    # another subject (or analysis) draws other relabelings
    first = decode_job.permutation_rng(7, "01", "shape").random(5)
    assert not np.array_equal(first, decode_job.permutation_rng(7, "02", "shape").random(5))
    assert not np.array_equal(first, decode_job.permutation_rng(7, "01", "other").random(5))


def test_decode_job_rejects_bad_inputs_with_input_error(tmp_path):
    images, tables, ember = _lantern_subject(tmp_path)
    cases = [
        (_analysis(classes={"round": ["seen_round"], "lantern": ["seen_lantern"]}), "seen_lantern"),
        (_analysis(classes={"round": ["seen_round"]}), "at least two classes"),
        (_analysis("cross", sets={"seen": {"round": "seen_round", "star": "seen_star"},
                                  "heard": {"round": "heard_round", "square": "heard_square"}}), "same class labels"),
    ]
    for analysis, message in cases:
        with pytest.raises(InputError, match=message):
            _run_decode(tmp_path, analysis, region=ember, images=images, tables=tables)
    with pytest.raises(InputError, match="subject"):
        _run_decode(tmp_path, _analysis(), region=ember, images=images, tables=tables, subject="02")
    with pytest.raises(InputError, match="empty"):
        _run_decode(tmp_path, _analysis(), region=np.zeros(GRID, dtype=bool), images=images, tables=tables)
    wrong_grid = tmp_path / "wrong_grid_mask.nii.gz"
    save_nifti(wrong_grid, np.ones((5, 4, 2), dtype=np.uint8), AFFINE, dtype=np.uint8)
    with pytest.raises(InputError, match="grid"):
        decode_job.run({"patterns": images, "tables": tables, "masks": [str(wrong_grid)]}, {key: [path] for key, path in _outputs(tmp_path).items()},
                       {"analysis": _analysis(), "subject": "01", "rois": ["ember"], "seed": 1}, logging.getLogger("test"))
    # two ROI masks on different grids: one job reads the patterns once over both, so they must share the grid
    with pytest.raises(InputError, match="grid of"):
        shifted = tmp_path / "shifted_mask.nii.gz"
        save_nifti(shifted, ember.astype(np.uint8), AFFINE + _shift(2.0), dtype=np.uint8)
        decode_job.run({"patterns": images, "tables": tables, "masks": [_mask(tmp_path, ember, "ember"), str(shifted)]},
                       {key: [path, path + ".2"] for key, path in _outputs(tmp_path).items()},
                       {"analysis": _analysis(), "subject": "01", "rois": ["ember", "glow"], "seed": 1}, logging.getLogger("test"))
    with pytest.raises(InputError, match="one mask per ROI"):
        decode_job.run({"patterns": images, "tables": tables, "masks": [_mask(tmp_path, ember, "ember")]},
                       {key: [path, path + ".2"] for key, path in _outputs(tmp_path).items()},
                       {"analysis": _analysis(), "subject": "01", "rois": ["ember", "glow"], "seed": 1}, logging.getLogger("test"))


def _shift(millimetres):
    """An affine term that moves a grid by ``millimetres`` along x."""
    shift = np.zeros((4, 4))
    shift[0, 3] = millimetres
    return shift


def test_decode_job_names_subject_run_and_class_missing_from_a_training_fold(tmp_path):
    # 'seen_star' exists in run-01 only: holding run-01 out leaves no star lantern to train on.
    folder = tmp_path
    images, tables, ember = _lantern_subject(folder, n_runs=3, conditions=["seen_round", "seen_square", "seen_star"])
    for path in tables[1:]:
        table = read_tsv(path)
        table.loc[table["condition"] == "seen_star", "condition"] = "seen_dark"
        write_tsv(path, table)
    with pytest.raises(InputError) as error:
        _run_decode(folder, _analysis(), region=ember, images=images, tables=tables, subject="01")
    message = str(error.value)
    assert "subject 01" in message and "run-01" in message and "'star'" in message


def test_gather_sorts_by_roi_direction_count_order_and_fold_and_summarises(tmp_path):
    images, tables, ember = _lantern_subject(tmp_path)
    hush = ~ember
    analysis = _analysis("cross", voxel_counts=["all", 5, 10], n_permutations=0)
    paths = [_run_decode(tmp_path, analysis, roi, region, images, tables)["scores"] for roi, region in (("hush", hush), ("ember", ember))]
    outputs = {"scores": str(tmp_path / "scores.tsv"), "summary": str(tmp_path / "summary.tsv")}
    decode_gather.run({"scores": paths}, outputs, {"analysis": analysis, "subject": "01"}, logging.getLogger("test"))
    scores = read_tsv(outputs["scores"])
    assert list(scores.columns) == list(decode_job.SCORE_COLUMNS)
    assert list(dict.fromkeys(scores["roi"])) == ["ember", "hush"]
    ember_rows = scores[scores["roi"] == "ember"]
    assert list(dict.fromkeys(ember_rows["direction"])) == list(decoding.cross_directions(("seen", "heard")))
    first_direction = ember_rows[ember_rows["direction"] == "seen->heard"]
    assert first_direction["n_voxels"].tolist() == ["all"] * 4 + ["5"] * 4 + ["10"] * 4
    assert first_direction["fold"].tolist() == [1, 2, 3, 4] * 3
    summary = read_tsv(outputs["summary"])
    assert list(summary.columns) == list(decode_gather.SUMMARY_COLUMNS) and len(summary) == 2 * 5 * 3
    expected = scores.groupby(["roi", "direction", "n_voxels"])["balanced_accuracy"].mean()
    for row in summary.itertuples():
        assert row.balanced_accuracy == pytest.approx(expected[(row.roi, row.direction, row.n_voxels)])
        assert row.n_folds == 4 and row.chance == pytest.approx(1 / 3)
    with pytest.raises(InputError, match="also in"):
        decode_gather.run({"scores": [paths[0], paths[0]]}, outputs, {"analysis": analysis, "subject": "01"}, logging.getLogger("test"))
    with pytest.raises(InputError, match="analysis"):
        decode_gather.run({"scores": paths}, outputs, {"analysis": dict(analysis, name="other"), "subject": "01"}, logging.getLogger("test"))


def test_decode_job_run_groups_and_sessions_name_the_held_out_runs(tmp_path):
    images, tables, ember = _lantern_subject(tmp_path)
    for path in tables:
        table = read_tsv(path)
        write_tsv(path, table.assign(session="ses-1"))
    analysis = _analysis(folds={"scheme": "run_groups", "n_groups": 2}, n_permutations=5)
    scores = read_tsv(_run_decode(tmp_path, analysis, region=ember, images=images, tables=tables)["scores"])
    assert scores["test_runs"].tolist()[:2] == ["ses-1_run-01+ses-1_run-02", "ses-1_run-03+ses-1_run-04"]
    assert (scores["n_train"] == 6).all() and (scores["n_test"] == 6).all()


def test_decode_job_with_a_single_run_names_the_tables(tmp_path):
    images, tables, ember = _lantern_subject(tmp_path, n_runs=1)
    with pytest.raises(InputError) as error:
        _run_decode(tmp_path, _analysis(), region=ember, images=images, tables=tables)
    assert error.value.file == tables[0] and "at least two runs" in str(error.value) and "subject 01" in str(error.value)


# -- class imbalance -------------------------------------------------------------------
def test_svm_and_logistic_weigh_unequal_classes_as_scikit_learn_balanced():
    # Reference: sklearn.svm.SVC(kernel="linear", class_weight="balanced") and
    # sklearn.linear_model.LogisticRegression(class_weight="balanced") on 2:1 imbalanced training classes.
    from foldwise.decoding import classifiers

    rng = np.random.default_rng(31)
    labels = np.array([0] * 16 + [1] * 8)
    train = rng.standard_normal((24, 12)) + 0.4 * labels[:, None]
    test = rng.standard_normal((40, 12))
    svm = classifiers.linear_svm_fit_predict(train @ train.T, labels, test @ train.T)
    np.testing.assert_array_equal(svm, SVC(kernel="linear", class_weight="balanced").fit(train, labels).predict(test))
    logistic, _ = classifiers.logistic_l2_fit_predict(train, labels, test)
    np.testing.assert_array_equal(logistic, LogisticRegression(class_weight="balanced").fit(train, labels).predict(test))


@pytest.mark.parametrize("classifier", ALL_CLASSIFIERS)
def test_noise_predictions_do_not_pile_onto_the_majority_class(classifier):
    # Two conditions mapped to class 0, one to class 1 (2:1), pure noise: with equal priors or balanced weights the
    # share of class-0 predictions stays near 1/2 (an unweighted SVM or logistic regression drifts toward 2/3).
    # Bound: 1/2 +- 0.1 over 6 runs x 30 simulated subjects x 18 test patterns, far wider than the binomial
    # spread (common practice, no source for the band).
    rng = np.random.default_rng(32)
    runs = np.repeat(np.arange(6), 18)
    labels = np.tile([0] * 12 + [1] * 6, 6)
    shares = []
    for _ in range(30):
        result = decoding.decode_curve(rng.standard_normal((labels.size, 20)), labels, runs, ["all"], classifier=classifier)
        shares.append(np.mean(result.directions["within"].predictions[0] == 0))
    assert abs(np.mean(shares) - 0.5) < 0.1, np.mean(shares)


# -- the relabeling space (decoding/permutations.py) ---------------------------------------
def test_relabeling_space_and_enumeration_equal_brute_force():
    # Brute force (itertools): every within-block permutation of the labels, collected as distinct vectors.
    import itertools

    from foldwise.decoding import permutations

    for labels, blocks in (
            (np.array([0, 0, 1, 0, 1, 1, 2]), np.array([0, 0, 0, 1, 1, 1, 1])),  # unequal classes: no renaming symmetry
            (np.array([0, 1, 1, 0, 0, 1]), np.array([0, 0, 1, 1, 2, 2])),  # one pattern per class and block: 2**3 / 2
            (np.array([0, 0, 1, 1, 1, 0, 1, 0]), np.array([0, 0, 0, 0, 1, 1, 1, 1]))):  # two per class and block: 6*6 / 2
        members = [np.flatnonzero(blocks == block) for block in np.unique(blocks)]
        vectors = set()
        for orders in itertools.product(*(itertools.permutations(m) for m in members)):
            vector = labels.copy()
            for m, order in zip(members, orders):
                vector[m] = labels[list(order)]
            vectors.add(tuple(vector))
        space = permutations.relabeling_space(labels, blocks)
        assert space.n_arrangements == len(vectors)
        if space.renaming_invariant:  # vectors that differ only by renaming the classes count once
            def canonical(vector):  # classes renamed in order of first appearance
                first = {}
                for value in vector:
                    first.setdefault(value, len(first))
                return tuple(first[value] for value in vector)

            assert space.n_distinct == len({canonical(v) for v in vectors}) == len(vectors) // 2
        else:
            assert space.n_distinct == len(vectors)
        listed = permutations.enumerate_relabelings(labels, blocks)
        np.testing.assert_array_equal(listed[0], labels)
        assert len({tuple(row) for row in listed}) == len(listed) == space.n_enumerated
        assert {tuple(row) for row in listed} <= vectors


def test_huge_relabeling_spaces_stay_finite_in_the_tables():
    # 20 runs x 60 trials of 3 classes: about 10**500 relabelings, beyond float range (Python ints hold it exactly).
    from foldwise.decoding import permutations

    labels, blocks = np.tile(np.arange(3), 400), np.repeat(np.arange(20), 60)
    space = permutations.relabeling_space(labels, blocks)
    assert space.n_distinct > 10**400
    assert permutations.smallest_p(1000, False, space) == pytest.approx(1 / 1001)
    assert permutations.count_as_float(space.n_distinct) == float("inf") and permutations.count_as_float(216) == 216.0
