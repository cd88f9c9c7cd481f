"""Tests of foldwise.stats.group (group statistics) and its job, foldwise.jobs.group.

Outside references, named beside each check: scipy.stats (ttest_1samp,
wilcoxon, sem, binom), the worked example of scipy's own wilcoxon
documentation (Wilcoxon 1945 data), brute-force enumeration of the published
definitions (Stelzer, Chen & Turner 2013; Nichols & Holmes 2002), and
hand-derived values for prevalence inference (Allefeld, Gorgen & Haynes 2016,
formulas from memory). Simulated data are invented, with known ground truth.
"""

import doctest
import gzip
import itertools
import logging
from types import SimpleNamespace
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from scipy import stats

from foldwise.stats import group
from foldwise.errors import InputError
from foldwise.data.fileio import write_tsv
from foldwise.provenance.hashing import seed_from
from foldwise.jobs import group as group_job
from workflow_support import Named


# -- descriptives, t-test, Wilcoxon ------------------------------------------

def _scores(rng, n_subjects=12, n_cells=5):
    return 0.5 + rng.normal(0.03, 0.06, size=(n_subjects, n_cells))


def test_t_test_equals_scipy_ttest_1samp_greater():
    rng = np.random.default_rng(1)
    scores, chance = _scores(rng), np.array([0.5, 0.5, 0.25, 0.5, 0.45])
    t_value, p_value = group.t_test_greater(scores, chance)
    # Source: scipy.stats.ttest_1samp (the reference library), one cell at a time.
    for cell in range(scores.shape[1]):
        reference = stats.ttest_1samp(scores[:, cell], chance[cell], alternative="greater")
        assert t_value[cell] == pytest.approx(reference.statistic, rel=1e-12)
        assert p_value[cell] == pytest.approx(reference.pvalue, rel=1e-10)


def test_mean_sem_ci_equal_scipy():
    rng = np.random.default_rng(2)
    scores = _scores(rng, n_subjects=9)
    out = group.mean_sem_ci(scores, confidence=0.95)
    for cell in range(scores.shape[1]):
        # Source: scipy.stats.sem and the two-sided interval of scipy.stats.ttest_1samp.
        interval = stats.ttest_1samp(scores[:, cell], 0.5).confidence_interval(0.95)
        assert out["sem"][cell] == pytest.approx(stats.sem(scores[:, cell]), rel=1e-12)
        assert out["ci_low"][cell] == pytest.approx(interval.low, rel=1e-12)
        assert out["ci_high"][cell] == pytest.approx(interval.high, rel=1e-12)
        assert out["mean"][cell] == pytest.approx(np.mean(scores[:, cell]), rel=1e-14)


def test_t_test_is_undefined_without_variance():
    scores = np.column_stack([np.full(6, 0.75), np.linspace(0.4, 0.9, 6)])
    t_value, p_value = group.t_test_greater(scores, 0.5)
    assert np.isnan(t_value[0]) and np.isnan(p_value[0])  # zero variance: stated as n/a, no warning
    assert np.isfinite(t_value[1]) and np.isfinite(p_value[1])


def test_wilcoxon_exact_equals_scipy_documentation_example():
    # Source: scipy.stats.wilcoxon docstring, the Wilcoxon (1945) differences;
    # its exact one-sided p-value is printed there as 0.0206298828125.
    differences = np.array([6, 8, 14, 16, 23, 24, 28, 29, 41, -48, 49, 56, 60, -67, 75], dtype=float)
    p_exact = group.wilcoxon_greater(differences[:, None], 0.0, max_exact=15)
    assert p_exact[0] == pytest.approx(0.0206298828125, abs=1e-15)
    # Above max_exact the normal approximation; source: scipy.stats.wilcoxon(method="asymptotic").
    p_normal = group.wilcoxon_greater(differences[:, None], 0.0, max_exact=13)
    reference = stats.wilcoxon(differences, alternative="greater", method="asymptotic")
    assert p_normal[0] == pytest.approx(reference.pvalue, rel=1e-10)


@pytest.mark.parametrize("n_subjects", [8, 20])
def test_wilcoxon_with_ties_and_zeros_equals_scipy_pratt(n_subjects):
    rng = np.random.default_rng(n_subjects)
    chance = 1 / 3
    # Discrete accuracies (multiples of 1/12): ties and subjects exactly at chance.
    scores = chance + rng.integers(-2, 4, size=(n_subjects, 4)) / 12
    scores[:3, 0] = chance
    p_value = group.wilcoxon_greater(scores, chance)
    for cell in range(scores.shape[1]):
        # Source: scipy.stats.wilcoxon with Pratt's zero handling; scipy enumerates all
        # sign flips for n <= 13 and uses the tie- and zero-corrected normal law above.
        difference = np.round(scores[:, cell] - chance, 12)
        reference = stats.wilcoxon(difference, zero_method="pratt", alternative="greater")
        assert p_value[cell] == pytest.approx(reference.pvalue, rel=1e-10)


def test_wilcoxon_counts_zeros_the_pratt_way_and_is_undefined_when_all_zero():
    # Hand derivation (Pratt 1959), d = [0, 0, .1, .2, .3, -.15, .25, -.05]:
    # |d| ranks with the zeros: 0, 0 -> 1, 2 (dropped); .05 -> 3, .1 -> 4, .15 -> 5,
    # .2 -> 6, .25 -> 7, .3 -> 8. W+ = 4 + 6 + 7 + 8 = 25 of a total 33, so a sign
    # flip reaches it iff its negative ranks sum to <= 8: {}, {3}, {4}, {5}, {6},
    # {7}, {8}, {3,4}, {3,5} -> 9 of 2**6 = 64 flips, p = 9/64 = 0.140625.
    # Discarding zeros instead (ranks 1..6, W+ = 17 of 21) would give 7/64.
    # Both agree with scipy.stats.wilcoxon(zero_method="pratt" / "wilcox").
    differences = np.array([0, 0, 0.1, 0.2, 0.3, -0.15, 0.25, -0.05])
    assert group.wilcoxon_greater(0.5 + differences[:, None], 0.5)[0] == pytest.approx(9 / 64, abs=1e-15)
    assert stats.wilcoxon(differences, zero_method="wilcox", alternative="greater").pvalue == pytest.approx(7 / 64)
    assert np.isnan(group.wilcoxon_greater(np.full((5, 1), 0.5), 0.5)[0])


