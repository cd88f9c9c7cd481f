"""A simulated dataset laid out as a raw BIDS tree plus a preprocessing pipeline's derivatives tree.

Invented scenario (the "lanterns" study): the main task ``lanterns`` shows
seen/heard lanterns of two shapes; the localizer task ``beacon`` alternates
``lit`` and ``dark`` blocks. Written by the tests, never shipped:

* raw tree: ``sub-XX/ses-YY/func/*_events.tsv`` and one top-level sidecar
  per task (``task-<task>_bold.json``, BIDS inheritance);
* derivatives tree: ``*_space-<space>_res-2_desc-preproc_bold.nii.gz``,
  ``*_desc-confounds_timeseries.tsv`` (motion, ``noise_comp_NN``,
  ``spike_volNN`` for flagged high-motion volumes, ``unsteady_NN`` for the
  initial non-steady-state volumes), ``*_desc-brain_mask.nii.gz``;
* an atlas in the same space: regions ``ember_L``/``ember_R`` (the
  anatomical constraint; the ``beacon``-responsive voxels are a known part
  of it), ``glow_L``/``glow_R``.

The BOLD carries: bright initial volumes (non-steady state), a spike at
each flagged volume, motion leaking into the signal, and condition
patterns in ``ember`` (shape code shared between seen and heard) and
``glow`` (code of seen lanterns only).
"""

import json
from pathlib import Path

import nibabel as nib
import numpy as np
import pandas as pd
from scipy import stats

GRID = (12, 12, 9)
VOXEL_MM = 3.0
TR_S = 2.0
N_UNSTEADY = 2
SPACE = "tmplA"
RES = "2"
MAIN_CONDITIONS = ("seen_round", "seen_square", "heard_round", "heard_square")
LOCALIZER_CONDITIONS = ("lit", "dark")
MOTION = ("trans_x", "trans_y", "trans_z", "rot_x", "rot_y", "rot_z")
N_COMPONENTS = 6


def affine():
    matrix = np.diag([VOXEL_MM, VOXEL_MM, VOXEL_MM, 1.0])
    matrix[:3, 3] = -VOXEL_MM * (np.array(GRID) - 1) / 2
    return matrix


def atlas_labels():
    """Integer atlas on GRID: 0 outside, 1 ember_L, 2 ember_R, 3 glow_L, 4 glow_R."""
    labels = np.zeros(GRID, dtype=np.int16)
    labels[2:5, 3:8, 2:7] = 1
    labels[7:10, 3:8, 2:7] = 2
    labels[2:5, 8:11, 2:7] = 3
    labels[7:10, 8:11, 2:7] = 4
    return labels


def brain():
    inside = np.zeros(GRID, dtype=bool)
    inside[1:11, 1:11, 1:8] = True
    return inside


def responsive_region():
    """The voxels that respond to ``lit`` more than ``dark``: a known part of ember (both sides)."""
    region = np.zeros(GRID, dtype=bool)
    region[2:4, 4:7, 3:6] = True
    region[8:10, 4:7, 3:6] = True
    return region


def _hrf(tr_s, length_s=32.0):
    """Double-gamma response sampled at the TR (peak ~5 s, undershoot ~15 s, ratio 1/6: common practice, no source)."""
    times = np.arange(0, length_s, tr_s)
    shape = stats.gamma.pdf(times, 6) - stats.gamma.pdf(times, 16) / 6.0
    return shape / shape.sum()


def _events(conditions, n_per_condition, n_kept, rng, block_s=None):
    """Onsets (s, from the first kept volume), shuffled conditions, 2 s events (or blocks)."""
    order = rng.permutation(np.repeat(np.arange(len(conditions)), n_per_condition))
    duration = block_s or 2.0
    step = duration + (8.0 if block_s else 6.0)
    onsets = 4.0 + step * np.arange(order.size)
    assert onsets[-1] + duration + 12 < n_kept * TR_S, "runs too short for their events"
    return pd.DataFrame({"onset": onsets, "duration": duration, "trial_type": [conditions[i] for i in order]})


