"""Tests of foldwise.data.demo (the invented lanterns study) and its job function.

The demo is a simulation with known ground truth; the checks here compare it
with an independent analysis written in the test (an HRF from
scipy.stats.gamma, ordinary least squares by numpy, correlation-to-centroid
decoding), and with the dataset reader and brain-mask code of the package.
"""

import json
import logging
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
import scipy.stats

from foldwise.data import bids
from foldwise.data import demo
from foldwise.masks import build as masks
from foldwise.errors import InputError
from foldwise.data.fileio import load_nifti, read_tsv
from foldwise.provenance.hashing import seed_from
from foldwise.jobs import demo as demo_job

LOG = logging.getLogger("test_demo")
SEED = 20261201
PATTERNS = {
    "bold": "sub-{subject}/func/sub-{subject}_task-{task}_run-{run}_desc-preproc_bold.nii.gz",
    "events": "sub-{subject}/func/sub-{subject}_task-{task}_run-{run}_events.tsv",
    "sidecar": "sub-{subject}/func/sub-{subject}_task-{task}_run-{run}_desc-preproc_bold.json",
    "confounds": "sub-{subject}/func/sub-{subject}_task-{task}_run-{run}_desc-confounds_timeseries.tsv",
    "brain_mask": "",
}
SEEN = ["seen_round", "seen_square", "seen_star"]
HEARD = ["heard_round", "heard_square", "heard_star"]


def _write(root, settings=None, seed=SEED, confounds=demo.MOTION_COLUMNS):
    root = Path(root)
    paths = {"atlas": root / "atlas" / "atlas.nii.gz", "labels": root / "atlas" / "atlas_labels.tsv",
             "truth": root / "ground_truth.json", "description": root / "bids" / "dataset_description.json"}
    runs = demo.write_demo_study(str(root / "bids"), PATTERNS, settings or {}, seed, "lanterns", list(confounds),
                                 str(paths["atlas"]), str(paths["labels"]), str(paths["truth"]), str(paths["description"]))
    return runs, paths


@pytest.fixture(scope="module")
def study(tmp_path_factory):
    root = tmp_path_factory.mktemp("lanterns")
    runs, paths = _write(root)
    return root, runs, paths


# ---------------------------------------------------------------- an independent analysis


def _reference_hrf(dt_s):
    # Canonical double gamma g(t; 6, 1) - g(t; 16, 1) / 6 (Friston et al. 1998; Glover 1999;
    # parameters from memory), written with scipy.stats.gamma as the reference library.
    times = np.arange(0.0, 32.0, dt_s)
    kernel = scipy.stats.gamma.pdf(times, 6) - scipy.stats.gamma.pdf(times, 16) / 6.0
    return kernel / kernel.sum()


def _condition_design(events, n_scans, tr_s, oversampling=16):
    """Per-condition regressors, an intercept and two slow drift terms, by plain numpy."""
    dt_s = tr_s / oversampling
    fine = np.arange(n_scans * oversampling) * dt_s
    kernel = _reference_hrf(dt_s)
    columns = []
    for condition in demo.CONDITIONS:
        chosen = events[events["trial_type"] == condition]
        boxcar = np.zeros(fine.size)
        for onset, duration in zip(chosen["onset"], chosen["duration"]):
            boxcar[(fine >= onset) & (fine < onset + duration)] = 1.0
        columns.append(np.convolve(boxcar, kernel)[: fine.size][::oversampling])
    ramp = np.linspace(-1.0, 1.0, n_scans)
    return np.column_stack(columns + [np.ones(n_scans), ramp, np.cos(np.pi * (ramp + 1.0) / 2.0)])


def _run_betas(run):
    data, _, header = bids.load_bold(run["bold"])
    tr_s = bids.read_tr_s(run["sidecar"], header, run["bold"])
    events = bids.read_events(run["events"], data.shape[3], tr_s)
    confounds = bids.read_confounds(run["confounds"], demo.MOTION_COLUMNS, data.shape[3])
    design = np.column_stack([_condition_design(events, data.shape[3], tr_s), confounds])
    series = data.reshape(-1, data.shape[3]).T.astype(np.float64)
    betas, *_ = np.linalg.lstsq(design, series, rcond=None)  # ordinary least squares, all voxels at once
    return betas[: len(demo.CONDITIONS)]  # (6, n_voxels)


