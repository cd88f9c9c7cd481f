"""Group tests of model fits: sign-flip permutations with max-statistic FWE control."""

import numpy as np

from foldwise.errors import InputError

__all__ = ["TIE_RELATIVE", "sign_flips", "flip_t", "signflip_test", "pairwise_differences"]

#: Flipped statistics within this relative distance of the observed one count
#: as ties (at least as extreme): sums of the same numbers in another order
#: differ in the last bits (common practice, no source).
TIE_RELATIVE = 1e-9
_CHUNK_ELEMENTS = 4_000_000


def _fail(field, problem, fix):
    raise InputError(None, field, problem, fix)


def sign_flips(n_subjects, n_draws, rng):
    """The sign-flip draws of a group test: exact enumeration when it fits in ``n_draws``.

    Parameters
    ----------
    n_subjects : int
    n_draws : int
        Number of random flips when ``2 ** n_subjects > n_draws``.
    rng : numpy.random.Generator

    Returns
    -------
    flips : ndarray of float64, shape (n_flips, n_subjects)
        Rows of +1/-1; the first row is all +1 (the observed data).
    exact : bool
        True when all ``2 ** n_subjects`` sign vectors are enumerated
        (p-values are then exact counts over the permutation distribution);
        else the identity plus ``n_draws`` random vectors, so that
        ``p = (1 + #{draws >= observed}) / (1 + n_draws)``, which is valid
        (Phipson & Smyth 2010, Stat Appl Genet Mol Biol 9:39).
    """
    if n_subjects < 2:
        _fail("subjects", f"a sign-flip test needs two or more subjects, got {n_subjects}", "add subjects")
    if 2 ** n_subjects <= n_draws:
        codes = np.arange(2 ** n_subjects)[:, None] >> np.arange(n_subjects)[None, :] & 1
        return 1.0 - 2.0 * codes, True
    random = 1.0 - 2.0 * rng.integers(0, 2, size=(n_draws, n_subjects))
    return np.vstack([np.ones((1, n_subjects)), random]), False


def flip_t(fits, flips):
    """One-sample t of every flipped group, per cell: ``(n_flips, n_cells)``.

    With ``m`` the flipped mean and ``q = sum x^2`` (unchanged by flips),
    ``sd^2 = (q - n m^2) / (n - 1)`` and ``t = m / (sd / sqrt(n))``. A cell
    without spread has ``t = +-inf`` (0 when its mean is 0).
    """
    n_subjects = fits.shape[0]
    mean = flips @ fits / n_subjects
    squares = np.einsum("sc,sc->c", fits, fits)
    variance = np.maximum(squares[None, :] - n_subjects * mean ** 2, 0.0) / (n_subjects - 1)
    scale = np.sqrt(variance / n_subjects)
    tiny = 1e-12 * np.sqrt(squares / n_subjects)[None, :]
    with np.errstate(divide="ignore", invalid="ignore"):
        t_value = np.where(scale > tiny, mean / scale, np.sign(mean) * np.inf)
    return np.nan_to_num(t_value, nan=0.0, posinf=np.inf, neginf=-np.inf)


def signflip_test(fits, flips, families=None, two_sided=False):
    """Sign-flip permutation test of the group mean against 0, per cell, with max-statistic FWE.

    Parameters
    ----------
    fits : array_like, shape (n_subjects, n_cells)
        One value per subject and cell (model fit, or a difference of fits).
    flips : ndarray, shape (n_flips, n_subjects)
        From :func:`sign_flips` (first row the identity).
    families : array_like, shape (n_cells,), optional
        Cells with one label form a family over which the maximum is taken
        (default: all cells one family).
    two_sided : bool
        Test ``|t|`` (for differences between models) instead of ``t``
        (one-sided, greater).

    Returns
    -------
    dict of ndarray, shape (n_cells,)
        ``t`` (observed), ``p`` (uncorrected), ``p_fwe``.

    Notes
    -----
    Under the null hypothesis that each subject's value is symmetric about
    0, flipping signs leaves the joint distribution unchanged (Fisher 1935,
    The Design of Experiments, sec. 21; Nichols & Holmes 2002, Hum Brain
    Mapp 15:1-25). Every cell uses the same flips, so the family's maximum
    ``t`` over cells under each flip gives the FWE-corrected p (Westfall &
    Young 1993). The statistic is the studentised mean, so cells on
    different scales (models, ROIs) enter the maximum on one scale.
    """
    fits = np.asarray(fits, dtype=np.float64)
    if fits.ndim != 2 or fits.shape[0] != flips.shape[1]:
        _fail("fits", f"expected (n_subjects={flips.shape[1]}, n_cells), got {fits.shape}", "pass one row per subject")
    if not np.all(np.isfinite(fits)):
        _fail("fits", "model fits hold NaN or inf (a constant dissimilarity vector?)", "check the subject's dissimilarities")
    n_cells = fits.shape[1]
    labels = np.zeros(n_cells, dtype=np.int64) if families is None else np.unique(np.asarray(families), return_inverse=True)[1]
    n_families = int(labels.max()) + 1 if n_cells else 0
    observed = flip_t(fits, flips[:1])[0]
    if two_sided:
        observed = np.abs(observed)
    threshold = observed - TIE_RELATIVE * np.maximum(1.0, np.abs(np.nan_to_num(observed, posinf=0, neginf=0)))
    counts = np.zeros(n_cells)
    maxima = np.empty((flips.shape[0], n_families))
    step = max(1, _CHUNK_ELEMENTS // max(1, n_cells))
    for start in range(0, flips.shape[0], step):
        t_values = flip_t(fits, flips[start:start + step])
        if two_sided:
            t_values = np.abs(t_values)
        counts += (t_values >= threshold[None, :]).sum(axis=0)
        for family in range(n_families):
            maxima[start:start + step, family] = t_values[:, labels == family].max(axis=1)
    fwe_counts = np.empty(n_cells)
    for family in range(n_families):
        members = labels == family
        ordered = np.sort(maxima[:, family])
        fwe_counts[members] = ordered.size - np.searchsorted(ordered, threshold[members], side="left")
    n_flips = flips.shape[0]
    return {"t": observed, "p": counts / n_flips, "p_fwe": fwe_counts / n_flips}


def pairwise_differences(fits, model_names):
    """Differences between every pair of models, per subject and cell group.

    Parameters
    ----------
    fits : ndarray, shape (n_subjects, n_groups, n_models)
    model_names : sequence of str

    Returns
    -------
    differences : ndarray, shape (n_subjects, n_groups, n_model_pairs)
        ``fit[a] - fit[b]`` for ``a < b`` in config order.
    pairs : list of (str, str)
    """
    first, second = np.triu_indices(len(model_names), k=1)
    return fits[..., first] - fits[..., second], [(model_names[a], model_names[b]) for a, b in zip(first, second)]
