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

All times come from this one run; the table prints their ratios.

Run: .venv/bin/python benchmarks/bench_geometry.py
"""

import itertools
import os
import time

os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")
os.environ.setdefault("OMP_NUM_THREADS", "1")

import numpy as np  # noqa: E402
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


def main():
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
    print(f"searchlight: {n_brain} voxels, spheres of {int(spheres.sizes.max())} voxels (median {int(np.median(spheres.sizes))}), "
          f"{fits.shape[1]} models, univariate: {searchlight_s:.2f} s per subject (target <= 60 s)")


if __name__ == "__main__":
    main()