def _loro_accuracy(betas, voxels, train_conditions, test_conditions):
    """Leave-one-run-out correlation-to-centroid decoding of the three shapes."""
    index = {condition: position for position, condition in enumerate(demo.CONDITIONS)}
    correct = []
    for test_run in range(betas.shape[0]):
        train = np.delete(np.arange(betas.shape[0]), test_run)
        centroids = np.stack([betas[train][:, index[c]][:, voxels].mean(axis=0) for c in train_conditions])
        for true_class, condition in enumerate(test_conditions):
            pattern = betas[test_run, index[condition]][voxels]
            scores = [np.corrcoef(pattern, centroid)[0, 1] for centroid in centroids]
            correct.append(int(np.argmax(scores)) == true_class)
    return float(np.mean(correct))


def _family_voxels(labels, family):
    indices = [position for position, name in enumerate(demo.REGION_NAMES, start=1) if name.startswith(family)]
    return np.isin(labels.ravel(), indices)


@pytest.fixture(scope="module")
def study_betas(study):
    _, runs, paths = study
    labels = np.asarray(load_nifti(paths["atlas"]).dataobj)
    by_subject = {}
    for run in runs:
        by_subject.setdefault(run["subject"], []).append(_run_betas(run))
    return labels, {subject: np.stack(betas) for subject, betas in by_subject.items()}


def test_shape_is_decodable_in_ember_and_glow_and_not_in_hush(study_betas):
    labels, betas = study_betas
    accuracy = {family: np.mean([_loro_accuracy(b, _family_voxels(labels, family), SEEN, SEEN) for b in betas.values()])
                for family in ("ember", "glow", "hush")}
    # 5 subjects x 4 runs x 3 test patterns = 60 tests: chance 1/3 with sd ~0.06.
    assert accuracy["ember"] > 0.6 and accuracy["glow"] > 0.6, accuracy
    assert 0.2 < accuracy["hush"] < 0.5, accuracy


def test_only_ember_carries_the_shape_code_across_seen_and_heard(study_betas):
    labels, betas = study_betas
    cross = {family: np.mean([_loro_accuracy(b, _family_voxels(labels, family), SEEN, HEARD) for b in betas.values()])
             for family in ("ember", "glow", "hush")}
    heard = {family: np.mean([_loro_accuracy(b, _family_voxels(labels, family), HEARD, HEARD) for b in betas.values()])
             for family in ("ember", "glow")}
    assert cross["ember"] > 0.55 and heard["ember"] > 0.55, (cross, heard)
    assert 0.2 < cross["glow"] < 0.5 and 0.2 < cross["hush"] < 0.5 and 0.2 < heard["glow"] < 0.5, (cross, heard)


def test_informative_voxels_decode_better_than_the_whole_region(study, study_betas):
    # Only 40 % of a region's voxels carry the code, so choosing voxels matters.
    _, _, paths = study
    truth = json.loads(paths["truth"].read_text())
    labels, betas = study_betas
    gains = []
    for family in ("ember", "glow"):
        informative = np.zeros(labels.shape, dtype=bool)
        for side in ("L", "R"):
            for voxel in truth["regions"][f"{family}_{side}"]["informative_voxels"]:
                informative[tuple(voxel)] = True
        for b in betas.values():
            gains.append(_loro_accuracy(b, informative.ravel(), SEEN, SEEN) - _loro_accuracy(b, _family_voxels(labels, family), SEEN, SEEN))
    assert np.mean(gains) > 0.03, gains


def test_the_decoding_check_is_not_tied_to_one_seed(tmp_path):
    runs, paths = _write(tmp_path, seed=SEED + 1)
    labels = np.asarray(load_nifti(paths["atlas"]).dataobj)
    by_subject = {}
    for run in runs:
        by_subject.setdefault(run["subject"], []).append(_run_betas(run))
    accuracy = {family: np.mean([_loro_accuracy(np.stack(b), _family_voxels(labels, family), SEEN, SEEN) for b in by_subject.values()])
                for family in ("ember", "glow", "hush")}
    assert accuracy["ember"] > 0.6 and accuracy["glow"] > 0.6 and 0.2 < accuracy["hush"] < 0.5, accuracy


def test_without_signal_nothing_is_decodable(tmp_path):
    runs, paths = _write(tmp_path, {"n_subjects": 3, "signal_to_noise": 0.0})
    labels = np.asarray(load_nifti(paths["atlas"]).dataobj)
    by_subject = {}
    for run in runs:
        by_subject.setdefault(run["subject"], []).append(_run_betas(run))
    accuracy = np.mean([_loro_accuracy(np.stack(b), _family_voxels(labels, "ember"), SEEN, SEEN) for b in by_subject.values()])
    assert 0.15 < accuracy < 0.55, accuracy  # 36 tests at chance: sd ~0.08


