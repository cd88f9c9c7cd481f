"""The canonical haemodynamic response function (HRF) and its derivatives.

A GLM models each event as a boxcar of neural activity convolved with an HRF.
This module gives the canonical double-gamma HRF and, optionally, two extra
basis functions that let each regressor absorb small shifts in latency
(temporal derivative) and width (dispersion derivative) of the response.
"""

import numpy as np
from scipy.special import gammaln

from foldwise.errors import InputError

__all__ = [
    "HRF_DURATION_S",
    "DISPERSION_STEP",
    "DERIVATIVE_CHOICES",
    "double_gamma",
    "double_gamma_time_derivative",
    "hrf_basis",
]

#: Length of the sampled kernel: the canonical response and its undershoot
#: have decayed to < 1e-4 of the peak by 32 s.
HRF_DURATION_S = 32.0
#: Relative step in the gamma scale parameter for the dispersion derivative.
DISPERSION_STEP = 0.01
#: Accepted values of ``hrf_derivatives`` (the config key of the same name).
DERIVATIVE_CHOICES = ("none", "temporal", "temporal_dispersion")

# Double-gamma parameters: response shape 6, undershoot shape 16, both scale
# 1 s, undershoot ratio 1/6: the canonical values popularised by Friston et
# al. 1998 (NeuroImage 7:30-40) and used as the standard form since (values
# from memory). Glover 1999 (NeuroImage 9:416-429) parameterises his
# difference of gamma-like functions differently (powers and widths fitted to
# measured responses, different numbers); his form is not what is used here.
_PEAK_SHAPE = 6.0
_UNDERSHOOT_SHAPE = 16.0
_UNDERSHOOT_RATIO = 1.0 / 6.0


def _gamma_pdf(times_s, shape, scale):
    """Gamma density written out (t^(a-1) e^(-t/s) / (Gamma(a) s^a)); 0 for t <= 0."""
    times_s = np.asarray(times_s, dtype=np.float64)
    density = np.zeros_like(times_s)
    positive = times_s > 0
    t = times_s[positive] / scale
    density[positive] = np.exp((shape - 1.0) * np.log(t) - t - gammaln(shape)) / scale
    return density


def _check_times(times_s):
    times = np.asarray(times_s, dtype=np.float64)
    if not np.all(np.isfinite(times)):
        raise InputError(None, "times_s", f"HRF times must be finite (got {times_s!r})", "pass finite times in seconds")
    return times


def double_gamma(times_s, scale=1.0):
    """The canonical double-gamma HRF, unnormalised.

    Parameters
    ----------
    times_s : array_like
        Time after the neural impulse, in seconds. Times <= 0 give 0.
    scale : float, optional
        Scale (dispersion) parameter of both gamma densities, in seconds;
        the canonical form uses 1.

    Returns
    -------
    numpy.ndarray
        ``g(t; 6, scale) - g(t; 16, scale) / 6`` with ``g`` the gamma
        probability density of the given shape and scale, same shape as
        ``times_s`` (float64).

    Notes
    -----
    Friston et al. (1998), NeuroImage 7:30-40 and Glover (1999), NeuroImage
    9:416-429 describe the response as a difference of two gamma densities:
    a peak near 5 s and an undershoot near 15 s. The parameters used here
    (shapes 6 and 16, scale 1 s, undershoot ratio 1/6) are the widely used
    canonical values, quoted from memory.

    Examples
    --------
    >>> float(np.round(double_gamma([5.0])[0], 4))
    0.1754
    """
    if not (np.isscalar(scale) and np.isfinite(scale) and scale > 0):
        raise InputError(None, "scale", f"the gamma scale must be a positive number (got {scale!r})", "pass a scale > 0 in seconds")
    times = _check_times(times_s)
    return _gamma_pdf(times, _PEAK_SHAPE, scale) - _UNDERSHOOT_RATIO * _gamma_pdf(times, _UNDERSHOOT_SHAPE, scale)


def double_gamma_time_derivative(times_s):
    """Analytic time derivative of :func:`double_gamma` (scale 1).

    Parameters
    ----------
    times_s : array_like
        Time after the neural impulse, in seconds.

    Returns
    -------
    numpy.ndarray
        ``dh/dt`` at ``times_s`` (float64).

    Notes
    -----
    For unit scale, ``d/dt g(t; a, 1) = g(t; a - 1, 1) - g(t; a, 1)``, which
    follows from differentiating ``t^(a-1) e^(-t) / Gamma(a)`` and
    ``Gamma(a) = (a - 1) Gamma(a - 1)``.
    """
    times = _check_times(times_s)
    peak = _gamma_pdf(times, _PEAK_SHAPE - 1.0, 1.0) - _gamma_pdf(times, _PEAK_SHAPE, 1.0)
    undershoot = _gamma_pdf(times, _UNDERSHOOT_SHAPE - 1.0, 1.0) - _gamma_pdf(times, _UNDERSHOOT_SHAPE, 1.0)
    return peak - _UNDERSHOOT_RATIO * undershoot


