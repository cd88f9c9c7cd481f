"""Tests of foldwise.glm.estimate (OLS, AR(1) prewhitening, LSS, LSA, estimate_patterns) and its job.

Outside references: statsmodels OLS, GLS and GLSAR (the reference
least-squares implementations from the package registry); a brute-force LSS
loop with numpy.linalg.lstsq, one model per trial as Mumford et al. (2012,
NeuroImage 59:2636-2643) define it; the closed-form boxcar response written
with scipy.stats.gamma's CDF; simulations with known ground truth (AR(1)
noise of known coefficient, noise-free data of known amplitudes); the job
end to end on a tiny invented run written to tmp_path, read back with nibabel.
"""

import dataclasses
import json
import logging
from pathlib import Path
from types import SimpleNamespace

import matplotlib.image
import nibabel as nib
import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm
from scipy.linalg import toeplitz
from scipy.stats import gamma

import foldwise.glm.estimate as glm_module
from foldwise.glm.design import build_design, frame_times
from foldwise.errors import InputError
from foldwise.glm.estimate import (AR1_STEP, ar1_coefficients, ar1_moment_table, bin_ar1, estimate_patterns, fit_ar1, fit_lss, fit_ols,
                          whiten_ar1)
from foldwise.data.fileio import save_nifti, write_json, write_tsv
from foldwise.glm.hrf import HRF_DURATION_S
from foldwise.jobs import glm as glm_job
from foldwise.provenance.memo import run_job

N_SCANS, TR_S = 120, 2.0
CONDITIONS = ["seen_round", "seen_square", "seen_star"]


def _lantern_events(rng, n_per_condition=4, extra=True, n_scans=N_SCANS):
    """Invented lantern trials: jittered onsets, 2 s each, plus an unmodelled-as-pattern 'button' type."""
    n_trials = n_per_condition * len(CONDITIONS)
    spacing = (n_scans * TR_S - 30.0) / n_trials
    onsets = 4.0 + spacing * np.arange(n_trials) + rng.uniform(0, 2.0, n_trials)
    kinds = np.array(CONDITIONS * n_per_condition)[rng.permutation(n_trials)]
    rows = [(float(on), 2.0, str(kind)) for on, kind in zip(onsets, kinds)]
    if extra:
        rows += [(float(on) + 1.0, 0.0, "button") for on in onsets[::3]]
    return pd.DataFrame(rows, columns=["onset", "duration", "trial_type"])


def _design(events, mode="per_condition", derivatives="none", confounds=None, names=(), n_scans=N_SCANS, conditions=CONDITIONS):
    return build_design(events, n_scans, TR_S, list(conditions), mode, derivatives, 100.0, confounds, names, 16)


def _ar1_noise(rng, rho, n_scans, n_voxels):
    """Stationary AR(1) noise: n_0 ~ N(0, 1/(1 - rho^2)), n_t = rho n_(t-1) + e_t."""
    innovations = rng.standard_normal((n_scans, n_voxels))
    noise = np.empty_like(innovations)
    noise[0] = innovations[0] / np.sqrt(1.0 - rho ** 2)
    for scan in range(1, n_scans):  # a loop over scans, vectorised over voxels
        noise[scan] = rho * noise[scan - 1] + innovations[scan]
    return noise


def _data(rng, design, n_voxels, rho=0.0):
    betas = rng.normal(0.0, 2.0, size=(design.matrix.shape[1], n_voxels))
    betas[-1] += 100.0  # a realistic baseline far from zero
    return design.matrix @ betas + _ar1_noise(rng, rho, design.matrix.shape[0], n_voxels)


SETTINGS = {"hrf_derivatives": "none", "highpass_s": 100.0, "serial_correlation": "ignore", "pattern_mode": "per_condition",
            "statistic": "t", "conditions": [], "hrf_steps_per_scan": 16}


# ---------------------------------------------------------------- OLS

def test_ols_betas_t_and_variance_equal_statsmodels_ols():
    # Source: statsmodels.api.OLS (params, tvalues, scale, df_resid), voxel by voxel.
    rng = np.random.default_rng(11)
    confounds = rng.normal(size=(N_SCANS, 3))
    design = _design(_lantern_events(rng), confounds=confounds, names=("trans_x", "trans_y", "rot_z"))
    bold = _data(rng, design, 40)
    fit = fit_ols(design.matrix, bold.astype(np.float32), design.pattern_columns)
    bold32 = bold.astype(np.float32).astype(np.float64)  # the fit sees the float32 values
    for voxel in (0, 7, 23, 39):
        reference = sm.OLS(bold32[:, voxel], design.matrix).fit()
        np.testing.assert_allclose(fit.betas[:, voxel], reference.params, rtol=1e-8, atol=1e-10)
        np.testing.assert_allclose(fit.t_values[:, voxel], reference.tvalues[design.pattern_columns], rtol=1e-8)
        assert fit.residual_variance[voxel] == pytest.approx(reference.scale, rel=1e-8)
        assert fit.dof.tolist() == [int(reference.df_resid)] * 3


@pytest.mark.filterwarnings("ignore::statsmodels.tools.sm_exceptions.SingularMatrixWarning")  # the point of the test
def test_ols_rank_deficient_nuisance_uses_the_rank_for_dof_like_statsmodels():
    # Source: statsmodels OLS solves with the pseudo-inverse and sets df_resid = T - rank.
    rng = np.random.default_rng(12)
    motion = rng.normal(size=(N_SCANS, 1))
    design = _design(_lantern_events(rng), confounds=np.hstack([motion, 2 * motion]), names=("trans_x", "trans_x_copy"))
    bold = _data(rng, design, 5)
    fit = fit_ols(design.matrix, bold, design.pattern_columns)
    reference = sm.OLS(bold[:, 2], design.matrix).fit()
    assert int(reference.df_resid) == N_SCANS - np.linalg.matrix_rank(design.matrix) == fit.dof[0]
    np.testing.assert_allclose(fit.betas[:, 2], reference.params, rtol=1e-8, atol=1e-10)
    np.testing.assert_allclose(fit.t_values[:, 2], reference.tvalues[design.pattern_columns], rtol=1e-8)


def test_non_estimable_pattern_column_is_an_input_error():
    rng = np.random.default_rng(13)
    design = _design(_lantern_events(rng))
    copy = design.matrix[:, [0]]  # a confound equal to the seen_round regressor
    bad = _design(_lantern_events(np.random.default_rng(13)), confounds=copy, names=("copy",))
    with pytest.raises(InputError) as excinfo:
        fit_ols(bad.matrix, np.ones((N_SCANS, 2)), bad.pattern_columns, column_names=bad.names)
    assert "seen_round" in excinfo.value.field


