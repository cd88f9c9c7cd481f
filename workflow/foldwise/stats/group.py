"""Group statistics over subjects' decoding scores.

Every function works on whole arrays of "cells": one cell is one ROI x
direction x voxel count of an analysis. Subject scores come as an array of
shape ``(n_subjects, n_cells)``; subject-level permutation nulls as
``(n_subjects, n_permutations, n_cells)``, where permutation ``k`` of a subject
is the same relabeling in every cell, so the cells share one joint null.

Public functions, in the order a group analysis uses them:

``mean_sem_ci``          mean, standard error and t-based confidence interval
``t_test_greater``       one-sided one-sample t-test against chance
``wilcoxon_greater``     one-sided Wilcoxon signed-rank test against chance
``draw_indices``         one index matrix of random per-subject permutation picks
``group_mean_null``      the null of the group mean (Stelzer, Chen & Turner 2013)
``group_minimum_null``   the null of the minimum over subjects (Allefeld et al. 2016)
``draw_group_picks``     the picks of every group draw in each subject's pool (actual labeling and relabelings)
``group_null_draws``     both nulls of some cells from those picks (cell by cell: a subset gives the same columns)
``permutation_p``        p-value of an observed statistic against its null draws
``max_statistic_p``      family-wise corrected p by the maximum statistic (one scale across the family)
``standardised_max_p``   the same after standardising each cell by its own null (balanced)
``min_p_fwe``            single-step min-p correction (Westfall & Young 1993; balanced)
``family_wise_p``        dispatch: ``standardised`` or ``min_p``
``standardised_effect``  (mean - chance) / SD across subjects
``prevalence_gamma0_max`` the largest gamma0 a design can ever reach
``prevalence_p``         p-value of the prevalence null gamma <= gamma0
``prevalence_bound``     the largest gamma0 whose prevalence null is rejected
``group_statistics``     all of the above for one analysis
"""

import numpy as np
# scipy.special, not scipy.stats: the t and normal tails and quantiles are the special functions scipy.stats
# itself evaluates (t.sf = stdtr(df, -t), t.ppf = stdtrit, norm.sf = ndtr(-z); scipy 1.17 source), and importing
# scipy.stats costs the group job's process about 0.4 s of CPU.
from scipy import special

from foldwise.errors import InputError

__all__ = [
    "TIE_TOLERANCE",
    "MIN_SUBJECTS",
    "mean_sem_ci",
    "t_test_greater",
    "wilcoxon_greater",
    "draw_indices",
    "group_mean_null",
    "group_minimum_null",
    "draw_group_picks",
    "group_null_draws",
    "permutation_p",
    "max_statistic_p",
    "FWE_METHODS",
    "standardised_max_p",
    "min_p_fwe",
    "family_wise_p",
    "standardised_effect",
    "prevalence_gamma0_max",
    "prevalence_p",
    "prevalence_bound",
    "group_statistics",
]

# Scores reach this stage through TSV text with 7 significant digits
# (fileio.FLOAT_FORMAT), so a group mean that equals the observed one in exact
# arithmetic can differ from it by up to ~5e-8 after reading. Accuracy means
# that truly differ are at least ~1e-5 apart (one test trial of one fold of one
# subject among thousands), so differences below 1e-6 on the score scale count
# as ties, and ties count as "at least as extreme" (the conservative side).
TIE_TOLERANCE = 1e-6

# Below this many subjects the stage reports descriptive statistics only.
MIN_SUBJECTS = 3

# scipy.stats.wilcoxon enumerates all sign flips up to this many subjects when
# there are ties or zeros (its documented "auto" threshold); we do the same.
_WILCOXON_MAX_EXACT = 13
_DIFFERENCE_DECIMALS = 12  # collapse float noise so equal differences tie


def _fail(field, problem, fix):
    raise InputError(None, field, problem, fix)


def _check_scores(scores, chance):
    scores = np.asarray(scores, dtype=np.float64)
    if scores.ndim != 2:
        _fail("scores", f"expected a 2-D array (subjects x cells), got shape {scores.shape}",
              "pass one row per subject and one column per cell")
    if scores.shape[0] < 1 or scores.shape[1] < 1:
        _fail("scores", f"empty array of shape {scores.shape}", "pass at least one subject and one cell")
    if not np.all(np.isfinite(scores)):
        _fail("scores", "non-finite value(s) among the scores", "remove or recompute the missing scores")
    chance = np.asarray(chance, dtype=np.float64)
    if chance.ndim > 1 or chance.size not in (1, scores.shape[1]):
        _fail("chance", f"expected a scalar or {scores.shape[1]} values (one per cell), got shape {chance.shape}",
              "pass one chance level per cell")
    chance = np.broadcast_to(chance.reshape(-1), (scores.shape[1],))
    if not np.all(np.isfinite(chance)):
        _fail("chance", f"non-finite chance level(s): {chance[~np.isfinite(chance)][:3]}", "pass finite chance levels")
    return scores, chance


