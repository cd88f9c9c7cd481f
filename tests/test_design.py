"""Tests of foldwise.glm.design: drift cosines, event regressors, the design of one run.

Outside references: scipy.fft's orthonormal DCT-II (Ahmed, Natarajan & Rao
1974) for the drift basis, scipy.linalg.subspace_angles and orth for spans,
and the closed-form response of a boxcar convolved with the double-gamma HRF,
written with scipy.stats.gamma's cumulative distribution function
(int_0^u g(s; a, 1) ds = gamma.cdf(u, a)).
"""

import numpy as np
import pandas as pd
import pytest
from scipy.fft import dct
from scipy.linalg import subspace_angles
from scipy.stats import gamma

from foldwise.glm.design import DERIVATIVE_SUFFIXES, build_design, cosine_drift_basis, event_regressors, frame_times
from foldwise.errors import InputError
from foldwise.glm.hrf import HRF_DURATION_S


def _exact_response(times_s, onset_s, duration_s):
    """Closed-form boxcar response with the unit-area canonical HRF on [0, 32 s) (scipy gamma CDFs).

    x(t) = [H(t - on) - H(t - on - d)] / H(32) with H(u) = G6(u) - G16(u) / 6 for u in [0, 32], clipped
    outside; duration 0: the impulse response h(t - on) / H(32).
    """
    def cumulative(u):
        u = np.clip(u, 0.0, HRF_DURATION_S)
        return gamma.cdf(u, 6) - gamma.cdf(u, 16) / 6.0

    area = cumulative(HRF_DURATION_S)
    lag = np.asarray(times_s, dtype=np.float64) - onset_s
    if duration_s == 0:
        inside = (lag >= 0) & (lag < HRF_DURATION_S)
        return np.where(inside, gamma.pdf(lag, 6) - gamma.pdf(lag, 16) / 6.0, 0.0) / area
    return (cumulative(lag) - cumulative(lag - duration_s)) / area


def _events(rows):
    return pd.DataFrame(rows, columns=["onset", "duration", "trial_type"])


LANTERN_EVENTS = _events([
    (4.0, 2.0, "seen_round"), (18.0, 2.0, "seen_star"), (30.0, 2.0, "seen_round"), (44.0, 2.0, "heard_square"),
    (58.0, 2.0, "seen_star"), (70.0, 2.0, "seen_round"), (84.0, 0.0, "button"),
])


# ---------------------------------------------------------------- drift basis

@pytest.mark.parametrize("n_scans, tr_s, highpass_s", [(200, 2.0, 128.0), (173, 0.8, 100.0), (50, 3.0, 30.0), (64, 1.0, 1000.0)])
def test_drift_basis_spans_scipy_orthonormal_dct2_components_below_cutoff(n_scans, tr_s, highpass_s):
    # Source: scipy.fft.dct(type=2, norm="ortho"): row k of the transform matrix is the k-th basis
    # vector. Component k has period 2 N tr / k; the cutoff keeps k = 1 .. floor(2 N tr / highpass_s).
    basis = cosine_drift_basis(frame_times(n_scans, tr_s), highpass_s)
    n_drift = int(np.floor(2 * n_scans * tr_s / highpass_s))
    assert basis.shape == (n_scans, n_drift)
    transform = dct(np.eye(n_scans), type=2, norm="ortho", axis=0)
    reference = transform[1:n_drift + 1].T
    if n_drift:
        np.testing.assert_allclose(basis @ basis.T, reference @ reference.T, atol=1e-12)  # same projection
        assert np.max(subspace_angles(basis, reference)) < 1e-9
        np.testing.assert_allclose(basis.T @ basis, np.eye(n_drift), atol=1e-12)
        np.testing.assert_allclose(basis.sum(axis=0), 0.0, atol=1e-10)  # the constant is excluded


def test_drift_basis_counts_and_caps():
    # 200 scans x 2 s over 128 s: floor(6.25) = 6 cosines (the usual rule; worked by hand).
    assert cosine_drift_basis(np.arange(200) * 2.0, 128.0).shape == (200, 6)
    # A cutoff shorter than two scans would ask for more cosines than exist: capped at N - 1.
    assert cosine_drift_basis(np.arange(10) * 2.0, 0.5).shape == (10, 9)
    # A cutoff longer than twice the run: no drift regressor.
    assert cosine_drift_basis(np.arange(10) * 2.0, 100.0).shape == (10, 0)


