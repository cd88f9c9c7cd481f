"""Speed of representational geometry: the ROI job + group stage, and the geometry searchlight.

1. ROI job (invented data): 6 conditions, 8 runs of 150 scans, 2,000
   voxels, multivariate (Ledoit-Wolf) noise normalisation, 3 models,
   Kendall's tau-a; then the group stage over 20 subjects x 3 models with
   10,000 sign flips (max-statistic FWE). foldwise
   (``foldwise.geometry``) against a straightforward implementation:
   per fold scikit-learn's ``LedoitWolf`` on the training residuals and
   ``numpy.linalg.inv``, a Python loop over run pairs and condition pairs,
   ``scipy.stats`` pair counting for tau-a, and a loop over the 10,000
   flips. The outputs must agree to 1e-10. Target: >= 20x.
2. Geometry searchlight of one subject: ~60,000 brain voxels, 123-voxel
   spheres (radius 3 voxels), 8 runs x 6 conditions, univariate noise
   normalisation, 3 models. Target: <= 60 s.
3. Calibration of the group tests on null studies (``--null-studies``, default
   1,000): every subject's patterns are noise (no condition differs) with
   correlated voxels; the whole chain (crossnobis with Ledoit-Wolf
   normalisation, tau-a fits, sign-flip test with max-statistic FWE over
   ROIs x models, pairwise comparisons) must reject at most alpha of the
   time: the rates are printed with their binomial 99 % interval.

All times come from this one run; the table prints their ratios.

Run: .venv/bin/python benchmarks/bench_geometry.py
"""

import argparse
import itertools
import os
import time

os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")
os.environ.setdefault("OMP_NUM_THREADS", "1")

import numpy as np  # noqa: E402
from scipy import stats  # noqa: E402
from sklearn.covariance import LedoitWolf  # noqa: E402

from foldwise.geometry import compare, distances, inference, models, noise  # noqa: E402
from foldwise.searchlight.engine import sphere_neighbourhoods  # noqa: E402
from foldwise.searchlight.geometry import sphere_model_fits  # noqa: E402

N_RUNS, N_SCANS, N_VOXELS, N_SUBJECTS, N_FLIPS = 8, 150, 2000, 20, 10_000
CONDITIONS = [f"{m}_{s}" for m in ("seen", "heard") for s in ("round", "square", "star")]
FEATURES = {c: {"modality": c.split("_")[0], "shape": c.split("_")[1]} for c in CONDITIONS}
MODELS = [{"name": "shape", "differ_in": ["shape"]}, {"name": "modality", "differ_in": ["modality"]},
          {"name": "shape_within_seen", "differ_in": ["shape"], "only_for": {"modality": ["seen"]}}]
GRID = (48, 57, 45)


def _subject(rng):
    mix = np.eye(N_VOXELS) + rng.standard_normal((N_VOXELS, N_VOXELS)) * (0.3 / np.sqrt(N_VOXELS))
    means = rng.standard_normal((6, N_VOXELS)) * 0.3
    patterns = means[None] + rng.standard_normal((N_RUNS, 6, N_VOXELS))
    residuals = [rng.standard_normal((N_SCANS, N_VOXELS)) @ mix for _ in range(N_RUNS)]
    return patterns, residuals


def fast_roi(patterns, residuals, model_set):
    folds = noise.fold_noise("multivariate", residuals)
    dissimilarity = distances.crossvalidated_distances(patterns, folds)
    return dissimilarity, compare.kendall_tau_a(dissimilarity, model_set)[0]


def reference_roi(patterns, residuals, model_set):
    n_runs, n_conditions, n_voxels = patterns.shape
    pairs = list(itertools.combinations(range(n_conditions), 2))
    dissimilarity = np.zeros(len(pairs))
    for k in range(n_runs):
        training = np.concatenate(residuals[:k] + residuals[k + 1:], axis=0)
        weight = np.linalg.inv(LedoitWolf(assume_centered=True).fit(training).covariance_)
        for m in range(n_runs):
            if m == k:
                continue
            for p, (i, j) in enumerate(pairs):
                dissimilarity[p] += (patterns[m, i] - patterns[m, j]) @ weight @ (patterns[k, i] - patterns[k, j])
    dissimilarity /= n_runs * (n_runs - 1) * n_voxels
    fits = []
    for model in model_set:
        score = 0.0
        for a, b in itertools.combinations(range(len(pairs)), 2):
            score += np.sign(dissimilarity[a] - dissimilarity[b]) * np.sign(model[a] - model[b])
        fits.append(score / (len(pairs) * (len(pairs) - 1) / 2))
    return dissimilarity, np.array(fits)