def test_special_functions_equal_scipy_stats_bit_for_bit():
    # The module evaluates scipy.special directly (no scipy.stats import in the group job); source: scipy.stats
    # itself, which must give the very same floats (t.ppf, t.sf, norm.sf, rankdata with average ties).
    from scipy import special
    rng = np.random.default_rng(11)
    t_values = rng.normal(0, 3, 200)
    for df in (2, 7, 29):
        assert np.array_equal(special.stdtr(df, -t_values), stats.t.sf(t_values, df))
        assert special.stdtrit(df, 0.975) == stats.t.ppf(0.975, df)
    assert np.array_equal(special.ndtr(-t_values), stats.norm.sf(t_values))
    tied = rng.integers(0, 5, size=(17, 40)).astype(float)  # many ties in every column
    tied[:, 0] = 1.0  # a column of one value
    assert np.array_equal(group._average_ranks(tied), stats.rankdata(tied, axis=0))
    assert np.array_equal(group._average_ranks(tied[:, :1].ravel()[:, None]), stats.rankdata(tied[:, :1], axis=0))


# -- group permutation test (Stelzer et al. 2013) ------------------------------

def _tiny_null_study():
    rng = np.random.default_rng(7)
    observed = np.array([[0.62, 0.55], [0.58, 0.52], [0.66, 0.50]])  # 3 subjects x 2 cells
    nulls = 0.5 + rng.normal(0, 0.06, size=(3, 4, 2))                 # 4 permutations each
    return observed, nulls


def test_group_permutation_p_equals_exhaustive_enumeration():
    observed, nulls = _tiny_null_study()
    combinations = np.array(list(itertools.product(range(4), repeat=3)))  # all 4**3 = 64
    null_mean = group.group_mean_null(nulls, combinations)
    p_value = group.permutation_p(observed.mean(axis=0), null_mean)
    # Source: the definition in Stelzer, Chen & Turner (2013): one permutation
    # per subject, averaged; here every combination once, by a plain loop.
    for cell in range(2):
        count = 0
        for picks in itertools.product(range(4), repeat=3):
            mean = sum(nulls[subject, pick, cell] for subject, pick in enumerate(picks)) / 3
            count += mean >= observed[:, cell].mean()
        assert p_value[cell] == pytest.approx((1 + count) / (1 + 64), abs=1e-15)


def test_sampled_group_p_converges_to_the_enumeration():
    observed, nulls = _tiny_null_study()
    combinations = np.array(list(itertools.product(range(4), repeat=3)))
    exact_share = (group.group_mean_null(nulls, combinations) >= observed.mean(axis=0)).mean(axis=0)
    n_draws = 200_000
    indices = group.draw_indices(np.random.default_rng(11), 4, 3, n_draws)
    sampled = group.permutation_p(observed.mean(axis=0), group.group_mean_null(nulls, indices))
    # Binomial standard error of a share estimated from n_draws draws; 5 SE is a loose bound.
    bound = 5 * np.sqrt(exact_share * (1 - exact_share) / n_draws) + 1 / n_draws
    assert np.all(np.abs(sampled - exact_share) <= bound)


def test_draws_are_one_joint_matrix_across_cells():
    rng = np.random.default_rng(3)
    nulls = rng.random((5, 20, 3))
    indices = group.draw_indices(np.random.default_rng(5), 20, 5, 50)
    assert indices.shape == (50, 5) and indices.min() >= 0 and indices.max() < 20
    together = group.group_mean_null(nulls, indices)
    for cell in range(3):  # the same picks in every cell
        alone = group.group_mean_null(nulls[:, :, [cell]], indices)[:, 0]
        np.testing.assert_array_equal(together[:, cell], alone)
    np.testing.assert_array_equal(indices, group.draw_indices(np.random.default_rng(5), 20, 5, 50))


@pytest.mark.parametrize("n_choices, exact", [(30, None), (np.array([30, 12, 30, 8, 30, 30]), np.array([0, 1, 0, 1, 0, 0], bool))])
def test_null_draws_of_some_cells_are_those_columns_of_all_cells(n_choices, exact):
    # The group job computes the draws one ROI at a time: each subset of cells must give exactly the columns that the
    # whole computation gives (reference: group_statistics in one call, as before the job was split by ROI).
    rng = np.random.default_rng(8)
    scores, nulls = 1 / 3 + rng.normal(0, 0.05, (6, 7)), 1 / 3 + rng.normal(0, 0.05, (6, 30, 7))
    families = np.array([0, 0, 0, 1, 1, 1, 1])
    whole, whole_null = group.group_statistics(scores, 1 / 3, nulls, families, np.random.default_rng(2), 400, 0.05,
                                               n_choices=n_choices, exact=exact)
    picks = group.draw_group_picks(np.random.default_rng(2), 6, 400, n_choices, exact)
    blocks = [group.group_null_draws(scores[:, part], nulls[:, :, part], *picks) for part in ([0, 1], [2], [3, 4, 5, 6])]
    null_mean, null_minimum = (np.concatenate([block[k] for block in blocks], axis=1) for k in (0, 1))
    np.testing.assert_array_equal(null_mean, whole_null)
    parts, parts_null = group.group_statistics(scores, 1 / 3, None, families, None, 400, 0.05, null_draws=(null_mean, null_minimum))
    np.testing.assert_array_equal(parts_null, whole_null)
    for name in whole:
        np.testing.assert_array_equal(parts[name], whole[name], err_msg=name)


def test_permutation_p_counts_ties_as_at_least_as_extreme():
    # Scores stored at 7 digits: a tie off by 4e-8 still counts (TIE_TOLERANCE).
    assert group.permutation_p([0.6], [[0.59999996], [0.5]])[0] == pytest.approx(2 / 3)
    assert group.permutation_p([0.6], [[0.5999], [0.5]])[0] == pytest.approx(1 / 3)


# -- max-statistic correction (Nichols & Holmes 2002) --------------------------

def test_max_statistic_p_equals_brute_force_loop():
    rng = np.random.default_rng(4)
    null = rng.normal(size=(40, 6))
    observed = np.array([1.9, 0.2, 1.1, 2.5, -0.3, 0.8])
    families = np.array([0, 0, 0, 1, 1, 1])
    p_fwe = group.max_statistic_p(observed, null, families)
    # Source: Nichols & Holmes (2002), p = share of draws whose family maximum
    # reaches the observed value, the observed labeling counted once.
    for cell in range(6):
        members = np.flatnonzero(families == families[cell])
        count = sum(max(null[draw, member] for member in members) >= observed[cell] for draw in range(40))
        assert p_fwe[cell] == pytest.approx((1 + count) / 41, abs=1e-15)
    assert np.all(p_fwe >= group.permutation_p(observed, null, tolerance=0.0))


