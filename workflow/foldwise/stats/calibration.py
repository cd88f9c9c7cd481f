"""Calibration on noise: a study's own analyses run on pure-noise patterns, many times.

Under the null hypothesis (patterns carry no class information) a calibrated
test rejects at level alpha in a share alpha of studies. This module runs the
project's own decoding and group functions on noise patterns drawn to the
shapes of a real design (runs, trials, classes, sets, folds, voxel counts,
classifier, selection) and measures:

- the **variance ratio** of each direction and count: the variance of the
  observed fold-mean balanced accuracy across null subjects over the mean
  variance of a subject's permutation null. A calibrated null has ratio 1; a
  null narrower than the observed scores' spread (ratio > 1) gives p-values
  that are too small;
- the **false-positive rate** of every test foldwise prints (subject-level p,
  group p_perm, p_t, p_fwe, the prevalence global null) at each alpha, with
  the binomial 99% interval of the count of rejections if the rate were
  exactly alpha (``scipy.stats.binom.interval``; Clopper & Pearson would give
  a slightly wider interval).

Public names:

``NullDesign``              one analysis's design as decoded on noise
``null_subjects``           noise subjects through the project's own decoding
``variance_ratio``          observed / null variance per cell
``binomial_bounds``         the 99% interval of a rejection count at rate alpha
``attainable_level``        the exact rejection probability a discrete null allows at alpha
``group_false_positives``   rejections of each group test on disjoint null groups
``calibration_rows``        one table row per test, direction and alpha
``SubjectDesign``           one subject's design of an analysis (the calibrate step)
``noise_study``             a whole study on noise: every subject x ROI, then the group tests
``merge_counts``            add one noise study's rejection counts to a total
``study_calibration_rows``  the calibrate step's table rows
"""

from dataclasses import dataclass, field

import numpy as np
from scipy import stats

from foldwise.contract import count_label
from foldwise.decoding.curves import decode_cross, decode_curve
from foldwise.decoding.permutations import subject_p
from foldwise.errors import InputError
from foldwise.stats import group as group_stats

__all__ = [
    "NullDesign",
    "null_subjects",
    "variance_ratio",
    "binomial_bounds",
    "attainable_level",
    "group_false_positives",
    "calibration_rows",
    "CALIBRATION_COLUMNS",
    "SubjectDesign",
    "noise_study",
    "merge_counts",
    "study_calibration_rows",
]

CALIBRATION_COLUMNS = ("analysis", "test", "direction", "alpha", "level", "n_tests", "n_rejections", "rate", "bound_low", "bound_high",
                       "within_bounds", "variance_ratio")


@dataclass(frozen=True)
class NullDesign:
    """The design of one analysis as it is decoded on noise.

    Attributes
    ----------
    labels : ndarray of int, shape (n_patterns,)
    runs : ndarray, shape (n_patterns,)
    n_voxels : int
        Voxels of the noise ROI.
    voxel_counts : tuple
    n_permutations : int
    set_index : ndarray of int or None
        0 / 1 per pattern for a cross analysis.
    set_names : tuple
    options : dict
        Keywords of :func:`foldwise.decoding.curves.decode_curve` (``folds``,
        ``classifier``, ``selection``, ``demean_patterns``, ``svm_c``,
        ``logistic_c``, ``n_classes``).
    """

    labels: np.ndarray
    runs: np.ndarray
    n_voxels: int
    voxel_counts: tuple
    n_permutations: int
    set_index: np.ndarray | None = None
    set_names: tuple = ("A", "B")
    options: dict = field(default_factory=dict)


