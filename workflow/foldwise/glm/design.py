"""Design matrices of one run: event regressors, cosine drifts, confounds, intercept.

Conventions (stated once, used throughout):

* The acquisition time of scan ``i`` is ``i * tr_s`` (the start of the
  volume); slice timing is not modelled, so data should be slice-time
  corrected to the start of each volume, or the resulting offset (up to one
  TR) accepted.
* Events are boxcars of unit height on a fine grid of step
  ``dt = tr_s / oversampling``, convolved with the HRF basis of
  :mod:`foldwise.glm.hrf` and sampled at the acquisition times. An event with
  duration 0 is an impulse of unit area (the response to 1 s of unit
  activity compressed into an instant), the usual convention for brief events.
* Column order: pattern regressors, other event regressors, drift cosines,
  confounds, intercept.
"""

from dataclasses import dataclass

import numpy as np
import pandas as pd
from scipy import fft as sp_fft  # not scipy.signal: its import alone costs a GLM job ~0.4 s of CPU

from foldwise.errors import InputError
from foldwise.glm.hrf import DERIVATIVE_CHOICES, hrf_basis

__all__ = [
    "PATTERN_MODES",
    "DERIVATIVE_SUFFIXES",
    "DRIFT_PREFIX",
    "DesignMatrix",
    "frame_times",
    "cosine_drift_basis",
    "event_regressors",
    "build_design",
]

#: Accepted values of ``pattern_mode`` (the config key ``glm.pattern_mode``).
PATTERN_MODES = ("per_condition", "lss", "lsa")
#: Name suffixes of the canonical, temporal-derivative and dispersion-derivative columns.
DERIVATIVE_SUFFIXES = ("", "_dtime", "_dwidth")
#: Name prefix of the low-frequency cosine (drift) columns: lowfreq_cos_01, lowfreq_cos_02, ...
DRIFT_PREFIX = "lowfreq_cos_"
_EVENT_COLUMNS = ("onset", "duration", "trial_type")


@dataclass(frozen=True, eq=False)
class DesignMatrix:
    """The design of one run.

    Attributes
    ----------
    matrix : numpy.ndarray
        ``(n_scans, n_regressors)`` float64.
    names : tuple of str
        One name per column.
    pattern_columns : numpy.ndarray
        ``(n_patterns,)`` int: the canonical-HRF column of each pattern.
    pattern_blocks : numpy.ndarray
        ``(n_patterns, n_basis)`` int: every basis column of each pattern
        (canonical first, then its derivatives).
    pattern_table : pandas.DataFrame
        One row per pattern: ``condition``, ``trial_index`` (0-based within
        the condition and run, by onset; missing for per-condition
        patterns), ``onset_s`` (missing for per-condition patterns).
    frame_times_s : numpy.ndarray
        ``(n_scans,)`` acquisition times.
    pattern_mode : str
        The mode the design was built for (``lss`` designs are trial-wise,
        like ``lsa``; the LSS models are derived from them by the estimator).
    missing_conditions : tuple of str
        Requested conditions that have no event in this run (no pattern row).
    """

    matrix: np.ndarray
    names: tuple
    pattern_columns: np.ndarray
    pattern_blocks: np.ndarray
    pattern_table: pd.DataFrame
    frame_times_s: np.ndarray
    pattern_mode: str
    missing_conditions: tuple

    @property
    def n_basis(self):
        """Number of HRF basis functions per event regressor."""
        return int(self.pattern_blocks.shape[1])

    @property
    def nuisance_columns(self):
        """Columns that belong to no pattern block (other events, drifts, confounds, intercept)."""
        in_block = np.zeros(self.matrix.shape[1], dtype=bool)
        in_block[self.pattern_blocks.ravel()] = True
        return np.flatnonzero(~in_block)


def _check_positive(value, field, fix):
    if isinstance(value, bool) or not np.isscalar(value) or not np.isfinite(value) or value <= 0:
        raise InputError(None, field, f"must be a positive number (got {value!r})", fix)
    return float(value)


def _check_count(value, field, minimum, fix):
    if isinstance(value, bool) or not isinstance(value, (int, np.integer)) or value < minimum:
        raise InputError(None, field, f"must be an integer >= {minimum} (got {value!r})", fix)
    return int(value)


