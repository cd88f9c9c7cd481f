"""Tests of foldwise.geometry (representational geometry).

Outside references, named beside each check: brute-force loops over run
pairs and condition pairs (the crossnobis definition of Walther et al. 2016,
NeuroImage 137:188-200, and Nili et al. 2014, PLoS Comput Biol
10:e1003553), scikit-learn's ``LedoitWolf`` covariance, brute-force
concordant/discordant pair counting (Kendall 1938, Biometrika 30:81-93),
``scipy.stats.spearmanr`` / ``pearsonr`` / ``binom`` /
``permutation_test``, a brute-force noise ceiling (Nili et al. 2014) and a
hand-derived count of sign vectors. Simulated data are invented.
"""

import doctest
import itertools

import numpy as np
import pytest
from scipy import stats
from sklearn.covariance import LedoitWolf

from foldwise.errors import InputError
from foldwise.geometry import compare, distances, inference, models, noise


def _runs(rng, n_runs=5, n_conditions=4, n_voxels=30, n_scans=40, mixing=True):
    """Random run patterns and correlated residuals of the same voxels."""
    mix = rng.standard_normal((n_voxels, n_voxels)) / np.sqrt(n_voxels) + np.eye(n_voxels) if mixing else np.eye(n_voxels)
    patterns = rng.standard_normal((n_runs, n_conditions, n_voxels))
    residuals = [rng.standard_normal((n_scans, n_voxels)) @ mix for _ in range(n_runs)]
    return patterns, residuals


def _brute_force(patterns, weights):
    """Mean over ordered run pairs (m, k), m != k, of delta_m' W_k delta_k / V, one condition pair at a time."""
    n_runs, n_conditions, n_voxels = patterns.shape
    out = []
    for i, j in itertools.combinations(range(n_conditions), 2):
        total = 0.0
        for m, k in itertools.permutations(range(n_runs), 2):
            total += (patterns[m, i] - patterns[m, j]) @ weights[k] @ (patterns[k, i] - patterns[k, j])
        out.append(total / (n_runs * (n_runs - 1) * n_voxels))
    return np.array(out)


def _training(residuals, fold):
    return np.concatenate(residuals[:fold] + residuals[fold + 1:], axis=0)


# -- distances -----------------------------------------------------------------

def test_doctests():
    for module in (distances, models):
        assert doctest.testmod(module).failed == 0


def test_euclidean_cv_equals_brute_force_loop():
    rng = np.random.default_rng(0)
    patterns, _ = _runs(rng)
    identity = [np.eye(patterns.shape[2])] * patterns.shape[0]
    # Source: brute-force loop over run pairs and condition pairs.
    np.testing.assert_allclose(distances.crossvalidated_distances(patterns), _brute_force(patterns, identity), rtol=0, atol=1e-12)
    np.testing.assert_allclose(distances.distances(patterns, "euclidean_cv"), _brute_force(patterns, identity), atol=1e-12)


def test_crossnobis_univariate_equals_brute_force_loop():
    rng = np.random.default_rng(1)
    patterns, residuals = _runs(rng)
    folds = noise.fold_noise("univariate", residuals)
    weights = [np.diag(1.0 / np.mean(_training(residuals, k) ** 2, axis=0)) for k in range(len(residuals))]
    # Source: brute-force loop, W_k = diag(1 / mean squared training residual).
    np.testing.assert_allclose(distances.crossvalidated_distances(patterns, folds), _brute_force(patterns, weights), atol=1e-12)