def mean_sem_ci(scores, confidence=0.95):
    """Mean, standard error of the mean and t-based confidence interval per cell.

    Parameters
    ----------
    scores : array_like, shape (n_subjects, n_cells)
        One score per subject and cell.
    confidence : float
        Two-sided coverage of the interval, in (0, 1).

    Returns
    -------
    dict of ndarray, shape (n_cells,)
        ``mean``, ``sem`` (sample SD with ddof=1 over sqrt(n)), ``ci_low``,
        ``ci_high``. ``sem`` and the interval are NaN with one subject.

    Notes
    -----
    The interval is ``mean +/- t_{(1+confidence)/2, n-1} * sem``, the
    Student-t interval for a mean (Student 1908, Biometrika 6:1-25), the same
    as ``scipy.stats.ttest_1samp(...).confidence_interval``.

    Example
    -------
    >>> out = mean_sem_ci([[0.5], [0.6], [0.7]])
    >>> round(float(out["mean"][0]), 3), round(float(out["sem"][0]), 4)
    (0.6, 0.0577)
    """
    if not 0 < confidence < 1:
        _fail("confidence", f"must lie in (0, 1), got {confidence!r}", "pass e.g. 0.95")
    scores, _ = _check_scores(scores, 0.0)
    n_subjects = scores.shape[0]
    mean = scores.mean(axis=0)
    if n_subjects < 2:
        nan = np.full(scores.shape[1], np.nan)
        return {"mean": mean, "sem": nan, "ci_low": nan.copy(), "ci_high": nan.copy()}
    sem = scores.std(axis=0, ddof=1) / np.sqrt(n_subjects)
    half_width = special.stdtrit(n_subjects - 1, 0.5 + confidence / 2) * sem  # scipy.stats.t.ppf
    return {"mean": mean, "sem": sem, "ci_low": mean - half_width, "ci_high": mean + half_width}


def t_test_greater(scores, chance):
    """One-sided one-sample t-test of the mean score against chance, per cell.

    Parameters
    ----------
    scores : array_like, shape (n_subjects, n_cells)
    chance : array_like, shape (n_cells,) or scalar

    Returns
    -------
    t : ndarray, shape (n_cells,)
        ``(mean - chance) / sem``.
    p : ndarray, shape (n_cells,)
        Upper tail of Student's t with n - 1 degrees of freedom.

    Notes
    -----
    Student (1908); equals ``scipy.stats.ttest_1samp(scores, chance,
    alternative="greater")``. Where all subjects have exactly the same score
    the variance is zero and the test is undefined: ``t`` and ``p`` are NaN
    there (scipy warns and returns an unreliable value instead). Fewer than two
    subjects give NaN throughout.
    """
    scores, chance = _check_scores(scores, chance)
    n_subjects = scores.shape[0]
    t_value = np.full(scores.shape[1], np.nan)
    p_value = np.full(scores.shape[1], np.nan)
    if n_subjects < 2:
        return t_value, p_value
    varying = np.ptp(scores, axis=0) > 0
    sem = scores[:, varying].std(axis=0, ddof=1) / np.sqrt(n_subjects)
    t_value[varying] = (scores[:, varying].mean(axis=0) - chance[varying]) / sem
    p_value[varying] = special.stdtr(n_subjects - 1, -t_value[varying])  # scipy.stats.t.sf
    return t_value, p_value


def _average_ranks(values):
    """Ranks along axis 0, ties sharing the mean of their ranks: ``scipy.stats.rankdata(values, axis=0)``.

    The same steps as scipy's ``_rankdata`` (scipy 1.17 source): a stable sort,
    the start of each run of equal values, and ``first rank + (count - 1) / 2``,
    half-integers that float64 holds exactly (tests/test_group.py compares
    with scipy on tied data).
    """
    columns = np.moveaxis(np.asarray(values, dtype=np.float64), 0, -1)
    n_values = columns.shape[-1]
    order = np.argsort(columns, axis=-1, kind="stable")
    ordered = np.take_along_axis(columns, order, axis=-1)
    edge = np.ones(columns.shape[:-1] + (1,), dtype=bool)
    starts = np.concatenate([edge, ordered[..., :-1] != ordered[..., 1:]], axis=-1)  # first of a run of ties
    ends = np.concatenate([ordered[..., :-1] != ordered[..., 1:], edge], axis=-1)    # last of a run of ties
    position = np.broadcast_to(np.arange(n_values), columns.shape)
    first = np.maximum.accumulate(np.where(starts, position, 0), axis=-1)
    last = np.flip(np.minimum.accumulate(np.flip(np.where(ends, position, n_values), axis=-1), axis=-1), axis=-1)
    sorted_ranks = (first + 1.0) + (last - first) / 2
    ranks = np.empty_like(sorted_ranks)
    np.put_along_axis(ranks, order, sorted_ranks, axis=-1)
    return np.moveaxis(ranks, -1, 0)