def fast_group(fits, flips):
    return inference.signflip_test(fits, flips)


def reference_group(fits, flips):
    n_subjects = fits.shape[0]
    t_values = np.empty((flips.shape[0], fits.shape[1]))
    for d, flip in enumerate(flips):
        flipped = flip[:, None] * fits
        t_values[d] = flipped.mean(axis=0) / (flipped.std(axis=0, ddof=1) / np.sqrt(n_subjects))
    observed = t_values[0]
    threshold = observed - inference.TIE_RELATIVE * np.maximum(1.0, np.abs(observed))
    return {"t": observed, "p": (t_values >= threshold).mean(axis=0),
            "p_fwe": (t_values.max(axis=1)[:, None] >= threshold[None, :]).mean(axis=0)}


def _brain():
    grid = np.indices(GRID).reshape(3, -1).T.astype(np.float64)
    centre = (np.asarray(GRID) - 1) / 2.0
    radii = np.asarray(GRID) / 2.0 - 0.5
    return ((((grid - centre) / radii) ** 2).sum(axis=1) <= 1.0).reshape(GRID)


def searchlight_glm_s(n_brain, rng, n_runs=N_RUNS, n_scans=N_SCANS, tr_s=2.0):
    """Seconds of the geometry searchlight job's GLM refit (betas per condition + residual sums) on n_brain voxels."""
    import pandas as pd

    from foldwise.config import load_yaml, validate
    from foldwise.geometry.residuals import glm_residuals
    from foldwise.glm.estimate import estimate_patterns

    glm = validate(load_yaml("config/config.yaml"), path="config/config.yaml")["glm"]
    glm = {**glm, "pattern_mode": "per_condition", "statistic": "beta"}
    onsets = np.arange(6 * 4) * (n_scans * tr_s - 40) / 24 + 10
    events = pd.DataFrame({"onset": onsets, "duration": 2.0, "trial_type": np.tile(CONDITIONS, 4)})
    start = time.perf_counter()
    for _ in range(n_runs):
        bold = (100 + rng.standard_normal((n_scans, n_brain))).astype(np.float32)
        estimate = estimate_patterns(bold, events, tr_s, glm, None, [])
        residuals = glm_residuals(estimate.design.matrix, bold, estimate.rho)
        np.einsum("ij,ij->j", residuals, residuals)
    return time.perf_counter() - start


def null_calibration(n_studies, n_subjects=10, n_rois=3, n_voxels=40, n_runs=4, n_scans=30, alpha=0.05, seed=7):
    """False-positive rates of the geometry group tests on null studies (see the module docstring)."""
    rng = np.random.default_rng(seed)
    model_set = models.model_vectors(CONDITIONS, FEATURES, MODELS)
    mixes = [np.eye(n_voxels) + 0.3 * rng.standard_normal((n_voxels, n_voxels)) / np.sqrt(n_voxels) for _ in range(n_rois)]
    any_fit, any_pair, cell = 0, 0, 0
    for _ in range(n_studies):
        fits = np.empty((n_subjects, n_rois, model_set.shape[0]))
        for s in range(n_subjects):
            for r in range(n_rois):
                common = rng.standard_normal(n_voxels)  # a response shared by every condition: no condition differs
                patterns = common + rng.standard_normal((n_runs, len(CONDITIONS), n_voxels)) @ mixes[r]
                residuals = [rng.standard_normal((n_scans, n_voxels)) @ mixes[r] for _ in range(n_runs)]
                d = distances.crossvalidated_distances(patterns, noise.fold_noise("multivariate", residuals))
                fits[s, r] = compare.kendall_tau_a(d, model_set)[0]
        flips, _ = inference.sign_flips(n_subjects, 1000, rng)
        tested = inference.signflip_test(fits.reshape(n_subjects, -1), flips)
        differences, _ = inference.pairwise_differences(fits, [m["name"] for m in MODELS])
        paired = inference.signflip_test(differences.reshape(n_subjects, -1), flips, two_sided=True)
        any_fit += np.any(tested["p_fwe"] <= alpha)
        any_pair += np.any(paired["p_fwe"] <= alpha)
        cell += tested["p"][0] <= alpha
    low, high = stats.binom.ppf([0.005, 0.995], n_studies, alpha) / n_studies
    print(f"null calibration: {n_studies} null studies x {n_subjects} subjects x {n_rois} ROIs x {model_set.shape[0]} models "
          f"(crossnobis, multivariate, tau-a), alpha {alpha}; binomial 99% interval {low:.3f}..{high:.3f}")
    for label, count in (("model fit > 0, any cell, p_fwe", any_fit), ("model vs model, any pair, p_fwe", any_pair),
                         ("model fit > 0, one cell, uncorrected p", cell)):
        rate = count / n_studies
        print(f"  {label:<40} {rate:.3f}  {'within' if low <= rate <= high else 'OUTSIDE'}")


