"""Tests of foldwise.glm.hrf: the canonical double-gamma HRF and its derivative kernels.

Outside references: scipy.stats.gamma (the gamma density, computed
independently of our closed form), the published double-gamma form
(Friston et al. 1998, NeuroImage 7:30-40; Glover 1999, NeuroImage 9:416-429;
parameters quoted from memory), numerical differentiation, and
scipy.linalg.subspace_angles for comparing spans.
"""

import numpy as np
import pytest
from scipy.linalg import subspace_angles
from scipy.stats import gamma

from foldwise.errors import InputError
from foldwise.glm.hrf import (DISPERSION_STEP, HRF_DURATION_S, double_gamma, double_gamma_time_derivative,
                          hrf_basis)

# A table of time points (s): the rise, the peak, the undershoot, the tail, and t <= 0.
TIMES_S = np.array([-1.0, 0.0, 0.25, 1.0, 2.0, 3.5, 4.0, 5.0, 6.0, 7.5, 10.0, 12.0, 15.0, 16.0, 20.0, 25.0, 31.875])


def _published_form(times_s, scale=1.0):
    """g(t; 6, s) - g(t; 16, s) / 6 with scipy's gamma density (Friston 1998; Glover 1999)."""
    return gamma.pdf(times_s, 6, scale=scale) - gamma.pdf(times_s, 16, scale=scale) / 6.0


def test_double_gamma_equals_the_published_form_from_scipy_gamma():
    # Source: the double-gamma form of Friston et al. 1998 / Glover 1999, evaluated with scipy.stats.gamma.
    np.testing.assert_allclose(double_gamma(TIMES_S), _published_form(TIMES_S), rtol=1e-12, atol=1e-300)
    np.testing.assert_allclose(double_gamma(TIMES_S, scale=1.3), _published_form(TIMES_S, 1.3), rtol=1e-12, atol=1e-300)
    assert double_gamma([-1.0, 0.0]).tolist() == [0.0, 0.0]


def test_double_gamma_peaks_near_5_s_and_dips_after_15_s():
    # Source: the peak of g(t; 6, 1) is its mode (shape - 1) * scale = 5 s (gamma density, any textbook);
    # the undershoot's mode is 15 s, pushed later by the decaying first gamma. The ~5 s peak and
    # ~15 s undershoot are the published description (Glover 1999, from memory).
    times = np.arange(0.0, 32.0, 0.001)
    values = double_gamma(times)
    assert abs(times[np.argmax(values)] - 5.0) < 0.01
    assert 15.0 < times[np.argmin(values)] < 16.5


def test_time_derivative_equals_a_central_difference_of_the_scipy_form():
    # Source: numerical differentiation (central difference, error O(h^2)) of the scipy.stats.gamma form.
    step = 1e-5
    numeric = (_published_form(TIMES_S + step) - _published_form(TIMES_S - step)) / (2 * step)
    positive = TIMES_S > step
    np.testing.assert_allclose(double_gamma_time_derivative(TIMES_S)[positive], numeric[positive], rtol=1e-6, atol=1e-10)


@pytest.mark.parametrize("tr_s, oversampling", [(2.0, 16), (0.8, 10), (1.5, 1), (3.0, 50)])
def test_kernel_is_the_sampled_form_scaled_to_unit_riemann_sum(tr_s, oversampling):
    times, kernels = hrf_basis(tr_s, oversampling)
    dt_s = tr_s / oversampling
    np.testing.assert_allclose(np.diff(times), dt_s, rtol=1e-12)
    assert times[0] == 0.0 and times[-1] < HRF_DURATION_S <= times[-1] + dt_s + 1e-9
    assert kernels.shape == (times.size, 1)
    assert kernels[:, 0].sum() * dt_s == pytest.approx(1.0, rel=1e-12)
    raw = _published_form(times)
    np.testing.assert_allclose(kernels[:, 0], raw / (raw.sum() * dt_s), rtol=1e-10, atol=1e-14)


def test_derivative_kernels_are_orthogonal_with_the_canonical_norm():
    _, kernels = hrf_basis(2.0, 16, "temporal_dispersion")
    assert kernels.shape[1] == 3
    gram = kernels.T @ kernels
    norm_squared = gram[0, 0]
    np.testing.assert_allclose(gram, norm_squared * np.eye(3), atol=1e-12 * norm_squared)
    _, canonical_only = hrf_basis(2.0, 16, "none")
    np.testing.assert_array_equal(kernels[:, 0], canonical_only[:, 0])


def test_basis_spans_the_canonical_form_and_its_analytic_derivatives():
    # Source: d/dt g(t; a, 1) from a central difference of scipy's density (checked above), and the
    # analytic scale derivative d/ds g(t; a, s) at s = 1 equal to g(t; a, 1) (t - a) (differentiate
    # log g = (a-1) log t - t/s - a log s - log Gamma(a)), with scipy.stats.gamma. The forward
    # difference with step 0.01 differs from it by O(0.01), so the spans agree to about that.
    times, kernels = hrf_basis(2.0, 16, "temporal_dispersion")
    step = 1e-5
    temporal = (_published_form(times + step) - _published_form(times - step)) / (2 * step)
    dispersion = gamma.pdf(times, 6) * (times - 6) - gamma.pdf(times, 16) * (times - 16) / 6.0
    reference = np.column_stack([_published_form(times), temporal, dispersion])
    assert np.max(subspace_angles(kernels[:, :2], reference[:, :2])) < 1e-6
    assert np.max(subspace_angles(kernels, reference)) < 5 * DISPERSION_STEP
    # ... and it is a finite difference, not the analytic derivative: the angle is not zero.
    assert np.max(subspace_angles(kernels, reference)) > 1e-6


@pytest.mark.parametrize("kwargs, field", [
    ({"tr_s": 0.0, "oversampling": 16}, "tr_s"),
    ({"tr_s": float("nan"), "oversampling": 16}, "tr_s"),
    ({"tr_s": 2.0, "oversampling": 0}, "glm.hrf_steps_per_scan"),
    ({"tr_s": 2.0, "oversampling": 2.5}, "glm.hrf_steps_per_scan"),
    ({"tr_s": 2.0, "oversampling": True}, "glm.hrf_steps_per_scan"),
    ({"tr_s": 2.0, "oversampling": 16, "derivatives": "dispersion"}, "glm.hrf_derivatives"),
    ({"tr_s": 2.0, "oversampling": 16, "duration_s": -3.0}, "duration_s"),
])
def test_bad_arguments_raise_input_error_naming_the_field(kwargs, field):
    with pytest.raises(InputError) as excinfo:
        hrf_basis(**kwargs)
    assert excinfo.value.field == field and excinfo.value.fix


def test_bad_scale_and_times_raise_input_error():
    with pytest.raises(InputError, match="scale"):
        double_gamma([1.0], scale=0.0)
    with pytest.raises(InputError, match="times_s"):
        double_gamma([1.0, np.inf])