def wilcoxon_greater(scores, chance, max_exact=_WILCOXON_MAX_EXACT):
    """One-sided Wilcoxon signed-rank test of ``score - chance`` > 0, per cell.

    Parameters
    ----------
    scores : array_like, shape (n_subjects, n_cells)
    chance : array_like, shape (n_cells,) or scalar
    max_exact : int
        Up to this many subjects the p-value is exact (all ``2**n`` sign flips
        enumerated); above it, the normal approximation.

    Returns
    -------
    ndarray, shape (n_cells,)
        p-values; NaN where every difference is zero (no subject differs from
        chance, the test is undefined).

    Notes
    -----
    Wilcoxon (1945), Biometrics Bulletin 1:80-83. Zero differences (subjects
    exactly at chance, common with discrete accuracies) follow Pratt (1959),
    JASA 54:655-667: they take part in the ranking of ``|d|`` and their ranks
    are then dropped, so subjects at chance still weaken the evidence instead
    of vanishing (``scipy.stats.wilcoxon(zero_method="pratt")``). Tied ``|d|``
    get average ranks. With ``W+`` the rank sum of positive differences and
    ``r`` the ranks of the non-zero differences:

    - exact: ``p = #{sign flips s : sum(s * r) >= W+} / 2**n``, the exact
      conditional null given the ranks (what scipy enumerates for n <= 13
      with ties or zeros, and what its exact distribution gives without them);
    - approximate: ``z = (W+ - sum(r)/2) / sqrt(sum(r**2)/4)``, ``p = 1 -
      Phi(z)``, no continuity correction. ``sum(r**2)/4`` is the exact null
      variance given the ranks and equals the tie (Cureton 1967, JASA
      62:1068-1069) and zero corrections that scipy applies.

    Differences are rounded to 12 decimals first so that values equal in
    exact arithmetic tie (scipy's documentation advises the same).

    Example
    -------
    >>> d = [6, 8, 14, 16, 23, 24, 28, 29, 41, -48, 49, 56, 60, -67, 75]
    >>> float(wilcoxon_greater(np.reshape(d, (-1, 1)), 0.0, max_exact=15)[0])
    0.0206298828125
    """
    if not isinstance(max_exact, (int, np.integer)) or not 0 <= max_exact <= 20:
        _fail("max_exact", f"must be an integer in [0, 20], got {max_exact!r}", "pass e.g. 13")
    scores, chance = _check_scores(scores, chance)
    n_subjects, n_cells = scores.shape
    difference = np.round(scores - chance, _DIFFERENCE_DECIMALS)
    ranks = _average_ranks(np.abs(difference))  # Pratt: zeros ranked too
    ranks = np.where(difference == 0, 0.0, ranks)       # ... then dropped
    rank_sum_positive = np.where(difference > 0, ranks, 0.0).sum(axis=0)
    p_value = np.full(n_cells, np.nan)
    defined = np.any(difference != 0, axis=0)
    if n_subjects <= max_exact:
        flips = (np.arange(2 ** n_subjects)[:, None] >> np.arange(n_subjects)) & 1
        null_sums = flips.astype(np.float64) @ ranks[:, defined]
        # ranks are multiples of 0.5, so sums are exact; the margin is for safety
        at_least = (null_sums >= rank_sum_positive[defined] - 1e-9).sum(axis=0)
        p_value[defined] = at_least / 2 ** n_subjects
    else:
        mean = ranks[:, defined].sum(axis=0) / 2
        sd = np.sqrt((ranks[:, defined] ** 2).sum(axis=0) / 4)
        p_value[defined] = special.ndtr(-((rank_sum_positive[defined] - mean) / sd))  # scipy.stats.norm.sf
    return p_value


def draw_indices(rng, n_choices, n_subjects, n_draws):
    """One matrix of random per-subject picks, shared by every cell.

    Parameters
    ----------
    rng : numpy.random.Generator
    n_choices : int or array_like of int, shape (n_subjects,)
        How many null values each subject offers (its permutations); one
        count per subject when they differ (an exactly enumerated small
        space lists fewer relabelings than requested).
    n_subjects : int
    n_draws : int

    Returns
    -------
    ndarray of int64, shape (n_draws, n_subjects)
        Uniform picks in ``[0, n_choices)``, with replacement.

    Notes
    -----
    Using the same row of picks in every cell makes the draws a joint null
    across cells, which the maximum-statistic correction needs (Nichols &
    Holmes 2002, Human Brain Mapping 15:1-25).
    """
    if not isinstance(rng, np.random.Generator):
        _fail("rng", f"expected a numpy.random.Generator, got {type(rng).__name__}",
              "pass np.random.default_rng(seed)")
    if np.ndim(n_choices) == 1:
        per_subject = np.asarray(n_choices)
        if per_subject.shape != (n_subjects,) or not np.issubdtype(per_subject.dtype, np.integer) or per_subject.min() < 1:
            _fail("n_choices", f"expected {n_subjects} positive integers, got {per_subject.tolist()}", "pass one count per subject")
        if np.all(per_subject == per_subject[0]):
            n_choices = int(per_subject[0])
    for name, value in (("n_choices", n_choices), ("n_subjects", n_subjects), ("n_draws", n_draws)):
        if np.ndim(value) == 1:
            continue
        if isinstance(value, bool) or not isinstance(value, (int, np.integer)) or value < 1:
            _fail(name, f"must be a positive integer, got {value!r}", f"pass {name} >= 1")
    if np.ndim(n_choices) == 1:  # uniform picks in [0, n_choices[s]) per subject column
        return rng.integers(0, np.asarray(n_choices, dtype=np.int64)[np.newaxis, :], size=(int(n_draws), int(n_subjects)), dtype=np.int64)
    return rng.integers(0, int(n_choices), size=(int(n_draws), int(n_subjects)), dtype=np.int64)


def _check_null(subject_nulls, indices):
    subject_nulls = np.asarray(subject_nulls, dtype=np.float64)
    indices = np.asarray(indices)
    if subject_nulls.ndim != 3:
        _fail("subject_nulls", f"expected shape (subjects, permutations, cells), got {subject_nulls.shape}",
              "stack one (permutations x cells) array per subject")
    if indices.ndim != 2 or indices.shape[1] != subject_nulls.shape[0]:
        _fail("indices", f"expected shape (draws, {subject_nulls.shape[0]}), got {indices.shape}",
              "draw one index per subject per draw")
    if not np.issubdtype(indices.dtype, np.integer):
        _fail("indices", f"expected integers, got dtype {indices.dtype}", "pass the output of draw_indices")
    if indices.size and (indices.min() < 0 or indices.max() >= subject_nulls.shape[1]):
        _fail("indices", f"values outside [0, {subject_nulls.shape[1]}): min {indices.min()}, max {indices.max()}",
              "draw indices with n_choices equal to the number of permutations")
    if not np.all(np.isfinite(subject_nulls)):
        _fail("subject_nulls", "non-finite value(s) in the permutation null", "recompute the subject-level null")
    return subject_nulls, indices