def _simulated_subject_values(rng, n_subjects, n_permutations, n_cells, effect):
    # One exchangeable set of (1 + n_permutations) labelings per subject; the
    # shared term correlates the cells (as nested voxel counts are correlated).
    shared = rng.normal(size=(n_subjects, n_permutations + 1, 1))
    values = 0.5 + 0.05 * (np.sqrt(0.5) * shared + np.sqrt(0.5) * rng.normal(size=(n_subjects, n_permutations + 1, n_cells)))
    values[:, 0, :] += effect  # row 0 is the actual labeling
    return values[:, 0, :], values[:, 1:, :]


def test_max_statistic_holds_familywise_error_on_null_studies():
    rng = np.random.default_rng(20261201)
    n_studies, n_subjects, n_permutations, n_cells, n_draws, alpha = 300, 10, 100, 6, 1000, 0.05
    families = np.zeros(n_cells, dtype=int)
    any_fwe = any_uncorrected = 0
    for _ in range(n_studies):
        observed, nulls = _simulated_subject_values(rng, n_subjects, n_permutations, n_cells, effect=0.0)
        null_mean = group.group_mean_null(nulls, group.draw_indices(rng, n_permutations, n_subjects, n_draws))
        mean = observed.mean(axis=0)
        any_fwe += np.any(group.max_statistic_p(mean - 0.5, null_mean - 0.5, families) <= alpha)
        any_uncorrected += np.any(group.permutation_p(mean, null_mean) <= alpha)
    # Source: scipy.stats.binom; the 99% upper bound of the count of rejections
    # among 300 studies if the family-wise error rate is exactly alpha.
    assert any_fwe <= stats.binom.ppf(0.99, n_studies, alpha)
    # Not vacuous: the rate is not far below alpha (same binomial, 1% lower bound),
    # and without correction six cells reject far more often.
    assert any_fwe >= stats.binom.ppf(0.01, n_studies, alpha)
    assert any_uncorrected > stats.binom.ppf(0.99, n_studies, alpha)


def test_max_statistic_finds_a_true_effect():
    rng = np.random.default_rng(9)
    observed, nulls = _simulated_subject_values(rng, 12, 200, 6, effect=0.0)
    observed[:, 2] += 0.06  # ground truth: only cell 2 carries information
    null_mean = group.group_mean_null(nulls, group.draw_indices(rng, 200, 12, 2000))
    p_fwe = group.max_statistic_p(observed.mean(axis=0) - 0.5, null_mean - 0.5, np.zeros(6, dtype=int))
    assert p_fwe[2] <= 0.01
    assert p_fwe[2] == p_fwe.min()


# -- balanced family-wise correction (Westfall & Young 1993; Nichols & Holmes 2002) --

def test_standardised_max_p_equals_brute_force_loop():
    rng = np.random.default_rng(14)
    null = rng.normal(size=(60, 5)) * [0.5, 1.0, 2.0, 4.0, 1.0]
    observed = np.array([1.2, 1.9, 3.0, 5.5, -0.4])
    families = np.array([0, 0, 0, 0, 1])
    p_fwe = group.standardised_max_p(observed, null, families, tolerance=0.0)
    # Source: Westfall & Young (1993) / Nichols & Holmes (2002): standardise each cell by the mean and SD (numpy's
    # population SD) of its members, the observed value and the draws, then count draws whose family maximum
    # reaches the observed standardised value.
    members = np.vstack([observed, null])
    z_null = (null - members.mean(axis=0)) / members.std(axis=0)
    z_observed = (observed - members.mean(axis=0)) / members.std(axis=0)
    for cell in range(5):
        members = np.flatnonzero(families == families[cell])
        count = sum(max(z_null[draw, m] for m in members) >= z_observed[cell] for draw in range(60))
        assert p_fwe[cell] == pytest.approx((1 + count) / 61, abs=1e-15)


def test_min_p_fwe_equals_brute_force_loop():
    rng = np.random.default_rng(15)
    null = rng.normal(size=(50, 4)) * [0.3, 1.0, 3.0, 1.0]
    observed = np.array([0.6, 2.4, 2.0, 0.1])
    families = np.array([0, 0, 0, 1])
    p_fwe = group.min_p_fwe(observed, null, families, tolerance=0.0)
    # Source: Westfall & Young (1993), single-step min-p, written out as loops: the observed labeling and the
    # draws are the 51 members; each member's p in a cell is its share of members at least as large.
    members = np.vstack([observed, null])
    member_p = np.array([[np.mean(members[:, c] >= members[m, c]) for c in range(4)] for m in range(51)])
    for cell in range(4):
        family = np.flatnonzero(families == families[cell])
        count = sum(min(member_p[m, f] for f in family) <= member_p[0, cell] for m in range(51))
        assert p_fwe[cell] == pytest.approx(count / 51, abs=1e-15)


def _heterogeneous_null_study(rng, n_subjects, n_permutations, n_cells):
    # Pure noise: cell c has null SD growing with c (as the null SD of accuracy grows with the voxel count).
    spread = np.linspace(0.02, 0.08, n_cells)
    shared = rng.normal(size=(n_subjects, n_permutations + 1, 1))
    values = 0.5 + spread * (np.sqrt(0.5) * shared + np.sqrt(0.5) * rng.normal(size=(n_subjects, n_permutations + 1, n_cells)))
    return values[:, 0, :], values[:, 1:, :]


@pytest.mark.parametrize("method", group.FWE_METHODS)
def test_balanced_correction_holds_fwe_and_spreads_it_over_cells(method):
    rng = np.random.default_rng(20261203)
    n_studies, n_subjects, n_permutations, n_cells, n_draws, alpha = 300, 10, 100, 4, 500, 0.05
    any_reject, raw_reject_widest, balanced_per_cell = 0, 0, np.zeros(n_cells)
    for _ in range(n_studies):
        observed, nulls = _heterogeneous_null_study(rng, n_subjects, n_permutations, n_cells)
        null_mean = group.group_mean_null(nulls, group.draw_indices(rng, n_permutations, n_subjects, n_draws))
        p_fwe = group.family_wise_p(observed.mean(axis=0) - 0.5, null_mean - 0.5, np.zeros(n_cells), method)
        any_reject += np.any(p_fwe <= alpha)
        balanced_per_cell += p_fwe <= alpha
        raw = group.max_statistic_p(observed.mean(axis=0) - 0.5, null_mean - 0.5, np.zeros(n_cells))
        raw_reject_widest += raw[-1] <= alpha
    # Source: scipy.stats.binom, 99% bounds of the count of studies with any rejection at exactly alpha.
    assert stats.binom.ppf(0.005, n_studies, alpha) <= any_reject <= stats.binom.ppf(0.995, n_studies, alpha)
    # Balanced: the narrowest cell gets a share of the error rate (the raw maximum gives it almost none).
    assert balanced_per_cell[0] >= 2
    assert raw_reject_widest >= balanced_per_cell[-1]


