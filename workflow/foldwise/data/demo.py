"""The invented "lanterns" demo study: a simulated BIDS dataset with known ground truth.

Participants (invented) see or hear lanterns of three shapes (round, square,
star): six conditions ``seen_round`` ... ``heard_star``. A synthetic atlas
holds six regions, each a left/right pair:

``ember_L``, ``ember_R``
    a shape code shared across seen and heard lanterns: ``seen_round`` and
    ``heard_round`` evoke the same voxel pattern, and so on;
``glow_L``, ``glow_R``
    a seen-only code: the three seen shapes evoke distinct patterns, the
    three heard shapes one common pattern;
``hush_L``, ``hush_R``
    no condition information: a voxel-specific response that is the same
    for every condition.

Only a fraction (:data:`INFORMATIVE_FRACTION`) of an informative region's
voxels carry the code, so voxel selection matters. Every brain voxel also
responds to every condition alike. Nothing here is a real experiment.

All randomness comes from generators seeded by
``foldwise.provenance.hashing.seed_from(seed, "demo_dataset", <part>, ...)``, so each
subject and run has its own stream: adding a subject leaves the others
unchanged.
"""

import nibabel as nib
import numpy as np
import pandas as pd

from foldwise import __version__
from foldwise.data.bids import make_run_id, run_files
from foldwise.errors import InputError
from foldwise.data.fileio import save_nifti, write_json, write_tsv
from foldwise.provenance.hashing import seed_from
from foldwise.glm.hrf import double_gamma

__all__ = [
    "STEP",
    "CONDITIONS",
    "REGION_NAMES",
    "REGION_CODES",
    "MOTION_COLUMNS",
    "CONFOUND_COLUMNS",
    "DEFAULT_SETTINGS",
    "INFORMATIVE_FRACTION",
    "check_settings",
    "planned_runs",
    "demo_affine",
    "make_atlas",
    "choose_informative_voxels",
    "expected_decoding",
    "subject_patterns",
    "plan_trials",
    "trial_regressors",
    "simulate_run",
    "write_demo_study",
]

STEP = "demo_dataset"  # the workflow step whose identity seeds the demo's randomness
SHAPES = ("round", "square", "star")
MODALITIES = ("seen", "heard")
CONDITIONS = tuple(f"{modality}_{shape}" for modality in MODALITIES for shape in SHAPES)
REGION_NAMES = ("ember_L", "ember_R", "glow_L", "glow_R", "hush_L", "hush_R")
REGION_CODES = {"ember": "shared", "glow": "seen_only", "hush": "none"}
MOTION_COLUMNS = ("trans_x", "trans_y", "trans_z", "rot_x", "rot_y", "rot_z")
CONFOUND_COLUMNS = MOTION_COLUMNS + ("framewise_displacement",)
DEFAULT_SETTINGS = {"n_subjects": 5, "n_runs": 4, "grid_shape": [20, 24, 16], "voxel_size_mm": 3.0, "tr_s": 2.0,
                    "trials_per_condition_per_run": 3, "signal_to_noise": 1.0}
INFORMATIVE_FRACTION = 0.4

# Simulation constants (BOLD units: the in-brain baseline is 1000). The
# amplitudes are per unit of an HRF-convolved regressor whose sustained
# plateau is 1, so a 2-s event peaks at about 0.4 of them.
_BASELINE = 1000.0
_BASELINE_SPREAD = 0.05  # voxel-to-voxel spread of the baseline, as a fraction
_OUTSIDE_LEVEL = 20.0
_OUTSIDE_NOISE_SD = 2.0
_NOISE_SD = 10.0
_NOISE_SPREAD = (0.85, 1.2)  # subject noise multiplier range
_EFFECT_SPREAD = (0.7, 1.3)  # subject effect-size multiplier range
_AR_RHO = 0.3
_COMMON_AMPLITUDE = 30.0  # response of every brain voxel to every condition
_COMMON_SPREAD = 0.3
_PATTERN_AMPLITUDE = 10.0  # code pattern amplitude at signal_to_noise 1 (tuned: see tests/test_demo.py)
_HUSH_AMPLITUDE = 8.0  # hush's condition-independent voxel pattern
_TRIAL_JITTER = 0.2  # trial-to-trial amplitude spread, as a fraction
_DRIFT_SD = 8.0
_LEAK_SD = 3.0  # how strongly motion leaks into the signal
_MOTION_STEP_SD = {"trans": 0.03, "rot": 0.0005}  # per volume, mm and radians
_MOTION_SMOOTHING = 5  # volumes of the moving average that smooths the walks
_FD_RADIUS_MM = 50.0  # rotation-to-displacement radius of Power et al. (2012)
_EVENT_DURATION_S = 2.0
_SOA_RANGE_S = (6.0, 8.0)
_REST_S = 16.0
_OVERSAMPLING = 16
_HRF_LENGTH_S = 32.0