@pytest.mark.parametrize("n_scans", [6, 40])  # fewer training scans than voxels (sample space) and more (voxel space)
def test_multivariate_noise_equals_sklearn_ledoit_wolf_whitening(n_scans):
    rng = np.random.default_rng(2)
    patterns, residuals = _runs(rng, n_scans=n_scans)
    folds = noise.fold_noise("multivariate", residuals)
    assert folds.factors[0][0] == ("sample" if n_scans * 4 <= 30 else "voxel")
    # Source: scikit-learn LedoitWolf(assume_centered=True) of the training runs' residuals, inverted by numpy.
    weights = [np.linalg.inv(LedoitWolf(assume_centered=True).fit(_training(residuals, k)).covariance_) for k in range(5)]
    np.testing.assert_allclose(distances.crossvalidated_distances(patterns, folds), _brute_force(patterns, weights),
                               rtol=1e-9, atol=1e-12)
    # Whitening itself: Sigma_k^-1 v against scikit-learn's covariance.
    vectors = rng.standard_normal((3, 30))
    np.testing.assert_allclose(folds.apply(2, vectors), vectors @ weights[2], rtol=1e-9, atol=1e-12)


def test_ledoit_wolf_covariance_equals_sklearn():
    rng = np.random.default_rng(3)
    for shape in [(10, 40), (80, 15)]:
        data = rng.standard_normal(shape) @ rng.standard_normal((shape[1], shape[1]))
        # Source: sklearn.covariance.LedoitWolf(assume_centered=True).
        reference = LedoitWolf(assume_centered=True).fit(data)
        np.testing.assert_allclose(noise.ledoit_wolf_covariance(data), reference.covariance_, rtol=1e-10, atol=1e-12)
        assert noise.ledoit_wolf_from_gram(data @ data.T, shape[1])[0] == pytest.approx(reference.shrinkage_, rel=1e-10)


def test_fold_weighting_never_sees_the_test_run():
    """Leak test: replacing the test run's residuals changes nothing in its own fold's weighting."""
    rng = np.random.default_rng(4)
    _, residuals = _runs(rng, n_scans=8)
    vectors = rng.standard_normal((4, 30))
    for kind in ("univariate", "multivariate"):
        before = noise.fold_noise(kind, residuals)
        for fold in range(len(residuals)):
            changed = list(residuals)
            changed[fold] = rng.standard_normal(residuals[fold].shape) * 5.0
            after = noise.fold_noise(kind, changed)
            assert np.array_equal(before.apply(fold, vectors), after.apply(fold, vectors))
            other = (fold + 1) % len(residuals)
            assert not np.allclose(before.apply(other, vectors), after.apply(other, vectors))


def test_crossnobis_unbiased_on_noise_while_correlation_distance_is_not():
    rng = np.random.default_rng(5)
    n_subjects = 400
    cv, corr = [], []
    for _ in range(n_subjects):
        patterns, residuals = _runs(rng, n_runs=4, n_conditions=3, n_voxels=20, n_scans=10)
        patterns = rng.standard_normal(patterns.shape)  # pure noise: no condition differs
        cv.append(distances.crossvalidated_distances(patterns, noise.fold_noise("multivariate", residuals)))
        corr.append(distances.correlation_distances(patterns))
    cv, corr = np.array(cv), np.array(corr)
    # Source: definition of unbiasedness; the mean over simulated subjects is 0 within 3.5 standard errors.
    standard_error = cv.std(axis=0, ddof=1) / np.sqrt(n_subjects)
    assert np.all(np.abs(cv.mean(axis=0)) < 3.5 * standard_error)
    # Correlation distance of pure noise sits near 1, far above 0 (Walther et al. 2016, fig. 2).
    assert np.all(corr.mean(axis=0) > 0.9)


def test_crossnobis_estimates_true_mahalanobis_distance():
    rng = np.random.default_rng(6)
    n_voxels, n_runs = 12, 6
    mix = rng.standard_normal((n_voxels, n_voxels)) * 0.4 + np.eye(n_voxels)
    covariance = mix.T @ mix
    means = rng.standard_normal((3, n_voxels)) * 0.8
    rows, columns = distances.condition_pairs(3)
    deltas = means[rows] - means[columns]
    truth = np.einsum("pv,vw,pw->p", deltas, np.linalg.inv(covariance), deltas) / n_voxels
    estimates = []
    for _ in range(200):
        patterns = means[None] + rng.standard_normal((n_runs, 3, n_voxels)) @ mix
        residuals = [rng.standard_normal((3000, n_voxels)) @ mix for _ in range(n_runs)]  # many scans: LW shrinks little
        estimates.append(distances.crossvalidated_distances(patterns, noise.fold_noise("multivariate", residuals)))
    # Source: Walther et al. 2016, eq. for the crossnobis expectation: delta' Sigma^-1 delta / V.
    # Tolerance 5 % (stated): shrinkage and the inverse of an estimated covariance bias it by ~1 % here.
    np.testing.assert_allclose(np.mean(estimates, axis=0), truth, rtol=0.05)