def test_standardised_effect_equals_t_over_root_n():
    rng = np.random.default_rng(16)
    scores = 0.5 + rng.normal(0.02, 0.05, size=(9, 3))
    # Source: scipy.stats.ttest_1samp; Cohen's one-sample d = t / sqrt(n).
    t_value = stats.ttest_1samp(scores, 0.5).statistic
    np.testing.assert_allclose(group.standardised_effect(scores, 0.5), t_value / 3.0, rtol=1e-12)


def test_gamma0_max_by_hand():
    # 5 subjects, 10,000 draws: smallest p = 1/10001; (1/10001)**(1/5) = 0.1584; 0.05**(1/5) = 0.5493;
    # gamma0_max = (0.5493 - 0.1584) / (1 - 0.1584) = 0.4644 < 0.5: the majority test can never succeed.
    assert group.prevalence_gamma0_max(5, 10_000, 0.05) == pytest.approx(0.4644, abs=1e-4)
    assert group.prevalence_gamma0_max(20, 10_000, 0.05) > 0.5
    assert np.isnan(group.prevalence_gamma0_max(3, 10, 0.05))  # 1/11 > 0.05: not even the global null


def test_corrected_prevalence_equals_brute_force_from_the_papers_formulas():
    # Hand-sized: 3 subjects, 2 cells, each subject with its actual labeling (choice 0) and 2 permutations; all
    # 27 combinations enumerated. Allefeld, Gorgen & Haynes (2016): the minimum statistic over subjects per cell;
    # family-wise: the maximum over the family of the (here standardised) minimum; then
    # gamma0* = (alpha**(1/N) - p**(1/N)) / (1 - p**(1/N)) (formulas from memory).
    labelings = np.array([[[0.70, 0.55], [0.40, 0.50], [0.50, 0.45]],
                          [[0.80, 0.60], [0.45, 0.65], [0.60, 0.40]],
                          [[0.75, 0.50], [0.55, 0.45], [0.35, 0.60]]])
    combinations = np.array(list(itertools.product(range(3), repeat=3)))
    minimum = group.group_minimum_null(labelings, combinations)
    observed = labelings[:, 0, :].min(axis=0)
    brute_min = np.array([[min(labelings[s, combo[s], c] for s in range(3)) for c in range(2)] for combo in combinations])
    np.testing.assert_allclose(minimum, brute_min)
    members = np.vstack([observed, brute_min])  # the observed and the draws alike
    z = (brute_min - members.mean(axis=0)) / members.std(axis=0)
    z_observed = (observed - members.mean(axis=0)) / members.std(axis=0)
    expected = np.array([(1 + sum(row.max() >= z_observed[c] for row in z)) / 28 for c in range(2)])
    p_fwe = group.standardised_max_p(observed, minimum, [0, 0], tolerance=0.0)
    np.testing.assert_allclose(p_fwe, expected)
    bound = group.prevalence_bound(p_fwe, 3, 0.5)
    root = expected ** (1 / 3)
    np.testing.assert_allclose(bound, np.where(expected <= 0.5, (0.5 ** (1 / 3) - root) / (1 - root), np.nan))


def test_group_statistics_report_effect_size_and_corrected_prevalence():
    rng = np.random.default_rng(17)
    observed, nulls = _simulated_subject_values(rng, 8, 50, 3, effect=0.0)
    observed[:, 0] += 0.08
    columns, _ = group.group_statistics(observed, 0.5, nulls, np.zeros(3, dtype=int), rng, 400, 0.05)
    np.testing.assert_allclose(columns["effect_size"], group.standardised_effect(observed, 0.5))
    assert np.all(columns["prevalence_p_global_fwe"] >= columns["prevalence_p_global"] - 1e-12)  # corrected never smaller
    assert columns["prevalence_gamma0_max"][0] == pytest.approx(group.prevalence_gamma0_max(8, 400, 0.05))


# -- prevalence inference (Allefeld, Gorgen & Haynes 2016) ---------------------

def test_prevalence_worked_example_by_hand():
    # N = 4 subjects, p_N = 0.0016, so p_N**(1/4) = 0.2 exactly.
    # Majority: p(0.5) = ((1 - 0.5) * 0.2 + 0.5)**4 = 0.6**4 = 0.1296.
    # Bound at alpha = 0.05: alpha**(1/4) = exp(ln(0.05) / 4) = exp(-0.7489331) = 0.4728708;
    #   gamma0* = (0.4728708 - 0.2) / (1 - 0.2) = 0.3410885.
    # Check: ((1 - 0.3410885) * 0.2 + 0.3410885)**4 = 0.4728708**4 = 0.05.
    assert group.prevalence_p(0.0016, 4, 0.5) == pytest.approx(0.1296, rel=1e-12)
    assert group.prevalence_p(0.0016, 4, 0.0) == pytest.approx(0.0016, rel=1e-12)  # gamma0 = 0 is the global null
    bound = group.prevalence_bound(0.0016, 4, 0.05)
    assert bound == pytest.approx(0.3410885, abs=1e-7)
    assert group.prevalence_p(0.0016, 4, bound) == pytest.approx(0.05, rel=1e-12)
    # The global null not rejected: no prevalence bound; exactly at alpha: bound 0.
    assert np.isnan(group.prevalence_bound(0.2, 4, 0.05))
    assert group.prevalence_bound(0.05, 4, 0.05) == pytest.approx(0.0, abs=1e-15)


def test_minimum_statistic_p_global_by_hand():
    # Three subjects, each with its actual labeling (choice 0) and one permutation (choice 1).
    labelings = np.array([[[0.60], [0.40]], [[0.70], [0.80]], [[0.65], [0.50]]])
    combinations = np.array(list(itertools.product(range(2), repeat=3)))  # all 8, the actual one included
    minimum = group.group_minimum_null(labelings, combinations)
    # By hand: the observed minimum is 0.60 (subject 1); a combination's minimum
    # reaches 0.60 only if subject 1 keeps 0.60 and subject 3 keeps 0.65, whatever
    # subject 2 does: 2 of the 8. p_N = (1 + 2) / (1 + 8) = 1/3.
    assert sorted(minimum[:, 0].round(2).tolist()) == [0.4, 0.4, 0.4, 0.4, 0.5, 0.5, 0.6, 0.6]
    assert group.permutation_p(labelings[:, 0, :].min(axis=0), minimum)[0] == pytest.approx(1 / 3)


