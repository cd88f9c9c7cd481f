"""Tests of foldwise.decoding.classifiers against scikit-learn, numpy brute force and the Bayes rate."""

import numpy as np
import pytest
from scipy import linalg, stats
from sklearn.covariance import ledoit_wolf, ledoit_wolf_shrinkage
from sklearn.discriminant_analysis import LinearDiscriminantAnalysis
from sklearn.linear_model import LogisticRegression
from sklearn.naive_bayes import GaussianNB
from sklearn.svm import SVC

from foldwise.decoding import classifiers as clf
from foldwise.errors import InputError

N_CLASSES = 3


@pytest.fixture
def shapes():
    """Invented lantern shapes (round, square, star): 30 training and 45 test patterns, 12 voxels."""
    rng = np.random.default_rng(21)
    codes = rng.standard_normal((N_CLASSES, 12))
    train_labels = np.repeat(np.arange(N_CLASSES), 10)
    test_labels = np.repeat(np.arange(N_CLASSES), 15)
    train = rng.standard_normal((30, 12)) + 0.8 * codes[train_labels]
    test = rng.standard_normal((45, 12)) + 0.8 * codes[test_labels]
    permutations = np.stack([train_labels] + [rng.permutation(train_labels) for _ in range(4)])
    return train, train_labels, test, permutations


def test_one_hot_and_class_means_match_a_loop(shapes):
    train, labels, _, permutations = shapes
    np.testing.assert_array_equal(clf.one_hot(labels, N_CLASSES).argmax(axis=1), labels)
    means = clf.class_means(train, permutations, N_CLASSES)
    for row, row_labels in enumerate(permutations):
        for klass in range(N_CLASSES):
            np.testing.assert_allclose(means[row, klass], train[row_labels == klass].mean(axis=0), rtol=1e-12)


def test_correlation_centroid_equals_a_brute_force_corrcoef_loop(shapes):
    # Reference: Haxby et al. 2001 rule written out with numpy.corrcoef, one test pattern and class at a time.
    train, labels, test, _ = shapes
    centroids = clf.class_means(train, labels, N_CLASSES)
    predictions, correlations = clf.correlation_centroid_predict(centroids, test, return_correlations=True)
    expected = np.array([[np.corrcoef(pattern, centroid)[0, 1] for centroid in centroids] for pattern in test])
    np.testing.assert_allclose(correlations, expected, atol=1e-12)
    np.testing.assert_array_equal(predictions, expected.argmax(axis=1))


def test_correlation_centroid_nested_counts_equal_separate_calls(shapes):
    train, _, test, permutations = shapes
    centroids = clf.class_means(train, permutations, N_CLASSES)
    counts = [2, 5, 12]
    nested = clf.correlation_centroid_predict(centroids, test, counts=counts)
    assert nested.shape == (permutations.shape[0], len(counts), test.shape[0])
    for position, count in enumerate(counts):
        np.testing.assert_array_equal(nested[:, position], clf.correlation_centroid_predict(centroids[:, :, :count], test[:, :count]))


def test_correlation_of_a_constant_pattern_counts_as_zero():
    centroids = np.array([[1.0, 2.0, 3.0], [3.0, 2.0, 1.0]])
    _, correlations = clf.correlation_centroid_predict(centroids, np.ones((1, 3)), return_correlations=True)
    np.testing.assert_array_equal(correlations, np.zeros((1, 2)))


def test_gaussian_nb_equals_sklearn_with_equal_priors(shapes):
    # Reference: sklearn.naive_bayes.GaussianNB(priors=equal), default var_smoothing.
    train, labels, test, permutations = shapes
    theta, var = clf.gaussian_nb_fit(train, permutations, N_CLASSES)
    predictions = clf.gaussian_nb_predict(theta, var, test)
    for row, row_labels in enumerate(permutations):
        reference = GaussianNB(priors=[1 / N_CLASSES] * N_CLASSES).fit(train, row_labels)
        np.testing.assert_allclose(theta[row], reference.theta_, rtol=1e-12)
        np.testing.assert_allclose(var[row], reference.var_, rtol=1e-10)
        np.testing.assert_array_equal(predictions[row], reference.predict(test))