def frame_times(n_scans, tr_s):
    """Acquisition times ``i * tr_s`` of scans ``i = 0 .. n_scans - 1``.

    Parameters
    ----------
    n_scans : int
        Number of volumes.
    tr_s : float
        Repetition time in seconds.

    Returns
    -------
    numpy.ndarray
        ``(n_scans,)`` float64 seconds.
    """
    n_scans = _check_count(n_scans, "n_scans", 1, "pass the number of volumes of the run")
    tr_s = _check_positive(tr_s, "tr_s", "set RepetitionTime in the BOLD sidecar")
    return tr_s * np.arange(n_scans, dtype=np.float64)


def cosine_drift_basis(frame_times_s, highpass_s):
    """Discrete cosine (DCT-II) drift regressors below a high-pass cutoff.

    Parameters
    ----------
    frame_times_s : array_like
        ``(n_scans,)`` equally spaced acquisition times in seconds.
    highpass_s : float
        Cutoff period in seconds: cosines with a period of at least this
        long are modelled as drift.

    Returns
    -------
    numpy.ndarray
        ``(n_scans, n_drift)`` float64 with orthonormal columns
        ``sqrt(2 / N) cos(pi k (2 i + 1) / (2 N))`` for ``k = 1 .. n_drift``.

    Notes
    -----
    The DCT-II component ``k`` of ``N`` scans has period ``2 N tr_s / k``;
    keeping every component with a period of at least ``highpass_s`` gives
    ``n_drift = floor(2 * N * tr_s / highpass_s)`` cosines (capped at
    ``N - 1``). The constant (``k = 0``) is excluded because the design has
    its own intercept. The basis is the orthonormal DCT-II (Ahmed, Natarajan
    & Rao 1974, IEEE Trans. Computers C-23:90-93).

    Examples
    --------
    >>> cosine_drift_basis(np.arange(100) * 2.0, 128.0).shape
    (100, 3)
    """
    times = np.asarray(frame_times_s, dtype=np.float64)
    if times.ndim != 1 or times.size < 2 or not np.all(np.isfinite(times)):
        raise InputError(None, "frame_times_s", f"need >= 2 finite times in a 1-D array (got shape {times.shape})",
                         "pass the acquisition times of the run's scans")
    highpass_s = _check_positive(highpass_s, "glm.highpass_s", "set glm.highpass_s to a period in seconds, e.g. 128")
    steps = np.diff(times)
    tr_s = float(steps.mean())
    if tr_s <= 0 or not np.allclose(steps, tr_s, rtol=1e-6, atol=0.0):
        raise InputError(None, "frame_times_s", f"times must be increasing and equally spaced (steps {steps.min()}..{steps.max()} s)",
                         "pass i * tr_s for i = 0 .. n_scans - 1")
    n_scans = times.size
    n_drift = min(int(np.floor(2.0 * n_scans * tr_s / highpass_s + 1e-9)), n_scans - 1)
    orders = np.arange(1, n_drift + 1, dtype=np.float64)
    scan_index = np.arange(n_scans, dtype=np.float64)
    return np.sqrt(2.0 / n_scans) * np.cos(np.pi * np.outer(2.0 * scan_index + 1.0, orders) / (2.0 * n_scans))