def test_group_statistics_prevalence_draws_include_the_actual_labeling():
    # Every subject's actual score beats all its permutations; the minimum null then
    # reaches the observed minimum only on draws that pick the actual labeling for
    # every subject, each with chance (1/(P+1))**N.
    rng = np.random.default_rng(12)
    n_subjects, n_permutations, n_draws = 3, 1, 40_000
    scores = np.array([[0.7], [0.8], [0.75]])
    nulls = np.full((n_subjects, n_permutations, 1), 0.4)
    columns, _ = group.group_statistics(scores, [0.5], nulls, [0], rng, n_draws, 0.05)
    expected = (1 + n_draws * 0.5 ** 3) / (1 + n_draws)
    assert columns["prevalence_p_global"][0] == pytest.approx(expected, abs=5 * np.sqrt(0.125 * 0.875 / n_draws))


def test_group_statistics_below_three_subjects_is_descriptive_only():
    columns, null_mean = group.group_statistics([[0.6, 0.7], [0.5, 0.8]], [0.5, 0.5], np.full((2, 5, 2), 0.5),
                                                [0, 0], np.random.default_rng(0), 100, 0.05)
    assert null_mean is None
    np.testing.assert_allclose(columns["mean"], [0.55, 0.75])
    for name in ("ci_low", "t", "p_t", "p_wilcoxon", "p_perm", "p_fwe", "prevalence_gamma0"):
        assert np.all(np.isnan(columns[name])), name


def test_module_examples_run():
    # The docstring examples double as checks (the Wilcoxon one is scipy's documented value).
    result = doctest.testmod(group, optionflags=doctest.NORMALIZE_WHITESPACE)
    assert result.attempted >= 8 and result.failed == 0


@pytest.mark.parametrize("call, field", [
    (lambda: group.t_test_greater(np.ones(4), 0.5), "scores"),
    (lambda: group.t_test_greater([[0.5, np.nan], [0.6, 0.7]], 0.5), "scores"),
    (lambda: group.mean_sem_ci([[0.5], [0.6]], confidence=1.5), "confidence"),
    (lambda: group.wilcoxon_greater(np.ones((4, 3)), [0.5, 0.5]), "chance"),
    (lambda: group.wilcoxon_greater(np.ones((4, 3)), 0.5, max_exact=2.5), "max_exact"),
    (lambda: group.draw_indices(np.random.default_rng(0), 0, 3, 10), "n_choices"),
    (lambda: group.draw_indices(0, 4, 3, 10), "rng"),
    (lambda: group.group_mean_null(np.zeros((3, 4, 2)), np.full((5, 3), 4)), "indices"),
    (lambda: group.max_statistic_p([0.1, 0.2], np.zeros((5, 2)), [0]), "families"),
    (lambda: group.prevalence_bound(0.01, 5, 1.0), "alpha"),
    (lambda: group.prevalence_p(0.01, 5, 1.0), "gamma0"),
])
def test_pure_functions_reject_bad_arguments(call, field):
    with pytest.raises(InputError) as error:
        call()
    assert error.value.field == field


# -- the job: files in, files out ----------------------------------------------

ANALYSIS = "lantern_shape"


def _write_study(folder, subjects=("01", "02", "03", "04", "05"), rois=("ember", "glow"), counts=("10", "all"),
                 directions=("within",), n_permutations=30, effect=None, seed=0, chance=1 / 3):
    """An invented lanterns study: per-subject summaries and per-subject x ROI nulls."""
    rng = np.random.default_rng(seed)
    effect = effect or {}
    summaries, nulls = [], []
    for subject in subjects:
        summary_rows, null_frames = [], {roi: [] for roi in rois}
        for roi in rois:
            for direction in directions:
                for count in counts:
                    score = np.clip(chance + effect.get(roi, 0.0) + rng.normal(0, 0.04), 0, 1)
                    summary_rows.append({"subject": subject, "analysis": ANALYSIS, "roi": roi, "direction": direction,
                                         "n_voxels": count, "n_used": 10 if count == "10" else 57, "n_folds": 4,
                                         "accuracy": score, "balanced_accuracy": score, "chance": chance})
                    values = np.clip(chance + rng.normal(0, 0.04, n_permutations), 0, 1)
                    null_frames[roi].append(pd.DataFrame({
                        "subject": subject, "analysis": ANALYSIS, "roi": roi, "direction": direction, "n_voxels": count,
                        "permutation": np.arange(1, n_permutations + 1), "balanced_accuracy": values, "accuracy": values}))
        path = folder / f"sub-{subject}_summary.tsv"
        write_tsv(path, pd.DataFrame(summary_rows))
        summaries.append(str(path))
        for roi in rois:
            path = folder / f"sub-{subject}_roi-{roi}_null.tsv.gz"
            columns = list(group_job.SUBJECT_NULL_COLUMNS)
            write_tsv(path, pd.concat(null_frames[roi]) if null_frames[roi] else pd.DataFrame(columns=columns))
            nulls.append(str(path))
    return {"summaries": summaries, "nulls": nulls}


def _params(subjects=("01", "02", "03", "04", "05"), n_draws=500, prevalence=True, analysis=None):
    analysis = analysis or {"name": ANALYSIS, "kind": "within", "classes": {"round": ["seen_round"]},
                            "rois": [], "voxel_counts": [10, "all"]}
    return {"group": {"n_draws": n_draws, "alpha": 0.05, "prevalence": prevalence}, "analysis": analysis,
            "subjects": list(subjects), "seed": 20261201}


def _outputs(folder):
    return {"table": str(folder / "out" / "group.tsv"), "null": str(folder / "out" / "group_null.tsv.gz"),
            "summary": str(folder / "out" / "summary.txt")}


LOG = logging.getLogger("test_group")


@pytest.mark.parametrize("labels", [("ember", "seen->heard", "all"), ("glow 100%", "within", "10"), ("hu\tsh", "within", "25")])
def test_null_table_writer_gives_the_bytes_of_write_tsv(tmp_path, labels):
    # Reference: foldwise.data.fileio.write_tsv (pandas DataFrame.to_csv) of the same table; values chosen to hit
    # every branch of "%.7g" (zero, negative zero, exponents, rounding at the 7th digit, subnormal, whole numbers).
    rng = np.random.default_rng(4)
    special = [0.0, -0.0, 1e-5, 0.00012345678, 123456789.0, 0.1 + 0.2, 1 / 3, 5e-324, 0.99999995, 1.0, 2.5e7, 0.5]
    null_mean = np.column_stack([np.resize(special, 40), rng.random(40), rng.normal(0.34, 0.05, 40)])
    cells = [labels, (labels[0], labels[1], "400"), ("wick", "heard->seen", "all")]
    write_tsv(tmp_path / "reference.tsv.gz", group_job._null_table(cells, null_mean))
    group_job._write_null_table(tmp_path / "fast.tsv.gz", cells, null_mean)
    assert (tmp_path / "fast.tsv.gz").read_bytes() == (tmp_path / "reference.tsv.gz").read_bytes()
    group_job._write_null_table(tmp_path / "empty.tsv.gz", cells, None)
    write_tsv(tmp_path / "empty_reference.tsv.gz", group_job._null_table(cells, None))
    assert (tmp_path / "empty.tsv.gz").read_bytes() == (tmp_path / "empty_reference.tsv.gz").read_bytes()