def null_subjects(design, n_subjects, rng, levels=(0.05, 0.01)):
    """Decode ``n_subjects`` noise subjects of one design.

    Parameters
    ----------
    design : NullDesign
    n_subjects : int
    rng : numpy.random.Generator
        Draws the noise patterns, then each subject's relabelings (one
        child generator per subject, so subjects are independent).

    Returns
    -------
    dict of str to dict
        Per direction: ``observed`` (n_subjects, n_counts) fold-mean balanced
        accuracy, ``null`` (n_subjects, n_null, n_counts), ``p``
        (n_subjects, n_counts) the subject-level p-values, ``exact`` (bool
        per subject), ``level`` ({alpha: (n_subjects, n_counts)} the
        attainable level of each subject's test, :func:`attainable_level`).

    Notes
    -----
    Noise is independent standard normal per pattern and voxel, the null
    hypothesis of exchangeable labels within runs (and sets) at its purest.
    """
    if isinstance(n_subjects, bool) or not isinstance(n_subjects, (int, np.integer)) or n_subjects < 1:
        raise InputError(None, "n_subjects", f"expected a positive integer, got {n_subjects!r}", "simulate at least one subject")
    out = {}
    seeds = rng.spawn(int(n_subjects))
    for subject, child in enumerate(seeds):
        patterns = child.standard_normal((design.labels.size, int(design.n_voxels)))
        if design.set_index is None:
            result = decode_curve(patterns, design.labels, design.runs, list(design.voxel_counts), n_permutations=design.n_permutations,
                                  rng=child, **design.options)
        else:
            result = decode_cross(patterns, design.labels, design.set_index, design.runs, list(design.voxel_counts),
                                  set_names=tuple(design.set_names), n_permutations=design.n_permutations, rng=child, **design.options)
        for direction, scores in result.directions.items():
            record = out.setdefault(direction, {"observed": [], "null": [], "p": [], "exact": [], "level": []})
            observed = scores.balanced_accuracy.mean(axis=0)
            record["observed"].append(observed)
            record["null"].append(scores.null_balanced_accuracy)
            record["p"].append(subject_p(observed, scores.null_balanced_accuracy, result.null_exact))
            record["exact"].append(result.null_exact)
            record["level"].append({alpha: attainable_level(observed, scores.null_balanced_accuracy, result.null_exact, alpha)
                                    for alpha in levels})
    for record in out.values():
        n_nulls = {null.shape[0] for null in record["null"]}
        record["observed"] = np.stack(record["observed"])
        record["null"] = np.stack(record["null"]) if len(n_nulls) == 1 else record["null"]
        record["p"] = np.stack(record["p"])
        record["exact"] = np.asarray(record["exact"])
        record["level"] = {alpha: np.stack([entry[alpha] for entry in record["level"]]) for alpha in levels}
    return out


def variance_ratio(observed, null):
    """Variance of the observed scores across subjects over the mean variance of a subject's null.

    Parameters
    ----------
    observed : array_like, shape (n_subjects, n_cells)
    null : array_like, shape (n_subjects, n_null, n_cells)

    Returns
    -------
    ndarray, shape (n_cells,)
        ``var_s(observed) / mean_s var_k(null[s, k])`` (both with ddof 1). Near
        1 for a calibrated null; above 1 the null is too narrow.
    """
    observed = np.asarray(observed, dtype=np.float64)
    null = np.asarray(null, dtype=np.float64)
    return observed.var(axis=0, ddof=1) / null.var(axis=1, ddof=1).mean(axis=0)


def binomial_bounds(n_tests, alpha, level=0.99):
    """The central ``level`` interval of the number of rejections among ``n_tests`` at rate ``alpha``.

    ``scipy.stats.binom.interval(level, n_tests, alpha)``: a calibrated test's
    count falls inside with probability at least ``level``.

    Examples
    --------
    >>> binomial_bounds(1000, 0.05)
    (33, 68)
    """
    low, high = stats.binom.interval(level, int(n_tests), float(alpha))
    return int(low), int(high)


def attainable_level(observed, null, exact, alpha):
    """The probability that a subject-level p is <= alpha under H0, given the subject's scores.

    Parameters
    ----------
    observed : array_like, shape (n_cells,)
    null : array_like, shape (n_null, n_cells)
    exact : bool
        As for :func:`foldwise.decoding.permutations.subject_p`.
    alpha : float

    Returns
    -------
    ndarray, shape (n_cells,)

    Notes
    -----
    Under H0 the actual labeling is exchangeable with the null's relabelings
    (drawn: the observed and the ``n`` draws; exact: the listed relabelings),
    so given the multiset of their scores each member is the observed one
    with equal probability. The rejection probability is therefore the share
    of members whose own p-value within the set is <= alpha. Accuracies are
    discrete (fold means of a few test patterns), ties count as at least as
    extreme, so this level is below alpha; a calibrated test rejects at this
    rate (the randomization argument of Hemerik & Goeman 2018, JRSS-B
    80:137-155).
    """
    observed = np.asarray(observed, dtype=np.float64)
    null = np.asarray(null, dtype=np.float64)
    members = null if exact else np.vstack([observed[np.newaxis], null])
    # scores equal up to float noise tie (9 decimals); #{members >= v} = n + 1 - (lowest rank of v)
    at_least = members.shape[0] + 1 - stats.rankdata(np.round(members, 9), method="min", axis=0)
    return np.mean(at_least / members.shape[0] <= alpha + 1e-12, axis=0)