def group_mean_null(subject_nulls, indices):
    """Null distribution of the group mean, one value per draw and cell.

    Parameters
    ----------
    subject_nulls : array_like, shape (n_subjects, n_permutations, n_cells)
        Each subject's fold-mean score under each label permutation.
    indices : array_like of int, shape (n_draws, n_subjects)
        Which permutation of each subject enters each draw (``draw_indices``).

    Returns
    -------
    ndarray, shape (n_draws, n_cells)
        ``mean_s subject_nulls[s, indices[d, s], c]``.

    Notes
    -----
    Stelzer, Chen & Turner (2013), NeuroImage 65:69-82: a group-level null
    built by combining one subject-level permutation per subject, drawn with
    replacement, many times.

    Example
    -------
    >>> nulls = np.array([[[0.4], [0.6]], [[0.5], [0.7]]])
    >>> group_mean_null(nulls, np.array([[0, 1], [1, 0]]))[:, 0].round(3).tolist()
    [0.55, 0.55]
    """
    subject_nulls, indices = _check_null(subject_nulls, indices)
    n_subjects = subject_nulls.shape[0]
    total = np.zeros((indices.shape[0], subject_nulls.shape[2]))
    # One gather per subject: the full (draws x subjects x cells) array would
    # not fit in memory for 10,000 draws x 30 subjects x 100 cells.
    for subject in range(n_subjects):
        total += subject_nulls[subject][indices[:, subject]]
    return total / n_subjects


def group_minimum_null(subject_values, indices):
    """Null distribution of the minimum over subjects, one value per draw and cell.

    Parameters
    ----------
    subject_values : array_like, shape (n_subjects, n_choices, n_cells)
        Each subject's scores under its labelings; for prevalence inference
        choice 0 is the actual (neutral) labeling and 1.. the permutations.
    indices : array_like of int, shape (n_draws, n_subjects)

    Returns
    -------
    ndarray, shape (n_draws, n_cells)
        ``min_s subject_values[s, indices[d, s], c]``.

    Notes
    -----
    The minimum statistic of Allefeld, Gorgen & Haynes (2016), NeuroImage
    141:378-392: it exceeds a threshold only if every subject does.
    """
    subject_values, indices = _check_null(subject_values, indices)
    minimum = np.full((indices.shape[0], subject_values.shape[2]), np.inf)
    for subject in range(subject_values.shape[0]):  # one gather per subject, as above
        np.minimum(minimum, subject_values[subject][indices[:, subject]], out=minimum)
    return minimum


def _check_observed_null(observed, null):
    observed = np.asarray(observed, dtype=np.float64)
    null = np.asarray(null, dtype=np.float64)
    if observed.ndim != 1:
        _fail("observed", f"expected a 1-D array (cells), got shape {observed.shape}", "pass one value per cell")
    if null.ndim != 2 or null.shape[1] != observed.shape[0] or null.shape[0] < 1:
        _fail("null", f"expected shape (draws, {observed.shape[0]}), got {null.shape}", "pass one row per draw")
    return observed, null


def permutation_p(observed, null, tolerance=TIE_TOLERANCE):
    """p-value of each observed statistic against its null draws (upper tail).

    Parameters
    ----------
    observed : array_like, shape (n_cells,)
    null : array_like, shape (n_draws, n_cells)
    tolerance : float
        Null values within ``tolerance`` below the observed count as ties.

    Returns
    -------
    ndarray, shape (n_cells,)
        ``(1 + #{null >= observed}) / (1 + n_draws)``.

    Notes
    -----
    Counting the observed labeling as one of the draws keeps the test valid
    with random draws (Phipson & Smyth 2010, Stat Appl Genet Mol Biol 9:39);
    Stelzer et al. (2013) and Allefeld et al. (2016) use this form. The tie
    tolerance follows ``scipy.stats.permutation_test``, which also compares
    against ``observed - gamma``; ours is on the score scale (``TIE_TOLERANCE``).

    Example
    -------
    >>> permutation_p([0.6], [[0.5], [0.6], [0.7], [0.4]]).tolist()
    [0.6]
    """
    if not tolerance >= 0:
        _fail("tolerance", f"must be >= 0, got {tolerance!r}", "pass e.g. 1e-6")
    observed, null = _check_observed_null(observed, null)
    at_least = (null >= observed - tolerance).sum(axis=0)
    return (1.0 + at_least) / (1.0 + null.shape[0])