def test_job_writes_table_null_and_summary(tmp_path):
    inputs = _write_study(tmp_path, effect={"ember": 0.15})
    outputs = _outputs(tmp_path)
    group_job.run(inputs, outputs, _params(), LOG)
    table = pd.read_csv(outputs["table"], sep="\t", dtype={"n_voxels": str})
    assert list(table.columns) == group_job.TABLE_COLUMNS
    assert table[["roi", "n_voxels"]].values.tolist() == [["ember", "10"], ["ember", "all"], ["glow", "10"], ["glow", "all"]]
    assert (table["n_subjects"] == 5).all() and table["p_fwe"].notna().all()
    assert (table.loc[table["roi"] == "ember", "p_fwe"] <= 0.05).all()  # ground truth: ember carries the shape
    null = pd.read_csv(outputs["null"], sep="\t", dtype={"n_voxels": str})
    assert list(null.columns) == group_job.NULL_COLUMNS and len(null) == 4 * 500
    assert null["draw"].tolist()[:3] == [1, 2, 3]
    summary = Path(outputs["summary"]).read_text(encoding="utf-8")
    assert "roi ember, n_voxels 10" in summary and "roi glow" not in summary
    assert "not about how many subjects" in summary and "research use only" in summary
    first = {name: Path(path).read_bytes() for name, path in outputs.items()}
    group_job.run(inputs, outputs, _params(), LOG)
    assert first == {name: Path(path).read_bytes() for name, path in outputs.items()}  # byte-identical


def test_job_equals_the_pure_functions_with_its_seed(tmp_path):
    inputs = _write_study(tmp_path, seed=3)
    outputs = _outputs(tmp_path)
    group_job.run(inputs, outputs, _params(n_draws=300), LOG)
    table = pd.read_csv(outputs["table"], sep="\t")
    frames = [pd.read_csv(path, sep="\t", dtype={"n_voxels": str}) for path in inputs["summaries"]]
    scores = np.array([frame["balanced_accuracy"].to_numpy() for frame in frames])  # cell order as written
    nulls = np.stack([np.concatenate([pd.read_csv(path, sep="\t")["balanced_accuracy"].to_numpy().reshape(2, 30).T
                                      for path in inputs["nulls"][2 * s: 2 * s + 2]], axis=1) for s in range(5)])
    rng = np.random.default_rng(seed_from(20261201, "group", ANALYSIS))
    chance = frames[0]["chance"].to_numpy()  # as stored, 7 digits
    columns, null_mean = group.group_statistics(scores, chance, nulls, np.zeros(4, dtype=int), rng, 300, 0.05)
    for name in ("mean", "p_t", "p_wilcoxon", "p_perm", "p_fwe", "prevalence_p_global"):
        np.testing.assert_allclose(table[name], columns[name], rtol=1e-6, err_msg=name)  # 7 digits on disk
    written = pd.read_csv(outputs["null"], sep="\t")["mean"].to_numpy().reshape(4, 300).T
    np.testing.assert_allclose(written, null_mean, rtol=1e-6)


def test_job_corrects_each_cross_direction_separately(tmp_path):
    directions = ("seen->heard", "heard->seen", "seen<->heard", "seen->seen", "heard->heard")
    inputs = _write_study(tmp_path, directions=directions[::-1], effect={"ember": 0.05}, seed=5)
    analysis = {"name": ANALYSIS, "kind": "cross", "sets": {"seen": {"round": "seen_round"}, "heard": {"round": "heard_round"}},
                "rois": ["glow", "ember"], "voxel_counts": [10, "all"]}
    outputs = _outputs(tmp_path)
    group_job.run(inputs, outputs, _params(analysis=analysis, n_draws=400), LOG)
    table = pd.read_csv(outputs["table"], sep="\t", dtype={"n_voxels": str})
    assert list(dict.fromkeys(table["roi"])) == ["glow", "ember"]  # configured ROI order
    assert list(dict.fromkeys(table["direction"])) == list(directions)  # configured direction order
    null = pd.read_csv(outputs["null"], sep="\t", dtype={"n_voxels": str})
    for direction in directions:
        rows = table["direction"] == direction
        draws = np.stack([null.loc[(null["roi"] == r) & (null["direction"] == direction) & (null["n_voxels"] == c), "mean"]
                          for r, c in table.loc[rows, ["roi", "n_voxels"]].values], axis=1)
        expected = group.standardised_max_p(table.loc[rows, "mean"].to_numpy() - 1 / 3, draws - 1 / 3, np.zeros(4))
        # The written null carries 7 digits; allow one draw's worth of difference.
        np.testing.assert_allclose(table.loc[rows, "p_fwe"], expected, atol=1.5 / 401)
    assert "direction seen<->heard" in Path(outputs["summary"]).read_text(encoding="utf-8")


def test_job_with_two_subjects_is_descriptive_with_a_warning(tmp_path, caplog):
    inputs = _write_study(tmp_path, subjects=("01", "02"))
    outputs = _outputs(tmp_path)
    with caplog.at_level(logging.WARNING, logger="test_group"):
        group_job.run(inputs, outputs, _params(subjects=("01", "02")), LOG)
    assert "descriptive statistics only" in caplog.text
    table = pd.read_csv(outputs["table"], sep="\t")
    assert table["mean"].notna().all() and table[["t", "p_t", "p_wilcoxon", "p_perm", "p_fwe"]].isna().all().all()
    assert "\tn/a\t" in Path(outputs["table"]).read_text(encoding="utf-8")
    assert gzip.decompress(Path(outputs["null"]).read_bytes()).decode() == "\t".join(group_job.NULL_COLUMNS) + "\n"


def test_job_without_permutations_warns_and_leaves_permutation_columns_empty(tmp_path, caplog):
    inputs = _write_study(tmp_path, n_permutations=0)
    outputs = _outputs(tmp_path)
    with caplog.at_level(logging.WARNING, logger="test_group"):
        group_job.run(inputs, outputs, _params(), LOG)
    assert "no permutation null" in caplog.text
    table = pd.read_csv(outputs["table"], sep="\t")
    assert table["p_t"].notna().all() and table[["p_perm", "p_fwe", "prevalence_p_global"]].isna().all().all()