def test_the_ar1_fits_share_one_rule_for_the_noise_coefficients():
    """fit_ar1 and fit_lss take rho as given, or estimate it from rho_design (default: the design) of the same run."""
    rng = np.random.default_rng(15)
    design = _design(_lantern_events(rng), mode="lsa")
    bold = _data(rng, design, 5, rho=0.3)
    blocks, groups = design.pattern_blocks, design.pattern_table["condition"]
    estimated = fit_ar1(design.matrix, bold, design.pattern_columns).rho
    given = np.full(5, 0.25)
    np.testing.assert_array_equal(fit_ar1(design.matrix, bold, design.pattern_columns, rho=given).rho, given)
    np.testing.assert_array_equal(fit_ar1(design.matrix, bold, design.pattern_columns, rho_design=design.matrix).rho, estimated)
    for fit in (lambda short: fit_ar1(design.matrix, bold, design.pattern_columns, rho_design=short),
                lambda short: fit_lss(design.matrix, bold, blocks, groups, noise_model="ar1", rho_design=short)):
        with pytest.raises(InputError) as excinfo:
            fit(design.matrix[:-1])
        assert excinfo.value.field == "rho_design"


def test_voxel_blocks_do_not_change_results(monkeypatch):
    rng = np.random.default_rng(14)
    design = _design(_lantern_events(rng), mode="lsa")
    bold = _data(rng, design, 30, rho=0.3)
    reference = [fit_ols(design.matrix, bold, design.pattern_columns), fit_ar1(design.matrix, bold, design.pattern_columns),
                 fit_lss(design.matrix, bold, design.pattern_blocks, design.pattern_table["condition"], noise_model="ar1")]
    monkeypatch.setattr(glm_module, "CHUNK_VOXELS", 7)
    blocked = [fit_ols(design.matrix, bold, design.pattern_columns), fit_ar1(design.matrix, bold, design.pattern_columns),
               fit_lss(design.matrix, bold, design.pattern_blocks, design.pattern_table["condition"], noise_model="ar1")]
    for first, second in zip(reference, blocked):
        np.testing.assert_allclose(second.betas, first.betas, rtol=1e-10, atol=1e-10)
        np.testing.assert_allclose(second.t_values, first.t_values, rtol=1e-10, atol=1e-10)
        np.testing.assert_allclose(second.residual_variance, first.residual_variance, rtol=1e-10)


def test_non_finite_data_and_bad_shapes_are_input_errors():
    design = _design(_lantern_events(np.random.default_rng(15)))
    bold = np.ones((N_SCANS, 3))
    bold[5, 1] = np.nan
    with pytest.raises(InputError) as excinfo:
        fit_ols(design.matrix, bold)
    assert excinfo.value.field == "bold_2d"
    with pytest.raises(InputError, match="rows"):
        fit_ols(design.matrix, np.ones((N_SCANS - 1, 3)))
    with pytest.raises(InputError) as excinfo:
        fit_ols(design.matrix, np.ones((N_SCANS, 3)), pattern_columns=[99])
    assert excinfo.value.field == "pattern_columns"


# ---------------------------------------------------------------- AR(1)

def test_whitening_equals_statsmodels_glsar_whiten_when_dropping_the_first_scan():
    # Source: statsmodels GLSAR.whiten (order 1) drops the first observation.
    rng = np.random.default_rng(21)
    values = rng.normal(size=(50, 4))
    model = sm.GLSAR(values[:, 0], values, rho=0.37)
    np.testing.assert_allclose(whiten_ar1(values, 0.37, "drop"), model.whiten(values), rtol=1e-13, atol=1e-14)
    kept = whiten_ar1(values, 0.37)
    np.testing.assert_allclose(kept[0], np.sqrt(1 - 0.37 ** 2) * values[0])
    np.testing.assert_array_equal(kept[1:], whiten_ar1(values, 0.37, "drop"))


def test_ar1_fit_with_fixed_rho_equals_statsmodels_glsar_and_exact_gls():
    # Sources: statsmodels GLSAR(rho fixed).fit() (Cochrane-Orcutt: first scan dropped) and
    # statsmodels GLS with the AR(1) correlation sigma_ij = rho^|i-j| (Prais-Winsten is exact GLS).
    rng = np.random.default_rng(22)
    design = _design(_lantern_events(rng))
    bold = _data(rng, design, 6, rho=0.4)
    rho = 0.4
    dropped = fit_ar1(design.matrix, bold, design.pattern_columns, rho=rho, first_scan="drop")
    kept = fit_ar1(design.matrix, bold, design.pattern_columns, rho=rho)
    sigma = toeplitz(rho ** np.arange(N_SCANS))
    for voxel in range(6):
        glsar = sm.GLSAR(bold[:, voxel], design.matrix, rho=rho).fit()
        np.testing.assert_allclose(dropped.betas[:, voxel], glsar.params, rtol=1e-8, atol=1e-10)
        np.testing.assert_allclose(dropped.t_values[:, voxel], glsar.tvalues[design.pattern_columns], rtol=1e-8)
        assert dropped.residual_variance[voxel] == pytest.approx(glsar.scale, rel=1e-8)
        gls = sm.GLS(bold[:, voxel], design.matrix, sigma=sigma).fit()
        np.testing.assert_allclose(kept.betas[:, voxel], gls.params, rtol=1e-8, atol=1e-10)
        np.testing.assert_allclose(kept.t_values[:, voxel], gls.tvalues[design.pattern_columns], rtol=1e-8)
    assert dropped.dof[0] == int(glsar.df_resid) and kept.dof[0] == int(gls.df_resid)