@pytest.mark.parametrize("times, highpass_s, field", [
    ([0.0], 128.0, "frame_times_s"),
    ([0.0, 2.0, 5.0], 128.0, "frame_times_s"),
    ([0.0, 2.0, np.nan], 128.0, "frame_times_s"),
    ([0.0, 2.0, 4.0], 0.0, "glm.highpass_s"),
])
def test_drift_basis_bad_input(times, highpass_s, field):
    with pytest.raises(InputError) as excinfo:
        cosine_drift_basis(times, highpass_s)
    assert excinfo.value.field == field


# ---------------------------------------------------------------- event regressors

def test_boxcar_response_matches_the_closed_form_with_second_order_error():
    # Source: the closed form above (scipy.stats.gamma.cdf). The fine grid applies the trapezoidal
    # rule, whose error falls as dt^2 (e.g. Press et al., Numerical Recipes, ch. 4): halving dt
    # should divide the error by about 4.
    n_scans, tr_s = 60, 2.0
    onsets, durations = np.array([3.0, 41.5, 80.25]), np.array([6.0, 1.0, 12.5])
    times = frame_times(n_scans, tr_s)
    exact = np.column_stack([_exact_response(times, on, d) for on, d in zip(onsets, durations)])
    errors = []
    for oversampling in (16, 32):
        regressors = event_regressors(onsets, durations, np.arange(3), 3, n_scans, tr_s, oversampling, "none")[:, :, 0]
        errors.append(np.max(np.abs(regressors - exact)))
    assert errors[0] < 2e-4
    assert 3.0 < errors[0] / errors[1] < 5.0


def test_impulse_is_a_unit_area_response_and_off_grid_onsets_interpolate():
    n_scans, tr_s = 40, 2.0
    times = frame_times(n_scans, tr_s)
    for onset in (10.0, 10.03, 17.9):
        regressor = event_regressors([onset], [0.0], [0], 1, n_scans, tr_s, 16, "none")[:, 0, 0]
        np.testing.assert_allclose(regressor, _exact_response(times, onset, 0.0), atol=1e-4)


def test_sustained_input_plateaus_at_one_and_nothing_precedes_the_onset():
    regressor = event_regressors([20.0], [200.0], [0], 1, 150, 2.0, 16, "none")[:, 0, 0]
    np.testing.assert_allclose(regressor[30:100], 1.0, rtol=1e-12)  # unit-area kernel (hrf_basis Notes)
    np.testing.assert_allclose(regressor[:11], 0.0, atol=1e-15)


def test_events_of_one_regressor_add_up_and_negative_onsets_are_allowed():
    single = event_regressors([4.0, 30.0], [2.0, 2.0], [0, 1], 2, 50, 2.0, 16, "temporal")
    summed = event_regressors([4.0, 30.0], [2.0, 2.0], [0, 0], 1, 50, 2.0, 16, "temporal")
    np.testing.assert_allclose(summed[:, 0], single[:, 0] + single[:, 1], atol=1e-13)
    early = event_regressors([-6.0], [2.0], [0], 1, 30, 2.0, 16, "none")[:, 0, 0]
    np.testing.assert_allclose(early, _exact_response(frame_times(30, 2.0), -6.0, 2.0), atol=2e-4)


# ---------------------------------------------------------------- build_design

def _lantern_design(pattern_mode="per_condition", conditions=("seen_round", "seen_star"), derivatives="none", **overrides):
    arguments = dict(events=LANTERN_EVENTS, n_scans=60, tr_s=2.0, conditions=list(conditions), pattern_mode=pattern_mode,
                     hrf_derivatives=derivatives, highpass_s=60.0, confounds=None, confound_names=(), oversampling=16)
    arguments.update(overrides)
    return build_design(**arguments)


def test_per_condition_design_layout():
    confounds = np.random.default_rng(3).normal(size=(60, 2))
    design = _lantern_design(confounds=confounds, confound_names=("trans_x", "rot_z"))
    # 2 x 60 x 2 s / 60 s = 4 drift cosines; heard_square and button are modelled, not patterns.
    assert design.names == ("seen_round", "seen_star", "button", "heard_square", "lowfreq_cos_01", "lowfreq_cos_02", "lowfreq_cos_03",
                            "lowfreq_cos_04", "trans_x", "rot_z", "intercept")
    assert design.pattern_columns.tolist() == [0, 1]
    assert design.nuisance_columns.tolist() == list(range(2, 11))
    assert design.matrix.shape == (60, 11) and design.matrix.dtype == np.float64
    np.testing.assert_array_equal(design.matrix[:, 8:10], confounds)
    np.testing.assert_array_equal(design.matrix[:, -1], 1.0)
    assert design.pattern_table["condition"].tolist() == ["seen_round", "seen_star"]
    assert design.pattern_table["trial_index"].isna().all() and design.pattern_table["onset_s"].isna().all()
    assert design.missing_conditions == ()
    # The seen_round regressor is the sum of its three trials' responses.
    times = frame_times(60, 2.0)
    expected = sum(_exact_response(times, on, 2.0) for on in (4.0, 30.0, 70.0))
    np.testing.assert_allclose(design.matrix[:, 0], expected, atol=5e-4)