# ---------------------------------------------------------------- the simulated signal


def test_trial_regressors_match_a_scipy_gamma_convolution():
    # Reference: the canonical double gamma from scipy.stats.gamma, convolved on the same fine grid.
    events = pd.DataFrame({"onset": [4.0, 30.0], "duration": [2.0, 2.0]})
    regressors = demo.trial_regressors(events["onset"], events["duration"], 40, 2.0)
    dt_s = 2.0 / 16
    fine = np.arange(40 * 16) * dt_s
    for column, onset in enumerate(events["onset"]):
        boxcar = ((fine >= onset) & (fine < onset + 2.0)).astype(float)
        reference = np.convolve(boxcar, _reference_hrf(dt_s))[: fine.size][::16]
        np.testing.assert_allclose(regressors[:, column], reference, atol=1e-10)
    sustained = demo.trial_regressors([0.0], [70.0], 40, 2.0)
    assert abs(sustained[30, 0] - 1.0) < 1e-3  # unit-area kernel: a sustained boxcar plateaus at 1


def _correlation_by_column(a, b):
    a = a - a.mean(axis=0)
    b = b - b.mean(axis=0)
    return (a * b).sum(axis=0) / np.sqrt((a * a).sum(axis=0) * (b * b).sum(axis=0))


def test_informative_voxels_follow_their_design_regressors(study):
    _, runs, paths = study
    truth = json.loads(paths["truth"].read_text())
    brain, labels, _ = demo.make_atlas(truth["settings"]["grid_shape"])
    informative = demo.choose_informative_voxels(labels, np.random.default_rng(seed_from(SEED, demo.STEP, "atlas")))
    patterns, *_ = demo.subject_patterns(brain, labels, informative, 1.0,
                                         np.random.default_rng(seed_from(SEED, demo.STEP, "subject", "01")))
    run = runs[0]
    data, _, _ = bids.load_bold(run["bold"])
    n_scans = data.shape[3]
    events = bids.read_events(run["events"], n_scans, 2.0)
    chosen = np.zeros(brain.shape, dtype=bool)
    for name in ("ember_L", "ember_R", "glow_L", "glow_R"):
        for voxel in truth["regions"][name]["informative_voxels"]:
            chosen[tuple(voxel)] = True
    # The model regressor of each voxel: its trials' HRF responses weighted by its true pattern values.
    regressors = demo.trial_regressors(events["onset"], events["duration"], n_scans, 2.0)
    expected = regressors @ np.stack([patterns[c][chosen[brain]] for c in events["trial_type"]])
    nuisance = np.column_stack([np.ones(n_scans), np.linspace(-1, 1, n_scans), np.cos(np.linspace(0, np.pi, n_scans)),
                                bids.read_confounds(run["confounds"], demo.MOTION_COLUMNS, n_scans)])

    def residual(values):
        return values - nuisance @ np.linalg.lstsq(nuisance, values, rcond=None)[0]

    series = residual(data[chosen].T.astype(np.float64))
    correlation = _correlation_by_column(series, residual(expected))
    shifted = _correlation_by_column(series, residual(np.roll(expected, 17, axis=0)))
    # Single-voxel correlations are modest (noise sd ~10 against peaks of ~10-15, as in real data);
    # with ~78 scans a null correlation has sd ~0.12, so a median of 0.2 is far from chance.
    assert np.median(correlation) > 0.2 and abs(np.median(shifted)) < 0.1, (np.median(correlation), np.median(shifted))
    assert data[~brain].mean() < 50 and data[brain].mean() > 800  # low outside, baseline ~1000 inside


def test_events_and_timing(study):
    _, runs, _ = study
    data, _, _ = bids.load_bold(runs[0]["bold"])
    events = bids.read_events(runs[0]["events"], data.shape[3], 2.0)
    assert events["trial_type"].value_counts().to_dict() == {condition: 3 for condition in demo.CONDITIONS}
    assert events["onset"].iloc[0] == 16.0
    soa = np.diff(events["onset"].to_numpy())
    assert soa.min() >= 5.9 and soa.max() <= 8.1
    assert data.shape[3] * 2.0 - (events["onset"].iloc[-1] + 2.0) >= 16.0
    other = bids.read_events(runs[1]["events"], 200, 2.0)
    assert other["trial_type"].tolist() != events["trial_type"].tolist()  # a fresh random order per run