def check_settings(demo_settings):
    """Demo settings with defaults filled in, checked.

    Parameters
    ----------
    demo_settings : dict
        The config's ``demo`` block (keys of :data:`DEFAULT_SETTINGS`).

    Returns
    -------
    dict
        A new dict with every key of :data:`DEFAULT_SETTINGS`.
    """
    if not isinstance(demo_settings, dict):
        raise InputError("the study config", "demo", f"expected a mapping, got {demo_settings!r}", "give demo settings as a mapping")
    unknown = sorted(set(demo_settings) - set(DEFAULT_SETTINGS))
    if unknown:
        raise InputError("the study config", f"demo.{unknown[0]}", "unknown demo setting", f"use only {', '.join(DEFAULT_SETTINGS)}")
    settings = {**DEFAULT_SETTINGS, **demo_settings}
    for key, minimum in (("n_subjects", 1), ("n_runs", 2), ("trials_per_condition_per_run", 1)):
        value = settings[key]
        if isinstance(value, bool) or not isinstance(value, (int, np.integer)) or value < minimum:
            raise InputError("the study config", f"demo.{key}", f"expected an integer >= {minimum}, got {value!r}", f"set demo.{key} to {minimum} or more")
        if key in ("n_subjects", "n_runs") and value > 99:
            raise InputError("the study config", f"demo.{key}", f"at most 99 (labels have two digits), got {value!r}", f"set demo.{key} <= 99")
    shape = settings["grid_shape"]
    if not (isinstance(shape, (list, tuple)) and len(shape) == 3 and all(isinstance(n, (int, np.integer)) and not isinstance(n, bool) and n >= 8 for n in shape)):
        raise InputError("the study config", "demo.grid_shape", f"expected three integers >= 8, got {shape!r}", "set e.g. [20, 24, 16]")
    for key, strictly in (("voxel_size_mm", True), ("tr_s", True), ("signal_to_noise", False)):
        value = settings[key]
        if isinstance(value, bool) or not isinstance(value, (int, float)) or not np.isfinite(value) or value < 0 or (strictly and value == 0):
            raise InputError("the study config", f"demo.{key}", f"expected a {'positive' if strictly else 'non-negative'} number, got {value!r}",
                             f"set demo.{key}")
    settings["grid_shape"] = [int(n) for n in shape]
    return settings


def planned_runs(demo_settings):
    """The demo's runs as (subject, session, run) label triples.

    Parameters
    ----------
    demo_settings : dict
        The ``demo`` config block.

    Returns
    -------
    list of tuple
        ``("01", None, "01"), ("01", None, "02"), ...``: subjects and runs
        zero-padded to two digits, no sessions, subject-major order.

    Example
    -------
    >>> planned_runs({"n_subjects": 1, "n_runs": 2})
    [('01', None, '01'), ('01', None, '02')]
    """
    settings = check_settings(demo_settings)
    return [(f"{subject:02d}", None, f"{run:02d}") for subject in range(1, settings["n_subjects"] + 1)
            for run in range(1, settings["n_runs"] + 1)]


def demo_affine(grid_shape, voxel_size_mm):
    """Voxel-to-world affine of the demo grid: isotropic, world origin at the grid centre.

    Parameters
    ----------
    grid_shape : sequence of 3 int
    voxel_size_mm : float

    Returns
    -------
    ndarray of float64, shape (4, 4)
    """
    affine = np.diag([float(voxel_size_mm)] * 3 + [1.0])
    affine[:3, 3] = -float(voxel_size_mm) * (np.asarray(grid_shape, dtype=np.float64) - 1.0) / 2.0
    return affine