def test_correlation_distance_equals_scipy_pearsonr():
    rng = np.random.default_rng(7)
    patterns, _ = _runs(rng)
    mean = patterns.mean(axis=0)
    # Source: scipy.stats.pearsonr of the run-averaged patterns.
    expected = [1 - stats.pearsonr(mean[i], mean[j])[0] for i, j in itertools.combinations(range(4), 2)]
    np.testing.assert_allclose(distances.correlation_distances(patterns), expected, atol=1e-12)


def test_square_form_and_condition_patterns():
    square = distances.square_form([1.0, 2.0, 3.0], 3)
    np.testing.assert_array_equal(square, [[0, 1, 2], [1, 0, 3], [2, 3, 0]])
    patterns = np.arange(12, dtype=float).reshape(6, 2)
    out = distances.condition_patterns(patterns, ["a", "a", "b", "a", "b", "b"], ["1", "1", "1", "2", "2", "2"], ["b", "a"])
    np.testing.assert_array_equal(out[0], [[4, 5], [1, 2]])
    with pytest.raises(InputError, match="has no pattern in run"):
        distances.condition_patterns(patterns, ["a"] * 6, ["1"] * 6, ["a", "b"], file="x.tsv")


def test_distances_refuse_one_run():
    with pytest.raises(InputError, match="two or more runs"):
        distances.crossvalidated_distances(np.zeros((1, 3, 4)))


# -- models --------------------------------------------------------------------

LANTERNS = [f"{m}_{s}" for m in ("seen", "heard") for s in ("round", "square", "star")]
FEATURES = {c: {"modality": c.split("_")[0], "shape": c.split("_")[1]} for c in LANTERNS}


def test_feature_models_by_hand():
    shape = distances.square_form(models.feature_model(LANTERNS, FEATURES, ["shape"]), 6)
    assert shape[0, 3] == 0 and shape[0, 1] == 1 and shape[0, 4] == 1  # seen_round~heard_round alike
    seen_only = distances.square_form(models.feature_model(LANTERNS, FEATURES, ["shape"], {"modality": ["seen"]}), 6)
    # Hand-derived: seen shapes differ among themselves and from every heard condition; heard conditions alike.
    np.testing.assert_array_equal(seen_only[3:, 3:], np.zeros((3, 3)))
    np.testing.assert_array_equal(seen_only[:3, 3:], np.ones((3, 3)))
    assert seen_only[0, 1] == 1


def test_model_tsv_round_trip_and_errors(tmp_path):
    square = distances.square_form(np.arange(1, 16, dtype=float), 6)
    path = tmp_path / "model.tsv"
    lines = ["condition\t" + "\t".join(LANTERNS)] + [c + "\t" + "\t".join(map(str, row)) for c, row in zip(LANTERNS, square)]
    path.write_text("\n".join(lines) + "\n")
    np.testing.assert_array_equal(models.read_model_tsv(path, LANTERNS[::-1])[:2], [square[5, 4], square[5, 3]])
    square[0, 1] = 99
    path.write_text("\n".join(["condition\t" + "\t".join(LANTERNS)] + [c + "\t" + "\t".join(map(str, row)) for c, row in zip(LANTERNS, square)]))
    with pytest.raises(InputError, match="symmetric"):
        models.read_model_tsv(path, LANTERNS)
    with pytest.raises(InputError, match="same dissimilarity"):
        models.model_vectors(LANTERNS[:3], FEATURES, [{"name": "flat", "differ_in": ["modality"]}])


