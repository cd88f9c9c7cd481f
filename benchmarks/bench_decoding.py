"""Speed of one realistic ROI decoding job: foldwise against a straightforward scikit-learn loop.

The job: 8 runs x 4 classes x 2 patterns per class per run (64 patterns), an
ROI of 2,000 voxels, the 7-count sweep (10, 25, 50, 100, 200, 400, all),
leave-one-run-out folds and 1,000 permutations (1,001 label sets with the
real labels). foldwise runs the whole job; the reference refits a Pipeline
(SelectKBest -> StandardScaler -> classifier) per count x fold x label set,
timed on the real labels and foldwise's first few permutations and
extrapolated to 1,001 label sets. Real-label predictions of both are compared
for every count, and the reference's scores on the sampled permutations with
foldwise's null. Logistic regression is left out: foldwise calls
scikit-learn once per fit there, so there is no speed-up to measure.

Run: OPENBLAS_NUM_THREADS=1 .venv/bin/python benchmarks/bench_decoding.py [--reference-sets N]
All times come from this one run (CPU time of the process); the table prints their ratios.
"""

import argparse
import os
import time

os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")

import numpy as np  # noqa: E402
from scipy import linalg, stats  # noqa: E402
from sklearn.base import BaseEstimator, ClassifierMixin  # noqa: E402
from sklearn.covariance import ledoit_wolf  # noqa: E402
from sklearn.feature_selection import SelectKBest, f_classif  # noqa: E402
from sklearn.metrics import balanced_accuracy_score  # noqa: E402
from sklearn.naive_bayes import GaussianNB  # noqa: E402
from sklearn.pipeline import Pipeline  # noqa: E402
from sklearn.preprocessing import StandardScaler  # noqa: E402
from sklearn.svm import SVC  # noqa: E402

from foldwise.decoding.curves import decode_curve  # noqa: E402
from foldwise.decoding.folds import make_folds  # noqa: E402

N_RUNS, N_CLASSES, PER_CLASS, N_VOXELS = 8, 4, 2, 2000
COUNTS = [10, 25, 50, 100, 200, 400, "all"]
N_PERMUTATIONS = 1000
TARGETS = {"linear_svm": 10, "correlation_centroid": 100, "shrinkage_lda": 100, "gaussian_nb": 100}


class CentroidCorrelation(ClassifierMixin, BaseEstimator):
    """Reference: the class whose training mean correlates most with the test pattern (plain numpy)."""

    def fit(self, X, y):
        self.classes_ = np.unique(y)
        self.centroids_ = np.stack([X[y == klass].mean(axis=0) for klass in self.classes_])
        return self

    def predict(self, X):
        correlations = np.array([[np.corrcoef(row, centroid)[0, 1] for centroid in self.centroids_] for row in X])
        return self.classes_[np.argmax(correlations, axis=1)]


class PooledShrinkageLDA(ClassifierMixin, BaseEstimator):
    """Reference: Ledoit-Wolf (sklearn.covariance.ledoit_wolf) of the pooled residuals, equal priors, lstsq solve."""

    def fit(self, X, y):
        self.classes_ = np.unique(y)
        means = np.stack([X[y == klass].mean(axis=0) for klass in self.classes_])
        residuals = X - means[np.searchsorted(self.classes_, y)]
        covariance, _ = ledoit_wolf(residuals, assume_centered=True)
        self.coef_ = linalg.lstsq(covariance, means.T)[0].T
        self.intercept_ = -0.5 * np.einsum("kp,kp->k", means, self.coef_)
        return self

    def predict(self, X):
        return self.classes_[np.argmax(X @ self.coef_.T + self.intercept_, axis=1)]


def absolute_t(X, y):
    """Reference signal score: |one-sample t| of every voxel (scipy.stats.ttest_1samp), labels unused."""
    return np.abs(stats.ttest_1samp(X, 0.0).statistic)


def reference_estimator(classifier):
    return {"linear_svm": lambda: SVC(kernel="linear"),
            "correlation_centroid": CentroidCorrelation,
            "shrinkage_lda": PooledShrinkageLDA,
            "gaussian_nb": lambda: GaussianNB(priors=[1.0 / N_CLASSES] * N_CLASSES)}[classifier]()


