"""Tests of foldwise.decoding.selection: voxel scores from training data and deterministic rankings."""

import itertools

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy import stats
from sklearn.feature_selection import f_classif

from foldwise.decoding.classifiers import class_means
from foldwise.errors import InputError
from foldwise.decoding.selection import f_scores, random_order, rank_voxels, signal_scores, stability_scores, top_ranked


@pytest.fixture
def lantern_patterns():
    """Invented lantern-study training patterns: 4 runs x 3 shapes x 2 patterns, 40 voxels."""
    rng = np.random.default_rng(11)
    runs = np.repeat(np.arange(4), 6)
    labels = np.tile(np.repeat(np.arange(3), 2), 4)
    codes = rng.standard_normal((3, 40))
    patterns = rng.standard_normal((24, 40)) + 0.7 * codes[labels] + rng.normal(2.0, 1.0, 40)
    return patterns, labels, runs


def test_signal_is_absolute_one_sample_t(lantern_patterns):
    # Reference: scipy.stats.ttest_1samp (Student's one-sample t against 0), absolute value.
    patterns, _, _ = lantern_patterns
    patterns = patterns - 2.0  # both signs of t occur
    expected = np.abs(stats.ttest_1samp(patterns, 0.0).statistic)
    np.testing.assert_allclose(signal_scores(patterns), expected, rtol=1e-12)
    assert (patterns.mean(axis=0) < 0).any()


def test_signal_of_a_constant_voxel_is_zero():
    patterns = np.column_stack([np.full(5, 3.0), np.arange(5.0)])
    assert signal_scores(patterns)[0] == 0.0


def test_f_equals_sklearn_f_classif_and_scipy_f_oneway(lantern_patterns):
    # References: sklearn.feature_selection.f_classif and scipy.stats.f_oneway (one-way ANOVA F).
    patterns, labels, _ = lantern_patterns
    ours = f_scores(patterns, labels, 3)
    np.testing.assert_allclose(ours, f_classif(patterns, labels)[0], rtol=1e-10)
    oneway = stats.f_oneway(*(patterns[labels == klass] for klass in range(3))).statistic
    np.testing.assert_allclose(ours, oneway, rtol=1e-10)


def test_f_is_scale_invariant_so_selection_before_or_after_z_scoring_agrees(lantern_patterns):
    patterns, labels, _ = lantern_patterns
    z_scored = (patterns - patterns.mean(axis=0)) / patterns.std(axis=0)
    np.testing.assert_allclose(f_scores(z_scored, labels, 3), f_scores(patterns, labels, 3), rtol=1e-10)
    np.testing.assert_array_equal(rank_voxels(f_scores(z_scored, labels, 3)), rank_voxels(f_scores(patterns, labels, 3)))


def test_f_batched_over_label_rows_equals_row_by_row(lantern_patterns):
    patterns, labels, _ = lantern_patterns
    rng = np.random.default_rng(3)
    rows = np.stack([labels] + [rng.permutation(labels) for _ in range(5)])
    batched = f_scores(patterns, rows, 3)
    for row, expected_labels in zip(batched, rows):
        np.testing.assert_allclose(row, f_scores(patterns, expected_labels, 3), rtol=1e-12)
    # handing in the class means the caller already has gives the same scores
    np.testing.assert_allclose(f_scores(patterns, rows, 3, class_means=class_means(patterns, rows, 3)), batched, rtol=1e-12)


def test_f_of_a_constant_voxel_is_zero_not_nan():
    patterns = np.column_stack([np.ones(6), np.arange(6.0)])
    assert f_scores(patterns, np.array([0, 0, 0, 1, 1, 1]), 2)[0] == 0.0