# -- comparison and noise ceiling ---------------------------------------------

def _kendall_brute(x, y):
    concordant = discordant = 0
    for a, b in itertools.combinations(range(len(x)), 2):
        product = (x[a] - x[b]) * (y[a] - y[b])
        concordant += product > 0
        discordant += product < 0
    return (concordant - discordant) / (len(x) * (len(x) - 1) / 2)


def test_kendall_tau_a_equals_pair_counting_and_spearman_pearson_equal_scipy():
    rng = np.random.default_rng(8)
    data = rng.standard_normal((5, 15))
    data[0, :4] = data[0, 4]  # ties in the data too
    model_set = np.vstack([models.feature_model(LANTERNS, FEATURES, ["shape"]), rng.standard_normal(15)])
    tau = compare.kendall_tau_a(data, model_set)
    rho, r = compare.spearman(data, model_set), compare.pearson(data, model_set)
    for s, m in itertools.product(range(5), range(2)):
        assert tau[s, m] == pytest.approx(_kendall_brute(data[s], model_set[m]), abs=1e-12)  # Source: brute-force counting
        assert rho[s, m] == pytest.approx(stats.spearmanr(data[s], model_set[m])[0], abs=1e-12)  # Source: scipy.stats.spearmanr
        assert r[s, m] == pytest.approx(stats.pearsonr(data[s], model_set[m])[0], abs=1e-12)  # Source: scipy.stats.pearsonr
    # Without ties tau-a equals scipy's tau-b (Source: scipy.stats.kendalltau).
    assert tau[1, 1] == pytest.approx(stats.kendalltau(data[1], model_set[1])[0], abs=1e-12)


@pytest.mark.parametrize("comparison", compare.COMPARISONS)
def test_noise_ceiling_equals_brute_force(comparison):
    rng = np.random.default_rng(9)
    data = rng.standard_normal((4, 10)) + np.linspace(0, 3, 10)
    ceiling = compare.noise_ceiling(data, comparison)
    # Source: Nili et al. 2014, brute force: scale each subject, average (with / without the subject), compare.
    def scaled(row):
        return stats.zscore(row) if comparison == "pearson" else stats.rankdata(row)
    reference = {"pearson": lambda x, y: stats.pearsonr(x, y)[0], "spearman": lambda x, y: stats.spearmanr(x, y)[0],
                 "kendall_tau_a": _kendall_brute}[comparison]
    upper = [reference(data[s], np.mean([scaled(row) for row in data], axis=0)) for s in range(4)]
    lower = [reference(data[s], np.mean([scaled(data[o]) for o in range(4) if o != s], axis=0)) for s in range(4)]
    assert ceiling["upper"] == pytest.approx(np.mean(upper), abs=1e-12)
    assert ceiling["lower"] == pytest.approx(np.mean(lower), abs=1e-12)
    assert ceiling["lower"] <= ceiling["upper"]


# -- group inference -----------------------------------------------------------

def test_sign_flip_exact_enumeration_matches_analytic_count():
    # Fits 1, 2, 4, 8, 16 with signs: every sign vector gives a distinct sum 2 * (positive subset sum) - 31,
    # and positive subset sums run over 0..31 once each, so p = (32 - observed subset sum) / 32 (hand-derived).
    flips, exact = inference.sign_flips(5, 10_000, np.random.default_rng(0))
    assert exact and flips.shape == (32, 5) and np.all(flips[0] == 1)
    magnitudes = 2.0 ** np.arange(5)
    for positive in [(0, 1, 2, 3, 4), (1, 2, 4), (4,), (0, 3)]:
        signs = -np.ones(5)
        signs[list(positive)] = 1
        fits = (signs * magnitudes)[:, None]
        subset_sum = magnitudes[list(positive)].sum()
        assert inference.signflip_test(fits, flips)["p"][0] == pytest.approx((32 - subset_sum) / 32, abs=1e-15)