def _regressors(events, conditions, n_kept):
    boxcar = np.zeros((n_kept, len(conditions)))
    for row in events.itertuples():
        start = int(round(row.onset / TR_S))
        stop = max(start + 1, int(round((row.onset + row.duration) / TR_S)))
        boxcar[start:stop, conditions.index(row.trial_type)] = 1.0
    kernel = _hrf(TR_S)
    return np.stack([np.convolve(boxcar[:, j], kernel)[:n_kept] for j in range(len(conditions))], axis=1)


def _write_nifti(path, data, dtype=np.float32):
    path.parent.mkdir(parents=True, exist_ok=True)
    image = nib.Nifti1Image(np.asarray(data, dtype=dtype), affine())
    image.header.set_xyzt_units("mm", "sec")
    if np.ndim(data) == 4:
        image.header["pixdim"][4] = TR_S
    nib.save(image, str(path))


def main_codes(rng):
    """Voxel patterns of the main task: ember's shape code shared by seen and heard; glow codes seen shapes only."""
    n = int(np.prod(GRID))
    atlas = atlas_labels().ravel(order="F")
    ember, glow = np.isin(atlas, (1, 2)), np.isin(atlas, (3, 4))
    shape_code = {shape: rng.standard_normal(n) for shape in ("round", "square")}
    glow_code = {shape: rng.standard_normal(n) for shape in ("round", "square")}
    codes = {}
    for condition in MAIN_CONDITIONS:
        modality, shape = condition.split("_")
        code = np.where(ember, shape_code[shape], 0.0)
        if modality == "seen":
            code = code + np.where(glow, glow_code[shape], 0.0)
        codes[condition] = code
    return codes