def make_atlas(grid_shape):
    """The synthetic atlas: an ellipsoidal brain and six labelled blobs.

    Parameters
    ----------
    grid_shape : sequence of 3 int
        Grid size, each >= 8.

    Returns
    -------
    brain : ndarray of bool, shape ``grid_shape``
        An ellipsoid with semi-axes 0.45 x the grid size.
    labels : ndarray of int16, shape ``grid_shape``
        0 outside the regions, else the region's index (1..6, the order of
        :data:`REGION_NAMES`).
    label_table : pandas.DataFrame
        Columns ``index``, ``name``.

    Notes
    -----
    Blobs are balls of radius 0.16 x the smallest grid size (at least 1.5
    voxels): left regions at 27 % and right regions at 73 % of the x axis
    (negative world x is left), ember, glow and hush at 25, 50 and 75 % of
    the y axis, all at mid z. Where balls would overlap (tiny grids), the
    earlier region keeps the voxel. Deterministic: no randomness.
    """
    shape = tuple(int(n) for n in grid_shape)
    if len(shape) != 3 or min(shape) < 8:
        raise InputError("the study config", "demo.grid_shape", f"expected three sizes >= 8, got {grid_shape!r}", "set e.g. [20, 24, 16]")
    size = np.asarray(shape, dtype=np.float64)
    coords = np.indices(shape, dtype=np.float64)
    centre = (size - 1.0) / 2.0
    normalised = (coords - centre[:, None, None, None]) / (0.45 * size)[:, None, None, None]
    brain = np.einsum("i...,i...->...", normalised, normalised) <= 1.0
    radius = max(1.5, 0.16 * size.min())
    labels = np.zeros(shape, dtype=np.int16)
    y_fraction = {"ember": 0.25, "glow": 0.5, "hush": 0.75}
    for index, name in enumerate(REGION_NAMES, start=1):
        family, side = name.split("_")
        ball_centre = np.array([0.27 if side == "L" else 0.73, y_fraction[family], 0.5]) * (size - 1.0)
        offsets = coords - ball_centre[:, None, None, None]
        ball = np.einsum("i...,i...->...", offsets, offsets) <= radius ** 2
        labels[ball & brain & (labels == 0)] = index
    return brain, labels, pd.DataFrame({"index": np.arange(1, len(REGION_NAMES) + 1), "name": list(REGION_NAMES)})


def choose_informative_voxels(labels, rng, fraction=INFORMATIVE_FRACTION):
    """Pick the voxels of each informative region that carry its code.

    Parameters
    ----------
    labels : ndarray of int, 3D
        The atlas of :func:`make_atlas`.
    rng : numpy.random.Generator
    fraction : float, optional
        Share of each ember/glow region's voxels that carry the code (at
        least one voxel per region).

    Returns
    -------
    dict
        Region name -> ndarray of bool, shape ``labels.shape`` (all False for
        the hush regions).
    """
    if not 0.0 < fraction <= 1.0:
        raise InputError(None, "fraction", f"expected a fraction in (0, 1], got {fraction!r}", "pass e.g. 0.4")
    labels = np.asarray(labels)
    chosen = {}
    for index, name in enumerate(REGION_NAMES, start=1):
        mask = np.zeros(labels.shape, dtype=bool)
        members = np.flatnonzero(labels.ravel() == index)
        if REGION_CODES[name.split("_")[0]] != "none" and members.size:
            n_informative = max(1, int(round(fraction * members.size)))
            mask.ravel()[np.sort(rng.choice(members, size=n_informative, replace=False))] = True
        chosen[name] = mask
    return chosen


def expected_decoding(code):
    """Which analyses a region with the given code should decode.

    Parameters
    ----------
    code : {"shared", "seen_only", "none"}

    Returns
    -------
    dict
        ``shape_seen`` (shapes within seen), ``shape_heard`` (within
        heard), ``shape_seen_to_heard`` and ``shape_heard_to_seen``
        (cross-decoding), ``modality`` (seen vs heard) -> bool.
    """
    if code not in ("shared", "seen_only", "none"):
        raise InputError(None, "code", f"unknown region code {code!r}", "use shared, seen_only or none")
    return {"shape_seen": code in ("shared", "seen_only"), "shape_heard": code == "shared",
            "shape_seen_to_heard": code == "shared", "shape_heard_to_seen": code == "shared",
            "modality": code == "seen_only"}