def test_trial_wise_design_numbers_trials_by_onset():
    shuffled = LANTERN_EVENTS.iloc[[5, 0, 3, 2, 1, 4, 6]].reset_index(drop=True)
    for mode in ("lsa", "lss"):
        design = _lantern_design(mode, events=shuffled, derivatives="temporal_dispersion")
        assert design.pattern_mode == mode
        table = design.pattern_table
        assert table["condition"].tolist() == ["seen_round"] * 3 + ["seen_star"] * 2
        assert table["trial_index"].tolist() == [0, 1, 2, 0, 1]
        assert table["onset_s"].tolist() == [4.0, 30.0, 70.0, 18.0, 58.0]
        assert design.n_basis == 3
        assert design.pattern_blocks.shape == (5, 3)
        assert [design.names[j] for j in design.pattern_blocks[1]] == [f"seen_round_trial001{s}" for s in DERIVATIVE_SUFFIXES]
        assert design.pattern_columns.tolist() == design.pattern_blocks[:, 0].tolist()


def test_empty_conditions_mean_every_trial_type_sorted_and_absent_ones_are_listed():
    design = _lantern_design(conditions=())
    assert design.pattern_table["condition"].tolist() == ["button", "heard_square", "seen_round", "seen_star"]
    design = _lantern_design(conditions=("seen_star", "heard_round", "seen_round"))
    assert design.pattern_table["condition"].tolist() == ["seen_star", "seen_round"]  # configured order
    assert design.missing_conditions == ("heard_round",)


def test_design_is_deterministic():
    first, second = _lantern_design("lsa"), _lantern_design("lsa")
    assert first.matrix.tobytes() == second.matrix.tobytes() and first.names == second.names


@pytest.mark.parametrize("overrides, field", [
    ({"pattern_mode": "trialwise"}, "glm.pattern_mode"),
    ({"hrf_derivatives": "all"}, "glm.hrf_derivatives"),
    ({"conditions": "seen_round"}, "glm.conditions"),
    ({"conditions": ["seen_round", "seen_round"]}, "glm.conditions"),
    ({"events": _events([(130.0, 1.0, "seen_round")])}, "onset"),
    ({"events": _events([(3.0, -1.0, "seen_round")])}, "duration"),
    ({"events": _events([(np.nan, 1.0, "seen_round")])}, "onset"),
    ({"events": pd.DataFrame({"onset": [1.0], "trial_type": ["a"]})}, "duration"),
    ({"confounds": np.zeros((59, 1)), "confound_names": ("x",)}, "confounds"),
    ({"confounds": np.zeros((60, 2)), "confound_names": ("x",)}, "confound_names"),
    ({"confounds": np.full((60, 1), np.nan), "confound_names": ("x",)}, "confounds"),
    ({"confounds": np.zeros((60, 1)), "confound_names": ("button",)}, "regressor names"),
    ({"n_scans": 1}, "n_scans"),
    ({"tr_s": -2.0}, "tr_s"),
    ({"highpass_s": 0}, "glm.highpass_s"),
    ({"oversampling": 0}, "glm.hrf_steps_per_scan"),
])
def test_build_design_bad_input_names_the_field(overrides, field):
    with pytest.raises(InputError) as excinfo:
        _lantern_design(**overrides)
    assert excinfo.value.field == field and excinfo.value.fix


def test_too_many_regressors_for_the_scans_is_an_error():
    rows = [(2.0 * k, 1.0, "seen_round") for k in range(30)]
    with pytest.raises(InputError) as excinfo:
        _lantern_design("lsa", events=_events(rows), n_scans=30, conditions=())
    assert excinfo.value.field == "design"


def test_column_convolution_equals_scipy_fftconvolve_bit_for_bit():
    # Source: scipy.signal.fftconvolve (scipy's reference implementation, full mode along axis 0);
    # the design convolves with scipy.fft directly so a GLM job need not import scipy.signal.
    from scipy.signal import fftconvolve

    from foldwise.glm.design import _convolve_columns

    rng = np.random.default_rng(3)
    for n_fine, n_columns, n_kernel in ((2880, 6, 513), (1000, 1, 97), (37, 48, 513), (5, 3, 4)):
        signal = rng.standard_normal((n_fine, n_columns))
        kernel = rng.standard_normal(n_kernel)
        expected = fftconvolve(signal, kernel[:, None], axes=0)
        assert np.array_equal(_convolve_columns(signal, kernel), expected)
