"""Comparing dissimilarity vectors with models, and noise ceilings.

All functions take data as ``(n_rows, n_pairs)`` (subjects, spheres, ...)
and models as ``(n_models, n_pairs)`` and return ``(n_rows, n_models)``.
"""

import numpy as np

from foldwise.errors import InputError

__all__ = ["COMPARISONS", "kendall_tau_a", "spearman", "pearson", "compare", "noise_ceiling"]

COMPARISONS = ("kendall_tau_a", "spearman", "pearson")


def _as_rows(values):
    return np.atleast_2d(np.asarray(values, dtype=np.float64))


def _pair_signs(values):
    """``sign(x_a - x_b)`` for every pair ``a < b`` of entries, per row: ``(n_rows, n(n-1)/2)``."""
    first, second = np.triu_indices(values.shape[1], k=1)
    return np.sign(values[:, first] - values[:, second])


def kendall_tau_a(data, models):
    """Kendall's tau-a: (concordant - discordant) / (n (n - 1) / 2), ties counted in neither.

    Notes
    -----
    Kendall (1938), Biometrika 30:81-93; recommended for comparing RDMs
    with models that predict ties (Nili et al. 2014, PLoS Comput Biol
    10:e1003553). One matrix product of the pair-sign matrices.
    """
    data, models = _as_rows(data), _as_rows(models)
    n_pairs = data.shape[1] * (data.shape[1] - 1) / 2
    return _pair_signs(data) @ _pair_signs(models).T / n_pairs


def pearson(data, models):
    """Pearson's r of every row with every model (NaN for a constant row)."""
    data, models = _as_rows(data), _as_rows(models)
    def unit(values):
        centred = values - values.mean(axis=1, keepdims=True)
        norms = np.linalg.norm(centred, axis=1, keepdims=True)
        with np.errstate(invalid="ignore", divide="ignore"):
            return centred / norms
    return unit(data) @ unit(models).T


def spearman(data, models):
    """Spearman's rho: Pearson's r of the ranks (ties get their average rank, as in scipy)."""
    from scipy.stats import rankdata  # here, not at import: scipy.stats costs ~0.5 s of CPU in jobs that compare by Kendall's tau-a

    data, models = _as_rows(data), _as_rows(models)
    return pearson(rankdata(data, axis=1), rankdata(models, axis=1))


def compare(data, models, comparison):
    """Dispatch on ``comparison`` (one of :data:`COMPARISONS`)."""
    if comparison == "kendall_tau_a":
        return kendall_tau_a(data, models)
    if comparison == "spearman":
        return spearman(data, models)
    if comparison == "pearson":
        return pearson(data, models)
    raise InputError(None, "comparison", f"unknown comparison {comparison!r}", f"use one of {', '.join(COMPARISONS)}")


def _reference_scale(data, comparison):
    """Per-subject transform the comparison ignores, applied before averaging subjects."""
    if comparison == "pearson":
        centred = data - data.mean(axis=1, keepdims=True)
        sd = centred.std(axis=1, keepdims=True)
        return np.divide(centred, sd, out=np.zeros_like(centred), where=sd > 0)
    from scipy.stats import rankdata  # late, as in spearman

    return rankdata(data, axis=1)


def noise_ceiling(data, comparison):
    """Lower and upper bound of the best fit any model could reach, per subject and on average.

    Parameters
    ----------
    data : array_like, shape (n_subjects, n_pairs)
        Each subject's dissimilarities (n_subjects >= 2).
    comparison : str

    Returns
    -------
    dict
        ``lower``, ``upper``: floats (means over subjects); ``lower_per_subject``
        and ``upper_per_subject``: ``(n_subjects,)``.

    Notes
    -----
    Nili et al. (2014), PLoS Comput Biol 10:e1003553: the upper bound
    compares each subject with the mean of all subjects (itself included),
    the lower bound with the mean of the others. The subjects are first put
    on the scale the comparison is blind to (z-scores for Pearson, ranks for
    Spearman and Kendall's tau-a) so that no subject dominates the mean.
    """
    data = _as_rows(data)
    n_subjects = data.shape[0]
    if n_subjects < 2:
        raise InputError(None, "subjects", "a noise ceiling needs two or more subjects", "add subjects")
    scaled = _reference_scale(data, comparison)
    total = scaled.sum(axis=0)
    upper = np.diag(compare(data, np.broadcast_to(total / n_subjects, data.shape), comparison)).copy()
    others = (total[None, :] - scaled) / (n_subjects - 1)
    lower = np.array([compare(data[s], others[s], comparison)[0, 0] for s in range(n_subjects)])
    return {"lower": float(np.mean(lower)), "upper": float(np.mean(upper)),
            "lower_per_subject": lower, "upper_per_subject": upper}