def expected_geometry(code):
    """What a geometry analysis of the six conditions should find in a region with this code.

    Returns
    -------
    dict
        ``alike`` -- the condition pairs whose noise-free patterns are equal
        (their cross-validated distance is 0 in expectation; every other pair
        of an ember or glow region differs); ``best_model`` -- which of the
        demo's models (config/config.yaml, analysis lantern_geometry) matches
        that structure exactly: ``shape`` (pairs alike when the shape
        matches), ``shape_within_seen`` (seen shapes apart, heard conditions
        alike) or None (hush: every condition evokes the same pattern, so
        no model should fit).
    """
    if code not in ("shared", "seen_only", "none"):
        raise InputError(None, "code", f"unknown region code {code!r}", "use shared, seen_only or none")
    if code == "shared":
        alike = [[f"seen_{shape}", f"heard_{shape}"] for shape in SHAPES]
    elif code == "seen_only":
        alike = [[f"heard_{a}", f"heard_{b}"] for i, a in enumerate(SHAPES) for b in SHAPES[i + 1:]]
    else:
        alike = [[a, b] for i, a in enumerate(CONDITIONS) for b in CONDITIONS[i + 1:]]
    return {"alike": alike, "best_model": {"shared": "shape", "seen_only": "shape_within_seen", "none": None}[code]}


def subject_patterns(brain, labels, informative, signal_to_noise, rng):
    """One subject's response patterns, baseline, noise level and effect size.

    Parameters
    ----------
    brain : ndarray of bool, 3D
        The brain mask.
    labels : ndarray of int, 3D
        The atlas.
    informative : dict
        Region name -> bool mask of its code-carrying voxels.
    signal_to_noise : float
        Scales the code patterns (0: no information anywhere).
    rng : numpy.random.Generator

    Returns
    -------
    condition_patterns : dict
        Condition -> float64 (n_brain_voxels,) response per unit regressor,
        over ``brain`` voxels in C order: the common response plus the
        region codes.
    baseline : ndarray of float64, (n_brain_voxels,)
    noise_sd : float
    effect_scale : float
        The subject's multiplier of the code amplitude.
    """
    brain = np.asarray(brain, dtype=bool)
    n_brain = int(brain.sum())
    effect_scale = float(rng.uniform(*_EFFECT_SPREAD))
    noise_sd = _NOISE_SD * float(rng.uniform(*_NOISE_SPREAD))
    baseline = _BASELINE * (1.0 + _BASELINE_SPREAD * rng.standard_normal(n_brain))
    common = _COMMON_AMPLITUDE * (1.0 + _COMMON_SPREAD * rng.standard_normal(n_brain))
    patterns = {condition: common.copy() for condition in CONDITIONS}
    amplitude = _PATTERN_AMPLITUDE * float(signal_to_noise) * effect_scale
    labels_in_brain = np.asarray(labels)[brain]
    for index, name in enumerate(REGION_NAMES, start=1):
        code = REGION_CODES[name.split("_")[0]]
        if code == "none":
            voxels = labels_in_brain == index
            shared = _HUSH_AMPLITUDE * rng.standard_normal(int(voxels.sum()))  # same for every condition
            for condition in CONDITIONS:
                patterns[condition][voxels] += shared
            continue
        voxels = informative[name][brain]
        n_voxels = int(voxels.sum())
        shape_codes = {shape: amplitude * rng.standard_normal(n_voxels) for shape in SHAPES}
        heard_common = amplitude * rng.standard_normal(n_voxels)
        for shape in SHAPES:
            patterns[f"seen_{shape}"][voxels] += shape_codes[shape]
            patterns[f"heard_{shape}"][voxels] += shape_codes[shape] if code == "shared" else heard_common
    return patterns, baseline, noise_sd, effect_scale


def plan_trials(trials_per_condition, rng):
    """A run's events in a seeded random order, with jittered spacing.

    Parameters
    ----------
    trials_per_condition : int
    rng : numpy.random.Generator

    Returns
    -------
    events : pandas.DataFrame
        ``onset`` (s, rounded to 0.1 s), ``duration`` (2 s), ``trial_type``.
    run_length_s : float
        Last offset plus 16 s of rest (the first onset is at 16 s).
    """
    trial_types = rng.permutation(np.repeat(np.array(CONDITIONS, dtype=object), int(trials_per_condition)))
    soa_s = rng.uniform(*_SOA_RANGE_S, size=trial_types.size - 1)
    onsets = np.round(_REST_S + np.concatenate([[0.0], np.cumsum(soa_s)]), 1)
    events = pd.DataFrame({"onset": onsets, "duration": np.full(onsets.size, _EVENT_DURATION_S), "trial_type": trial_types})
    return events, float(onsets[-1] + _EVENT_DURATION_S + _REST_S)