def test_sign_flip_p_equals_scipy_permutation_test():
    rng = np.random.default_rng(10)
    fits = rng.normal(0.3, 1.0, size=(9, 3))
    flips, exact = inference.sign_flips(9, 10_000, rng)
    ours = inference.signflip_test(fits, flips)["p"]
    for cell in range(3):
        # Source: scipy.stats.permutation_test, one sample, permutation_type="samples" (sign flips), exact.
        reference = stats.permutation_test((fits[:, cell],), np.mean, permutation_type="samples",
                                           alternative="greater", n_resamples=np.inf)
        assert ours[cell] == pytest.approx(reference.pvalue, abs=1e-12)


def test_max_statistic_p_by_brute_force():
    rng = np.random.default_rng(11)
    fits = rng.normal(0.2, 1.0, size=(6, 4)) * [1, 3, 0.5, 1]
    flips, _ = inference.sign_flips(6, 10_000, rng)
    out = inference.signflip_test(fits, flips, families=[0, 0, 1, 1])
    # Source: Nichols & Holmes 2002, brute force over the 64 flips.
    t_all = np.array([[np.mean(f * fits[:, c]) / (np.std(f * fits[:, c], ddof=1) / np.sqrt(6)) for c in range(4)] for f in flips])
    for cell, members in zip(range(4), [[0, 1], [0, 1], [2, 3], [2, 3]]):
        assert out["t"][cell] == pytest.approx(t_all[0, cell], rel=1e-12)
        assert out["p_fwe"][cell] == pytest.approx(np.mean(t_all[:, members].max(axis=1) >= t_all[0, cell] - 1e-9), abs=1e-15)
    assert np.all(out["p_fwe"] >= out["p"])


def test_sign_flip_false_positive_rate_on_null_groups():
    rng = np.random.default_rng(12)
    n_groups, alpha = 2000, 0.05
    correlated = np.linalg.cholesky(0.5 * np.eye(6) + 0.5)
    any_fwe = np.zeros(n_groups, dtype=bool)
    cell_hits = np.zeros(n_groups, dtype=bool)
    for group in range(n_groups):
        fits = rng.standard_t(4, size=(10, 6)) @ correlated.T  # symmetric, heavy-tailed, correlated cells
        flips, _ = inference.sign_flips(10, 200, rng)
        out = inference.signflip_test(fits, flips)
        any_fwe[group] = np.any(out["p_fwe"] <= alpha)
        cell_hits[group] = out["p"][0] <= alpha
    # Source: scipy.stats.binom, 99.9 % two-sided interval of the count of false positives at alpha.
    low, high = stats.binom.ppf([0.0005, 0.9995], n_groups, alpha)
    assert low <= any_fwe.sum() <= high
    assert low <= cell_hits.sum() <= high


def test_sign_flip_two_sided_and_pairwise():
    fits = np.stack([np.ones((6, 2)) * [0.5, 0.1] + np.random.default_rng(13).normal(0, 0.05, (6, 2))], axis=1)
    differences, pairs = inference.pairwise_differences(fits, ["a", "b"])
    assert pairs == [("a", "b")] and differences.shape == (6, 1, 1)
    flips, _ = inference.sign_flips(6, 10_000, np.random.default_rng(0))
    out = inference.signflip_test(-differences[:, :, 0], flips, two_sided=True)
    assert out["p"][0] == pytest.approx(2 / 64)  # all six negative: only the identity and its mirror as extreme (hand count)


# -- searchlight ---------------------------------------------------------------