def test_job_without_prevalence(tmp_path):
    inputs = _write_study(tmp_path)
    outputs = _outputs(tmp_path)
    group_job.run(inputs, outputs, _params(prevalence=False), LOG)
    table = pd.read_csv(outputs["table"], sep="\t")
    assert table["p_fwe"].notna().all()
    assert table[["prevalence_p_global", "prevalence_gamma0", "prevalence_p_majority"]].isna().all().all()


def _rewrite(path, change):
    frame = pd.read_csv(path, sep="\t", dtype=str, keep_default_na=False)
    write_tsv(path, change(frame))


@pytest.mark.parametrize("damage, params_change, field, words", [
    (None, {"subjects": ["01", "02", "03", "04", "05", "06"]}, "subject", ["06", "exclude_subjects"]),
    (lambda inputs: inputs["summaries"].pop(1), {}, "subject", ["02", "exclude_subjects"]),
    (lambda inputs: _rewrite(inputs["summaries"][2], lambda f: f[f["n_voxels"] != "all"]), {},
     "roi, direction, n_voxels", ["03", "voxel-count sweep"]),
    (lambda inputs: _rewrite(inputs["summaries"][3], lambda f: f[f["roi"] != "glow"]), {},
     "roi, direction, n_voxels", ["04", "lacks"]),
    (lambda inputs: _rewrite(inputs["summaries"][0], lambda f: f.assign(analysis="other")), {}, "analysis", ["other"]),
    (lambda inputs: _rewrite(inputs["summaries"][1], lambda f: f.assign(balanced_accuracy="high")), {},
     "balanced_accuracy", ["high"]),
    (lambda inputs: _rewrite(inputs["summaries"][1], lambda f: f.drop(columns="chance")), {}, "chance", ["missing"]),
    (lambda inputs: _rewrite(inputs["summaries"][4], lambda f: f.assign(chance="0.5")), {}, "chance", ["05"]),
    (lambda inputs: inputs["nulls"].pop(3), {}, "subject, roi", ["02/glow"]),
    (lambda inputs: _rewrite(inputs["nulls"][0], lambda f: f[f["permutation"] != "30"]), {}, "permutation",
     ["different numbers"]),
    (lambda inputs: _rewrite(inputs["nulls"][0], lambda f: f.assign(permutation=f["permutation"].replace("2", "1"))), {}, "permutation",
     ["exactly once"]),
    (None, {"group": {"n_draws": 0, "alpha": 0.05, "prevalence": True}}, "group.n_draws", ["0"]),
])
def test_job_rejects_bad_inputs(tmp_path, damage, params_change, field, words):
    inputs = _write_study(tmp_path)
    if damage is not None:
        damage(inputs)
    params = {**_params(), **params_change}
    with pytest.raises(InputError) as error:
        group_job.run(inputs, _outputs(tmp_path), params, LOG)
    assert error.value.field == field
    for word in words:
        assert word in str(error.value)
    assert not (tmp_path / "out").exists()  # nothing written on bad input


def test_job_accepts_bids_style_subject_labels(tmp_path):
    inputs = _write_study(tmp_path, subjects=("sub-01", "sub-02", "sub-03"))
    group_job.run(inputs, _outputs(tmp_path), _params(subjects=("01", "02", "03")), LOG)
    assert pd.read_csv(_outputs(tmp_path)["table"], sep="\t")["n_subjects"].eq(3).all()


def test_job_code_hash_covers_the_science_module():
    # The group rule's code key (foldwise.provenance.hashing.code_hash) must change when group.py does.
    from foldwise.provenance.hashing import module_closure

    assert Path(group.__file__).resolve() in module_closure("foldwise.jobs.group")


def test_job_reports_counts_beyond_the_roi_once_as_all_with_one_warning_per_roi(tmp_path, caplog):
    # ROIs of 57 voxels: the requested count 100 uses every voxel, like 'all' (n_used 57 in every subject).
    inputs = _write_study(tmp_path, counts=("10", "100", "all"), seed=8)
    outputs = _outputs(tmp_path)
    params = _params()
    params["analysis"]["voxel_counts"] = [10, 100, "all"]
    with caplog.at_level(logging.WARNING, logger="test_group"):
        group_job.run(inputs, outputs, params, LOG)
    table = pd.read_csv(outputs["table"], sep="\t", dtype={"n_voxels": str, "n_used": str})
    assert table[["roi", "n_voxels", "n_used"]].values.tolist() == [["ember", "10", "10"], ["ember", "all", "57"],
                                                                     ["glow", "10", "10"], ["glow", "all", "57"]]
    warned = [record.getMessage() for record in caplog.records if "reach the ROI's size" in record.getMessage()]
    assert len(warned) == 2 and "ROI ember" in warned[0] and "ROI glow" in warned[1]  # once per ROI, not per subject


@pytest.mark.parametrize("family", ["per_direction", "all_directions"])
def test_job_family_setting_names_and_forms_the_family(tmp_path, family):
    directions = ("seen->heard", "heard->seen", "seen<->heard", "seen->seen", "heard->heard")
    inputs = _write_study(tmp_path, directions=directions, seed=6)
    analysis = {"name": ANALYSIS, "kind": "cross", "sets": {"seen": {"round": "seen_round"}, "heard": {"round": "heard_round"}},
                "rois": ["ember", "glow"], "voxel_counts": [10, "all"]}
    params = _params(analysis=analysis, n_draws=300)
    params["group"]["family"] = family
    outputs = _outputs(tmp_path)
    group_job.run(inputs, outputs, params, LOG)
    table = pd.read_csv(outputs["table"], sep="\t", dtype={"n_voxels": str})
    null = pd.read_csv(outputs["null"], sep="\t", dtype={"n_voxels": str})
    draws = np.stack([null.loc[(null["roi"] == r) & (null["direction"] == d) & (null["n_voxels"] == c), "mean"].to_numpy()
                      for r, d, c in table[["roi", "direction", "n_voxels"]].values], axis=1)
    if family == "per_direction":
        assert table["family"].tolist() == [f"direction {d}" for d in table["direction"]]
        labels = pd.factorize(table["direction"])[0]
    else:
        assert set(table["family"]) == {"all directions"}
        labels = np.zeros(len(table), dtype=int)
    expected = group.standardised_max_p(table["mean"].to_numpy() - 1 / 3, draws - 1 / 3, labels)
    np.testing.assert_allclose(table["p_fwe"], expected, atol=1.5 / 301)  # 7 digits on disk
    assert "one family" in Path(outputs["summary"]).read_text(encoding="utf-8")