def trial_regressors(onsets_s, durations_s, n_scans, tr_s):
    """One HRF-convolved boxcar per trial, sampled at the scan times ``i * tr_s``.

    Parameters
    ----------
    onsets_s, durations_s : array_like, (n_trials,)
    n_scans : int
    tr_s : float

    Returns
    -------
    ndarray of float64, (n_scans, n_trials)
        A sustained unit boxcar plateaus at 1.

    Notes
    -----
    Boxcars are built on a grid of ``tr_s / 16`` and convolved with the
    canonical double-gamma HRF (Friston et al. 1998; Glover 1999), scaled to
    unit area.
    """
    onsets = np.asarray(onsets_s, dtype=np.float64)
    durations = np.asarray(durations_s, dtype=np.float64)
    dt_s = float(tr_s) / _OVERSAMPLING
    fine_times = dt_s * np.arange(int(n_scans) * _OVERSAMPLING)
    boxcars = ((fine_times[:, None] >= onsets[None, :]) & (fine_times[:, None] < (onsets + durations)[None, :])).astype(np.float64)
    kernel = double_gamma(dt_s * np.arange(int(np.ceil(_HRF_LENGTH_S / dt_s))))
    kernel /= kernel.sum()  # unit area on the fine grid
    from scipy.signal import fftconvolve  # late: the workflow imports this module to plan the demo's runs (1.2 s)

    convolved = fftconvolve(boxcars, kernel[:, None], axes=0)[: fine_times.size]
    return convolved[:: _OVERSAMPLING]