def test_moment_table_equals_monte_carlo_residual_autocorrelation():
    # Simulation with known ground truth: for AR(1) noise of coefficient rho, the ratio of the mean
    # lag-1 residual product to the mean residual square tends to the table's value at rho.
    rng = np.random.default_rng(23)
    design = _design(_lantern_events(rng), confounds=rng.normal(size=(N_SCANS, 4)), names=("a", "b", "c", "d")).matrix
    grid, expected = ar1_moment_table(design)
    residual_forming = np.eye(N_SCANS) - design @ np.linalg.pinv(design)
    for rho in (0.0, 0.5):
        residuals = residual_forming @ _ar1_noise(rng, rho, N_SCANS, 20000)
        lag0 = (residuals ** 2).sum(axis=0).reshape(20, -1).mean(axis=1)
        lag1 = (residuals[1:] * residuals[:-1]).sum(axis=0).reshape(20, -1).mean(axis=1)
        batch_ratios = lag1 / lag0
        standard_error = batch_ratios.std(ddof=1) / np.sqrt(batch_ratios.size)
        table_value = np.interp(rho, grid, expected)
        assert standard_error < 0.003
        assert abs(batch_ratios.mean() - table_value) < 4 * standard_error
    # With white noise the residuals are negatively autocorrelated: the bias the table corrects.
    assert np.interp(0.0, grid, expected) < -0.02


@pytest.mark.parametrize("rho", [0.0, 0.3, 0.6])
def test_corrected_ar1_estimates_are_nearly_unbiased_where_the_plain_ones_are_not(rho):
    # Simulation with known ground truth. The correction (Worsley et al. 2002) removes the bias
    # from the residual-forming matrix; the O(1/T) bias of a ratio estimator remains (0.01 at 200
    # scans is our bound: common practice, no source).
    rng = np.random.default_rng(24)
    n_scans = 200
    events = _lantern_events(rng, n_per_condition=6, n_scans=n_scans)
    design = _design(events, n_scans=n_scans, confounds=rng.normal(size=(n_scans, 6)), names=tuple("uvwxyz")).matrix
    noise = _ar1_noise(rng, rho, n_scans, 20000)
    residuals = noise - design @ np.linalg.lstsq(design, noise, rcond=None)[0]
    corrected = ar1_coefficients(residuals, design)
    plain = (residuals[1:] * residuals[:-1]).sum(axis=0) / (residuals ** 2).sum(axis=0)
    assert abs(corrected.mean() - rho) < 0.01
    assert rho - plain.mean() > 0.04


def test_bin_ar1_clips_and_rounds():
    np.testing.assert_allclose(bin_ar1([0.234, -0.97, 0.5049, 0.95, 0.006], step=0.01), [0.23, -0.9, 0.5, 0.9, 0.01])
    values = np.random.default_rng(26).uniform(-0.8, 0.8, 500)
    binned = bin_ar1(values)  # default step: multiples of AR1_STEP within half a step
    np.testing.assert_allclose(binned / AR1_STEP, np.round(binned / AR1_STEP), atol=1e-9)
    assert np.max(np.abs(binned - values)) <= AR1_STEP / 2 + 1e-12
    with pytest.raises(InputError):
        bin_ar1([0.1], step=0.0)
    with pytest.raises(InputError):
        bin_ar1([np.nan])


def test_estimated_ar1_fit_solves_each_voxel_with_its_binned_coefficient():
    rng = np.random.default_rng(25)
    design = _design(_lantern_events(rng))
    bold = np.column_stack([_data(rng, design, 8, rho=rho) for rho in (0.1, 0.5)])
    fit = fit_ar1(design.matrix, bold, design.pattern_columns)
    residuals = bold - design.matrix @ np.linalg.lstsq(design.matrix, bold, rcond=None)[0]
    np.testing.assert_array_equal(fit.rho, bin_ar1(ar1_coefficients(residuals, design.matrix)))
    assert len(np.unique(fit.rho)) > 3  # several bins really are solved separately
    for voxel in (0, 5, 9, 15):
        single = fit_ar1(design.matrix, bold[:, [voxel]], design.pattern_columns, rho=fit.rho[voxel])
        np.testing.assert_allclose(fit.betas[:, voxel], single.betas[:, 0], rtol=1e-10, atol=1e-10)
        np.testing.assert_allclose(fit.t_values[:, voxel], single.t_values[:, 0], rtol=1e-10)


def test_whitened_quadratic_forms_equal_sums_over_whitened_data():
    # Reference: whiten_ar1's rows themselves, multiplied out (X'W'W y and y'W'W y), for both first-scan variants
    # and per-voxel coefficients; the forms are those fit_ar1 solves from without whitening the data.
    rng = np.random.default_rng(31)
    design = rng.normal(size=(40, 3))
    data = rng.normal(size=(40, 5)) + 7.0
    rho = np.array([-0.6, 0.0, 0.2, 0.5, 0.9])
    neighbours = np.zeros_like(design)
    neighbours[1:] += design[:-1]
    neighbours[:-1] += design[1:]
    lag_square = np.einsum("ij,ij->j", data[1:], data[:-1])
    for first_scan in ("keep", "drop"):
        design_form, data_form = glm_module._whitened_forms(rho, first_scan, design.T @ data, neighbours.T @ data,
                                                            np.einsum("ij,ij->j", data, data), lag_square, data[0], data[-1],
                                                            design[0], design[-1])
        for voxel, coefficient in enumerate(rho):
            whitened_design = whiten_ar1(design, coefficient, first_scan)
            whitened_data = whiten_ar1(data[:, voxel], coefficient, first_scan)
            np.testing.assert_allclose(design_form[:, voxel], whitened_design.T @ whitened_data, rtol=1e-12, atol=1e-12)
            assert data_form[voxel] == pytest.approx(whitened_data @ whitened_data, rel=1e-12)


