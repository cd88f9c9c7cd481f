"""Calibration benchmark: the project's own decoding and group tests on pure noise, at large sizes.

Scenario (invented, the lanterns demo's designs): 4 runs, 3 shape classes,
one pattern per class and run (per-condition patterns); the within analysis
decodes the seen shapes, the cross analysis the shapes across seen and
heard lanterns (five directions). Noise ROI of 150 voxels; voxel counts 10,
50 and all; signal selection; correlation-to-centroid classifier (batched);
100 permutations per subject (the demo's setting).

Printed, per analysis and direction (H0 exactly true):

- the variance ratio (variance of the observed fold-mean balanced accuracy
  across null subjects over the mean variance of a subject's null), per
  count: a calibrated null gives 1; the acceptance band is 0.85-1.15;
- the share of subject-level p <= alpha beside the attainable level of the
  discrete null (the exact rejection probability given each subject's
  scores; below alpha because fold-mean accuracies are discrete and ties
  count as extreme) with the binomial 99% interval around it
  (scipy.stats.binom.interval);
- on disjoint groups of 20 null subjects (>= 500 groups): the false-positive
  rate of the group tests (p_perm, p_t, p_wilcoxon, p_fwe, prevalence) at
  alpha .05 and .01, with binomial 99% bounds.

Run: ``OPENBLAS_NUM_THREADS=1 .venv/bin/python benchmarks/bench_calibration.py``
(``--groups 500 --group-size 20`` are the defaults: 10,000 null subjects per
analysis; minutes on one core). Cost per null subject is printed.
"""

import argparse
import os
import platform
import time

import numpy as np

from foldwise.stats import calibration

ALPHAS = (0.05, 0.01)


def designs(n_runs=4, n_classes=3, n_voxels=150, n_permutations=100):
    runs = np.repeat(np.arange(n_runs), 2 * n_classes)
    sets = np.tile(np.repeat([0, 1], n_classes), n_runs)
    labels = np.tile(np.arange(n_classes), 2 * n_runs)
    options = {"classifier": "correlation_centroid", "selection": "signal", "n_classes": n_classes}
    counts = (10, 50, "all")
    seen = sets == 0
    return {
        "shape (within)": calibration.NullDesign(labels=labels[seen], runs=runs[seen], n_voxels=n_voxels, voxel_counts=counts,
                                                 n_permutations=n_permutations, options=options),
        "shape_seen_heard (cross)": calibration.NullDesign(labels=labels, runs=runs, n_voxels=n_voxels, voxel_counts=counts,
                                                           n_permutations=n_permutations, set_index=sets, set_names=("seen", "heard"),
                                                           options=options),
    }


def main():
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--groups", type=int, default=500)
    parser.add_argument("--group-size", type=int, default=20)
    parser.add_argument("--draws", type=int, default=1000, help="group-level draws per null group")
    parser.add_argument("--seed", type=int, default=20261203)
    arguments = parser.parse_args()
    n_subjects = arguments.groups * arguments.group_size
    print(f"bench_calibration: {platform.python_version()} on {platform.machine()}, OPENBLAS_NUM_THREADS="
          f"{os.environ.get('OPENBLAS_NUM_THREADS', 'unset')}; {n_subjects} null subjects per analysis, "
          f"{arguments.groups} groups of {arguments.group_size}, {arguments.draws} group draws")
    rng = np.random.default_rng(arguments.seed)
    all_ok = True
    for name, design in designs().items():
        start = time.perf_counter()
        records = calibration.null_subjects(design, n_subjects, rng)
        subject_seconds = time.perf_counter() - start
        print(f"\n== {name}: {n_subjects} null subjects in {subject_seconds:.1f} s "
              f"({1000 * subject_seconds / n_subjects:.1f} ms per subject, {design.n_permutations} permutations)")
        print("subject-level p <= alpha per count (10, 50, all): rate, attainable level of the discrete null, and the binomial 99% "
              "interval around that level")
        print(f"{'direction':<16} {'var ratio (10, 50, all)':<24} {'alpha':>6}  {'rate / level [99% bounds] per count'}")
        for direction, record in records.items():
            ratios = calibration.variance_ratio(record["observed"], record["null"])
            ok = bool(np.all((ratios >= 0.85) & (ratios <= 1.15)))
            for alpha in ALPHAS:
                cells = []
                for count in range(record["p"].shape[1]):
                    rejections = int(np.sum(record["p"][:, count] <= alpha))
                    level = float(record["level"][alpha][:, count].mean())
                    low, high = calibration.binomial_bounds(n_subjects, level)
                    _, high_alpha = calibration.binomial_bounds(n_subjects, alpha)
                    ok &= low <= rejections <= high and rejections <= high_alpha
                    cells.append(f"{rejections / n_subjects:.4f}/{level:.4f} [{low / n_subjects:.4f}-{high / n_subjects:.4f}]")
                print(f"{direction:<16} {' '.join(f'{r:.3f}' for r in ratios):<24} {alpha:>6.2f}  {'  '.join(cells)}")
            print(f"{'':<16} {'ok' if ok else 'OUT OF BOUNDS'}")
            all_ok &= ok
        start = time.perf_counter()
        print(f"{'direction':<16} {'test':<26} {'alpha':>6} {'rate':>8} {'99% bounds':>16}")
        for direction, record in records.items():
            counts = calibration.group_false_positives(record, 1.0 / design.options["n_classes"], arguments.group_size,
                                                       arguments.draws, ALPHAS, rng)
            for position, alpha in enumerate(ALPHAS):
                for test in ("p_perm", "p_t", "p_wilcoxon", "prevalence_p_global", "p_fwe", "prevalence_p_global_fwe"):
                    family = test.endswith("fwe")
                    n_tests = counts["n_groups"] * (1 if family else counts["n_cells"])
                    low, high = calibration.binomial_bounds(n_tests, alpha)
                    rejections = int(counts[test][position])
                    above = rejections > high
                    all_ok &= not above or test in ("p_t", "p_wilcoxon")  # the parametric tests are reported, not required
                    print(f"{direction:<16} {test + (' (any in family)' if family else ''):<26} {alpha:>6.2f} {rejections / n_tests:>8.4f} "
                          f"{low / n_tests:>7.4f}-{high / n_tests:.4f}  {'ABOVE' if above else ('below' if rejections < low else 'ok')}")
        print(f"group tests: {time.perf_counter() - start:.1f} s")
    print("\nall permutation-based rates at or below their upper bound and all variance ratios in 0.85-1.15:", all_ok)


if __name__ == "__main__":
    main()