def write_dataset(root, n_subjects=3, sessions=("1", "2"), runs_per_session=2, n_scans=None, seed=1,
                  main_amplitude=1.2, localizer_amplitude=3.0, main_seed_offset=0, condition_rename=None, subject_rois=False,
                  space=SPACE, res=RES):
    """Write the raw and derivatives trees under ``root``; return a dict of paths and truths.

    ``sessions=None`` writes a dataset without sessions (``runs_per_session``
    runs per task); ``subject_rois`` also writes one ROI image per subject
    (``rois/sub-XX_ember.nii.gz``, the ember region); ``space``/``res``
    name the derivatives (``res=""``: no ``res-`` part).

    ``main_seed_offset`` changes the main task's data only (the localizer's
    stays the same bits); ``condition_rename`` maps (subject, condition) to
    another label written in that subject's main-task events (a misspelling).
    """
    root = Path(root)
    raw, deriv = root / "raw", root / "derivatives" / "prep"
    rng_codes = np.random.default_rng(seed)
    codes = main_codes(rng_codes)
    inside = brain().ravel(order="F")
    region = responsive_region().ravel(order="F")
    n_voxels = inside.size
    for task, conditions in (("lanterns", MAIN_CONDITIONS), ("beacon", LOCALIZER_CONDITIONS)):
        (raw / f"task-{task}_bold.json").parent.mkdir(parents=True, exist_ok=True)
        (raw / f"task-{task}_bold.json").write_text(json.dumps({"RepetitionTime": TR_S, "TaskName": task}))
    (raw / "dataset_description.json").write_text(json.dumps({"Name": "lanterns (simulated)", "BIDSVersion": "1.8.0"}))
    (deriv / "dataset_description.json").parent.mkdir(parents=True, exist_ok=True)
    (deriv / "dataset_description.json").write_text(json.dumps({"Name": "prep", "BIDSVersion": "1.8.0", "DatasetType": "derivative"}))
    atlas_path = root / "atlas" / f"space-{space}_atlas.nii.gz"
    _write_nifti(atlas_path, atlas_labels(), dtype=np.int16)
    names = {1: "ember_L", 2: "ember_R", 3: "glow_L", 4: "glow_R"}
    pd.DataFrame({"index": list(names), "name": list(names.values())}).to_csv(root / "atlas" / "atlas_labels.tsv", sep="\t", index=False)

    subjects = [f"{index + 1:02d}" for index in range(n_subjects)]
    if subject_rois:
        for subject in subjects:
            _write_nifti(root / "rois" / f"sub-{subject}_ember.nii.gz", np.isin(atlas_labels(), (1, 2)).astype(np.uint8), dtype=np.uint8)
    for subject_index, subject in enumerate(subjects):
        for session in (sessions or (None,)):
            for task, conditions in (("lanterns", MAIN_CONDITIONS), ("beacon", LOCALIZER_CONDITIONS)):
                for run_index in range(runs_per_session):
                    run = str(run_index + 1)
                    offset = main_seed_offset if task == "lanterns" else 0
                    rng = np.random.default_rng([seed, subject_index, int(session or 0), run_index, 0 if task == "lanterns" else 1, offset])
                    is_localizer = task == "beacon"
                    n_per = 4 if is_localizer else 5
                    per_event_s = (18.0 if is_localizer else 8.0)
                    kept = n_scans or int(np.ceil((4.0 + per_event_s * n_per * len(conditions) + 16.0) / TR_S))
                    events = _events(conditions, n_per, kept, rng, block_s=10.0 if is_localizer else None)
                    total = kept + N_UNSTEADY
                    signal = _regressors(events, list(conditions), kept)
                    if is_localizer:
                        amplitude = np.zeros((len(conditions), n_voxels))
                        amplitude[0] = np.where(region, localizer_amplitude, 0.0) + np.where(inside, 0.5, 0.0)
                        amplitude[1] = np.where(inside, 0.5, 0.0)
                    else:
                        amplitude = np.stack([main_amplitude * codes[c] + np.where(inside, 1.0, 0.0) for c in conditions])
                    motion = np.cumsum(rng.normal(0, 0.02, size=(total, 6)), axis=0)
                    noise = rng.standard_normal((total, n_voxels))
                    series = np.empty((total, n_voxels))
                    series[N_UNSTEADY:] = signal @ amplitude
                    series[:N_UNSTEADY] = 0.0
                    series += noise + 3.0 * motion[:, :1] @ np.ones((1, n_voxels))
                    series[:N_UNSTEADY] += 40.0  # bright volumes before steady state
                    spikes = np.sort(rng.choice(np.arange(N_UNSTEADY + 5, total - 5), size=1 + run_index % 2, replace=False))
                    series[spikes] += 25.0
                    series = np.where(inside, 100.0 + series, 0.0)
                    bold = series.T.reshape(GRID + (total,), order="F")
                    stem = (f"sub-{subject}/func/sub-{subject}_task-{task}_run-{run}" if session is None else
                            f"sub-{subject}/ses-{session}/func/sub-{subject}_ses-{session}_task-{task}_run-{run}")
                    entities = f"_space-{space}" + (f"_res-{res}" if res else "")
                    _write_nifti(deriv / f"{stem}{entities}_desc-preproc_bold.nii.gz", bold)
                    _write_nifti(deriv / f"{stem}{entities}_desc-brain_mask.nii.gz",
                                 brain().astype(np.uint8), dtype=np.uint8)
                    confounds = pd.DataFrame(motion, columns=list(MOTION))
                    for component in range(N_COMPONENTS):
                        confounds[f"noise_comp_{component:02d}"] = rng.standard_normal(total)
                    for volume in spikes:
                        column = np.zeros(total)
                        column[volume] = 1.0
                        confounds[f"spike_vol{volume:03d}"] = column
                    for volume in range(N_UNSTEADY):
                        column = np.zeros(total)
                        column[volume] = 1.0
                        confounds[f"unsteady_{volume:02d}"] = column
                    derivative = np.r_[np.nan, np.diff(motion[:, 0])]
                    confounds["trans_x_derivative1"] = derivative
                    confounds.to_csv(deriv / f"{stem}_desc-confounds_timeseries.tsv", sep="\t", index=False, na_rep="n/a")
                    written = events.assign(onset=events["onset"] + N_UNSTEADY * TR_S)  # raw onsets count from volume 0
                    if condition_rename and not is_localizer:
                        written["trial_type"] = [condition_rename.get((subject, c), c) for c in written["trial_type"]]
                    (raw / stem).parent.mkdir(parents=True, exist_ok=True)
                    written.to_csv(raw / f"{stem}_events.tsv", sep="\t", index=False, float_format="%.3f")
    return {"raw": raw, "derivatives": deriv, "atlas_image": atlas_path, "atlas_labels": root / "atlas" / "atlas_labels.tsv",
            "subjects": subjects, "responsive": responsive_region()}