def test_searchlight_distances_equal_the_roi_estimator_on_each_sphere():
    from foldwise.searchlight.engine import sphere_neighbourhoods
    from foldwise.searchlight import geometry as searchlight_geometry
    rng = np.random.default_rng(14)
    mask = np.ones((6, 6, 5), dtype=bool)
    mask[0, 0, :] = False
    spheres = sphere_neighbourhoods(mask, np.eye(4), 2.0)
    n_voxels = int(mask.sum())
    patterns = rng.standard_normal((4, 4, n_voxels))
    residuals = [rng.standard_normal((20, n_voxels)) for _ in range(4)]
    inverse_variance = noise.fold_noise("univariate", residuals).inverse_variance
    model_set = rng.standard_normal((2, 6))
    fits = searchlight_geometry.sphere_model_fits(patterns, spheres, model_set, "kendall_tau_a", inverse_variance)
    for centre in (0, 37, n_voxels - 1):
        voxels = spheres.indices[centre][spheres.indices[centre] >= 0]
        # Source: the ROI estimator (itself checked against the brute-force loop) on the sphere's voxels.
        roi = distances.crossvalidated_distances(patterns[:, :, voxels], noise.fold_noise("univariate", [r[:, voxels] for r in residuals]))
        np.testing.assert_allclose(searchlight_geometry.sphere_distances(patterns, spheres, inverse_variance)[centre], roi, atol=1e-12)
        np.testing.assert_allclose(fits[centre], compare.kendall_tau_a(roi, model_set)[0], atol=1e-12)


def test_classical_mds_recovers_planar_points():
    rng = np.random.default_rng(15)
    points = rng.standard_normal((6, 2))
    squared = ((points[:, None] - points[None]) ** 2).sum(axis=2)
    coordinates = distances.classical_mds(squared)
    # Source: Torgerson 1952 -- points in the plane are recovered up to rotation, so their distances are exact.
    np.testing.assert_allclose(((coordinates[:, None] - coordinates[None]) ** 2).sum(axis=2), squared, atol=1e-10)


# -- the demo (end to end) -----------------------------------------------------

@pytest.mark.e2e
@pytest.mark.slow
def test_demo_geometry_matches_the_simulators_ground_truth(tmp_path):
    """ember fits shape, glow shape_within_seen (best), hush no model; p_fwe at the config's alpha."""
    import json

    import pandas as pd
    from workflow_support import copy_repository, snakemake

    workdir = copy_repository(tmp_path / "repo")
    target = "results/geometry/lantern_geometry/lantern_geometry_group.tsv"
    # An option first, so the targets are not read as more --config entries.
    snakemake(workdir, "--rerun-incomplete", target, "results/demo/ground_truth.json", config="config/config.yaml")
    table = pd.read_csv(workdir / target, sep="\t")
    truth = json.loads((workdir / "results/demo/ground_truth.json").read_text())["rois"]
    alpha = 0.05
    for roi, expected in truth.items():
        rows = table[table["roi"] == roi].set_index("model")
        best = expected["geometry"]["best_model"]
        # Source: the simulator's ground truth (data/demo.py expected_geometry).
        if best is None:
            assert (rows["p_fwe"] > alpha).all(), rows
        else:
            assert rows.loc[best, "p_fwe"] <= alpha and rows["mean"].idxmax() == best, rows
    assert (workdir / "results/geometry/lantern_geometry/lantern_geometry_fits.png").stat().st_size > 0


def test_univariate_weights_from_sums_equal_fold_noise():
    rng = np.random.default_rng(16)
    _, residuals = _runs(rng, n_scans=9)
    sums = np.stack([np.einsum("ij,ij->j", r, r) for r in residuals])
    # Source: fold_noise("univariate") (itself checked against the brute-force loop above).
    np.testing.assert_allclose(noise.univariate_weights(sums, [9] * 5), noise.fold_noise("univariate", residuals).inverse_variance,
                               rtol=1e-12)


# -- voxel-count sweep ----------------------------------------------------------

def test_sweep_at_every_voxel_equals_the_unselected_estimate():
    rng = np.random.default_rng(18)
    patterns, residuals = _runs(rng, n_scans=8)
    for kind in ("none", "univariate", "multivariate"):
        swept, used = distances.swept_distances(patterns, residuals, kind, [30, "all"])
        reference = distances.crossvalidated_distances(patterns, noise.fold_noise(kind, None if kind == "none" else residuals, 30))
        # Source: the unselected estimator (itself checked against the brute-force loop) -- selection of every voxel changes nothing.
        np.testing.assert_allclose(swept, np.stack([reference, reference]), rtol=1e-10, atol=1e-12)
        assert used.tolist() == [30, 30]