def group_false_positives(record, chance, group_size, n_draws, alphas, rng, fwe_method="standardised", prevalence=True):
    """Rejections of every group test on disjoint groups of null subjects of one direction.

    Parameters
    ----------
    record : dict
        One direction of :func:`null_subjects` (``observed``, ``null``).
    chance : float
    group_size : int
        Subjects per group; ``n_subjects // group_size`` disjoint groups.
    n_draws : int
        Group-level draws per group.
    alphas : sequence of float
    rng : numpy.random.Generator
    fwe_method : str
    prevalence : bool

    Returns
    -------
    dict
        ``n_groups`` and, per test name (``p_perm``, ``p_t``, ``p_wilcoxon``,
        ``p_fwe``, ``prevalence_p_global``, ``prevalence_p_global_fwe``), an
        array of rejection counts per alpha. Cell-wise tests count each cell
        of each group (``n_groups * n_cells`` tests); ``p_fwe`` and the
        family-wise prevalence count groups with any rejection in the family
        (the direction's counts), ``n_groups`` tests.
    """
    observed, null = record["observed"], record["null"]
    n_groups = observed.shape[0] // int(group_size)
    if n_groups < 1:
        raise InputError(None, "group_size", f"{observed.shape[0]} null subjects make no group of {group_size}", "simulate more subjects")
    alphas = np.asarray(alphas, dtype=np.float64)
    names = ("p_perm", "p_t", "p_wilcoxon", "p_fwe", "prevalence_p_global", "prevalence_p_global_fwe")
    counts = {name: np.zeros(alphas.size, dtype=np.int64) for name in names}
    n_cells = observed.shape[1]
    for index in range(n_groups):
        members = slice(index * group_size, (index + 1) * group_size)
        columns, _ = group_stats.group_statistics(observed[members], np.full(n_cells, chance), null[members], np.zeros(n_cells, dtype=int),
                                                  rng, n_draws, float(alphas.max()), prevalence=prevalence, fwe_method=fwe_method)
        for name in names:
            values = columns[name]
            if name in ("p_fwe", "prevalence_p_global_fwe"):
                counts[name] += np.array([np.any(values <= alpha) for alpha in alphas])
            else:
                counts[name] += np.array([np.sum(values <= alpha) for alpha in alphas])
    counts["n_groups"] = n_groups
    counts["n_cells"] = n_cells
    return counts


def calibration_rows(analysis, records, group_counts, alphas, level=0.99):
    """One row per test x direction x alpha: rejections, rate and binomial bounds.

    Parameters
    ----------
    analysis : str
    records : dict
        :func:`null_subjects` output.
    group_counts : dict of str to dict
        :func:`group_false_positives` per direction (may be empty).
    alphas : sequence of float
    level : float

    Returns
    -------
    list of dict
        Keys ``CALIBRATION_COLUMNS``. ``level`` is the rate a calibrated test
        has: alpha for the group tests, the mean attainable level
        (:func:`attainable_level`, below alpha for discrete accuracies) for
        the subject-level p; the bounds are around it. The subject-level row of a direction
        counts every subject x count (the counts of one subject are
        correlated, so its spread exceeds the binomial one; the bounds are
        those of independent tests, and the rate is what to read); the
        variance ratio is the largest over the direction's counts.
    """
    rows = []
    for direction, record in records.items():
        ratio = float(np.max(variance_ratio(record["observed"], record["null"])))
        for alpha in alphas:
            tests = [("subject p", int(record["p"].size), int(np.sum(record["p"] <= alpha)))]
            attainable = float(np.mean(record["level"][alpha])) if alpha in record.get("level", {}) else alpha
            counts = group_counts.get(direction)
            if counts is not None:
                position = list(alphas).index(alpha)
                for name in ("p_perm", "p_t", "p_wilcoxon", "prevalence_p_global"):
                    tests.append((f"group {name}", counts["n_groups"] * counts["n_cells"], int(counts[name][position])))
                for name in ("p_fwe", "prevalence_p_global_fwe"):
                    tests.append((f"group {name}", counts["n_groups"], int(counts[name][position])))
            for test, n_tests, rejections in tests:
                nominal = attainable if test == "subject p" else alpha
                low, high = binomial_bounds(n_tests, nominal, level)
                rows.append({"analysis": analysis, "test": test, "direction": direction, "alpha": alpha, "level": nominal,
                             "n_tests": n_tests, "n_rejections": rejections, "rate": rejections / n_tests, "bound_low": low / n_tests,
                             "bound_high": high / n_tests, "within_bounds": bool(rejections <= high),
                             "variance_ratio": ratio})
    return rows