def test_ar1_fit_equals_exact_gls_for_mixed_voxels_designs_without_a_constant_and_a_separate_rho_design():
    # Source: statsmodels GLS with sigma_ij = rho^|i-j| (Prais-Winsten is exact GLS), voxel by voxel, with the
    # coefficients fit_ar1 chose. fit_ar1 solves from products of the centred data when the design spans the
    # constant; exact fits (a noise-free voxel, a constant voxel) are refitted from their whitened data, and a
    # design without the constant is whitened directly: every route must give the same GLS answer.
    rng = np.random.default_rng(32)
    design = _design(_lantern_events(rng))
    bold = _data(rng, design, 6, rho=0.4) * 40.0  # a large baseline (4,000) against unit-scale noise
    bold[:, 2] = design.matrix @ rng.normal(size=design.matrix.shape[1])  # noise-free: the model fits exactly
    bold[:, 3] = bold[:, 2] + 1e-6 * _ar1_noise(rng, 0.4, N_SCANS, 1)[:, 0]  # almost noise-free: refitted from its data
    bold[:, 4] = 321.0  # constant
    no_constant = design.matrix[:, :len(CONDITIONS)]  # the pattern regressors alone
    per_condition_rho = _design(_lantern_events(np.random.default_rng(33))).matrix  # another design of the same length
    for matrix, rho_design in ((design.matrix, None), (design.matrix, per_condition_rho), (no_constant, None),
                               (design.matrix, no_constant)):
        columns = np.arange(len(CONDITIONS))
        fit = fit_ar1(matrix, bold, columns, rho_design=rho_design)
        noise_design = matrix if rho_design is None else rho_design
        residuals = bold - noise_design @ np.linalg.lstsq(noise_design, bold, rcond=None)[0]
        np.testing.assert_array_equal(fit.rho, bin_ar1(ar1_coefficients(residuals, noise_design)))
        for voxel in range(bold.shape[1]):
            sigma = toeplitz(fit.rho[voxel] ** np.arange(N_SCANS))
            gls = sm.GLS(bold[:, voxel], matrix, sigma=sigma).fit()
            np.testing.assert_allclose(fit.betas[:, voxel], gls.params, rtol=1e-8, atol=1e-8)
            if voxel in (2, 4) and matrix is design.matrix:  # exact fits: no residual noise, t reported as 0
                assert fit.residual_variance[voxel] == 0.0
                np.testing.assert_array_equal(fit.t_values[:, voxel], 0.0)
            else:
                # Prais-Winsten's W'W is (1 - rho^2) times GLS's inverse correlation: the innovation variance
                assert fit.residual_variance[voxel] == pytest.approx(gls.scale * (1.0 - fit.rho[voxel] ** 2), rel=1e-7)
                np.testing.assert_allclose(fit.t_values[:, voxel], gls.tvalues[columns], rtol=1e-7)


def test_whiten_ar1_bad_input():
    with pytest.raises(InputError):
        whiten_ar1(np.ones((5, 2)), 1.0)
    with pytest.raises(InputError):
        whiten_ar1(np.ones((5, 2)), [0.1, 0.2, 0.3])
    with pytest.raises(InputError):
        whiten_ar1(np.ones(5), 0.1, "first")


# ---------------------------------------------------------------- LSS and LSA

def _brute_force_lss(design, bold, rho=None):
    """One GLM per trial (Mumford et al. 2012) with numpy.linalg.lstsq; whitened first if rho is given."""
    matrix = design.matrix if rho is None else whiten_ar1(design.matrix, rho)
    data = bold if rho is None else whiten_ar1(bold, rho)
    conditions = design.pattern_table["condition"].to_numpy()
    blocks, nuisance = design.pattern_blocks, design.nuisance_columns
    betas, t_values = [], []
    for trial in range(len(conditions)):
        columns = [matrix[:, blocks[trial]]]
        same = [j for j in range(len(conditions)) if conditions[j] == conditions[trial] and j != trial]
        if same:
            columns.append(matrix[:, blocks[same]].sum(axis=1))
        for other in sorted(set(conditions) - {conditions[trial]}):
            members = [j for j in range(len(conditions)) if conditions[j] == other]
            columns.append(matrix[:, blocks[members]].sum(axis=1))
        model = np.column_stack(columns + [matrix[:, nuisance]])
        coefficients, *_ = np.linalg.lstsq(model, data, rcond=None)
        residuals = data - model @ coefficients
        dof = model.shape[0] - np.linalg.matrix_rank(model)
        variance = (residuals ** 2).sum(axis=0) / dof
        betas.append(coefficients[0])
        t_values.append(coefficients[0] / np.sqrt(variance * np.linalg.pinv(model.T @ model)[0, 0]))
    return np.array(betas), np.array(t_values)


@pytest.mark.parametrize("derivatives", ["none", "temporal"])
def test_lss_equals_a_brute_force_loop_of_one_glm_per_trial(derivatives):
    # Source: the LSS definition (Mumford et al. 2012), fitted trial by trial with numpy.linalg.lstsq.
    rng = np.random.default_rng(31)
    events = _lantern_events(rng)
    events = pd.concat([events, pd.DataFrame([(200.0, 2.0, "seen_moon")], columns=events.columns)], ignore_index=True)
    conditions = CONDITIONS + ["seen_moon"]  # a condition with a single trial: no "other trials" regressor
    design = _design(events, mode="lss", derivatives=derivatives, confounds=rng.normal(size=(N_SCANS, 2)), names=("a", "b"),
                     conditions=conditions)
    bold = _data(rng, design, 25)
    fit = fit_lss(design.matrix, bold, design.pattern_blocks, design.pattern_table["condition"])
    betas, t_values = _brute_force_lss(design, bold)
    np.testing.assert_allclose(fit.betas, betas, rtol=1e-8, atol=1e-9)
    np.testing.assert_allclose(fit.t_values, t_values, rtol=1e-8, atol=1e-9)
    single = design.pattern_table.index[design.pattern_table["condition"] == "seen_moon"][0]
    assert fit.dof[single] == fit.dof[0] + design.n_basis  # one regressor block fewer in its model
    # The residual variance is that of the model with every trial (LSA).
    lsa = fit_ols(design.matrix, bold, design.pattern_columns)
    np.testing.assert_allclose(fit.residual_variance, lsa.residual_variance, rtol=1e-9)
    # Without an intercept the data cannot be centred first; the algebra still holds.
    no_intercept = dataclasses.replace(design, matrix=design.matrix[:, :-1], names=design.names[:-1])
    fit = fit_lss(no_intercept.matrix, bold, design.pattern_blocks, design.pattern_table["condition"])
    betas, t_values = _brute_force_lss(no_intercept, bold)
    np.testing.assert_allclose(fit.betas, betas, rtol=1e-8, atol=1e-9)
    np.testing.assert_allclose(fit.t_values, t_values, rtol=1e-7, atol=1e-8)


def test_lss_with_ar1_equals_the_brute_force_loop_on_whitened_data():
    rng = np.random.default_rng(32)
    design = _design(_lantern_events(rng), mode="lss")
    bold = _data(rng, design, 12, rho=0.35)
    fit = fit_lss(design.matrix, bold, design.pattern_blocks, design.pattern_table["condition"], noise_model="ar1", rho=0.35)
    betas, t_values = _brute_force_lss(design, bold, rho=0.35)
    np.testing.assert_allclose(fit.betas, betas, rtol=1e-8, atol=1e-9)
    np.testing.assert_allclose(fit.t_values, t_values, rtol=1e-8, atol=1e-9)