def _motion(n_scans, rng):
    """Six smooth random walks (mm, radians) and framewise displacement."""
    step_sd = [_MOTION_STEP_SD["trans" if name.startswith("trans") else "rot"] for name in MOTION_COLUMNS]
    steps = rng.normal(0.0, 1.0, size=(n_scans, len(MOTION_COLUMNS))) * np.array(step_sd)
    walks = np.cumsum(steps, axis=0)
    window = np.ones(_MOTION_SMOOTHING) / _MOTION_SMOOTHING
    padded = np.pad(walks, ((_MOTION_SMOOTHING // 2, _MOTION_SMOOTHING // 2), (0, 0)), mode="edge")
    smooth = np.column_stack([np.convolve(padded[:, column], window, mode="valid") for column in range(6)])
    smooth -= smooth[0]  # the first volume is the reference position
    # Framewise displacement (Power et al. 2012, NeuroImage 59:2142-2154):
    # sum of absolute volume-to-volume changes, rotations as arcs on a 50 mm sphere.
    changes = np.abs(np.diff(smooth, axis=0))
    displacement = np.concatenate([[np.nan], changes[:, :3].sum(axis=1) + _FD_RADIUS_MM * changes[:, 3:].sum(axis=1)])
    return smooth, displacement


def simulate_run(brain, condition_patterns, baseline, noise_sd, tr_s, trials_per_condition, rng):
    """Simulate one BOLD run of the lanterns study.

    Parameters
    ----------
    brain : ndarray of bool, (x, y, z)
        Where the brain is.
    condition_patterns : dict
        Condition -> (n_brain_voxels,) response per unit regressor.
    baseline : ndarray, (n_brain_voxels,)
        Mean signal of each brain voxel.
    noise_sd : float
        Marginal standard deviation of the AR(1) noise.
    tr_s : float
        Repetition time in seconds.
    trials_per_condition : int
    rng : numpy.random.Generator

    Returns
    -------
    bold : ndarray of float32, (x, y, z, n_scans)
    events : pandas.DataFrame
        ``onset``, ``duration``, ``trial_type``.
    confounds : pandas.DataFrame
        :data:`CONFOUND_COLUMNS`; ``framewise_displacement`` is n/a (NaN) at
        the first volume.

    Notes
    -----
    Brain voxels: ``baseline + sum_k a_k r_k(t) p_{c(k)} + drift + leak +
    noise``, with ``r_k`` the HRF-convolved boxcar of trial ``k``,
    ``a_k = 1 + 0.2 z`` its amplitude jitter, ``p_c`` the condition's
    pattern, a per-voxel linear and half-cosine drift, motion leaking into
    each voxel with random weights, and AR(1) noise (rho 0.3) with
    stationary variance ``noise_sd**2``. Outside the brain: a low level
    (20) plus white noise.
    """
    brain = np.asarray(brain, dtype=bool)
    baseline = np.asarray(baseline, dtype=np.float64)
    n_brain = int(brain.sum())
    if baseline.shape != (n_brain,):
        raise InputError(None, "baseline", f"expected {n_brain} brain voxels, got shape {baseline.shape}", "pass one value per brain voxel")
    missing = [condition for condition in CONDITIONS if condition not in condition_patterns]
    if missing:
        raise InputError(None, "condition_patterns", f"no pattern for {', '.join(missing)}", "give one pattern per condition")
    events, run_length_s = plan_trials(trials_per_condition, rng)
    n_scans = int(np.ceil(run_length_s / tr_s))
    regressors = trial_regressors(events["onset"], events["duration"], n_scans, tr_s)
    amplitudes = 1.0 + _TRIAL_JITTER * rng.standard_normal(len(events))
    trial_patterns = np.stack([condition_patterns[condition] for condition in events["trial_type"]])
    signal = regressors @ (amplitudes[:, None] * trial_patterns)

    time_axis = np.linspace(-0.5, 0.5, n_scans)
    drift_basis = np.column_stack([time_axis, np.cos(np.pi * (time_axis + 0.5))])
    drift = drift_basis @ (_DRIFT_SD * rng.standard_normal((2, n_brain)))
    motion, displacement = _motion(n_scans, rng)
    motion_scale = motion.std(axis=0)
    motion_z = (motion - motion.mean(axis=0)) / np.where(motion_scale > 0, motion_scale, 1.0)
    leak = motion_z @ (_LEAK_SD / np.sqrt(6.0) * rng.standard_normal((6, n_brain)))
    innovations = noise_sd * rng.standard_normal((n_scans, n_brain))
    innovations[1:] *= np.sqrt(1.0 - _AR_RHO ** 2)  # the first sample already has the stationary variance
    from scipy.signal import lfilter  # late, as fftconvolve above

    noise = lfilter([1.0], [1.0, -_AR_RHO], innovations, axis=0)

    bold = np.empty(brain.shape + (n_scans,), dtype=np.float32)
    outside = ~brain
    bold[outside] = _OUTSIDE_LEVEL + _OUTSIDE_NOISE_SD * rng.standard_normal((int(outside.sum()), n_scans))
    bold[brain] = (baseline[None, :] + signal + drift + leak + noise).T
    confounds = pd.DataFrame(motion, columns=list(MOTION_COLUMNS))
    confounds["framewise_displacement"] = displacement
    return bold, events, confounds


def _description(settings):
    return {
        "Name": "foldwise lanterns demo (simulated)",
        "BIDSVersion": "1.9.0",
        "DatasetType": "derivative",
        "Simulated": True,
        "Description": ("Invented data: simulated participants who see or hear lanterns of three shapes (round, square, star). "
                        "No real person or scanner is involved; the regions ember, glow and hush are made up."),
        "GeneratedBy": [{"Name": "foldwise demo simulator", "Version": __version__}],
        "SimulationSettings": settings,
    }


def _bold_header(shape, voxel_size_mm, tr_s):
    """A NIfTI header whose pixdim[4] holds the TR in seconds (as the sidecar does)."""
    header = nib.Nifti1Header()
    header.set_data_shape(shape)
    header.set_zooms((float(voxel_size_mm),) * 3 + (float(tr_s),))
    header.set_xyzt_units("mm", "sec")
    return header


def _voxel_list(mask):
    return [list(map(int, index)) for index in np.argwhere(mask)]


def write_demo_study(bids_root, patterns, demo_settings, seed, task, confound_names, atlas_image_path, atlas_labels_path,
                     ground_truth_path, description_path):
    """Simulate the lanterns study and write it as a BIDS dataset plus atlas and ground truth.

    Parameters
    ----------
    bids_root : str
        Where the dataset goes; run files follow ``patterns``.
    patterns : dict
        The ``dataset.patterns`` templates (see :func:`foldwise.data.bids.run_files`).
    demo_settings : dict
        The ``demo`` config block.
    seed : int
        The study seed; every random stream is seeded from it and its part's
        identity (step ``demo_dataset``, then ``atlas``, a subject, a run).
    task : str
        The BIDS task label.
    confound_names : sequence of str
        Confound columns the study will use; each must be one the demo writes
        (:data:`CONFOUND_COLUMNS`).
    atlas_image_path, atlas_labels_path, ground_truth_path, description_path : str
        Output files: label NIfTI (int16), label TSV (``index``, ``name``),
        ground-truth JSON, ``dataset_description.json``.

    Returns
    -------
    list of dict
        Per planned run: ``subject``, ``session``, ``run``, ``run_id`` and the
        paths written (``bold``, ``events``, ``sidecar``, ``confounds``).
    """
    settings = check_settings(demo_settings)
    # Prefix and first-k selectors pick among the written columns at GLM time; names must be columns the demo writes.
    unknown = [name for name in confound_names if isinstance(name, str) and not name.endswith("*") and name not in CONFOUND_COLUMNS]
    if unknown:
        raise InputError("the study config", "dataset.confounds", f"the demo writes no column {', '.join(map(repr, unknown))}",
                         f"use columns of {', '.join(CONFOUND_COLUMNS)}")
    seed = int(seed)
    grid_shape, tr_s = settings["grid_shape"], float(settings["tr_s"])
    affine = demo_affine(grid_shape, settings["voxel_size_mm"])
    brain, labels, label_table = make_atlas(grid_shape)
    informative = choose_informative_voxels(labels, np.random.default_rng(seed_from(seed, STEP, "atlas")))

    written, subjects = [], {}
    for subject, session, run in planned_runs(settings):
        if subject not in subjects:
            subject_rng = np.random.default_rng(seed_from(seed, STEP, "subject", subject))
            subjects[subject] = subject_patterns(brain, labels, informative, settings["signal_to_noise"], subject_rng)
        condition_patterns, baseline, noise_sd, _ = subjects[subject]
        run_id = make_run_id(session, run)
        run_rng = np.random.default_rng(seed_from(seed, STEP, "run", subject, run_id))
        bold, events, confounds = simulate_run(brain, condition_patterns, baseline, noise_sd, tr_s,
                                               settings["trials_per_condition_per_run"], run_rng)
        files = run_files(bids_root, patterns, task, subject, session, run)
        save_nifti(files["bold"], bold, affine, header=_bold_header(bold.shape, settings["voxel_size_mm"], tr_s), dtype=np.float32)
        write_tsv(files["events"], events)
        write_json(files["sidecar"], {"RepetitionTime": tr_s, "TaskName": task})
        if files["confounds"] is not None:
            write_tsv(files["confounds"], confounds)
        written.append({"subject": subject, "session": session, "run": run, "run_id": run_id,
                        **{name: files[name] for name in ("bold", "events", "sidecar", "confounds")}})

    save_nifti(atlas_image_path, labels, affine, dtype=np.int16)
    write_tsv(atlas_labels_path, label_table)
    regions = {}
    for index, name in enumerate(REGION_NAMES, start=1):
        code = REGION_CODES[name.split("_")[0]]
        regions[name] = {"index": index, "code": code, "n_voxels": int((labels == index).sum()),
                         "n_informative": int(informative[name].sum()), "informative_voxels": _voxel_list(informative[name]),
                         "decodes": expected_decoding(code)}
    families = {family: {"labels": [f"{family}_L", f"{family}_R"], "code": code, "decodes": expected_decoding(code),
                         "geometry": expected_geometry(code)}
                for family, code in REGION_CODES.items()}
    write_json(ground_truth_path, {
        "invented": True,
        "study": "lanterns (simulated)",
        "seed": seed,
        "settings": settings,
        "task": task,
        "conditions": list(CONDITIONS),
        "informative_fraction": INFORMATIVE_FRACTION,
        "voxel_index_order": "i, j, k voxel indices of the atlas grid",
        "n_brain_voxels": int(brain.sum()),
        "regions": regions,
        "rois": families,
        "subjects": {subject: {"effect_scale": round(values[3], 6), "noise_sd": round(values[2], 6)}
                     for subject, values in subjects.items()},
    })
    write_json(description_path, _description(settings))
    return written
