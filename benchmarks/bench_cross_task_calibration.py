"""Calibration of cross-task decoding on pure noise: subject-level and group tests over paired runs of two tasks.

Scenario (invented): the lanterns task and the beacon task, 4 runs each in one
session, two classes per task (lanterns: round / square; beacon: lit / dark),
3 trial patterns per class and run; a cross analysis takes one set from each
task, so run k of each task forms one fold unit
(:func:`foldwise.decoding.folds.pair_runs_across_tasks`) and the null
relabels within each run (unit x set). Noise ROI of 60 voxels; voxel counts
10 and all; signal selection; correlation-to-centroid classifier; 100
permutations per subject.

Printed, per direction (H0 exactly true: noise patterns):

- the variance ratio (variance of the observed fold-mean balanced accuracy
  across null subjects over the mean variance of a subject's null); a
  calibrated null gives 1 (acceptance band 0.85-1.15);
- the share of subject-level p <= alpha beside the attainable level of the
  discrete null, with the binomial 99% interval around it
  (scipy.stats.binom.interval, through foldwise.stats.calibration);
- on disjoint groups of null subjects: the false-positive rate of the group
  permutation test (p_perm) and its family-wise version, with binomial 99%
  bounds.

Run: ``OPENBLAS_NUM_THREADS=1 .venv/bin/python benchmarks/bench_cross_task_calibration.py``
(``--groups 100 --group-size 20``: 2,000 null subjects; a few minutes on one core).
"""

import argparse
import os
import platform
import time

import numpy as np

from foldwise.decoding.folds import make_folds, pair_runs_across_tasks
from foldwise.stats import calibration

ALPHAS = (0.05, 0.01)


def cross_task_design(n_runs=4, per_class=3, n_voxels=60, n_permutations=100):
    """The NullDesign of a two-task cross analysis, with the decode job's pairing of runs."""
    labels, sets, runs = [], [], []
    for task, prefix in ((0, ""), (1, "task-beacon_")):
        for run in range(n_runs):
            for klass in (0, 1):
                labels += [klass] * per_class
                sets += [task] * per_class
                runs += [f"ses-1_{prefix}run-{run + 1}"] * per_class
    sets = np.array(sets)
    units = pair_runs_across_tasks(np.array(runs), sets, ("lanterns", "beacon"))
    options = {"classifier": "correlation_centroid", "selection": "signal", "n_classes": 2, "folds": make_folds(units)}
    return calibration.NullDesign(labels=np.array(labels), runs=units, n_voxels=n_voxels, voxel_counts=(10, "all"),
                                  n_permutations=n_permutations, set_index=sets, set_names=("lanterns", "beacon"), options=options)


def subject_level_rows(records, n_subjects):
    """(direction, ratios, alpha, rejections, level, low, high, ok) per direction and alpha."""
    rows = []
    for direction, record in records.items():
        ratios = calibration.variance_ratio(record["observed"], record["null"])
        for alpha in ALPHAS:
            for count in range(record["p"].shape[1]):
                rejections = int(np.sum(record["p"][:, count] <= alpha))
                level = float(record["level"][alpha][:, count].mean())
                low, high = calibration.binomial_bounds(n_subjects, level)
                _, high_alpha = calibration.binomial_bounds(n_subjects, alpha)
                rows.append((direction, ratios, alpha, count, rejections, level, low, high,
                             bool(low <= rejections <= high and rejections <= high_alpha)))
    return rows


def main():
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--groups", type=int, default=100)
    parser.add_argument("--group-size", type=int, default=20)
    parser.add_argument("--draws", type=int, default=1000, help="group-level draws per null group")
    parser.add_argument("--seed", type=int, default=20261203)
    arguments = parser.parse_args()
    n_subjects = arguments.groups * arguments.group_size
    print(f"bench_cross_task_calibration: {platform.python_version()} on {platform.machine()}, OPENBLAS_NUM_THREADS="
          f"{os.environ.get('OPENBLAS_NUM_THREADS', 'unset')}; {n_subjects} null subjects, {arguments.groups} groups of "
          f"{arguments.group_size}, {arguments.draws} group draws")
    rng = np.random.default_rng(arguments.seed)
    design = cross_task_design()
    start = time.perf_counter()
    records = calibration.null_subjects(design, n_subjects, rng)
    seconds = time.perf_counter() - start
    print(f"{n_subjects} null subjects in {seconds:.1f} s ({1000 * seconds / n_subjects:.1f} ms per subject)")
    print(f"{'direction':<22} {'var ratio (10, all)':<20} {'alpha':>6} {'count':>6}  rate / level [99% bounds]")
    all_ok = True
    for direction, ratios, alpha, count, rejections, level, low, high, ok in subject_level_rows(records, n_subjects):
        ratio_ok = bool(np.all((ratios >= 0.85) & (ratios <= 1.15)))
        all_ok &= ok and ratio_ok
        print(f"{direction:<22} {' '.join(f'{r:.3f}' for r in ratios):<20} {alpha:>6.2f} {('10', 'all')[count]:>6}  "
              f"{rejections / n_subjects:.4f} / {level:.4f} [{low / n_subjects:.4f}-{high / n_subjects:.4f}] "
              f"{'ok' if ok and ratio_ok else 'OUT OF BOUNDS'}")
    print(f"{'direction':<22} {'test':<26} {'alpha':>6} {'rate':>8} {'99% bounds':>16}")
    for direction, record in records.items():
        counts = calibration.group_false_positives(record, 0.5, arguments.group_size, arguments.draws, ALPHAS, rng)
        for position, alpha in enumerate(ALPHAS):
            for test in ("p_perm", "p_fwe"):
                family = test == "p_fwe"
                n_tests = counts["n_groups"] * (1 if family else counts["n_cells"])
                low, high = calibration.binomial_bounds(n_tests, alpha)
                rejections = int(counts[test][position])
                all_ok &= rejections <= high
                print(f"{direction:<22} {test + (' (any in family)' if family else ''):<26} {alpha:>6.2f} {rejections / n_tests:>8.4f} "
                      f"{low / n_tests:>7.4f}-{high / n_tests:.4f}  {'ABOVE' if rejections > high else ('below' if rejections < low else 'ok')}")
    print("\nall rates at or below their upper bound and all variance ratios in 0.85-1.15:", all_ok)


if __name__ == "__main__":
    main()