def max_statistic_p(observed, null, families, tolerance=TIE_TOLERANCE):
    """Family-wise corrected p-values by the maximum statistic.

    Parameters
    ----------
    observed : array_like, shape (n_cells,)
        Observed statistic per cell (here: group mean minus chance).
    null : array_like, shape (n_draws, n_cells)
        The statistic under each joint null draw (the same draw in every cell).
    families : array_like, shape (n_cells,)
        A label per cell; cells with the same label form one family.
    tolerance : float
        Tie tolerance as in ``permutation_p``.

    Returns
    -------
    ndarray, shape (n_cells,)
        ``(1 + #{d : max_{c' in family(c)} null[d, c'] >= observed[c]}) /
        (1 + n_draws)``.

    Notes
    -----
    Nichols & Holmes (2002), Human Brain Mapping 15:1-25: the distribution of
    the family's maximum over the joint permutation null controls the chance
    of any false positive in the family (weak and, by subset pivotality,
    strong control). The statistic must be on one scale across the family.

    Example
    -------
    >>> null = [[0.1, 0.3], [0.2, 0.0], [0.0, 0.1]]
    >>> max_statistic_p([0.25, 0.05], null, [0, 0]).tolist()
    [0.5, 1.0]
    """
    if not tolerance >= 0:
        _fail("tolerance", f"must be >= 0, got {tolerance!r}", "pass e.g. 1e-6")
    observed, null = _check_observed_null(observed, null)
    families = np.asarray(families)
    if families.shape != observed.shape:
        _fail("families", f"expected shape {observed.shape}, got {families.shape}", "pass one family label per cell")
    p_value = np.empty(observed.shape[0])
    for family in np.unique(families):  # a handful of families; each step is whole-array
        members = families == family
        family_max = np.sort(null[:, members].max(axis=1))
        below = np.searchsorted(family_max, observed[members] - tolerance, side="left")
        p_value[members] = (1.0 + family_max.size - below) / (1.0 + null.shape[0])
    return p_value


FWE_METHODS = ("standardised", "min_p")


def _check_families(observed, families, tolerance):
    if not tolerance >= 0:
        _fail("tolerance", f"must be >= 0, got {tolerance!r}", "pass e.g. 1e-6")
    families = np.asarray(families)
    if families.shape != observed.shape:
        _fail("families", f"expected shape {observed.shape}, got {families.shape}", "pass one family label per cell")
    return families


def standardised_max_p(observed, null, families, tolerance=TIE_TOLERANCE):
    """Family-wise corrected p-values by the maximum of per-cell standardised statistics.

    Parameters
    ----------
    observed : array_like, shape (n_cells,)
    null : array_like, shape (n_draws, n_cells)
        The statistic under each joint null draw (the same draw in every cell).
    families : array_like, shape (n_cells,)
        A label per cell; cells with the same label form one family.
    tolerance : float
        Tie tolerance on the statistic's own scale, as in ``permutation_p``.

    Returns
    -------
    ndarray, shape (n_cells,)
        With ``z = (x - mean) / sd`` per cell (mean and population SD over
        the observed value and the cell's null draws together): ``(1 + #{d : max_{c' in family(c)}
        z_null[d, c'] >= z_obs[c]}) / (1 + n_draws)``.

    Notes
    -----
    The raw maximum over cells whose nulls differ in spread is dominated by
    the widest cells (on noise the null SD of a fold-mean accuracy grows with
    the number of voxels); standardising each cell by its own null puts the
    cells on one scale before the maximum is taken (the "standardised" or
    "pivotal" maximum statistic: Westfall & Young 1993, Resampling-Based
    Multiple Testing, Wiley; Nichols & Holmes 2002, Human Brain Mapping
    15:1-25). The maximum over the joint null controls the family-wise error
    rate whatever transformation is applied per cell, as long as the same one
    is applied to the observed value and the null draws. A cell whose null is
    constant (SD 0) enters with ``z = 0`` for its draws and ``z = +inf`` for
    an observed value above it (``0`` at or below it).
    """
    observed, null = _check_observed_null(observed, null)
    families = _check_families(observed, families, tolerance)
    # moments over the observed value and the draws alike: a symmetric function of the members, so the observed
    # value stays exchangeable with the draws after the scaling
    members = np.vstack([observed[np.newaxis], null])
    centre = members.mean(axis=0)
    spread = members.std(axis=0)
    constant = spread <= 0
    safe = np.where(constant, 1.0, spread)
    null_z = np.where(constant, 0.0, (null - centre) / safe)
    # ties within the tolerance count as at least as extreme: shift the observed value down by it first
    shifted = observed - tolerance
    observed_z = np.where(constant, np.where(shifted > centre, np.inf, 0.0), (shifted - centre) / safe)
    p_value = np.empty(observed.shape[0])
    for family in np.unique(families):
        members = families == family
        family_max = np.sort(null_z[:, members].max(axis=1))
        below = np.searchsorted(family_max, observed_z[members], side="left")
        p_value[members] = (1.0 + family_max.size - below) / (1.0 + null.shape[0])
    return p_value


def min_p_fwe(observed, null, families, tolerance=TIE_TOLERANCE):
    """Single-step min-p family-wise corrected p-values.

    Parameters
    ----------
    observed, null, families, tolerance
        As for :func:`standardised_max_p`.

    Returns
    -------
    ndarray, shape (n_cells,)
        The observed labeling and the ``n_draws`` null draws form ``n + 1``
        members. Each member's p-value in a cell is ``#{members m' : x[m', c]
        >= x[m, c]} / (n + 1)``; the corrected p of cell ``c`` is
        ``#{members m : min_{c' in family(c)} p[m, c'] <= p[observed, c]} / (n + 1)``.

    Notes
    -----
    Westfall & Young (1993), Resampling-Based Multiple Testing (Wiley),
    single-step min-p; every cell enters through its own null quantile, so
    cells of any spread or shape weigh alike (Nichols & Holmes 2002, Human
    Brain Mapping 15:1-25, discuss it beside the maximum statistic). Counting
    the observed labeling among the members keeps the test valid with random
    draws (Phipson & Smyth 2010). Cost: one sort per cell.
    """
    observed, null = _check_observed_null(observed, null)
    families = _check_families(observed, families, tolerance)
    members_values = np.vstack([observed[np.newaxis], null])  # (n + 1, n_cells), the observed first
    n_members = members_values.shape[0]
    ordered = np.sort(members_values, axis=0)
    member_p = np.empty_like(members_values)
    for cell in range(members_values.shape[1]):  # one searchsorted per cell; each is whole-array over members
        below = np.searchsorted(ordered[:, cell], members_values[:, cell] - tolerance, side="left")
        member_p[:, cell] = (n_members - below) / n_members
    p_value = np.empty(observed.shape[0])
    for family in np.unique(families):
        columns = families == family
        smallest = np.sort(member_p[:, columns].min(axis=1))
        p_value[columns] = np.searchsorted(smallest, member_p[0, columns] + 1e-12, side="right") / n_members
    return p_value


