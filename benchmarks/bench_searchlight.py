"""Speed of one subject's whole-brain searchlight: foldwise against a per-sphere scikit-learn refit loop.

The job (invented data): a brain of about 60,000 voxels (an ellipsoid on a
3 mm grid), spheres of radius 9 mm = 3 voxels (123 voxels inside the brain),
8 runs x 4 conditions with one pattern per condition and run (32 patterns),
4 classes, leave-one-run-out, real labels only. foldwise scores every centre;
the reference refits a scikit-learn Pipeline (StandardScaler -> the
counterpart classifier) per sphere and fold on a random sample of spheres,
and its time is extrapolated to all centres. Accuracies of the sampled
spheres are compared (they must be identical).

Each measurement runs in a fresh child process (one BLAS thread), so the
peak memory reported is that measurement's own: the child's peak resident
set size from ``resource.getrusage(RUSAGE_SELF).ru_maxrss`` (it includes the
interpreter, numpy/scipy/sklearn and the data; the "baseline" row is a child
that only builds the data). All times come from this one run; the table
prints their ratios.

Run: .venv/bin/python benchmarks/bench_searchlight.py [--sample 200] [--svm-centres 600] [--classifiers ...]
"""

import argparse
import multiprocessing
import os
import resource
import time

os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")
os.environ.setdefault("OMP_NUM_THREADS", "1")

import numpy as np  # noqa: E402

N_RUNS, N_CLASSES = 8, 4
VOXEL_MM, RADIUS_MM = 3.0, 9.0
GRID = (48, 57, 45)
TARGET_S = 60.0
TARGET_RATIO = 100.0


def _brain():
    """An ellipsoid brain mask with a little over 60,000 voxels, and a class code in a blob."""
    grid = np.indices(GRID).reshape(3, -1).T.astype(np.float64)
    centre = (np.asarray(GRID) - 1) / 2.0
    radii = np.asarray(GRID) / 2.0 - 0.5
    mask = (((grid - centre) / radii) ** 2).sum(axis=1) <= 1.0
    return mask.reshape(GRID)