def simulate(rng):
    """Invented lantern-study patterns: four shape classes, a weak code in 10% of the voxels."""
    runs = np.repeat(np.arange(N_RUNS), N_CLASSES * PER_CLASS)
    labels = np.tile(np.repeat(np.arange(N_CLASSES), PER_CLASS), N_RUNS)
    informative = rng.random(N_VOXELS) < 0.1
    codes = rng.standard_normal((N_CLASSES, N_VOXELS)) * informative
    patterns = rng.standard_normal((labels.size, N_VOXELS)) + 0.8 * codes[labels] + 1.5 + 0.5 * rng.standard_normal(N_VOXELS)
    return patterns, labels, runs


def reference_predictions(patterns, label_sets, folds, classifier, selection):
    """The straightforward loop: one Pipeline fit per label set x fold x count."""
    score = f_classif if selection == "f" else absolute_t
    predictions = np.empty((len(label_sets), len(COUNTS), patterns.shape[0]), dtype=np.int64)
    for row, labels in enumerate(label_sets):
        for train, test in folds:
            for position, count in enumerate(COUNTS):
                pipe = Pipeline([("select", SelectKBest(score, k=count)), ("scale", StandardScaler()), ("classify", reference_estimator(classifier))])
                predictions[row, position, test] = pipe.fit(patterns[train], labels[train]).predict(patterns[test])
    return predictions


def main():
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--reference-sets", type=int, default=3, help="label sets the reference is timed on (real labels + permutations)")
    parser.add_argument("--permutations", type=int, default=N_PERMUTATIONS)
    arguments = parser.parse_args()
    rng = np.random.default_rng(20261201)
    patterns, labels, runs = simulate(rng)
    folds = make_folds(runs)
    n_sets = arguments.permutations + 1
    rows = []
    for classifier in TARGETS:
        for selection in ("f", "signal"):
            started = time.process_time()
            result = decode_curve(patterns, labels, runs, COUNTS, folds=folds, classifier=classifier, selection=selection,
                                  n_permutations=arguments.permutations, rng=np.random.default_rng(7))
            ours_s = time.process_time() - started
            within = result.directions["within"]
            # the reference refits on the real labels and on foldwise's first permutations
            label_sets = np.vstack([labels[np.newaxis], result.permuted_labels[:arguments.reference_sets - 1]])
            started = time.process_time()
            reference = reference_predictions(patterns, label_sets, folds, classifier, selection)
            reference_s = (time.process_time() - started) / len(label_sets) * n_sets
            identical = bool(np.array_equal(reference[0], within.predictions))
            null_reference = np.array([[np.mean([balanced_accuracy_score(relabeled[test], reference[row, position, test]) for _, test in folds])
                                        for position in range(len(COUNTS))] for row, relabeled in enumerate(label_sets)])
            null_identical = bool(np.allclose(null_reference[1:], within.null_balanced_accuracy[:len(label_sets) - 1], rtol=0, atol=1e-12))
            rows.append((classifier, selection, ours_s, reference_s, reference_s / ours_s, TARGETS[classifier], identical, null_identical))
            print(f"  done {classifier:<21} {selection:<6} ours {ours_s:8.2f} s", flush=True)
    print()
    print(f"ROI job: {N_RUNS} runs x {N_CLASSES} classes x {PER_CLASS} patterns, {N_VOXELS} voxels, counts {COUNTS}, "
          f"{arguments.permutations} permutations; reference timed on {arguments.reference_sets} label sets, extrapolated to {n_sets}")
    print("times: CPU seconds of this process (time.process_time), single BLAS thread; 'identical': real-label predictions of every")
    print("count equal; 'null same': the reference's fold-mean balanced accuracy on the sampled permutations equals foldwise's null")
    print(f"{'classifier':<21} {'selection':<9} {'foldwise_s':>10} {'reference_s':>12} {'speedup':>8} {'target':>7} {'met':>4} {'identical':>9} {'null same':>9}")
    for classifier, selection, ours_s, reference_s, ratio, target, identical, null_identical in rows:
        print(f"{classifier:<21} {selection:<9} {ours_s:10.2f} {reference_s:12.1f} {ratio:7.1f}x {target:6d}x {'yes' if ratio >= target else 'NO':>4} "
              f"{'yes' if identical else 'NO':>9} {'yes' if null_identical else 'NO':>9}")


if __name__ == "__main__":
    main()