# ---------------------------------------------------------------- atlas, ground truth, files


def test_atlas_regions_are_blobs_inside_the_brain():
    brain, labels, table = demo.make_atlas([20, 24, 16])
    assert table["name"].tolist() == list(demo.REGION_NAMES) and table["index"].tolist() == [1, 2, 3, 4, 5, 6]
    affine = demo.demo_affine([20, 24, 16], 3.0)
    assert np.allclose(affine[:3, :3] @ (np.array([20, 24, 16]) - 1) / 2 + affine[:3, 3], 0.0)  # origin at the centre
    for index, name in enumerate(demo.REGION_NAMES, start=1):
        voxels = np.argwhere(labels == index)
        assert 24 <= len(voxels) <= 150, (name, len(voxels))
        assert brain[labels == index].all()
        centre_x_mm = (affine[:3, :3] @ voxels.mean(axis=0) + affine[:3, 3])[0]
        assert (centre_x_mm < 0) == name.endswith("_L")  # RAS: left is negative x
    tiny_brain, tiny_labels, _ = demo.make_atlas([8, 8, 8])
    assert set(np.unique(tiny_labels)) == set(range(7))


def test_ground_truth_is_consistent_with_the_atlas(study):
    _, _, paths = study
    truth = json.loads(paths["truth"].read_text())
    atlas = np.asarray(load_nifti(paths["atlas"]).dataobj)
    table = read_tsv(paths["labels"], required_columns=("index", "name"))
    assert truth["invented"] is True and truth["seed"] == SEED and truth["settings"] == demo.check_settings({})
    for row in table.itertuples():
        region = truth["regions"][row.name]
        assert region["index"] == row.index and region["n_voxels"] == int((atlas == row.index).sum())
        voxels = np.array(region["informative_voxels"], dtype=int).reshape(-1, 3)
        assert len(voxels) == region["n_informative"]
        assert np.all(atlas[tuple(voxels.T)] == row.index)
        if row.name.startswith("hush"):
            assert region["n_informative"] == 0 and not any(region["decodes"].values())
        else:
            assert region["n_informative"] == round(0.4 * region["n_voxels"])
    assert truth["rois"]["ember"]["decodes"] == {"shape_seen": True, "shape_heard": True, "shape_seen_to_heard": True,
                                                 "shape_heard_to_seen": True, "modality": False}
    assert truth["rois"]["glow"]["decodes"]["shape_seen"] and not truth["rois"]["glow"]["decodes"]["shape_seen_to_heard"]
    scales = [subject["effect_scale"] for subject in truth["subjects"].values()]
    assert len(set(scales)) == 5 and min(scales) >= 0.7 and max(scales) <= 1.3  # subjects differ


def test_written_dataset_reads_back_through_the_reader(study):
    root, runs, paths = study
    found = bids.discover_runs(root / "bids", PATTERNS, "lanterns")
    assert [(run["subject"], run["run"]) for run in found] == [(s, r) for s, _, r in demo.planned_runs({})]
    assert [run["bold"] for run in found] == [run["bold"] for run in runs]
    description = json.loads(paths["description"].read_text())
    assert description["Name"] == "foldwise lanterns demo (simulated)" and description["Simulated"] is True
    assert "BIDSVersion" in description and "Invented" in description["Description"]
    sidecar = json.loads(Path(runs[0]["sidecar"]).read_text())
    assert sidecar == {"RepetitionTime": 2.0, "TaskName": "lanterns"}
    image = load_nifti(runs[0]["bold"])
    assert image.header.get_zooms()[3] == 2.0 and image.header.get_xyzt_units() == ("mm", "sec")
    assert image.get_data_dtype() == np.float32
    confounds = read_tsv(runs[0]["confounds"])
    assert list(confounds.columns) == list(demo.CONFOUND_COLUMNS) and np.isnan(confounds["framewise_displacement"].iloc[0])
    # The derived brain mask recovers the simulated brain exactly.
    brain, _, _ = demo.make_atlas([20, 24, 16])
    subject_runs = [bids.load_bold(run["bold"])[0] for run in runs if run["subject"] == "01"]
    mask, n_nonfinite = masks.derive_brain_mask(subject_runs, 0.2)
    np.testing.assert_array_equal(mask, brain)
    assert n_nonfinite == 0