def event_regressors(onsets_s, durations_s, regressor_index, n_regressors, n_scans, tr_s, oversampling, hrf_derivatives):
    """Convolve event boxcars with the HRF basis and sample them at the scans.

    Parameters
    ----------
    onsets_s, durations_s : array_like
        ``(n_events,)`` seconds; durations >= 0 (0: unit-area impulse).
    regressor_index : array_like
        ``(n_events,)`` int in ``[0, n_regressors)``: which regressor each
        event belongs to (events of one regressor are summed).
    n_regressors : int
        Number of regressors.
    n_scans : int
        Number of volumes.
    tr_s : float
        Repetition time in seconds.
    oversampling : int
        Fine samples per TR.
    hrf_derivatives : {"none", "temporal", "temporal_dispersion"}
        HRF basis (see :func:`foldwise.glm.hrf.hrf_basis`).

    Returns
    -------
    numpy.ndarray
        ``(n_scans, n_regressors, n_basis)`` float64.

    Notes
    -----
    Fine sample ``m`` stands for the interval ``[t_m - dt/2, t_m + dt/2)``
    and carries the overlap of each boxcar with it, divided by ``dt``; the
    convolution is ``dt * sum_k s[m - k] h[k]``. For onsets and offsets on
    the fine grid this is the trapezoidal rule applied to the response
    integral ``x(t) = int h(t - u) s(u) du``, so the error falls as ``dt**2``
    for a smooth kernel. An impulse is split linearly between its two
    neighbouring fine samples. Events before time 0 are supported (the grid
    is extended backwards); only their response after time 0 is sampled.
    """
    onsets = np.asarray(onsets_s, dtype=np.float64).ravel()
    durations = np.asarray(durations_s, dtype=np.float64).ravel()
    groups = np.asarray(regressor_index).ravel()
    n_regressors = _check_count(n_regressors, "n_regressors", 1, "pass at least one regressor")
    n_scans = _check_count(n_scans, "n_scans", 1, "pass the number of volumes of the run")
    tr_s = _check_positive(tr_s, "tr_s", "set RepetitionTime in the BOLD sidecar")
    if not (onsets.shape == durations.shape == groups.shape):
        raise InputError(None, "events", f"onsets, durations and regressor indices differ in length "
                         f"({onsets.size}, {durations.size}, {groups.size})", "pass one value of each per event")
    if not (np.all(np.isfinite(onsets)) and np.all(np.isfinite(durations)) and np.all(durations >= 0)):
        raise InputError(None, "onset/duration", "onsets must be finite and durations finite and >= 0",
                         "correct the events table")
    if groups.size and (not np.issubdtype(groups.dtype, np.integer) or groups.min() < 0 or groups.max() >= n_regressors):
        raise InputError(None, "regressor_index", f"must be integers in [0, {n_regressors}) (got {groups!r})",
                         "pass one regressor index per event")
    _, kernels = hrf_basis(tr_s, oversampling, hrf_derivatives)
    dt_s = tr_s / oversampling
    n_pre_scans = int(np.ceil(max(0.0, -onsets.min(initial=0.0)) / tr_s))
    n_fine = (n_pre_scans + n_scans) * oversampling
    start_s = -n_pre_scans * tr_s
    signal = np.zeros((n_fine, n_regressors), dtype=np.float64)

    boxcar = durations > 0
    if np.any(boxcar):
        on, off, group = onsets[boxcar], onsets[boxcar] + durations[boxcar], groups[boxcar]
        first = np.clip(np.floor((on - start_s) / dt_s + 0.5).astype(np.int64), 0, n_fine - 1)
        last = np.clip(np.floor((off - start_s) / dt_s + 0.5).astype(np.int64), 0, n_fine - 1)
        counts = last - first + 1
        event_of_pair = np.repeat(np.arange(on.size), counts)
        offsets = np.arange(counts.sum()) - np.repeat(np.cumsum(counts) - counts, counts)
        sample = first[event_of_pair] + offsets
        low = start_s + (sample - 0.5) * dt_s
        overlap = np.minimum(off[event_of_pair], low + dt_s) - np.maximum(on[event_of_pair], low)
        np.add.at(signal, (sample, group[event_of_pair]), np.maximum(overlap, 0.0) / dt_s)
    impulse = ~boxcar
    if np.any(impulse):
        position = (onsets[impulse] - start_s) / dt_s
        below = np.floor(position).astype(np.int64)
        fraction = position - below
        for sample, weight in ((below, 1.0 - fraction), (below + 1, fraction)):
            inside = (sample >= 0) & (sample < n_fine)
            # unit area: 1 s of unit activity, spread over the fine samples
            np.add.at(signal, (sample[inside], groups[impulse][inside]), weight[inside] * (1.0 / dt_s))

    scan_samples = (n_pre_scans + np.arange(n_scans)) * oversampling
    regressors = np.empty((n_scans, n_regressors, kernels.shape[1]), dtype=np.float64)
    for basis in range(kernels.shape[1]):  # 1-3 kernels; each call convolves every column at once
        convolved = _convolve_columns(signal, kernels[:, basis])
        regressors[:, :, basis] = dt_s * convolved[scan_samples]
    return regressors


def _convolve_columns(signal, kernel):
    """Full linear convolution of every column of ``signal`` with ``kernel`` (along axis 0).

    The same real-FFT arithmetic as ``scipy.signal.fftconvolve(signal,
    kernel[:, None], axes=0)`` (transforms padded to ``next_fast_len``),
    written with ``scipy.fft`` so a GLM job does not import scipy.signal;
    tests/test_design.py checks the two agree bit for bit.
    """
    n_full = signal.shape[0] + kernel.shape[0] - 1
    n_fast = sp_fft.next_fast_len(n_full, True)
    spectrum = sp_fft.rfftn(signal, [n_fast], axes=[0]) * sp_fft.rfftn(kernel[:, None], [n_fast], axes=[0])
    return sp_fft.irfftn(spectrum, [n_fast], axes=[0])[:n_full]