def test_lss_ar1_in_estimate_patterns_whitens_with_per_condition_coefficients():
    rng = np.random.default_rng(33)
    events = _lantern_events(rng)
    lss_design = _design(events, mode="lss")
    bold = _data(rng, lss_design, 10, rho=0.4)
    estimate = estimate_patterns(bold, events, TR_S, {**SETTINGS, "serial_correlation": "ar1_whiten", "pattern_mode": "lss",
                                                      "conditions": CONDITIONS}, None, ())
    per_condition = _design(events).matrix
    residuals = bold - per_condition @ np.linalg.lstsq(per_condition, bold, rcond=None)[0]
    np.testing.assert_array_equal(estimate.rho, bin_ar1(ar1_coefficients(residuals, per_condition)))
    for voxel in (0, 6):
        _, t_values = _brute_force_lss(lss_design, bold[:, [voxel]], rho=estimate.rho[voxel])
        np.testing.assert_allclose(estimate.patterns[:, voxel], t_values[:, 0], rtol=1e-8)


def test_lsa_equals_one_big_ols_from_statsmodels():
    # Source: statsmodels OLS on the trial-wise design.
    rng = np.random.default_rng(34)
    events = _lantern_events(rng)
    design = _design(events, mode="lsa")
    bold = _data(rng, design, 4)
    settings = {**SETTINGS, "pattern_mode": "lsa", "conditions": CONDITIONS}
    t_estimate = estimate_patterns(bold, events, TR_S, settings, None, ())
    beta_estimate = estimate_patterns(bold, events, TR_S, {**settings, "statistic": "beta"}, None, ())
    np.testing.assert_array_equal(t_estimate.design.matrix, design.matrix)
    for voxel in range(4):
        reference = sm.OLS(bold[:, voxel], design.matrix).fit()
        np.testing.assert_allclose(t_estimate.patterns[:, voxel], reference.tvalues[design.pattern_columns], rtol=1e-8)
        np.testing.assert_allclose(beta_estimate.patterns[:, voxel], reference.params[design.pattern_columns], rtol=1e-8)
    assert t_estimate.table["trial_index"].tolist() == [0, 1, 2, 3] * 3


# ---------------------------------------------------------------- noise-free recovery

def _exact_regressor(times_s, onsets_s, duration_s):
    """Sum of closed-form boxcar responses (unit-area canonical HRF on [0, 32 s), scipy gamma CDFs)."""
    def cumulative(u):
        u = np.clip(u, 0.0, HRF_DURATION_S)
        return gamma.cdf(u, 6) - gamma.cdf(u, 16) / 6.0

    total = np.zeros_like(times_s)
    for onset in onsets_s:
        total += (cumulative(times_s - onset) - cumulative(times_s - onset - duration_s)) / cumulative(HRF_DURATION_S)
    return total


@pytest.mark.parametrize("mode", ["per_condition", "lsa"])
def test_noise_free_betas_recover_the_amplitudes_within_the_discretisation_bound(mode):
    # Ground truth: data made from the closed-form (continuous-time) regressors with known amplitudes.
    # The design differs from them by E, its discretisation error; least squares then misses the
    # amplitudes by pinv(X) E beta, so |error| <= ||pinv(X)||_2 ||E beta||_2. E itself obeys the
    # trapezoid-rule bound (onsets and durations on the fine grid): per event and scan
    # |x_disc - x| <= (d dt^2 / 12 max|h''| + dt |h(32)|) / S + |x| |A - S| / S, with S the kernel's
    # Riemann sum and A its integral (e.g. Press et al., Numerical Recipes, ch. 4).
    rng = np.random.default_rng(41)
    n_scans, oversampling, duration_s = 200, 16, 4.0
    dt_s = TR_S / oversampling
    onsets = np.arange(4.0, 380.0, 16.0)  # multiples of dt, 16 s apart: one event of a regressor at a time
    kinds = [CONDITIONS[k % 3] for k in range(onsets.size)]
    events = pd.DataFrame({"onset": onsets, "duration": duration_s, "trial_type": kinds})
    confounds = rng.normal(size=(n_scans, 2))
    design = build_design(events, n_scans, TR_S, CONDITIONS, mode, "none", 128.0, confounds, ("a", "b"), oversampling)
    times = frame_times(n_scans, TR_S)
    exact = design.matrix.copy()
    for row, column in zip(design.pattern_table.itertuples(), design.pattern_columns):
        chosen = onsets[[kind == row.condition and (mode == "per_condition" or on == row.onset_s) for on, kind in zip(onsets, kinds)]]
        exact[:, column] = _exact_regressor(times, chosen, duration_s)
    amplitudes = np.zeros(design.matrix.shape[1])
    amplitudes[design.pattern_columns] = rng.uniform(1.0, 3.0, design.pattern_columns.size)
    amplitudes[-1], amplitudes[-2] = 100.0, 0.5
    bold = (exact @ amplitudes)[:, None]

    errors = design.matrix - exact
    grid = np.arange(0.0, HRF_DURATION_S, 1e-4)
    second = lambda t, a: gamma.pdf(t, a - 2) - 2 * gamma.pdf(t, a - 1) + gamma.pdf(t, a)  # g'' for unit scale
    max_curvature = np.max(np.abs(second(grid, 6) - second(grid, 16) / 6.0))
    tail = abs(gamma.pdf(HRF_DURATION_S, 6) - gamma.pdf(HRF_DURATION_S, 16) / 6.0)
    kernel_times = dt_s * np.arange(int(round(HRF_DURATION_S / dt_s)))
    riemann = dt_s * np.sum(gamma.pdf(kernel_times, 6) - gamma.pdf(kernel_times, 16) / 6.0)
    area = gamma.cdf(HRF_DURATION_S, 6) - gamma.cdf(HRF_DURATION_S, 16) / 6.0
    element_bound = ((duration_s * dt_s ** 2 / 12 * max_curvature + dt_s * tail) / riemann
                     + np.abs(exact[:, design.pattern_columns]).max() * abs(area - riemann) / riemann)
    assert np.abs(errors).max() <= element_bound

    estimate = estimate_patterns(bold, events, TR_S, {**SETTINGS, "pattern_mode": mode, "statistic": "beta",
                                                      "highpass_s": 128.0, "conditions": CONDITIONS},
                                 confounds, ("a", "b"))
    beta_bound = np.linalg.norm(np.linalg.pinv(design.matrix), 2) * np.linalg.norm(errors @ amplitudes)
    miss = np.abs(estimate.patterns[:, 0] - amplitudes[design.pattern_columns])
    assert miss.max() <= beta_bound
    assert beta_bound < 0.01 * amplitudes[design.pattern_columns].min()  # the bound is tight enough to matter