# -- a whole study on noise (the calibrate step) ------------------------------------------------
@dataclass(frozen=True)
class SubjectDesign:
    """One subject's design of an analysis: what its noise patterns must look like.

    Attributes
    ----------
    labels : ndarray of int, shape (n_patterns,)
    runs : ndarray, shape (n_patterns,)
    folds : list of (train_idx, test_idx)
    roi_sizes : dict of str to int
        Voxels of each ROI of the analysis in this subject.
    set_index : ndarray of int or None
    """

    labels: np.ndarray
    runs: np.ndarray
    folds: list
    roi_sizes: dict
    set_index: np.ndarray | None = None


def _empty_counts():
    return {"n_tests": 0, "n_rejections": 0, "level_sum": 0.0}


def noise_study(subjects, rois, voxel_counts, options, n_permutations, set_names, chance, alphas, group, rng_of):
    """Run one whole study on noise: every subject x ROI decoded, then the group tests; count rejections.

    Parameters
    ----------
    subjects : list of SubjectDesign
    rois : list of str
    voxel_counts : list
    options : dict
        Keywords of :func:`foldwise.decoding.curves.decode_curve` without
        ``folds`` (``classifier``, ``selection``, ``demean_patterns``,
        ``svm_c``, ``logistic_c``, ``n_classes``).
    n_permutations : int
    set_names : tuple or None
        The two sets of a cross analysis (None: within).
    chance : float
    alphas : sequence of float
    group : dict
        ``n_draws``, ``prevalence``, ``fwe_method``, ``family``
        (``per_direction`` or one family), ``n_analyses`` (Bonferroni factor).
    rng_of : callable
        ``rng_of(kind, subject_index)`` returns the generator for ``"noise"``
        (the patterns), ``"permutation"`` (the relabelings, shared by the
        subject's ROIs, as in the decode step) and ``"group"`` (subject index -1).

    Returns
    -------
    dict of (test, direction, alpha) to dict
        ``n_tests``, ``n_rejections`` and ``level_sum`` (the summed rejection
        probability a calibrated test has: alpha, or the attainable level of
        the subject-level tests).
    """
    observed, nulls, exact_flags, directions, cells = [], [], [], None, None
    for index, subject in enumerate(subjects):
        noise = rng_of("noise", index)
        subject_observed, subject_null, subject_cells = [], [], []
        for roi in rois:
            patterns = noise.standard_normal((subject.labels.size, int(subject.roi_sizes[roi])))
            permutation = rng_of("permutation", index)  # one stream per subject: the same relabelings in every ROI
            common = dict(options, folds=subject.folds, n_permutations=n_permutations, rng=permutation)
            if subject.set_index is None:
                result = decode_curve(patterns, subject.labels, subject.runs, list(voxel_counts), **common)
            else:
                result = decode_cross(patterns, subject.labels, subject.set_index, subject.runs, list(voxel_counts),
                                      set_names=tuple(set_names), **common)
            for direction, scores in result.directions.items():
                subject_observed.append(scores.balanced_accuracy.mean(axis=0))
                subject_null.append(scores.null_balanced_accuracy)
                subject_cells += [(roi, direction, count_label(count)) for count in voxel_counts]
            exact = result.null_exact
        observed.append(np.concatenate(subject_observed))
        nulls.append(np.concatenate(subject_null, axis=1))
        exact_flags.append(exact)
        cells = subject_cells
    directions = list(dict.fromkeys(cell[1] for cell in cells))
    counts = {}

    def add(test, direction, alpha, n_tests, rejections, level_sum):
        entry = counts.setdefault((test, direction, alpha), _empty_counts())
        entry["n_tests"] += int(n_tests)
        entry["n_rejections"] += int(rejections)
        entry["level_sum"] += float(level_sum)

    cell_direction = np.array([cell[1] for cell in cells])
    for index in range(len(subjects)):
        p_values = subject_p(observed[index], nulls[index], exact_flags[index])
        for alpha in alphas:
            level = attainable_level(observed[index], nulls[index], exact_flags[index], alpha)
            for direction in directions:
                members = cell_direction == direction
                add("subject p", direction, alpha, members.sum(), np.sum(p_values[members] <= alpha), level[members].sum())
    n_null = {null.shape[0] for null in nulls}
    if len(subjects) < group_stats.MIN_SUBJECTS or len(n_null) != 1:
        return counts
    scores = np.stack(observed)
    subject_nulls = np.stack(nulls)
    if group["family"] == "per_direction":
        families = np.array([directions.index(direction) for direction in cell_direction])
    else:
        families = np.zeros(len(cells), dtype=np.int64)
    columns, _ = group_stats.group_statistics(scores, np.full(len(cells), chance), subject_nulls, families, rng_of("group", -1),
                                              int(group["n_draws"]), float(max(alphas)), prevalence=bool(group["prevalence"]),
                                              fwe_method=group["fwe_method"])
    factor = int(group.get("n_analyses", 1))
    for alpha in alphas:
        for direction in directions:
            members = cell_direction == direction
            for name in ("p_perm", "p_t", "p_wilcoxon", "prevalence_p_global"):
                values = columns[name][members]
                if np.all(np.isnan(values)):
                    continue
                add(f"group {name}", direction, alpha, members.sum(), np.sum(values <= alpha), alpha * members.sum())
        family_names = directions if group["family"] == "per_direction" else ["all directions"]
        for family_index, family_name in enumerate(family_names):
            members = families == (family_index if group["family"] == "per_direction" else 0)
            for name in ("p_fwe", "prevalence_p_global_fwe"):
                values = np.minimum(1.0, columns[name][members] * factor)
                if np.all(np.isnan(values)):
                    continue
                add(f"group {name} (any in family)", family_name, alpha, 1, np.any(values <= alpha), alpha)
    return counts