def family_wise_p(observed, null, families, method="standardised", tolerance=TIE_TOLERANCE):
    """Family-wise corrected p-values by ``method``: ``standardised`` (:func:`standardised_max_p`) or ``min_p`` (:func:`min_p_fwe`)."""
    if method == "standardised":
        return standardised_max_p(observed, null, families, tolerance)
    if method == "min_p":
        return min_p_fwe(observed, null, families, tolerance)
    _fail("group.fwe_method", f"unknown family-wise method {method!r}", f"use one of {', '.join(FWE_METHODS)}")


def standardised_effect(scores, chance):
    """Standardised effect per cell: (mean - chance) / SD across subjects (ddof 1).

    Parameters
    ----------
    scores : array_like, shape (n_subjects, n_cells)
    chance : array_like, shape (n_cells,) or scalar

    Returns
    -------
    ndarray, shape (n_cells,)
        NaN with fewer than two subjects or where every subject has the same score.

    Notes
    -----
    The one-sample standardised mean difference (Cohen 1988, Statistical
    Power Analysis for the Behavioral Sciences, 2nd ed., "d" for one sample;
    equal to ``t / sqrt(n)``). It describes the spread of the effect over
    subjects, not a population prevalence.

    Example
    -------
    >>> round(float(standardised_effect([[0.6], [0.7], [0.8]], 0.5)[0]), 6)
    2.0
    """
    scores, chance = _check_scores(scores, chance)
    effect = np.full(scores.shape[1], np.nan)
    if scores.shape[0] < 2:
        return effect
    spread = scores.std(axis=0, ddof=1)
    varying = np.ptp(scores, axis=0) > 0
    effect[varying] = (scores[:, varying].mean(axis=0) - chance[varying]) / spread[varying]
    return effect


def prevalence_gamma0_max(n_subjects, n_draws, alpha, smallest_p_global=None):
    """The largest prevalence bound gamma0 the design can ever reach.

    Parameters
    ----------
    n_subjects : int
    n_draws : int
        Group-level draws of the minimum-statistic null.
    alpha : float
    smallest_p_global : float, optional
        A larger floor of the global-null p-value, if the subject-level
        nulls impose one; default ``1 / (1 + n_draws)``.

    Returns
    -------
    float
        :func:`prevalence_bound` at the smallest attainable global p-value;
        NaN when even that does not reach ``alpha``.

    Examples
    --------
    With 5 subjects and 10,000 draws the majority test (gamma0 = 0.5) can never succeed:

    >>> round(prevalence_gamma0_max(5, 10000, 0.05), 3)
    0.464
    """
    floor = 1.0 / (1.0 + n_draws)
    if smallest_p_global is not None and np.isfinite(smallest_p_global):
        floor = max(floor, float(smallest_p_global))
    return float(prevalence_bound(np.array([floor]), n_subjects, alpha)[0])


def _check_prevalence_args(p_global, n_subjects):
    if isinstance(n_subjects, bool) or not isinstance(n_subjects, (int, np.integer)) or n_subjects < 1:
        _fail("n_subjects", f"must be a positive integer, got {n_subjects!r}", "pass the number of subjects")
    p_global = np.asarray(p_global, dtype=np.float64)
    finite = p_global[np.isfinite(p_global)]
    if np.any((finite <= 0) | (finite > 1)):
        _fail("p_global", f"p-values must lie in (0, 1], got {finite[(finite <= 0) | (finite > 1)][:3]}",
              "pass p-values of the global null")
    return p_global


def prevalence_p(p_global, n_subjects, gamma0):
    """p-value of the prevalence null hypothesis ``gamma <= gamma0``.

    Parameters
    ----------
    p_global : array_like
        p-value of the global null (no subject has an effect) from the
        minimum statistic.
    n_subjects : int
    gamma0 : float or array_like
        Prevalence threshold(s) in [0, 1).

    Returns
    -------
    ndarray
        ``((1 - gamma0) * p_global**(1/N) + gamma0)**N``.

    Notes
    -----
    Allefeld, Gorgen & Haynes (2016), NeuroImage 141:378-392 (formula as we
    remember it): under ``gamma <= gamma0`` each subject's first-level test
    is significant at level ``a`` with probability at most ``(1 - gamma0) a +
    gamma0``, and the minimum statistic is significant only if all N are.
    ``gamma0 = 0.5`` gives the majority test.

    Example
    -------
    >>> float(prevalence_p(0.0016, 4, 0.5))  # (0.5 * 0.2 + 0.5)**4
    0.1296
    """
    p_global = _check_prevalence_args(p_global, n_subjects)
    gamma0 = np.asarray(gamma0, dtype=np.float64)
    if np.any((gamma0 < 0) | (gamma0 >= 1)):
        _fail("gamma0", f"must lie in [0, 1), got {gamma0}", "pass a prevalence threshold such as 0.5")
    root = p_global ** (1.0 / n_subjects)
    return ((1.0 - gamma0) * root + gamma0) ** n_subjects