def test_gaussian_nb_equal_priors_differ_from_sklearn_empirical_priors_on_unbalanced_data():
    # Equal priors are a choice: on unbalanced training data sklearn's default (empirical priors) can disagree.
    rng = np.random.default_rng(4)
    labels = np.array([0] * 40 + [1] * 4)
    train = rng.standard_normal((44, 2)) + labels[:, None] * 0.5
    test = rng.standard_normal((400, 2)) + 0.25
    theta, var = clf.gaussian_nb_fit(train, labels, 2)
    ours = clf.gaussian_nb_predict(theta, var, test)
    np.testing.assert_array_equal(ours, GaussianNB(priors=[0.5, 0.5]).fit(train, labels).predict(test))
    assert (ours != GaussianNB().fit(train, labels).predict(test)).any()


def test_gaussian_nb_nested_counts_equal_separate_calls(shapes):
    train, _, test, permutations = shapes
    theta, var = clf.gaussian_nb_fit(train, permutations, N_CLASSES)
    nested = clf.gaussian_nb_predict(theta, var, test, counts=[1, 4, 12])
    for position, count in enumerate([1, 4, 12]):
        np.testing.assert_array_equal(nested[:, position], clf.gaussian_nb_predict(theta[:, :, :count], var[:, :, :count], test[:, :count]))


def test_ledoit_wolf_shrinkage_equals_sklearn(shapes):
    # Reference: sklearn.covariance.ledoit_wolf_shrinkage(assume_centered=True), for p < n and p > n.
    train, labels, _, _ = shapes
    residuals = train - clf.class_means(train, labels, N_CLASSES)[labels]
    wide = np.random.default_rng(2).standard_normal((10, 40))
    for data in (residuals, wide):
        shrinkage, mu = clf.ledoit_wolf_shrinkage(data)
        assert shrinkage == pytest.approx(ledoit_wolf_shrinkage(data, assume_centered=True), rel=1e-10)
        assert mu == pytest.approx(np.trace(data.T @ data) / data.size, rel=1e-12)


@pytest.mark.parametrize("shrinkage", [0.0, 0.3, 0.9])
def test_lda_with_fixed_shrinkage_equals_sklearn_lsqr_on_balanced_classes(shapes, shrinkage):
    # Reference: sklearn LinearDiscriminantAnalysis(solver="lsqr", shrinkage=float, priors equal). With a fixed
    # shrinkage and balanced classes, sklearn's prior-weighted average of per-class covariances equals our pooled one.
    train, labels, test, _ = shapes
    model = clf.shrinkage_lda_fit(train, labels, N_CLASSES, shrinkage=shrinkage)
    reference = LinearDiscriminantAnalysis(solver="lsqr", shrinkage=shrinkage, priors=[1 / N_CLASSES] * N_CLASSES).fit(train, labels)
    np.testing.assert_allclose(model["coef"], reference.coef_, rtol=1e-9, atol=1e-12)
    np.testing.assert_array_equal(clf.shrinkage_lda_predict(model, test), reference.predict(test))


def test_lda_auto_shrinks_the_pooled_residual_covariance_unlike_sklearn(shapes):
    # Reference: sklearn.covariance.ledoit_wolf on the pooled within-class residuals + scipy lstsq for the weights.
    train, labels, test, _ = shapes
    means = clf.class_means(train, labels, N_CLASSES)
    covariance, shrinkage = ledoit_wolf(train - means[labels], assume_centered=True)
    model = clf.shrinkage_lda_fit(train, labels, N_CLASSES)
    assert model["shrinkage"] == pytest.approx(shrinkage, rel=1e-10)
    np.testing.assert_allclose(model["coef"], linalg.lstsq(covariance, means.T)[0].T, rtol=1e-9, atol=1e-12)
    # sklearn's shrinkage="auto" standardises and shrinks each class separately, then averages: a different estimate.
    reference = LinearDiscriminantAnalysis(solver="lsqr", shrinkage="auto", priors=[1 / N_CLASSES] * N_CLASSES).fit(train, labels)
    assert not np.allclose(reference.covariance_, covariance, rtol=1e-3)