def merge_counts(total, counts):
    """Add one study's :func:`noise_study` counts to a running total (in place); returns the total."""
    for key, entry in counts.items():
        into = total.setdefault(key, _empty_counts())
        for name in into:
            into[name] += entry[name]
    return total


def study_calibration_rows(analysis, total, level=0.99):
    """Rows of the calibration table from summed :func:`noise_study` counts.

    The bounds are the binomial ``level`` interval around the rate a
    calibrated test has (alpha for the group tests; the mean attainable level
    of the discrete null for the subject-level p). ``within_bounds`` is true
    when the count is at most the upper bound (a conservative test is
    within); ``variance_ratio`` is not computed here (NaN). Cell-wise rows
    count every ROI x count of every noise study; the cells of one study are
    correlated (nested voxel counts), so their spread exceeds the binomial
    one and the bounds are a guide there; the family-wise rows count one
    test per study and are exact binomial bounds.
    """
    rows = []
    for (test, direction, alpha), entry in sorted(total.items(), key=lambda item: (item[0][0], item[0][1], -item[0][2])):
        n_tests = entry["n_tests"]
        nominal = entry["level_sum"] / n_tests
        low, high = binomial_bounds(n_tests, nominal, level)
        rows.append({"analysis": analysis, "test": test, "direction": direction, "alpha": alpha, "level": nominal, "n_tests": n_tests,
                     "n_rejections": entry["n_rejections"], "rate": entry["n_rejections"] / n_tests, "bound_low": low / n_tests,
                     "bound_high": high / n_tests, "within_bounds": bool(entry["n_rejections"] <= high), "variance_ratio": np.nan})
    return rows