def prevalence_bound(p_global, n_subjects, alpha):
    """The largest prevalence threshold gamma0 whose null is rejected at alpha.

    Parameters
    ----------
    p_global : array_like
        p-value of the global null from the minimum statistic.
    n_subjects : int
    alpha : float
        Significance level in (0, 1).

    Returns
    -------
    ndarray
        ``gamma0* = (alpha**(1/N) - p_global**(1/N)) / (1 - p_global**(1/N))``
        where ``p_global <= alpha``; NaN where even the global null stands.

    Notes
    -----
    ``prevalence_p`` increases with gamma0, so the rejected thresholds form
    ``[0, gamma0*]``; solving ``prevalence_p(gamma0) = alpha`` gives the closed
    form (Allefeld, Gorgen & Haynes 2016, NeuroImage 141:378-392; from memory).
    One can then say: the share of the population with an effect exceeds
    gamma0* (at level alpha).

    Example
    -------
    >>> round(float(prevalence_bound(0.0016, 4, 0.05)), 4)  # (0.05**0.25 - 0.2) / 0.8
    0.3411
    """
    if not 0 < alpha < 1:
        _fail("alpha", f"must lie in (0, 1), got {alpha!r}", "pass e.g. 0.05")
    p_global = _check_prevalence_args(p_global, n_subjects)
    root = p_global ** (1.0 / n_subjects)
    level_root = alpha ** (1.0 / n_subjects)
    with np.errstate(divide="ignore", invalid="ignore"):
        bound = (level_root - root) / (1.0 - root)
    return np.where(p_global <= alpha, bound, np.nan)


def draw_group_picks(rng, n_subjects, n_draws, n_choices, exact=None, prevalence=True):
    """The group draws' picks in each subject's pool, shared by every cell: one matrix for the mean, one for the minimum.

    Parameters
    ----------
    rng : numpy.random.Generator
    n_subjects, n_draws : int
    n_choices : int or array_like of int, shape (n_subjects,)
        Each subject's relabelings (null rows).
    exact : array_like of bool, shape (n_subjects,), optional
        Subjects whose null lists their whole relabeling space (the actual labeling among its rows).
    prevalence : bool
        Also draw the picks of the minimum statistic's null.

    Returns
    -------
    mean_picks : ndarray of int64, shape (n_draws, n_subjects)
        Rows of each subject's pool (:func:`group_null_draws`: row 0 the actual
        labeling, then the relabelings) in each draw of the group mean.
    minimum_picks : ndarray of int64, shape (n_draws, n_subjects), or None
        The same for the minimum statistic (prevalence); None without prevalence.

    Notes
    -----
    Each subject's pool holds its actual labeling (choice 0) beside its
    relabelings, as a randomization distribution does: under H0 the actual
    labeling is one more member of the subject's null, so the observed group
    mean is exchangeable with the drawn ones and the p-value (1 + #) / (1 +
    draws) is exact (Hemerik & Goeman 2018, JRSS-B 80:137-155). A subject
    whose null lists its whole space already holds the actual labeling: its
    picks skip choice 0. For prevalence, choice 0 is the neutral (actual)
    labeling, as in Allefeld, Gorgen & Haynes (2016). The stream is used in
    a fixed order: the mean's picks first, then the minimum's.
    """
    listed = np.zeros(n_subjects, dtype=bool) if exact is None else np.asarray(exact, dtype=bool)
    choices = np.broadcast_to(np.asarray(n_choices, dtype=np.int64), (n_subjects,)) + (~listed).astype(np.int64)
    shift = listed.astype(np.int64)[np.newaxis, :]
    mean_picks = draw_indices(rng, choices if np.any(choices != choices[0]) else int(choices[0]), n_subjects, n_draws) + shift
    if not prevalence:
        return mean_picks, None
    minimum_picks = draw_indices(rng, choices if np.any(choices != choices[0]) else int(choices[0]), n_subjects, n_draws) + shift
    return mean_picks, minimum_picks


def group_null_draws(scores, subject_nulls, mean_picks, minimum_picks=None):
    """The group-mean null and the minimum-statistic null of some cells, from each subject's pool.

    Parameters
    ----------
    scores : array_like, shape (n_subjects, n_cells)
        Observed scores (row 0 of each subject's pool).
    subject_nulls : array_like, shape (n_subjects, n_permutations, n_cells)
    mean_picks, minimum_picks : ndarray of int, shape (n_draws, n_subjects)
        From :func:`draw_group_picks` (``minimum_picks`` None: no minimum null).

    Returns
    -------
    null_mean : ndarray, shape (n_draws, n_cells)
    null_minimum : ndarray, shape (n_draws, n_cells), or None

    Notes
    -----
    Every cell's draws depend on its own column alone (gathers, sums and
    minima element by element), so the draws of a subset of the cells equal
    those columns of the draws of all cells, bit for bit: the group job
    computes them one ROI at a time (tests/test_group.py checks this).
    """
    scores = np.asarray(scores, dtype=np.float64)
    pool = np.concatenate([scores[:, None, :], np.asarray(subject_nulls, dtype=np.float64)], axis=1)
    null_mean = group_mean_null(pool, mean_picks)
    null_minimum = None if minimum_picks is None else group_minimum_null(pool, minimum_picks)
    return null_mean, null_minimum