def _stability_brute_force(patterns, labels, runs, n_classes):
    """Pereira, Mitchell & Botvinick 2009: mean over run pairs of the correlation of per-class mean profiles."""
    scores = np.zeros(patterns.shape[1])
    run_ids = np.unique(runs)
    for voxel in range(patterns.shape[1]):
        profiles = [[patterns[(runs == run) & (labels == klass), voxel].mean() for klass in range(n_classes)] for run in run_ids]
        scores[voxel] = np.mean([np.corrcoef(first, second)[0, 1] for first, second in itertools.combinations(profiles, 2)])
    return scores


def test_stability_equals_brute_force_pairwise_correlations(lantern_patterns):
    patterns, labels, runs = lantern_patterns
    np.testing.assert_allclose(stability_scores(patterns, labels, runs, 3), _stability_brute_force(patterns, labels, runs, 3), atol=1e-12)


def test_stability_batched_and_uses_only_complete_runs(lantern_patterns):
    patterns, labels, runs = lantern_patterns
    rng = np.random.default_rng(5)
    rows = np.stack([labels, rng.permutation(labels)])
    batched = stability_scores(patterns, rows, runs, 3)
    np.testing.assert_allclose(batched[1], stability_scores(patterns, rows[1], runs, 3), atol=1e-12)
    # a run without class 2 is left out of the pairs
    keep = ~((runs == 3) & (labels == 2))
    complete = runs != 3
    np.testing.assert_allclose(stability_scores(patterns[keep], labels[keep], runs[keep], 3),
                               _stability_brute_force(patterns[complete], labels[complete], runs[complete], 3), atol=1e-12)


def test_stability_needs_two_complete_runs(lantern_patterns):
    patterns, labels, runs = lantern_patterns
    one_run = runs == 0
    with pytest.raises(InputError, match="two or more training runs"):
        stability_scores(patterns[one_run], labels[one_run], runs[one_run], 3)


def test_rank_voxels_descending_with_ties_to_the_lower_index():
    scores = np.array([1.0, 3.0, 1.0, np.nan, 3.0, -np.inf])
    np.testing.assert_array_equal(rank_voxels(scores), [1, 4, 0, 2, 3, 5])
    # Reference: numpy lexsort on (index, -score) (nan scored lowest).
    keys = np.where(np.isnan(scores), -np.inf, scores)
    assert rank_voxels(scores)[:3].tolist() == np.lexsort((np.arange(6), -keys))[:3].tolist()


@settings(max_examples=60, deadline=None)
@given(st.lists(st.integers(min_value=0, max_value=4), min_size=1, max_size=30), st.data())
def test_top_ranked_equals_the_head_of_the_full_ranking_even_with_ties(values, data):
    scores = np.array(values, dtype=np.float64).reshape(1, -1).repeat(2, axis=0)
    scores[1] = scores[1][::-1]
    n_top = data.draw(st.integers(min_value=1, max_value=scores.shape[1]))
    np.testing.assert_array_equal(top_ranked(scores, n_top), rank_voxels(scores)[:, :n_top])


def test_random_order_is_a_seeded_permutation():
    first = random_order(50, np.random.default_rng(9))
    np.testing.assert_array_equal(np.sort(first), np.arange(50))
    np.testing.assert_array_equal(first, random_order(50, np.random.default_rng(9)))
    assert not np.array_equal(first, random_order(50, np.random.default_rng(10)))


@pytest.mark.parametrize("call", [
    lambda: random_order(5, 123),
    lambda: random_order(0, np.random.default_rng(0)),
    lambda: f_scores(np.ones((4, 3)), np.array([0, 1, 2, 3]), 2),
    lambda: f_scores(np.ones((4, 3)), np.array([0, 1]), 2),
    lambda: signal_scores(np.ones((1, 3))),
    lambda: signal_scores(np.array([[np.nan, 1.0], [1.0, 2.0]])),
    lambda: top_ranked(np.ones(4), 5),
    lambda: stability_scores(np.ones((4, 3)), np.array([0, 1, 0, 1]), np.array([0, 0]), 2),
])
def test_bad_arguments_raise_input_error(call):
    with pytest.raises(InputError):
        call()