def main():
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--null-studies", type=int, default=1000)
    arguments = parser.parse_args()
    rng = np.random.default_rng(20261203)
    model_set = models.model_vectors(CONDITIONS, FEATURES, MODELS)
    patterns, residuals = _subject(rng)

    start = time.perf_counter()
    fast_d, fast_fit = fast_roi(patterns, residuals, model_set)
    fast_roi_s = time.perf_counter() - start
    start = time.perf_counter()
    ref_d, ref_fit = reference_roi(patterns, residuals, model_set)
    reference_roi_s = time.perf_counter() - start
    roi_difference = max(np.max(np.abs(fast_d - ref_d) / np.max(np.abs(ref_d))), np.max(np.abs(fast_fit - ref_fit)))

    group_fits = rng.normal(0.1, 0.3, size=(N_SUBJECTS, model_set.shape[0]))
    flips, _ = inference.sign_flips(N_SUBJECTS, N_FLIPS, np.random.default_rng(1))
    start = time.perf_counter()
    fast_out = fast_group(group_fits, flips)
    fast_group_s = time.perf_counter() - start
    start = time.perf_counter()
    ref_out = reference_group(group_fits, flips)
    reference_group_s = time.perf_counter() - start
    group_difference = max(np.max(np.abs(fast_out[key] - ref_out[key])) for key in ("t", "p", "p_fwe"))

    fast_total, reference_total = fast_roi_s + fast_group_s, reference_roi_s + reference_group_s
    print(f"ROI job: {len(CONDITIONS)} conditions, {N_RUNS} runs x {N_SCANS} scans, {N_VOXELS} voxels, multivariate, "
          f"{model_set.shape[0]} models; group: {N_SUBJECTS} subjects, {N_FLIPS} sign flips")
    print(f"{'stage':<28}{'foldwise s':>12}{'reference s':>13}{'ratio':>9}")
    print(f"{'distances + model fits':<28}{fast_roi_s:>12.3f}{reference_roi_s:>13.3f}{reference_roi_s / fast_roi_s:>9.1f}")
    print(f"{'group sign-flip test':<28}{fast_group_s:>12.3f}{reference_group_s:>13.3f}{reference_group_s / fast_group_s:>9.1f}")
    print(f"{'total':<28}{fast_total:>12.3f}{reference_total:>13.3f}{reference_total / fast_total:>9.1f}   (target >= 20)")
    print(f"largest difference: distances (relative) / fits {roi_difference:.2e}; group t, p {group_difference:.2e}  (target <= 1e-10)")

    mask = _brain()
    n_brain = int(mask.sum())
    spheres = sphere_neighbourhoods(mask, np.diag([3.0, 3.0, 3.0, 1.0]), 9.0)
    brain_patterns = rng.standard_normal((N_RUNS, len(CONDITIONS), n_brain))
    inverse_variance = 1.0 / rng.uniform(0.5, 2.0, size=(N_RUNS, n_brain))
    start = time.perf_counter()
    fits = sphere_model_fits(brain_patterns, spheres, model_set, "kendall_tau_a", inverse_variance)
    searchlight_s = time.perf_counter() - start
    glm_s = searchlight_glm_s(n_brain, rng)
    print(f"searchlight: {n_brain} voxels, spheres of {int(spheres.sizes.max())} voxels (median {int(np.median(spheres.sizes))}), "
          f"{fits.shape[1]} models, univariate: distances and fits {searchlight_s:.2f} s + GLM refit of {N_RUNS} runs x {N_SCANS} scans "
          f"{glm_s:.2f} s = {searchlight_s + glm_s:.2f} s per subject (target <= 60 s)")
    start = time.perf_counter()
    null_calibration(arguments.null_studies)
    print(f"  ({time.perf_counter() - start:.0f} s)")


if __name__ == "__main__":
    main()