def _check_events(events, n_scans, tr_s):
    if not isinstance(events, pd.DataFrame):
        raise InputError(None, "events", f"expected a pandas DataFrame (got {type(events).__name__})",
                         "read the events TSV with foldwise.data.bids.read_events")
    missing = [column for column in _EVENT_COLUMNS if column not in events.columns]
    if missing:
        raise InputError(None, ", ".join(missing), "column(s) missing from the events table", "add onset, duration and trial_type")
    onsets = pd.to_numeric(events["onset"], errors="coerce").to_numpy(dtype=np.float64)
    durations = pd.to_numeric(events["duration"], errors="coerce").to_numpy(dtype=np.float64)
    if not np.all(np.isfinite(onsets)):
        raise InputError(None, "onset", f"onsets must be finite numbers (rows {np.flatnonzero(~np.isfinite(onsets)).tolist()})",
                         "give every event an onset in seconds")
    if not (np.all(np.isfinite(durations)) and np.all(durations >= 0)):
        bad = np.flatnonzero(~(np.isfinite(durations) & (durations >= 0))).tolist()
        raise InputError(None, "duration", f"durations must be numbers >= 0 (rows {bad})", "give every event a duration in seconds")
    trial_types = events["trial_type"]
    if trial_types.isna().any():
        raise InputError(None, "trial_type", f"missing trial types (rows {np.flatnonzero(trial_types.isna()).tolist()})",
                         "give every event a trial_type")
    late = onsets >= n_scans * tr_s
    if np.any(late):
        raise InputError(None, "onset", f"events start after the last scan ends at {n_scans * tr_s:g} s "
                         f"(onsets {onsets[late].tolist()})", "remove them or check the run's events file")
    return onsets, durations, trial_types.astype(str).to_numpy()


def _check_confounds(confounds, confound_names, n_scans):
    names = tuple(str(name) for name in (confound_names or ()))
    if confounds is None:
        if names:
            raise InputError(None, "confounds", f"confound names {list(names)} given without confound values",
                             "pass the confound table's values or no names")
        return np.zeros((n_scans, 0)), names
    values = np.asarray(confounds, dtype=np.float64)
    if values.ndim == 1:
        values = values[:, None]
    if values.ndim != 2 or values.shape[0] != n_scans:
        raise InputError(None, "confounds", f"expected {n_scans} rows (one per scan), got shape {values.shape}",
                         "pass one confound row per volume")
    if values.shape[1] != len(names):
        raise InputError(None, "confound_names", f"{len(names)} names for {values.shape[1]} confound columns",
                         "pass one name per confound column")
    if not np.all(np.isfinite(values)):
        raise InputError(None, "confounds", "confounds contain non-finite values",
                         "fill missing values (e.g. the first scan's derivatives) before modelling")
    return values, names