def _orthogonalise(vector, previous):
    """Remove from ``vector`` its least-squares projection on the columns of ``previous``."""
    coefficients, *_ = np.linalg.lstsq(previous, vector, rcond=None)
    return vector - previous @ coefficients


def hrf_basis(tr_s, oversampling, derivatives="none", duration_s=HRF_DURATION_S):
    """Sample the HRF basis at the fine time resolution ``dt = tr_s / oversampling``.

    Parameters
    ----------
    tr_s : float
        Repetition time in seconds.
    oversampling : int
        Fine samples per TR (>= 1); the design is built on this grid.
    derivatives : {"none", "temporal", "temporal_dispersion"}
        Which derivative kernels to add after the canonical one.
    duration_s : float, optional
        Kernel length in seconds (default 32 s).

    Returns
    -------
    times_s : numpy.ndarray
        ``(n_samples,)`` sample times ``0, dt, 2 dt, ...`` below ``duration_s``.
    kernels : numpy.ndarray
        ``(n_samples, n_basis)`` float64 with n_basis 1, 2 or 3: the
        canonical HRF, then the temporal derivative, then the dispersion
        derivative.

    Notes
    -----
    *Normalisation.* The canonical kernel is divided by ``dt * sum(h)`` so
    that its Riemann sum is 1: a sustained unit input then produces a
    response that plateaus at 1, so a beta is in the data's units per unit
    of sustained activity and does not depend on ``tr_s`` or
    ``oversampling``.

    *Temporal derivative.* The analytic ``dh/dt`` (see
    :func:`double_gamma_time_derivative`); ``h(t - tau) ~ h(t) - tau dh/dt``
    so its coefficient absorbs small latency shifts (Friston et al. 1998).

    *Dispersion derivative.* A forward finite difference in the gamma scale
    parameter of both densities, ``(h(t; 1 + delta) - h(t; 1)) / delta``
    with ``delta = DISPERSION_STEP = 0.01`` (relative to the unit scale).

    Each derivative kernel is divided by the same constant as the canonical
    one, orthogonalised (least squares over the fine samples) against the
    kernels before it, so the canonical kernel keeps the shared variance,
    and then rescaled to the canonical kernel's Euclidean norm so the design
    columns have comparable size (good conditioning; the scale of a
    derivative regressor is arbitrary).

    Examples
    --------
    >>> times, kernels = hrf_basis(2.0, 16, "temporal")
    >>> kernels.shape
    (256, 2)
    """
    if not (np.isscalar(tr_s) and np.isfinite(tr_s) and tr_s > 0):
        raise InputError(None, "tr_s", f"the repetition time must be a positive number of seconds (got {tr_s!r})",
                         "set RepetitionTime in the BOLD sidecar")
    if isinstance(oversampling, bool) or not isinstance(oversampling, (int, np.integer)) or oversampling < 1:
        raise InputError(None, "glm.hrf_steps_per_scan", f"must be an integer >= 1 (got {oversampling!r})",
                         "set glm.hrf_steps_per_scan to e.g. 16")
    if derivatives not in DERIVATIVE_CHOICES:
        raise InputError(None, "glm.hrf_derivatives", f"unknown choice {derivatives!r}", f"use one of {', '.join(DERIVATIVE_CHOICES)}")
    if not (np.isscalar(duration_s) and np.isfinite(duration_s) and duration_s > 0):
        raise InputError(None, "duration_s", f"the kernel length must be a positive number of seconds (got {duration_s!r})",
                         "pass a duration such as 32")
    dt_s = float(tr_s) / int(oversampling)
    n_samples = max(int(np.ceil(duration_s / dt_s - 1e-9)), 2)
    times_s = dt_s * np.arange(n_samples, dtype=np.float64)

    canonical_raw = double_gamma(times_s)
    area = dt_s * canonical_raw.sum()
    kernels = [canonical_raw / area]
    if derivatives != "none":
        kernels.append(double_gamma_time_derivative(times_s) / area)
    if derivatives == "temporal_dispersion":
        dispersion = (double_gamma(times_s, 1.0 + DISPERSION_STEP) - canonical_raw) / DISPERSION_STEP
        kernels.append(dispersion / area)
    reference_norm = np.linalg.norm(kernels[0])
    for index in range(1, len(kernels)):
        residual = _orthogonalise(kernels[index], np.column_stack(kernels[:index]))
        kernels[index] = residual * (reference_norm / np.linalg.norm(residual))
    return times_s, np.column_stack(kernels)