@pytest.mark.parametrize("n_voxels, shrinkage", [(12, None), (80, None), (80, 0.4), (80, 0.0)])
def test_lda_from_the_gram_matrix_equals_feature_space(n_voxels, shrinkage):
    rng = np.random.default_rng(n_voxels)
    labels = np.repeat(np.arange(N_CLASSES), 10)
    train = rng.standard_normal((30, n_voxels)) + 0.5 * rng.standard_normal((N_CLASSES, n_voxels))[labels]
    test = rng.standard_normal((20, n_voxels))
    rows = np.stack([labels, rng.permutation(labels)])
    dual = clf.shrinkage_lda_fit_gram(train @ train.T, rows, N_CLASSES, n_voxels, shrinkage=shrinkage)
    predictions = clf.shrinkage_lda_predict(dual, test_gram=test @ train.T)
    for row in range(2):
        coef = (train.T @ dual["dual"][row]).T
        if shrinkage == 0.0:  # unshrunk and singular (p > n): the minimum-norm solution, numpy's pseudo-inverse as reference
            means = clf.class_means(train, rows[row], N_CLASSES)
            residuals = train - means[rows[row]]
            np.testing.assert_allclose(coef, (np.linalg.pinv(residuals.T @ residuals / 30) @ means.T).T, rtol=1e-6, atol=1e-8)
            continue
        primal = clf.shrinkage_lda_fit(train, rows[row], N_CLASSES, shrinkage=shrinkage)
        np.testing.assert_allclose(dual["shrinkage"][row], primal["shrinkage"], rtol=1e-10)
        np.testing.assert_allclose(coef, primal["coef"], rtol=1e-7, atol=1e-10)
        np.testing.assert_array_equal(predictions[row], clf.shrinkage_lda_predict(primal, test))
        if shrinkage is not None:
            # Reference: sklearn LDA(lsqr, fixed shrinkage) on balanced classes, p > n.
            reference = LinearDiscriminantAnalysis(solver="lsqr", shrinkage=shrinkage, priors=[1 / N_CLASSES] * N_CLASSES)
            np.testing.assert_array_equal(predictions[row], reference.fit(train, rows[row]).predict(test))


def test_lda_accuracy_approaches_the_bayes_rate():
    # Two Gaussian classes with a shared covariance and Mahalanobis distance Delta = 2: the Bayes accuracy is
    # Phi(Delta / 2) (Duda, Hart & Stork 2001, Pattern Classification, 2nd ed., sec. 2.6 and 2.8.3).
    rng = np.random.default_rng(2026)
    n_features, delta = 5, 2.0
    mixing = rng.standard_normal((n_features, n_features))
    covariance = mixing @ mixing.T + n_features * np.eye(n_features)
    direction = rng.standard_normal(n_features)
    shift = direction * delta / np.sqrt(direction @ np.linalg.solve(covariance, direction))
    means = np.stack([np.zeros(n_features), shift])
    n_train, n_test = 2000, 20000  # per class

    def draw(n_per_class):
        labels = np.repeat([0, 1], n_per_class)
        return rng.multivariate_normal(np.zeros(n_features), covariance, labels.size) + means[labels], labels

    train, train_labels = draw(n_train)
    test, test_labels = draw(n_test)
    model = clf.shrinkage_lda_fit(train, train_labels, 2)
    accuracy = np.mean(clf.shrinkage_lda_predict(model, test) == test_labels)
    bayes = stats.norm.cdf(delta / 2)
    sd = np.sqrt(bayes * (1 - bayes) / test_labels.size)  # binomial SD of the test accuracy
    # Plug-in LDA loses O(p / n) accuracy to estimation (Okamoto 1963 expansion, from memory: ~0.001 here); 0.004 allowed.
    assert bayes - 4 * sd - 0.004 <= accuracy <= bayes + 4 * sd