def test_same_seed_same_bytes_and_another_seed_other_data(tmp_path):
    settings = {"n_subjects": 1, "n_runs": 2}
    first, first_paths = _write(tmp_path / "a", settings)
    second, second_paths = _write(tmp_path / "b", settings)
    other, _ = _write(tmp_path / "c", settings, seed=SEED + 1)
    for name in ("bold", "events", "sidecar", "confounds"):
        for run_a, run_b in zip(first, second):
            assert Path(run_a[name]).read_bytes() == Path(run_b[name]).read_bytes(), name
    for name in ("atlas", "labels", "truth", "description"):
        assert first_paths[name].read_bytes() == second_paths[name].read_bytes(), name
    assert Path(first[0]["bold"]).read_bytes() != Path(other[0]["bold"]).read_bytes()
    # A subject's data do not depend on how many subjects are simulated.
    bigger, _ = _write(tmp_path / "d", {"n_subjects": 2, "n_runs": 2})
    assert Path(bigger[0]["bold"]).read_bytes() == Path(first[0]["bold"]).read_bytes()


def test_planned_runs_and_settings():
    assert demo.planned_runs({"n_subjects": 2, "n_runs": 3}) == [
        ("01", None, "01"), ("01", None, "02"), ("01", None, "03"), ("02", None, "01"), ("02", None, "02"), ("02", None, "03")]
    assert len(demo.planned_runs({})) == 20
    for bad, field in [({"n_runs": 1}, "demo.n_runs"), ({"grid_shape": [20, 24]}, "demo.grid_shape"), ({"tr_s": 0}, "demo.tr_s"),
                       ({"n_subject": 3}, "demo.n_subject"), ({"signal_to_noise": -1}, "demo.signal_to_noise")]:
        with pytest.raises(InputError) as excinfo:
            demo.planned_runs(bad)
        assert field in str(excinfo.value) and "Fix:" in str(excinfo.value)


def test_unknown_confound_name_is_an_error(tmp_path):
    with pytest.raises(InputError) as excinfo:
        _write(tmp_path, {"n_subjects": 1, "n_runs": 2}, confounds=["trans_x", "csf"])
    assert "dataset.confounds" in str(excinfo.value) and "'csf'" in str(excinfo.value)


# ---------------------------------------------------------------- the job function


def _job_params(tmp_path, demo_settings):
    return {"demo": demo_settings, "seed": SEED, "task": "lanterns", "bids_root": str(tmp_path / "bids"), "patterns": PATTERNS,
            "confounds": list(demo.MOTION_COLUMNS)}


def _job_outputs(tmp_path, params):
    planned = [bids.run_files(params["bids_root"], PATTERNS, "lanterns", s, ses, r) for s, ses, r in demo.planned_runs(params["demo"])]
    return {"description": str(tmp_path / "bids" / "dataset_description.json"), "atlas": str(tmp_path / "atlas.nii.gz"),
            "atlas_labels": str(tmp_path / "atlas_labels.tsv"), "ground_truth": str(tmp_path / "truth.json"),
            "bold": [files["bold"] for files in planned], "events": [files["events"] for files in planned],
            "sidecars": [files["sidecar"] for files in planned], "confounds": [files["confounds"] for files in planned]}


def test_demo_job_writes_its_declared_outputs(tmp_path):
    params = _job_params(tmp_path, {"n_subjects": 1, "n_runs": 2})
    outputs = _job_outputs(tmp_path, params)
    demo_job.run({}, outputs, params, LOG)
    declared = {outputs[name] for name in ("description", "atlas", "atlas_labels", "ground_truth")}
    declared |= {path for name in ("bold", "events", "sidecars", "confounds") for path in outputs[name]}
    written = {str(path) for path in tmp_path.rglob("*") if path.is_file()}
    assert written == declared  # nothing but the declared outputs


def test_demo_job_refuses_outputs_that_are_not_the_planned_runs(tmp_path):
    params = _job_params(tmp_path, {"n_subjects": 1, "n_runs": 2})
    outputs = _job_outputs(tmp_path, params)
    outputs["bold"] = outputs["bold"][::-1]
    with pytest.raises(InputError) as excinfo:
        demo_job.run({}, outputs, params, LOG)
    assert "outputs.bold" in str(excinfo.value) and "planned_runs" in str(excinfo.value)
    assert not any(path.is_file() for path in tmp_path.rglob("*"))