def _data(seed=20261201):
    mask = _brain()
    rng = np.random.default_rng(seed)
    n_voxels = int(mask.sum())
    labels = np.tile(np.arange(N_CLASSES), N_RUNS)
    runs = np.repeat(np.arange(N_RUNS), N_CLASSES)
    patterns = rng.standard_normal((labels.size, n_voxels))
    informative = rng.choice(n_voxels, n_voxels // 5, replace=False)  # some spheres carry a code, most do not
    patterns[:, informative] += 0.7 * rng.standard_normal((N_CLASSES, informative.size))[labels]
    return mask, patterns, labels, runs


def _reference_predict(classifier, train, train_labels, test):
    from scipy.spatial.distance import cdist
    from sklearn.discriminant_analysis import LinearDiscriminantAnalysis
    from sklearn.naive_bayes import GaussianNB
    from sklearn.neighbors import NearestCentroid
    from sklearn.pipeline import make_pipeline
    from sklearn.preprocessing import StandardScaler
    from sklearn.svm import SVC

    equal = np.full(N_CLASSES, 1.0 / N_CLASSES)
    if classifier == "correlation_centroid":
        scaler = StandardScaler().fit(train)
        centroids = NearestCentroid().fit(scaler.transform(train), train_labels).centroids_
        return np.argmin(cdist(scaler.transform(test), centroids, metric="correlation"), axis=1)
    estimator = {"gaussian_nb": GaussianNB(priors=equal),
                 "shrinkage_lda": LinearDiscriminantAnalysis(solver="lsqr", shrinkage="auto", priors=equal),
                 "linear_svm": SVC(kernel="linear", C=1.0)}[classifier]
    return make_pipeline(StandardScaler(), estimator).fit(train, train_labels).predict(test)


def _child(task, queue):
    """One measurement in a fresh process: returns ((wall s, CPU s), peak MB, extra)."""
    from foldwise.searchlight import engine as sl

    mask, patterns, labels, runs = _data()
    kind, classifier, arguments = task
    started, cpu_started = time.perf_counter(), time.process_time()
    extra = None
    if kind == "baseline":
        spheres = sl.sphere_neighbourhoods(mask, np.diag([VOXEL_MM] * 3 + [1.0]), RADIUS_MM)
        extra = {"n_voxels": int(mask.sum()), "sizes": (int(spheres.sizes.min()), int(spheres.sizes.max()))}
        seconds = cpu_seconds = 0.0
    elif kind == "neighbourhoods":
        spheres = sl.sphere_neighbourhoods(mask, np.diag([VOXEL_MM] * 3 + [1.0]), RADIUS_MM)
        spheres.sum_operator
        seconds, cpu_seconds = time.perf_counter() - started, time.process_time() - cpu_started
    elif kind == "foldwise":
        spheres = sl.sphere_neighbourhoods(mask, np.diag([VOXEL_MM] * 3 + [1.0]), RADIUS_MM)
        if arguments.get("n_centres"):
            spheres = spheres.subset(np.arange(arguments["n_centres"]))
        started, cpu_started = time.perf_counter(), time.process_time()
        scores, _ = sl.searchlight_scores(patterns, labels, runs, spheres, classifier=classifier,
                                          n_permutations=arguments.get("n_permutations", 0), rng=np.random.default_rng(1))
        seconds, cpu_seconds = time.perf_counter() - started, time.process_time() - cpu_started
        sample = arguments["sample"]
        extra = {"n_centres": spheres.n_centres, "scores": scores[0, sample[sample < spheres.n_centres], 0]}
    else:  # the per-sphere scikit-learn refit loop
        from sklearn.metrics import balanced_accuracy_score
        from sklearn.model_selection import LeaveOneGroupOut

        spheres = sl.sphere_neighbourhoods(mask, np.diag([VOXEL_MM] * 3 + [1.0]), RADIUS_MM)
        sample = arguments["sample"]
        splits = list(LeaveOneGroupOut().split(patterns, labels, runs))
        started, cpu_started = time.perf_counter(), time.process_time()
        values = []
        for centre in sample:
            columns = spheres.indices[centre][spheres.indices[centre] >= 0]
            data = patterns[:, columns]
            fold_scores = [balanced_accuracy_score(labels[test], _reference_predict(classifier, data[train], labels[train], data[test]))
                           for train, test in splits]
            values.append(np.mean(fold_scores))
        seconds, cpu_seconds = time.perf_counter() - started, time.process_time() - cpu_started
        extra = {"scores": np.asarray(values)}
    queue.put(((seconds, cpu_seconds), resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0, extra))


def _measure(task):
    context = multiprocessing.get_context("spawn")
    queue = context.Queue()
    process = context.Process(target=_child, args=(task, queue))
    process.start()
    result = queue.get()
    process.join()
    return result


def main():
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--sample", type=int, default=200, help="spheres refitted by the scikit-learn loop")
    parser.add_argument("--svm-centres", type=int, default=600, help="centres the foldwise linear SVM scores (it is slow by design)")
    parser.add_argument("--permutations", type=int, default=10, help="permutations timed for the null's cost (0: skip)")
    parser.add_argument("--classifiers", nargs="+", default=["correlation_centroid", "gaussian_nb", "shrinkage_lda", "linear_svm"],
                        help="which classifiers to measure")
    arguments = parser.parse_args()

    _, baseline_mb, info = _measure(("baseline", None, {}))
    n_voxels = info["n_voxels"]
    (neighbourhood_s, _), _, _ = _measure(("neighbourhoods", None, {}))
    sample = np.sort(np.random.default_rng(7).choice(n_voxels, arguments.sample, replace=False))
    print(f"brain {n_voxels} voxels on a {GRID} grid of {VOXEL_MM:g} mm; spheres of {RADIUS_MM:g} mm hold "
          f"{info['sizes'][0]}-{info['sizes'][1]} voxels; {N_RUNS} runs x {N_CLASSES} conditions = {N_RUNS * N_CLASSES} patterns; "
          f"leave one run out; real labels only; one BLAS thread per process")
    print(f"neighbourhood index + sparse operator: {neighbourhood_s:.2f} s; baseline peak RSS (data, no searchlight): {baseline_mb:.0f} MB")
    print("wall = elapsed seconds (includes waiting for a shared CPU); cpu = the process's own CPU seconds; ratios on CPU time")
    print()
    header = (f"{'classifier':22s} {'foldwise wall':>13s} {'cpu':>7s} {'sklearn loop cpu':>17s} {'ratio':>7s} {'target':>7s} "
              f"{'max |diff| acc':>15s} {'peak RSS MB':>12s}")
    print(header)
    print("-" * len(header))
    real_cpu = {}
    for classifier in arguments.classifiers:
        n_centres = arguments.svm_centres if classifier == "linear_svm" else None
        (wall_s, cpu_s), peak_mb, result = _measure(("foldwise", classifier, {"sample": sample, "n_centres": n_centres}))
        scale = n_voxels / result["n_centres"]
        (_, reference_cpu_s), _, reference = _measure(("reference", classifier, {"sample": sample}))
        reference_brain_s = reference_cpu_s * n_voxels / sample.size
        compared = sample < result["n_centres"]
        difference = float(np.max(np.abs(result["scores"] - reference["scores"][compared])))
        ratio = reference_brain_s / (cpu_s * scale)
        note = "" if n_centres is None else f"  (extrapolated from {result['n_centres']} centres)"
        target = "-" if classifier == "linear_svm" else ("met" if cpu_s <= TARGET_S and ratio >= TARGET_RATIO else "MISSED")
        print(f"{classifier:22s} {wall_s * scale:13.1f} {cpu_s * scale:7.1f} {reference_brain_s:17.0f} {ratio:7.0f} {target:>7s} "
              f"{difference:15.2g} {peak_mb:12.0f}{note}")
        real_cpu[classifier] = cpu_s
    if arguments.permutations:
        print()
        print(f"cost of the null: whole brain, real labels + {arguments.permutations} permutations (CPU seconds)")
        for classifier in [name for name in ("correlation_centroid", "gaussian_nb") if name in real_cpu]:
            (_, cpu_s), peak_mb, _ = _measure(("foldwise", classifier, {"sample": sample, "n_permutations": arguments.permutations}))
            per_permutation = (cpu_s - real_cpu[classifier]) / arguments.permutations
            print(f"{classifier:22s} {cpu_s:7.1f} s in all, {per_permutation:6.2f} s per permutation "
                  f"({per_permutation / real_cpu[classifier]:.2f} x the real-label run), peak RSS {peak_mb:.0f} MB")
    print()
    print(f"targets: whole brain <= {TARGET_S:g} s with correlation, naive Bayes or LDA, and >= {TARGET_RATIO:g}x the per-sphere loop "
          f"(its time extrapolated from {sample.size} spheres to {n_voxels}).")


if __name__ == "__main__":
    main()