def test_swept_multivariate_equals_brute_force_with_per_fold_voxels():
    rng = np.random.default_rng(19)
    patterns, residuals = _runs(rng, n_scans=12)
    swept, used = distances.swept_distances(patterns, residuals, "multivariate", [7])
    selections = distances.fold_selections(patterns, [7])[0]
    pairs = list(itertools.combinations(range(4), 2))
    expected = np.zeros(len(pairs))
    for k, voxels in enumerate(selections):
        # Source: scikit-learn LedoitWolf of fold k's training residuals on fold k's voxels; loop over training runs and pairs.
        weight = np.linalg.inv(LedoitWolf(assume_centered=True).fit(_training(residuals, k)[:, voxels]).covariance_)
        for p, (i, j) in enumerate(pairs):
            test = patterns[k, i, voxels] - patterns[k, j, voxels]
            train = np.mean([patterns[m, i, voxels] - patterns[m, j, voxels] for m in range(5) if m != k], axis=0)
            expected[p] += train @ weight @ test / 7
    np.testing.assert_allclose(swept[0], expected / 5, rtol=1e-9, atol=1e-12)
    assert used.tolist() == [7]


def test_voxel_choice_never_sees_the_test_run():
    """Leak test: replacing the test run's patterns changes nothing in its own fold's choice of voxels."""
    rng = np.random.default_rng(20)
    patterns, _ = _runs(rng)
    before = distances.fold_selections(patterns, [5, 12])
    for fold in range(patterns.shape[0]):
        changed = patterns.copy()
        changed[fold] = rng.standard_normal(changed[fold].shape) * 10
        after = distances.fold_selections(changed, [5, 12])
        for count in range(2):
            assert np.array_equal(before[count][fold], after[count][fold])
            assert any(not np.array_equal(before[count][other], after[count][other]) for other in range(5) if other != fold)


def test_sweep_stays_unbiased_on_noise():
    rng = np.random.default_rng(21)
    estimates = []
    for _ in range(300):
        patterns = rng.standard_normal((4, 3, 25)) + rng.standard_normal(25) * 2  # a shared response, no condition differs
        residuals = [rng.standard_normal((10, 25)) for _ in range(4)]
        estimates.append(distances.swept_distances(patterns, residuals, "univariate", [5])[0][0])
    estimates = np.array(estimates)
    # Source: unbiasedness -- selecting on the training runs leaves the mean at 0 (within 3.5 standard errors).
    assert np.all(np.abs(estimates.mean(axis=0)) < 3.5 * estimates.std(axis=0, ddof=1) / np.sqrt(len(estimates)))


# -- the jobs (files in, files out) ----------------------------------------------

def _geometry_entry(**changes):
    features = {c: {"modality": c.split("_")[0], "shape": c.split("_")[1]} for c in LANTERNS}
    geometry = {"conditions": LANTERNS, "features": features, "distance": "crossnobis", "noise_normalisation": "multivariate",
                "comparison": "kendall_tau_a", "models": [{"name": "shape", "differ_in": ["shape"]},
                                                          {"name": "modality", "differ_in": ["modality"]}], **changes}
    return {"name": "geo", "kind": "geometry", "rois": ["ember", "hush"], "geometry": geometry}