# ---------------------------------------------------------------- estimate_patterns

def test_estimate_patterns_conditions_rows_and_statistics():
    rng = np.random.default_rng(51)
    events = _lantern_events(rng)
    bold = _data(rng, _design(events), 6).astype(np.float32)
    everything = estimate_patterns(bold, events, TR_S, SETTINGS, None, ())
    assert everything.table["condition"].tolist() == ["button"] + CONDITIONS  # sorted trial types
    chosen = estimate_patterns(bold, events, TR_S, {**SETTINGS, "conditions": ["seen_star", "heard_star", "seen_round"]}, None, ())
    assert chosen.table["condition"].tolist() == ["seen_star", "seen_round"]
    assert chosen.design.missing_conditions == ("heard_star",)
    assert chosen.patterns.shape == (2, 6) and chosen.patterns.dtype == np.float64
    beta = estimate_patterns(bold, events, TR_S, {**SETTINGS, "statistic": "beta", "conditions": ["seen_star"]}, None, ())
    direct = fit_ols(chosen.design.matrix, bold)
    np.testing.assert_allclose(beta.patterns[0], direct.betas[chosen.design.pattern_columns[0]], rtol=1e-12)
    np.testing.assert_allclose(chosen.patterns, direct.t_values[chosen.design.pattern_columns], rtol=1e-12)
    np.testing.assert_allclose(chosen.residual_variance, direct.residual_variance, rtol=1e-12)


@pytest.mark.parametrize("change, field", [
    ({"serial_correlation": "ar2"}, "glm.serial_correlation"),
    ({"statistic": "z"}, "glm.statistic"),
    ({"pattern_mode": "lsx"}, "glm.pattern_mode"),
    ({"hrf_derivatives": "both"}, "glm.hrf_derivatives"),
    ({"highpass_s": -1.0}, "glm.highpass_s"),
    ({"conditions": ["heard_moon"]}, "trial_type"),
    ({"hrf_steps_per_scan": 0}, "glm.hrf_steps_per_scan"),
    ({"smoothing_mm": 4}, "glm"),
])
def test_estimate_patterns_bad_settings(change, field):
    rng = np.random.default_rng(52)
    events = _lantern_events(rng)
    with pytest.raises(InputError) as excinfo:
        estimate_patterns(np.ones((N_SCANS, 2)), events, TR_S, {**SETTINGS, **change}, None, ())
    assert excinfo.value.field == field and excinfo.value.fix
    settings = dict(SETTINGS)
    del settings["statistic"]
    with pytest.raises(InputError, match="statistic"):
        estimate_patterns(np.ones((N_SCANS, 2)), events, TR_S, settings, None, ())


def test_constant_voxel_gets_zero_t_rather_than_nan():
    rng = np.random.default_rng(53)
    events = _lantern_events(rng)
    bold = _data(rng, _design(events), 3)
    bold[:, 1] = 500.0  # a constant voxel inside the mask
    for mode in ("per_condition", "lss"):
        estimate = estimate_patterns(bold, events, TR_S, {**SETTINGS, "pattern_mode": mode, "serial_correlation": "ar1_whiten"}, None, ())
        assert np.all(np.isfinite(estimate.patterns))
        np.testing.assert_array_equal(estimate.patterns[:, 1], 0.0)
        assert np.all(estimate.patterns[:, 0] != 0.0)


# ---------------------------------------------------------------- the job function

def _write_run(folder, rng, n_scans=80, shape=(6, 5, 4), conditions=CONDITIONS):
    """A tiny invented lantern run on disk: BOLD, events, sidecar, confounds, brain mask."""
    folder.mkdir(parents=True, exist_ok=True)
    affine = np.diag([3.0, 3.0, 3.0, 1.0])
    affine[:3, 3] = [-9.0, -7.5, -6.0]
    events = _lantern_events(rng, n_per_condition=3, n_scans=n_scans)
    events = events[events["trial_type"].isin(conditions) | (events["trial_type"] == "button")]
    confounds = pd.DataFrame({"trans_x": rng.normal(size=n_scans), "rot_z": rng.normal(size=n_scans)})
    confounds.loc[0, "rot_z"] = np.nan  # a derivative-like leading n/a, filled with 0 by the reader
    design = _design(events, n_scans=n_scans, confounds=confounds.fillna(0.0).to_numpy(), names=("trans_x", "rot_z"),
                     conditions=[c for c in CONDITIONS if c in set(events["trial_type"])])
    mask = np.zeros(shape, dtype=np.uint8)
    mask[1:5, 1:4, 1:3] = 1
    n_voxels = int(mask.sum())
    data = np.zeros(shape + (n_scans,), dtype=np.float32)
    data[mask.astype(bool)] = _data(rng, design, n_voxels, rho=0.2).T
    header = nib.Nifti1Header()
    header.set_data_shape(data.shape)
    header.set_zooms((3.0, 3.0, 3.0, TR_S))
    header.set_xyzt_units("mm", "sec")
    save_nifti(folder / "bold.nii.gz", data, affine, header=header)
    save_nifti(folder / "mask.nii.gz", mask, affine, dtype=np.uint8)
    write_tsv(folder / "events.tsv", events)
    write_tsv(folder / "confounds.tsv", confounds)
    write_json(folder / "bold.json", {"RepetitionTime": TR_S})
    inputs = {"bold": str(folder / "bold.nii.gz"), "events": str(folder / "events.tsv"), "sidecar": str(folder / "bold.json"),
              "mask": str(folder / "mask.nii.gz"), "confounds": str(folder / "confounds.tsv")}
    return inputs, data, mask.astype(bool)


def _outputs(folder):
    names = {"patterns": "patterns.nii.gz", "table": "patterns.tsv", "design": "design.tsv", "design_png": "design.png",
             "resvar": "resvar.nii.gz", "facts": "glm.json"}
    return {key: str(folder / name) for key, name in names.items()}


def _params(**glm_changes):
    return {"glm": {**SETTINGS, "serial_correlation": "ar1_whiten", **glm_changes}, "confounds": ["trans_x", "rot_z"], "subject": "01",
            "session": None, "run_id": "run-01", "seed": 20261201}