def test_job_warns_when_a_subjects_design_cannot_reach_alpha(tmp_path, caplog):
    inputs = _write_study(tmp_path, seed=9)
    for path in inputs["summaries"][:2]:  # two subjects with 8 distinct relabelings: p >= 1/8 > 0.05
        frame = pd.read_csv(path, sep="\t", dtype={"subject": str, "n_voxels": str})
        write_tsv(path, frame.assign(p_min=0.125))
    outputs = _outputs(tmp_path)
    with caplog.at_level(logging.WARNING, logger="test_group"):
        group_job.run(inputs, outputs, _params(), LOG)
    assert any("01, 02" in record.getMessage() and "relabelings" in record.getMessage() for record in caplog.records)
    table = pd.read_csv(outputs["table"], sep="\t")
    assert np.allclose(table["subject_p_min"], 0.125)
    assert "relabelings" in Path(outputs["summary"]).read_text(encoding="utf-8")


def test_job_takes_subjects_whose_nulls_differ_in_size(tmp_path):
    # Subject 01's design has 8 distinct relabelings, listed exactly; the others drew 30. Each subject's picks stay
    # within its own null (checked by drawing with the per-subject counts), and the job runs.
    inputs = _write_study(tmp_path, seed=10)
    for path in inputs["nulls"][:2]:  # subject 01, both ROIs
        frame = pd.read_csv(path, sep="\t", dtype={"subject": str, "n_voxels": str})
        write_tsv(path, frame[frame["permutation"] <= 8])
    outputs = _outputs(tmp_path)
    group_job.run(inputs, outputs, _params(), LOG)
    table = pd.read_csv(outputs["table"], sep="\t")
    assert table["p_fwe"].notna().all()
    picks = group.draw_indices(np.random.default_rng(0), np.array([8, 30, 30, 30, 30]), 5, 20_000)
    assert picks[:, 0].max() == 7 and picks[:, 1:].max() == 29
    # uniform within each subject's own count (chi-square against scipy.stats.chisquare's uniform expectation)
    assert stats.chisquare(np.bincount(picks[:, 0], minlength=8)).pvalue > 0.001
    # equal counts give the same stream as a plain integer count
    np.testing.assert_array_equal(group.draw_indices(np.random.default_rng(1), np.array([30] * 5), 5, 10),
                                  group.draw_indices(np.random.default_rng(1), 30, 5, 10))


def test_job_says_nothing_about_relabelings_without_a_p_min_column(tmp_path, caplog):
    inputs = _write_study(tmp_path, seed=11)
    outputs = _outputs(tmp_path)
    with caplog.at_level(logging.WARNING, logger="test_group"):
        group_job.run(inputs, outputs, _params(), LOG)
    assert not any("relabelings" in record.getMessage() for record in caplog.records)


def test_job_family_all_analyses_is_bonferroni_over_the_analyses_maxima(tmp_path):
    inputs = _write_study(tmp_path, seed=12, effect={"ember": 0.06})
    one, three = _outputs(tmp_path / "one"), _outputs(tmp_path / "three")
    params = _params()
    params["group"]["family"] = "all_directions"
    group_job.run(inputs, one, params, LOG)
    params = _params()
    params["group"]["family"] = "all_analyses"
    params["n_analyses"] = 3
    group_job.run(inputs, three, params, LOG)
    single = pd.read_csv(one["table"], sep="\t")
    study = pd.read_csv(three["table"], sep="\t")
    # Bonferroni (Dunn 1961) over three analyses: the analysis's own family-wise p times 3, capped at 1
    np.testing.assert_allclose(study["p_fwe"], np.minimum(1.0, 3 * single["p_fwe"]), rtol=1e-6)
    assert set(study["family"]) == {"all analyses"}
    assert "Bonferroni over the study's 3 analyses" in Path(three["summary"]).read_text(encoding="utf-8")


# -- through the content memo: one ROI's change recomputes that ROI's draws only ----------------
def _run_through_memo(tmp_path, inputs, params):
    """The job as Snakemake's script runs it (foldwise.provenance.memo.run_job, outputs removed first); its record."""
    import json
    from foldwise.provenance.memo import run_job
    outputs = _outputs(tmp_path / "results")
    for path in outputs.values():
        Path(path).unlink(missing_ok=True)
    smk = SimpleNamespace(input=Named(inputs), output=Named(**outputs, provenance=str(tmp_path / "provenance" / "group.json")),
                          params=Named(settings=params, code="code-v1"), log=[str(tmp_path / "logs" / "group.log")],
                          wildcards=Named(analysis=ANALYSIS), config={"study": {"store_dir": str(tmp_path / "store")}})
    run_job(smk, "group", group_job.run)
    return json.loads((tmp_path / "provenance" / "group.json").read_text()), outputs


def test_a_changed_roi_recomputes_its_draws_only_and_the_outputs_keep_the_bytes_of_a_full_run(tmp_path, monkeypatch):
    monkeypatch.delenv("FOLDWISE_MEMO", raising=False)
    directions = ("seen->heard", "heard->seen")
    analysis = {"name": ANALYSIS, "kind": "cross", "sets": {"seen": {"round": "seen_round"}, "heard": {"round": "heard_round"}},
                "rois": [], "voxel_counts": [10, "all"]}
    rois = ("ember", "glow", "hush")
    inputs = _write_study(tmp_path / "in", rois=rois, directions=directions, effect={"ember": 0.08}, seed=21)
    params = _params(n_draws=400, analysis=analysis)
    first, outputs = _run_through_memo(tmp_path, inputs, params)
    assert [(part["part"], part["restored"]) for part in first["parts"]] == [(f"roi-{roi}", False) for roi in rois]
    # glow changes in every subject (its nulls and its summary rows): Snakemake reruns the job, ember and hush are restored
    _write_study(tmp_path / "in", rois=rois, directions=directions, effect={"ember": 0.08, "glow": 0.1}, seed=21)
    for path in inputs["nulls"] + inputs["summaries"]:
        if "glow" not in path and "summary" not in path:
            continue
        frame = pd.read_csv(path, sep="\t", dtype=str, keep_default_na=False)
        rows = frame["roi"] == "glow"
        frame.loc[rows, "balanced_accuracy"] = [f"{float(value) * 0.97 + 0.02:.7g}" for value in frame.loc[rows, "balanced_accuracy"]]
        write_tsv(path, frame)
    second, outputs = _run_through_memo(tmp_path, inputs, params)
    assert sorted((part["part"], part["restored"]) for part in second["parts"]) == [("roi-ember", True), ("roi-glow", False),
                                                                                   ("roi-hush", True)]
    # Reference: the job without any memo on the same inputs (every ROI computed, as before the job had parts)
    alone = _outputs(tmp_path / "alone")
    group_job.run(inputs, alone, params, LOG)
    for name in outputs:
        assert Path(outputs[name]).read_bytes() == Path(alone[name]).read_bytes(), name
    assert Path(outputs["table"]).read_bytes() != b"" and "glow" in Path(outputs["table"]).read_text(encoding="utf-8")