def build_design(events, n_scans, tr_s, conditions, pattern_mode, hrf_derivatives, highpass_s, confounds,
                 confound_names, oversampling):
    """Build the design matrix of one run.

    Parameters
    ----------
    events : pandas.DataFrame
        Columns ``onset``, ``duration`` (seconds) and ``trial_type``.
    n_scans : int
        Number of volumes.
    tr_s : float
        Repetition time in seconds.
    conditions : sequence of str
        Trial types to model as patterns; empty: every trial type in the
        events, sorted.
    pattern_mode : {"per_condition", "lss", "lsa"}
        ``per_condition``: one regressor per condition (the patterns);
        ``lsa`` and ``lss``: one regressor per trial (``lss`` designs are
        this trial-wise design; :func:`foldwise.glm.estimate.fit_lss` derives the
        per-trial models from it).
    hrf_derivatives : {"none", "temporal", "temporal_dispersion"}
        HRF basis per event regressor.
    highpass_s : float
        Drift cutoff period in seconds (see :func:`cosine_drift_basis`).
    confounds : array_like or None
        ``(n_scans, n_confounds)`` nuisance time courses.
    confound_names : sequence of str
        One name per confound column.
    oversampling : int
        Fine samples per TR for the convolution.

    Returns
    -------
    DesignMatrix

    Notes
    -----
    Events whose trial type is not a requested condition are still modelled,
    one regressor per trial type (never per trial), so their responses do
    not leak into the baseline or the residuals; they yield no pattern.
    A requested condition without events in this run yields no pattern row
    and is listed in ``missing_conditions``. Trials of a condition are
    numbered by onset (ties keep file order).

    Examples
    --------
    >>> events = pd.DataFrame({"onset": [4.0, 20.0], "duration": [2.0, 2.0], "trial_type": ["a", "b"]})
    >>> design = build_design(events, 40, 2.0, [], "per_condition", "none", 128.0, None, (), 16)
    >>> design.names
    ('a', 'b', 'lowfreq_cos_01', 'intercept')
    """
    n_scans = _check_count(n_scans, "n_scans", 2, "a run needs at least two volumes")
    tr_s = _check_positive(tr_s, "tr_s", "set RepetitionTime in the BOLD sidecar")
    if pattern_mode not in PATTERN_MODES:
        raise InputError(None, "glm.pattern_mode", f"unknown mode {pattern_mode!r}", f"use one of {', '.join(PATTERN_MODES)}")
    if hrf_derivatives not in DERIVATIVE_CHOICES:
        raise InputError(None, "glm.hrf_derivatives", f"unknown choice {hrf_derivatives!r}", f"use one of {', '.join(DERIVATIVE_CHOICES)}")
    if isinstance(conditions, str) or not all(isinstance(name, str) and name for name in conditions):
        raise InputError(None, "glm.conditions", f"must be a list of non-empty trial-type names (got {conditions!r})",
                         "list the trial types to model as patterns, or leave it empty for all")
    if len(set(conditions)) != len(conditions):
        raise InputError(None, "glm.conditions", f"repeated names in {list(conditions)}", "list each condition once")
    onsets, durations, trial_types = _check_events(events, n_scans, tr_s)
    confound_values, confound_names = _check_confounds(confounds, confound_names, n_scans)
    times_s = frame_times(n_scans, tr_s)
    drifts = cosine_drift_basis(times_s, highpass_s)

    present = set(trial_types.tolist())
    requested = list(conditions) if len(conditions) else sorted(present)
    pattern_conditions = [name for name in requested if name in present]
    missing = tuple(name for name in requested if name not in present)
    other_types = sorted(present - set(pattern_conditions))

    # Regressor groups: pattern groups first, then one group per other trial type.
    group_of_event = np.empty(onsets.size, dtype=np.int64)
    table_rows, group_names = [], []
    for condition in pattern_conditions:
        members = np.flatnonzero(trial_types == condition)
        if pattern_mode == "per_condition":
            group_of_event[members] = len(group_names)
            group_names.append(condition)
            table_rows.append((condition, pd.NA, np.nan))
        else:
            by_onset = members[np.argsort(onsets[members], kind="stable")]
            for trial_index, event in enumerate(by_onset):
                group_of_event[event] = len(group_names)
                group_names.append(f"{condition}_trial{trial_index:03d}")
                table_rows.append((condition, trial_index, float(onsets[event])))
    n_pattern_groups = len(group_names)
    for trial_type in other_types:
        group_of_event[trial_types == trial_type] = len(group_names)
        group_names.append(trial_type)

    blocks = np.zeros((n_scans, 0))
    n_basis = 1 + DERIVATIVE_CHOICES.index(hrf_derivatives)
    if group_names:
        regressors = event_regressors(onsets, durations, group_of_event, len(group_names), n_scans, tr_s,
                                      oversampling, hrf_derivatives)
        blocks = regressors.reshape(n_scans, len(group_names) * n_basis)  # group-major, basis-minor
    event_names = [name + suffix for name in group_names for suffix in DERIVATIVE_SUFFIXES[:n_basis]]
    drift_names = [f"{DRIFT_PREFIX}{order:02d}" for order in range(1, drifts.shape[1] + 1)]
    names = tuple(event_names + drift_names + list(confound_names) + ["intercept"])
    duplicated = sorted({name for name in names if names.count(name) > 1})
    if duplicated:
        raise InputError(None, "regressor names", f"duplicate regressor name(s) {duplicated}",
                         "rename the confound column(s) or trial type(s) so that every regressor name is unique")
    matrix = np.column_stack([blocks, drifts, confound_values, np.ones(n_scans)])
    if matrix.shape[1] >= n_scans:
        raise InputError(None, "design", f"{matrix.shape[1]} regressors for {n_scans} scans leave no residual degrees of freedom",
                         "use per_condition patterns, fewer confounds or a longer glm.highpass_s")
    pattern_blocks = (np.arange(n_pattern_groups)[:, None] * n_basis + np.arange(n_basis)[None, :]).astype(np.int64)
    table = pd.DataFrame(table_rows, columns=["condition", "trial_index", "onset_s"])
    table = table.astype({"condition": object, "trial_index": "Int64", "onset_s": np.float64})
    return DesignMatrix(matrix=matrix, names=names, pattern_columns=pattern_blocks[:, 0].copy(),
                        pattern_blocks=pattern_blocks, pattern_table=table, frame_times_s=times_s,
                        pattern_mode=pattern_mode, missing_conditions=missing)