def test_job_writes_the_contract_outputs(tmp_path):
    rng = np.random.default_rng(61)
    inputs, data, mask = _write_run(tmp_path / "in", rng)
    outputs = _outputs(tmp_path / "out")
    params = _params(conditions=CONDITIONS)
    glm_job.run_one(inputs, outputs, params, logging.getLogger("test_glm_job"))

    patterns = nib.load(outputs["patterns"])
    values = np.asarray(patterns.dataobj)
    assert values.dtype == np.float32 and values.shape == mask.shape + (3,)
    np.testing.assert_allclose(patterns.affine, np.diag([3.0, 3.0, 3.0, 1.0]) + np.pad([[-9.0], [-7.5], [-6.0]], ((0, 1), (3, 0))))
    assert np.all(values[~mask] == 0) and np.all(values[mask] != 0)
    read_back = np.asarray(nib.load(inputs["bold"]).dataobj)[mask].T
    events = pd.read_csv(inputs["events"], sep="\t")
    confounds = pd.read_csv(inputs["confounds"], sep="\t", na_values="n/a").fillna(0.0).to_numpy()
    expected = estimate_patterns(read_back, events, TR_S, params["glm"], confounds, ("trans_x", "rot_z"))
    np.testing.assert_allclose(values[mask], expected.patterns.T.astype(np.float32), rtol=1e-5, atol=1e-5)
    resvar = np.asarray(nib.load(outputs["resvar"]).dataobj)
    assert resvar.shape == mask.shape and resvar.dtype == np.float32
    np.testing.assert_allclose(resvar[mask], expected.residual_variance, rtol=1e-5)

    table = pd.read_csv(outputs["table"], sep="\t", dtype=str, keep_default_na=False)
    assert tuple(table.columns) == glm_job.TABLE_COLUMNS
    assert table["volume"].tolist() == ["0", "1", "2"]
    assert table["condition"].tolist() == CONDITIONS
    assert set(table["subject"]) == {"01"} and set(table["session"]) == {"n/a"} and set(table["run_id"]) == {"run-01"}
    assert set(table["trial_index"]) == {"n/a"} and set(table["onset_s"]) == {"n/a"}
    design = pd.read_csv(outputs["design"], sep="\t")
    assert tuple(design.columns) == expected.design.names
    np.testing.assert_allclose(design.to_numpy(), expected.design.matrix, rtol=1e-6, atol=1e-7)
    image = matplotlib.image.imread(outputs["design_png"])
    assert image.shape[:2] == (900, 1200)  # 4 x 3 inches at 300 dpi
    facts = json.loads(Path(outputs["facts"]).read_text())
    n_scans = nib.load(inputs["bold"]).shape[3]
    assert facts == {"subject": "01", "session": "n/a", "run_id": "run-01", "confounds": ["trans_x", "rot_z"],
                     "n_dropped_initial_volumes": 0, "n_dropped_events_rows": 0, "n_scans_kept": n_scans}
    assert sorted(p.name for p in (tmp_path / "out").iterdir()) == sorted(Path(p).name for p in outputs.values())


def test_job_is_deterministic_and_runs_trial_wise_modes(tmp_path):
    rng = np.random.default_rng(62)
    inputs, _, _ = _write_run(tmp_path / "in", rng)
    params = _params(pattern_mode="lss", conditions=CONDITIONS)
    first, second = _outputs(tmp_path / "a"), _outputs(tmp_path / "b")
    glm_job.run_one(inputs, first, params, logging.getLogger("test_glm_job"))
    glm_job.run_one(inputs, second, params, logging.getLogger("test_glm_job"))
    for key in first:
        assert Path(first[key]).read_bytes() == Path(second[key]).read_bytes(), key
    table = pd.read_csv(first["table"], sep="\t", dtype=str, keep_default_na=False)
    assert table["trial_index"].tolist() == ["0", "1", "2"] * 3
    assert all(float(value) > 0 for value in table["onset_s"])
    assert nib.load(first["patterns"]).shape[3] == 9


def test_job_warns_about_a_condition_absent_from_the_run(tmp_path, caplog):
    rng = np.random.default_rng(63)
    inputs, _, _ = _write_run(tmp_path / "in", rng, conditions=["seen_round", "seen_star"])
    outputs = _outputs(tmp_path / "out")
    with caplog.at_level(logging.WARNING, logger="test_glm_job"):
        glm_job.run_one(inputs, outputs, _params(conditions=CONDITIONS, serial_correlation="ignore", statistic="beta"),
                    logging.getLogger("test_glm_job"))
    assert "seen_square" in caplog.text and "run-01" in caplog.text
    table = pd.read_csv(outputs["table"], sep="\t")
    assert table["condition"].tolist() == ["seen_round", "seen_star"]


def test_job_refuses_a_mask_on_another_grid(tmp_path):
    rng = np.random.default_rng(64)
    inputs, _, _ = _write_run(tmp_path / "in", rng)
    shifted = np.diag([3.0, 3.0, 3.0, 1.0])
    save_nifti(tmp_path / "in" / "mask_shifted.nii.gz", np.ones((6, 5, 4), dtype=np.uint8), shifted, dtype=np.uint8)
    with pytest.raises(InputError) as excinfo:
        glm_job.run_one({**inputs, "mask": str(tmp_path / "in" / "mask_shifted.nii.gz")}, _outputs(tmp_path / "out"), _params(),
                    logging.getLogger("test_glm_job"))
    assert excinfo.value.file.endswith("mask_shifted.nii.gz") and excinfo.value.field == "affine"
    assert not (tmp_path / "out").exists() or not any((tmp_path / "out").iterdir())


def test_job_names_the_events_file_when_no_condition_occurs(tmp_path):
    rng = np.random.default_rng(65)
    inputs, _, _ = _write_run(tmp_path / "in", rng)
    with pytest.raises(InputError) as excinfo:
        glm_job.run_one(inputs, _outputs(tmp_path / "out"), _params(conditions=["heard_moon"]), logging.getLogger("test_glm_job"))
    assert excinfo.value.file == inputs["events"] and excinfo.value.field == "trial_type"
    with pytest.raises(InputError) as excinfo:
        glm_job.run_one(inputs, _outputs(tmp_path / "out"), _params(serial_correlation="ar3"), logging.getLogger("test_glm_job"))
    assert excinfo.value.field == "glm.serial_correlation"


class _Named(dict):
    """Stands in for Snakemake's Namedlist: items() plus attribute access."""

    def __getattr__(self, name):
        return self[name]