@pytest.mark.parametrize("C", [0.05, 1.0, 10.0])
def test_linear_svm_on_gram_matrices_equals_sklearn_svc(shapes, C):
    # Reference: sklearn.svm.SVC(kernel="linear", C=C), one-vs-one multiclass, for the real and permuted labels.
    train, _, test, permutations = shapes
    predictions, models = clf.linear_svm_fit_predict(train @ train.T, permutations, test @ train.T, C=C, return_models=True)
    for row, row_labels in enumerate(permutations):
        np.testing.assert_array_equal(predictions[row], SVC(kernel="linear", C=C).fit(train, row_labels).predict(test))
        precomputed = SVC(kernel="precomputed", C=C).fit(train @ train.T, row_labels)
        np.testing.assert_array_equal(models[row]["support"], precomputed.support_)
        np.testing.assert_allclose(models[row]["dual_coef"], precomputed.dual_coef_, rtol=1e-9, atol=1e-12)


def test_linear_svm_with_batched_gram_matrices(shapes):
    train, _, test, permutations = shapes
    rng = np.random.default_rng(8)
    subsets = [np.sort(rng.choice(12, 6, replace=False)) for _ in permutations]
    grams = np.stack([train[:, subset] @ train[:, subset].T for subset in subsets])
    test_grams = np.stack([test[:, subset] @ train[:, subset].T for subset in subsets])
    predictions = clf.linear_svm_fit_predict(grams, permutations, test_grams)
    for row, subset in enumerate(subsets):
        np.testing.assert_array_equal(predictions[row], SVC(kernel="linear").fit(train[:, subset], permutations[row]).predict(test[:, subset]))


def test_logistic_l2_equals_sklearn(shapes):
    # Reference: sklearn.linear_model.LogisticRegression(C=C) with its defaults.
    train, _, test, permutations = shapes
    predictions, n_not_converged = clf.logistic_l2_fit_predict(train, permutations, test, C=0.5)
    assert n_not_converged == 0
    for row, row_labels in enumerate(permutations):
        np.testing.assert_array_equal(predictions[row], LogisticRegression(C=0.5).fit(train, row_labels).predict(test))


def test_single_label_vector_gives_one_dimensional_predictions(shapes):
    train, labels, test, _ = shapes
    assert clf.correlation_centroid_predict(clf.class_means(train, labels, N_CLASSES), test).shape == (45,)
    assert clf.linear_svm_fit_predict(train @ train.T, labels, test @ train.T).shape == (45,)
    assert clf.shrinkage_lda_predict(clf.shrinkage_lda_fit(train, labels, N_CLASSES), test).shape == (45,)


@pytest.mark.parametrize("call", [
    lambda train, labels, test: clf.class_means(train, labels + 5, N_CLASSES),
    lambda train, labels, test: clf.class_means(train, labels.astype(float), N_CLASSES),
    lambda train, labels, test: clf.class_means(train, labels[:-1], N_CLASSES),
    lambda train, labels, test: clf.class_means(train, np.zeros_like(labels), N_CLASSES),
    lambda train, labels, test: clf.linear_svm_fit_predict(train @ train.T, labels, test @ train.T, C=0.0),
    lambda train, labels, test: clf.shrinkage_lda_fit(train, labels, N_CLASSES, shrinkage=1.5),
    lambda train, labels, test: clf.gaussian_nb_fit(train, labels, N_CLASSES, var_smoothing=-1.0),
    lambda train, labels, test: clf.correlation_centroid_predict(clf.class_means(train, labels, N_CLASSES), test[:, :5]),
    lambda train, labels, test: clf.correlation_centroid_predict(clf.class_means(train, labels, N_CLASSES), test, counts=[5, 3]),
    lambda train, labels, test: clf.logistic_l2_fit_predict(train, labels, test, C=-1.0),
])
def test_bad_arguments_raise_input_error(shapes, call):
    train, labels, test, _ = shapes
    with pytest.raises(InputError):
        call(train, labels, test)