def group_statistics(scores, chance, subject_nulls, families, rng, n_draws, alpha, prevalence=True, fwe_method="standardised",
                     n_choices=None, exact=None, null_draws=None):
    """Every group statistic of one analysis, per cell.

    Parameters
    ----------
    scores : array_like, shape (n_subjects, n_cells)
        Observed balanced accuracies.
    chance : array_like, shape (n_cells,)
    subject_nulls : array_like, shape (n_subjects, n_permutations, n_cells) or None
        Subject-level permutation nulls (the same permutation ``k`` across the
        cells of a subject); ``None`` or zero permutations: no permutation tests.
    families : array_like, shape (n_cells,)
        Family label per cell for the maximum-statistic correction.
    rng : numpy.random.Generator
    n_draws : int
        Group-level draws.
    alpha : float
        Level for the prevalence bound.
    prevalence : bool
        Whether to run prevalence inference.
    fwe_method : {"standardised", "min_p"}
        How cells are put on one scale before the family's maximum
        (:func:`family_wise_p`).
    n_choices : array_like of int, shape (n_subjects,), optional
        Null rows of each subject when they differ (the rest of its rows are
        padding, never drawn); default every row of every subject.
    exact : array_like of bool, shape (n_subjects,), optional
        Subjects whose null lists their whole relabeling space (the actual
        labeling among the rows); default none.
    null_draws : tuple of ndarray, optional
        ``(null_mean, null_minimum)`` computed beforehand by
        :func:`group_null_draws` with the picks of :func:`draw_group_picks`
        (the group job assembles them ROI by ROI); ``subject_nulls``, ``rng``,
        ``n_choices`` and ``exact`` are then not used.

    Returns
    -------
    columns : dict of ndarray, shape (n_cells,)
        ``mean, sem, ci_low, ci_high, effect_size, t, p_t, p_wilcoxon, p_perm,
        p_fwe, prevalence_p_global, prevalence_gamma0, prevalence_p_majority,
        prevalence_p_global_fwe, prevalence_gamma0_fwe, prevalence_gamma0_max``
        (NaN where not computed). The ``_fwe`` prevalence columns are
        corrected over each family: the family's maximum of the minimum
        statistic (Allefeld, Gorgen & Haynes 2016, NeuroImage 141:378-392),
        each cell standardised as for ``p_fwe``.
    null_mean : ndarray, shape (n_draws, n_cells) or None
        The group-mean null (``None`` when no permutation test ran).

    Notes
    -----
    Fewer than ``MIN_SUBJECTS`` subjects: descriptive columns only (the
    interval too is left out). The random stream is used in a fixed order:
    first the (n_draws x n_subjects) picks among the permutations for the
    group-mean null, then, if prevalence is on, the picks among the neutral
    labeling and the permutations for the minimum null. Each is one matrix used
    in every cell.
    """
    scores, chance = _check_scores(scores, chance)
    n_subjects, n_cells = scores.shape
    nan = np.full(n_cells, np.nan)
    columns = mean_sem_ci(scores)
    columns["effect_size"] = standardised_effect(scores, chance)
    for name in ("t", "p_t", "p_wilcoxon", "p_perm", "p_fwe", "prevalence_p_global", "prevalence_gamma0",
                 "prevalence_p_majority", "prevalence_p_global_fwe", "prevalence_gamma0_fwe", "prevalence_gamma0_max"):
        columns[name] = nan.copy()
    if n_subjects < MIN_SUBJECTS:
        columns["ci_low"], columns["ci_high"] = nan.copy(), nan.copy()
        return columns, None
    columns["t"], columns["p_t"] = t_test_greater(scores, chance)
    columns["p_wilcoxon"] = wilcoxon_greater(scores, chance)
    if null_draws is None:
        if subject_nulls is None or np.asarray(subject_nulls).shape[1] == 0:
            return columns, None
        subject_nulls = np.asarray(subject_nulls, dtype=np.float64)
        if subject_nulls.shape[0] != n_subjects or subject_nulls.shape[2] != n_cells:
            _fail("subject_nulls", f"shape {subject_nulls.shape} does not match scores {scores.shape}",
                  "pass one (permutations x cells) null per subject, cells as in scores")
        n_permutations = subject_nulls.shape[1] if n_choices is None else np.asarray(n_choices, dtype=np.int64)
        picks = draw_group_picks(rng, n_subjects, n_draws, n_permutations, exact, prevalence)
        null_mean, null_minimum = group_null_draws(scores, subject_nulls, *picks)
    else:
        null_mean, null_minimum = null_draws
        if np.shape(null_mean) != (n_draws, n_cells) or (prevalence and np.shape(null_minimum) != (n_draws, n_cells)):
            _fail("null_draws", f"expected ({n_draws}, {n_cells}) draws of the group mean (and minimum), got "
                  f"{np.shape(null_mean)} and {np.shape(null_minimum)}", "pass the output of group_null_draws for these cells")
    observed_mean = columns["mean"]
    columns["p_perm"] = permutation_p(observed_mean, null_mean)
    columns["p_fwe"] = family_wise_p(observed_mean - chance, null_mean - chance, families, fwe_method)
    if prevalence:
        observed_minimum = scores.min(axis=0)
        p_global = permutation_p(observed_minimum, null_minimum)
        columns["prevalence_p_global"] = p_global
        columns["prevalence_gamma0"] = prevalence_bound(p_global, n_subjects, alpha)
        columns["prevalence_p_majority"] = prevalence_p(p_global, n_subjects, 0.5)
        p_global_fwe = family_wise_p(observed_minimum, null_minimum, families, fwe_method)
        columns["prevalence_p_global_fwe"] = p_global_fwe
        columns["prevalence_gamma0_fwe"] = prevalence_bound(p_global_fwe, n_subjects, alpha)
        columns["prevalence_gamma0_max"] = np.full(n_cells, prevalence_gamma0_max(n_subjects, n_draws, alpha))
    return columns, null_mean