@pytest.mark.parametrize("counts", [["all"], [5, "all"]])
def test_subject_and_group_jobs_write_the_documented_tables(tmp_path, counts):
    import json
    import logging

    import pandas as pd

    from foldwise import contract
    from foldwise.jobs import geometry_group, geometry_patterns, geometry_subject

    rng = np.random.default_rng(17)
    log = logging.getLogger("test_geometry")
    shape_code = {s: rng.standard_normal(20) for s in ("round", "square", "star")}
    analysis = _geometry_entry(voxel_counts=counts)
    fits, distances_paths = [], []
    for subject in ("01", "02", "03", "04"):
        folder = tmp_path / subject
        folder.mkdir()
        truth = np.stack([np.r_[shape_code[c.split("_")[1]], np.zeros(20)] for c in LANTERNS])  # ember: shape code; hush: nothing
        betas = truth[None] + 0.5 * rng.standard_normal((4, 6, 40))
        residuals = rng.standard_normal((4 * 30, 40))
        inputs = {"betas": str(folder / "b.npy"), "residuals": str(folder / "r.npy"), "index": str(folder / "i.json")}
        geometry_patterns.save_npy(inputs["betas"], betas)
        geometry_patterns.save_npy(inputs["residuals"], residuals.astype(np.float32))
        (folder / "i.json").write_text(json.dumps({"n_scans": [30] * 4, "conditions": LANTERNS,
                                                   "rois": {"ember": list(range(20)), "hush": list(range(20, 40))}}))
        outputs = {key: str(folder / f"{key}.tsv") for key in ("distances", "matrices", "fits")}
        geometry_subject.run(inputs, outputs, {"analysis": analysis, "subject": subject}, log)
        fits.append(outputs["fits"])
        distances_paths.append(outputs["distances"])
        table = contract.read_table("geometry_distances", outputs["distances"])
        assert len(table) == 2 * len(counts) * 15 and list(table.columns) == list(contract.GEOMETRY_DISTANCE_COLUMNS)
        assert sorted(set(table["n_used"])) == sorted({5, 20} if len(counts) == 2 else {20})
        square = pd.read_csv(outputs["matrices"], sep="\t")
        assert square.shape == (2 * len(counts) * 6, 6 + 6)
    out = {key: str(tmp_path / f"group_{key}") for key in ("table", "pairwise", "mean_matrices", "ceilings", "summary")}
    out.update({key: str(tmp_path / f"{key}.png") for key in ("matrix_png", "mds_png", "fits_png")})
    geometry_group.run({"fits": fits, "distances": distances_paths}, out,
                       {"analysis": analysis, "subjects": ["01", "02", "03", "04"], "group": {"n_draws": 1000, "alpha": 0.05},
                        "seed": 1}, log)
    group = contract.read_table("geometry_group_table", out["table"])
    assert sorted(set(group["n_voxels"].astype(str))) == sorted(map(str, counts))
    group = group[group["n_voxels"].astype(str) == "all"].set_index(["roi", "model"])
    assert bool(group.loc[("ember", "shape"), "exact"]) and group.loc[("ember", "shape"), "n_flips"] == 16
    assert group.loc[("ember", "shape"), "mean"] > 0.2  # the simulated shape code
    assert len(contract.read_table("geometry_pairwise", out["pairwise"])) == 2 * len(counts)
    with open(out["summary"], encoding="utf-8") as handle:
        assert "geometry geo: crossnobis, multivariate" in handle.read()


def test_geometry_kind_in_the_study_model_and_the_plan():
    from foldwise import plan
    from foldwise.config import load_yaml, validate
    from foldwise.study import build_study

    study = build_study(validate(load_yaml("config/config.yaml"), path="config/config.yaml"), path="config/config.yaml")
    analysis = study.analyses["lantern_geometry"]
    assert analysis.kind == "geometry" and analysis.class_names == tuple(LANTERNS) and analysis.rois == ("ember", "glow", "hush")
    steps = [step for step, _ in plan.planned_jobs(study)]
    n_subjects = len(study.subjects)
    assert {step: steps.count(step) for step in set(steps) if step.startswith("geometry")} == {
        "geometry_patterns": n_subjects, "geometry_subject": n_subjects, "geometry_group": 1,
        "geometry_searchlight": n_subjects, "geometry_searchlight_group": 1}
    # No decoding job for a geometry analysis, and the report reads its group table and figures.
    assert not [w for step, w in plan.planned_jobs(study) if step == "decode" and w["analysis"] == "lantern_geometry"]
    assert "geometry_group_table" in plan.report_input_index(study)