def _subject_job(tmp_path, run_folders, glm_changes=None):
    """The subject job's Snakemake object over runs written by _write_run (the first run's mask is the subject's)."""
    run_ids = [folder.name for folder in run_folders]
    inputs = _Named({name: [str(folder / file) for folder in run_folders] for name, file in
                     (("bold", "bold.nii.gz"), ("events", "events.tsv"), ("sidecar", "bold.json"), ("confounds", "confounds.tsv"))})
    inputs["mask"] = str(run_folders[0] / "mask.nii.gz")
    per_run = {name: [str(tmp_path / "out" / f"{run_id}_{Path(path).name}") for run_id in run_ids]
               for name, path in _outputs(tmp_path).items()}
    params = _params(**(glm_changes or {}))
    settings = {key: value for key, value in params.items() if key not in ("session", "run_id", "seed")}
    settings.update(runs=[{"session": None, "run_id": run_id} for run_id in run_ids], drop_initial_volumes=0,
                    condition_column="trial_type")
    return SimpleNamespace(input=inputs, output=_Named(per_run, provenance=str(tmp_path / "prov" / "sub-01.json")),
                           params=_Named(settings=settings, code="glm-code"), log=[str(tmp_path / "logs" / "sub-01.log")],
                           wildcards=_Named(subject="01"), config={"study": {"store_dir": str(tmp_path / "store")}})


def _run_subject_job(smk):
    for paths in smk.output.values():  # Snakemake removes a job's outputs before it reruns
        for path in [paths] if isinstance(paths, str) else paths:
            Path(path).unlink(missing_ok=True)
    run_job(smk, "glm", glm_job.run)
    return json.loads(Path(smk.output.provenance).read_text())


def test_subject_job_writes_every_run_as_the_one_run_fit_does(tmp_path, monkeypatch):
    monkeypatch.chdir(tmp_path)
    folders = [tmp_path / "in" / run_id for run_id in ("run-01", "run-02")]
    for seed, folder in zip((71, 72), folders):
        _write_run(folder, np.random.default_rng(seed))
    smk = _subject_job(tmp_path, folders)
    record = _run_subject_job(smk)
    assert [(part["part"], part["restored"]) for part in record["parts"]] == [("run-01", False), ("run-02", False)]
    for index, folder in enumerate(folders):
        alone = _outputs(tmp_path / "alone" / folder.name)
        run_inputs = {name: smk.input[name][index] for name in ("bold", "events", "sidecar", "confounds")}
        glm_job.run_one({**run_inputs, "mask": smk.input["mask"]}, alone, glm_job.run_settings(smk.params.settings, index),
                        logging.getLogger("test_glm_job"))
        for name, path in alone.items():
            assert Path(smk.output[name][index]).read_bytes() == Path(path).read_bytes(), (folder.name, name)


def test_an_events_edit_in_one_run_refits_only_that_run(tmp_path, monkeypatch):
    """The narrow key inside the subject's job: the edited run's part is computed, the other run's restored (memo on)."""
    monkeypatch.chdir(tmp_path)
    folders = [tmp_path / "in" / run_id for run_id in ("run-01", "run-02")]
    for seed, folder in zip((73, 74), folders):
        _write_run(folder, np.random.default_rng(seed))
    smk = _subject_job(tmp_path, folders)
    first = _run_subject_job(smk)
    before = {name: [Path(path).read_bytes() for path in paths] for name, paths in smk.output.items() if name != "provenance"}
    events = pd.read_csv(folders[1] / "events.tsv", sep="\t")
    events.loc[0, "onset"] += 2.0  # one trial of run-02 moves by a scan
    write_tsv(folders[1] / "events.tsv", events)
    second = _run_subject_job(smk)
    assert [(part["part"], part["restored"]) for part in second["parts"]] == [("run-01", True), ("run-02", False)]
    assert second["parts"][0]["key"] == first["parts"][0]["key"] and second["parts"][1]["key"] != first["parts"][1]["key"]
    after = {name: [Path(path).read_bytes() for path in paths] for name, paths in smk.output.items() if name != "provenance"}
    assert all(after[name][0] == before[name][0] for name in before)  # run-01: the stored bytes
    assert after["design"][1] != before["design"][1] and after["patterns"][1] != before["patterns"][1]  # run-02: refitted
    # A GLM setting reaches every run's part: both are refitted.
    third = _run_subject_job(_subject_job(tmp_path, folders, {"highpass_s": 64}))
    assert [part["restored"] for part in third["parts"]] == [False, False]


def test_design_labels_name_condition_blocks_of_trial_wise_designs():
    rng = np.random.default_rng(66)
    events = _lantern_events(rng, n_per_condition=15, n_scans=200)
    trial_wise = _design(events, mode="lss", n_scans=200)
    labels = glm_job.design_labels(trial_wise)
    texts = [text for _, text in labels]
    assert texts[:3] == [f"{condition}: 15 trials" for condition in CONDITIONS]
    assert "intercept" in texts and "button" in texts and len(labels) <= 24
    positions = [position for position, _ in labels]
    assert positions == sorted(positions) and positions[-1] == trial_wise.matrix.shape[1] - 1
    per_condition = _design(events, n_scans=200)
    assert [text for _, text in glm_job.design_labels(per_condition)] == list(per_condition.names)


def test_lss_trial_identical_to_its_only_sibling_is_not_estimable():
    # Two identical "seen_moon" trials: in trial 1's model its sibling regressor is a copy of it.
    # (A duplicate inside a larger condition stays estimable: the sibling regressor also holds other trials.)
    rng = np.random.default_rng(67)
    events = _lantern_events(rng, extra=False)
    moons = pd.DataFrame([(101.0, 2.0, "seen_moon"), (101.0, 2.0, "seen_moon")], columns=events.columns)
    design = _design(pd.concat([events, moons], ignore_index=True), mode="lss", conditions=CONDITIONS + ["seen_moon"])
    bold = 100.0 + rng.normal(size=(N_SCANS, 3))
    with pytest.raises(InputError) as excinfo:
        fit_lss(design.matrix, bold, design.pattern_blocks, design.pattern_table["condition"], column_names=design.names)
    assert "seen_moon_trial000" in excinfo.value.field and "seen_moon_trial001" in excinfo.value.field
    assert "duplicated" in excinfo.value.fix
    # One duplicate among five trials of a condition: estimable, and equal to the brute-force loop.
    design = _design(pd.concat([events, events.iloc[[0]]], ignore_index=True), mode="lss")
    fit = fit_lss(design.matrix, bold, design.pattern_blocks, design.pattern_table["condition"])
    betas, _ = _brute_force_lss(design, bold)
    np.testing.assert_allclose(fit.betas, betas, rtol=1e-7, atol=1e-8)
