"""Real lab designs: derivatives layouts, confound selection, dropped volumes, the dataset check,
localizer-defined ROIs, session folds and several tasks.

The data are the simulated raw + derivatives trees of ``tests/derivatives_support.py``
(an invented scenario), written by the tests. Outside references are named
beside each check.
"""

import json
import logging
import sys
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

sys.path.insert(0, str(Path(__file__).resolve().parent))
import derivatives_support as simulated  # noqa: E402

from foldwise.data import bids  # noqa: E402
from foldwise.data.fileio import read_tsv  # noqa: E402
from foldwise.errors import InputError  # noqa: E402
from foldwise.glm.design import build_design  # noqa: E402
from foldwise.jobs import glm as glm_job  # noqa: E402

PATTERNS = {
    "bold": "sub-{subject}/ses-{session}/func/sub-{subject}_ses-{session}_task-{task}_run-{run}_space-{space}_res-{res}_desc-preproc_bold.nii.gz",
    "events": "sub-{subject}/ses-{session}/func/sub-{subject}_ses-{session}_task-{task}_run-{run}_events.tsv",
    "sidecar": "task-{task}_bold.json",
    "confounds": "sub-{subject}/ses-{session}/func/sub-{subject}_ses-{session}_task-{task}_run-{run}_desc-confounds_timeseries.tsv",
    "brain_mask": "sub-{subject}/ses-{session}/func/sub-{subject}_ses-{session}_task-{task}_run-{run}_space-{space}_res-{res}_desc-brain_mask.nii.gz",
}
GLM = {"hrf_derivatives": "none", "highpass_s": 128.0, "serial_correlation": "ignore", "pattern_mode": "per_condition", "statistic": "t",
       "conditions": [], "hrf_steps_per_scan": 16}
SELECTORS = ["trans_x", "rot_z", "spike_vol*", {"prefix": "noise_comp_", "first": 3}]


@pytest.fixture(scope="module")
def dataset(tmp_path_factory):
    return simulated.write_dataset(tmp_path_factory.mktemp("derivatives"), n_subjects=2, sessions=("1", "2"))


def _runs(dataset, task="lanterns"):
    return bids.discover_runs(dataset["raw"], PATTERNS, task, derivatives_root=dataset["derivatives"],
                              space=simulated.SPACE, res=simulated.RES)


def test_discovery_finds_every_run_with_sessions_in_the_derivatives_tree(dataset):
    runs = _runs(dataset)
    assert [(run["subject"], run["run_id"]) for run in runs] == [
        (subject, f"ses-{session}_run-{run}") for subject in ("01", "02") for session in ("1", "2") for run in ("1", "2")]
    assert all(run["events"].startswith(str(dataset["raw"])) and run["bold"].startswith(str(dataset["derivatives"])) for run in runs)


@pytest.mark.parametrize("drop", [simulated.N_UNSTEADY, {"flagged_by": "unsteady_"}])
def test_design_holds_exactly_the_selected_confounds_and_drops_the_initial_volumes(dataset, tmp_path, drop):
    run = _runs(dataset)[1]
    inputs = {"bold": run["bold"], "events": run["events"], "sidecar": run["sidecar"], "confounds": run["confounds"],
              "mask": run["brain_mask"]}
    outputs = {name: str(tmp_path / f"out_{name}{suffix}") for name, suffix in
               (("patterns", ".nii.gz"), ("table", ".tsv"), ("design", ".tsv"), ("design_png", ".png"), ("resvar", ".nii.gz"),
                ("facts", ".json"))}
    params = {"glm": GLM, "confounds": SELECTORS, "subject": run["subject"], "session": run["session"], "run_id": run["run_id"],
              "drop_initial_volumes": drop, "condition_column": "trial_type"}
    glm_job.run_one(inputs, outputs, params, logging.getLogger("test"))
    written = read_tsv(outputs["design"])

    # The hand-built design: columns picked by hand from the table, first volumes cut, onsets moved by hand.
    table = pd.read_csv(run["confounds"], sep="\t", na_values="n/a")
    spikes = [column for column in table.columns if column.startswith("spike_vol")]
    chosen = ["trans_x", "rot_z"] + spikes + ["noise_comp_00", "noise_comp_01", "noise_comp_02"]
    kept = table[chosen].to_numpy()[simulated.N_UNSTEADY:]
    events = pd.read_csv(run["events"], sep="\t")
    events["onset"] -= simulated.N_UNSTEADY * simulated.TR_S
    n_kept = len(table) - simulated.N_UNSTEADY
    expected = build_design(events, n_kept, simulated.TR_S, [], "per_condition", "none", 128.0, kept, chosen, 16)
    assert list(written.columns) == list(expected.names)
    assert [name for name in written.columns if name in table.columns] == chosen  # exactly the selected confounds
    assert not any(name.startswith("unsteady_") or name.startswith("noise_comp_03") for name in written.columns)
    assert len(written) == n_kept  # the dropped volumes are gone
    facts = json.loads(Path(outputs["facts"]).read_text())  # what the report's quality table shows for this run
    assert facts["confounds"] == chosen and facts["n_dropped_initial_volumes"] == simulated.N_UNSTEADY
    assert facts["n_scans_kept"] == n_kept
    np.testing.assert_allclose(written.to_numpy(), expected.matrix, rtol=1e-6, atol=1e-6)  # TSV keeps 7 significant digits


def test_a_spike_column_of_a_dropped_volume_leaves_the_design(dataset, tmp_path):
    run = _runs(dataset)[0]
    table = pd.read_csv(run["confounds"], sep="\t", na_values="n/a")
    names, values, n_drop = glm_job.run_nuisance(run["confounds"], ["unsteady_*", "trans_x"], {"flagged_by": "unsteady_"}, len(table))
    assert n_drop == simulated.N_UNSTEADY and names == ["unsteady_00", "unsteady_01", "trans_x"]
    # after the cut the flag columns are all zero: the job removes them (checked through the job in the test above)
    assert not np.any(values[n_drop:, :2])


def test_dropping_every_volume_is_refused(dataset):
    run = _runs(dataset)[0]
    with pytest.raises(InputError) as excinfo:
        glm_job.run_nuisance(run["confounds"], [], 10_000, 40)
    assert "dataset.drop_initial_volumes" in str(excinfo.value)


# ------------------------------------------------ the dataset check (before any job)

from foldwise.data import check as dataset_check  # noqa: E402

STUDY_BASE = {
    "dataset": {"source": "bids", "task": "lanterns", "condition_column": "trial_type"},
    "glm": {"conditions": []},
    "rois": [{"name": "ember", "labels": ["ember_L", "ember_R"]}],
    "analyses": [{"name": "shape", "kind": "within", "classes": {"round": ["seen_round"], "square": ["seen_square"]}},
                 {"name": "carry", "kind": "cross", "sets": {"seen": {"round": "seen_round", "square": "seen_square"},
                                                              "heard": {"round": "heard_round", "square": "heard_square"}}}],
}


def test_dataset_check_lists_each_subject(dataset):
    table = dataset_check.check_dataset(STUDY_BASE, _runs(dataset))
    assert table["subject"].tolist() == ["01", "02"]
    assert table["sessions"].tolist() == ["1,2", "1,2"] and table["n_runs"].tolist() == [4, 4]
    assert table["tr_s"].tolist() == ["2", "2"] and table["grid"].iloc[0] == "12x12x9@3x3x3"
    assert table["trial_types"].iloc[0] == "heard_round,heard_square,seen_round,seen_square"


def test_dataset_check_flags_a_misspelt_condition_in_one_subject_with_did_you_mean(tmp_path):
    written = simulated.write_dataset(tmp_path, n_subjects=3, sessions=("1",), condition_rename={("02", "heard_square"): "heard_sqaure"})
    runs = bids.discover_runs(written["raw"], PATTERNS, "lanterns", derivatives_root=written["derivatives"],
                              space=simulated.SPACE, res=simulated.RES)
    with pytest.raises(InputError) as excinfo:
        dataset_check.check_dataset(STUDY_BASE, runs, "config/study.yaml")
    error = excinfo.value
    assert error.field == "analyses[1].sets.heard.square"
    assert error.file.endswith("sub-02_ses-1_task-lanterns_run-1_events.tsv")
    assert "subject 02 has no event 'heard_square'" in error.problem and "did you mean 'heard_sqaure'?" in error.problem
    assert "subject 01" not in error.problem and "subject 03" not in error.problem
    assert "config/study.yaml" in error.fix


def test_required_conditions_cover_analyses_glm_and_localizers():
    study = dict(STUDY_BASE, glm={"conditions": ["seen_round"]},
                 rois=[{"name": "beam", "localizer": {"task": "beacon", "contrast": {"lit": 1, "dark": -1}}}])
    required = dataset_check.required_conditions(study)
    assert ("heard_square", "analyses[1].sets.heard.square", "lanterns") in required
    assert ("seen_round", "glm.conditions", None) in required  # the GLM models every task's runs
    assert ("dark", "rois[0].localizer.contrast", "beacon") in required


# ------------------------------------------------ localizer-defined ROIs

from foldwise.masks import localizer  # noqa: E402


def _localizer_fit(dataset, subject="01"):
    """The stacked localizer design and masked data of one subject (every beacon run), built as the job builds it."""
    from foldwise.jobs import localizer_roi
    runs = [run for run in _runs(dataset, "beacon") if run["subject"] == subject]
    brain = simulated.brain().ravel(order="F")
    settings = {"glm": GLM, "confounds": ["trans_x"], "drop_initial_volumes": {"flagged_by": "unsteady_"}, "condition_column": "trial_type"}
    return localizer_roi.localizer_model(runs, brain, settings, logging.getLogger("test"))


def test_contrast_t_equals_statsmodels_ols_t_on_sampled_voxels(dataset):
    # Reference: statsmodels OLS(y, X).fit().t_test(c) per voxel (the registry's regression library).
    import statsmodels.api as sm
    design, names, data = _localizer_fit(dataset)
    contrast = localizer.contrast_vector(names, {"lit": 1, "dark": -1})
    t, dof = localizer.contrast_t(design, data, contrast)
    rng = np.random.default_rng(5)
    for voxel in rng.choice(data.shape[1], size=12, replace=False):
        reference = sm.OLS(data[:, voxel], design).fit()
        assert dof == int(reference.df_resid)
        np.testing.assert_allclose(t[voxel], float(np.squeeze(reference.t_test(contrast).tvalue)), rtol=1e-8, atol=1e-10)


def test_contrast_that_cannot_be_estimated_is_refused():
    design = np.column_stack([np.ones(20), np.zeros(20)])  # the second condition never occurs
    with pytest.raises(InputError) as excinfo:
        localizer.contrast_t(design, np.random.default_rng(0).standard_normal((20, 3)), np.array([1.0, -1.0]))
    assert "not estimable" in str(excinfo.value)
    with pytest.raises(InputError) as excinfo:
        localizer.contrast_vector(["lit", "dark", "r0_intercept"], {"lti": 1})
    assert "did you mean 'lit'" in str(excinfo.value)


def test_top_k_selection_breaks_ties_by_voxel_index_and_threshold_counts():
    t = np.array([1.0, 5.0, 3.0, 5.0, 9.0, 2.0])
    inside = np.array([True, True, True, True, False, True])
    assert np.flatnonzero(localizer.select_localizer_voxels(t, inside, top_k=2)).tolist() == [1, 3]  # 9.0 is outside
    assert np.flatnonzero(localizer.select_localizer_voxels(t, inside, t_threshold=3.0)).tolist() == [1, 2, 3]
    with pytest.raises(InputError):
        localizer.select_localizer_voxels(t, inside, top_k=6)
    with pytest.raises(InputError):
        localizer.select_localizer_voxels(t, inside, t_threshold=8.0, min_voxels=1)


def test_localizer_roi_recovers_the_responsive_region(dataset):
    # Simulated truth: the responsive voxels (36, both sides) lie inside the ember constraint (90 voxels).
    design, names, data = _localizer_fit(dataset)
    t, _ = localizer.contrast_t(design, data, localizer.contrast_vector(names, {"lit": 1, "dark": -1}))
    brain = simulated.brain().ravel(order="F")
    truth = simulated.responsive_region().ravel(order="F")[brain]
    constraint = np.isin(simulated.atlas_labels().ravel(order="F")[brain], (1, 2))
    chosen = localizer.select_localizer_voxels(t, constraint, top_k=int(truth.sum()))
    overlap = (chosen & truth).sum() / truth.sum()
    print(f"localizer ROI overlap with the responsive region: {overlap:.3f} ({int((chosen & truth).sum())}/{int(truth.sum())})")
    assert overlap >= 0.9


LOCALIZER_ENTRY = {"name": "beam", "min_voxels": 10,
                   "localizer": {"task": "beacon", "contrast": {"lit": 1, "dark": -1}, "within": {"labels": ["ember_L", "ember_R"]},
                                 "top_k": 36}}


def _localizer_job(written, subject, folder):
    from foldwise.jobs import localizer_roi
    runs = [run for run in bids.discover_runs(written["raw"], PATTERNS, "beacon", derivatives_root=written["derivatives"],
                                              space=simulated.SPACE, res=simulated.RES) if run["subject"] == subject]
    inputs = {"bold": [run["bold"] for run in runs], "events": [run["events"] for run in runs],
              "sidecar": [run["sidecar"] for run in runs], "confounds": [run["confounds"] for run in runs],
              "brain_mask": runs[0]["brain_mask"], "atlas": str(written["atlas_image"]), "atlas_labels": str(written["atlas_labels"])}
    folder.mkdir(parents=True, exist_ok=True)
    outputs = {"mask": str(folder / "mask.nii.gz"), "tmap": str(folder / "tmap.nii.gz"), "info": str(folder / "info.json")}
    params = {"roi": LOCALIZER_ENTRY, "subject": subject, "glm": GLM, "confounds": ["trans_x"],
              "drop_initial_volumes": {"flagged_by": "unsteady_"}, "condition_column": "trial_type"}
    localizer_roi.run(inputs, outputs, params, logging.getLogger("test"))
    return outputs


def test_localizer_roi_is_byte_identical_when_the_main_task_data_change(tmp_path):
    first = simulated.write_dataset(tmp_path / "a", n_subjects=1, sessions=("1",))
    second = simulated.write_dataset(tmp_path / "b", n_subjects=1, sessions=("1",), main_seed_offset=1)
    main_a = first["derivatives"] / "sub-01/ses-1/func/sub-01_ses-1_task-lanterns_run-1_space-tmplA_res-2_desc-preproc_bold.nii.gz"
    main_b = second["derivatives"] / "sub-01/ses-1/func/sub-01_ses-1_task-lanterns_run-1_space-tmplA_res-2_desc-preproc_bold.nii.gz"
    assert main_a.read_bytes() != main_b.read_bytes()  # the main task's data did change
    out_a, out_b = _localizer_job(first, "01", tmp_path / "out_a"), _localizer_job(second, "01", tmp_path / "out_b")
    assert Path(out_a["mask"]).read_bytes() == Path(out_b["mask"]).read_bytes()
    assert Path(out_a["tmap"]).read_bytes() == Path(out_b["tmap"]).read_bytes()
    import nibabel as nib
    mask = np.asarray(nib.load(out_a["mask"]).dataobj) > 0
    truth = simulated.responsive_region()
    print(f"localizer job ROI: {int(mask.sum())} voxels, {int((mask & truth).sum())} of the {int(truth.sum())} responsive")
    assert mask.sum() == 36 and (mask & truth).sum() >= 32


# ------------------------------------------------ sessions as the unit of cross-validation

from foldwise.decoding import folds as fold_schemes  # noqa: E402


def test_leave_one_session_out_never_trains_on_the_held_out_session(dataset):
    # Run labels as the decode job builds them from the pattern tables (session, then run id), 3 patterns per run.
    run_labels = np.repeat([f"{run['session']}_{run['run_id']}" for run in _runs(dataset) if run["subject"] == "01"], 3)
    folds = fold_schemes.make_folds(run_labels, "leave_one_session_out")
    table = pd.DataFrame(fold_schemes.fold_table(run_labels, folds))
    assert len(folds) == 2
    for _, rows in table.groupby("fold"):
        held_out = set(rows.loc[rows["role"] == "test", "session"])
        trained = set(rows.loc[rows["role"] == "train", "session"])
        assert len(held_out) == 1 and not (held_out & trained)  # no training pattern from the held-out session
        assert rows.loc[rows["role"] == "test", "n_patterns"].sum() == 6  # both runs of the session
    tested = np.sort(np.concatenate([test for _, test in folds]))
    assert tested.tolist() == list(range(run_labels.size))  # every pattern tested once


def test_leave_one_session_out_needs_sessions():
    with pytest.raises(InputError) as excinfo:
        fold_schemes.make_folds(["run-1", "run-2"], "leave_one_session_out")
    assert "has no session" in str(excinfo.value)
    with pytest.raises(InputError) as excinfo:
        fold_schemes.make_folds(["ses-1_run-1", "ses-1_run-2"], "leave_one_session_out")
    assert "two or more sessions" in str(excinfo.value)


# ------------------------------------------------ several tasks: cross-task decoding with paired runs

from foldwise.decoding.curves import decode_cross  # noqa: E402
from foldwise.stats.group import draw_indices, group_mean_null, permutation_p  # noqa: E402


def _two_task_patterns(rng, shared, n_runs=4, per_class=3, n_voxels=40, signal=0.3):
    """Trial patterns of two tasks (sets 0/1), two classes; the class code is shared between tasks or not."""
    code_a = rng.standard_normal((2, n_voxels))
    code_b = code_a if shared else rng.standard_normal((2, n_voxels))
    patterns, labels, sets, runs = [], [], [], []
    for task, code, prefix in ((0, code_a, ""), (1, code_b, "task-beacon_")):
        for run in range(n_runs):
            for klass in (0, 1):
                for _ in range(per_class):
                    patterns.append(signal * code[klass] + rng.standard_normal(n_voxels))
                    labels.append(klass)
                    sets.append(task)
                    runs.append(f"ses-1_{prefix}run-{run + 1}")
    return np.array(patterns), np.array(labels), np.array(sets), np.array(runs)


def _cross_task_group(shared, n_subjects=10, n_permutations=100, seed=11):
    observed, nulls = [], []
    for subject in range(n_subjects):
        rng = np.random.default_rng([seed, subject, int(shared)])
        patterns, labels, sets, runs = _two_task_patterns(rng, shared)
        units = fold_schemes.pair_runs_across_tasks(runs, sets, ("lanterns", "beacon"))
        folds = fold_schemes.make_folds(units)
        for train, test in folds:  # independence: no run is on both sides, and each fold holds out one run of each task
            assert not set(runs[train]) & set(runs[test]) and sorted(set(sets[test])) == [0, 1]
        result = decode_cross(patterns, labels, sets, units, ["all"], set_names=("lanterns", "beacon"), folds=folds, n_classes=2,
                              classifier="correlation_centroid", selection="none", n_permutations=n_permutations,
                              rng=np.random.default_rng([seed, subject, 1]), selection_rng=np.random.default_rng(0))
        direction = result.directions["lanterns->beacon"]
        observed.append(direction.balanced_accuracy.mean(axis=0)[0])
        nulls.append(direction.null_balanced_accuracy[:, :1])
    indices = draw_indices(np.random.default_rng(seed), n_permutations, n_subjects, 2000)
    null = group_mean_null(np.stack(nulls), indices)
    group_mean = float(np.mean(observed))
    return group_mean, float(permutation_p(np.array([group_mean]), null)[0])


def test_cross_task_decoding_transfers_a_shared_code_and_stays_at_chance_without_one():
    shared_mean, shared_p = _cross_task_group(shared=True)
    separate_mean, separate_p = _cross_task_group(shared=False)
    print(f"cross-task lanterns->beacon, 10 subjects: shared code mean balanced accuracy {shared_mean:.3f} (group p {shared_p:.4f}); "
          f"separate codes {separate_mean:.3f} (group p {separate_p:.4f})")
    assert shared_mean > 0.6 and shared_p < 0.01
    assert abs(separate_mean - 0.5) < 0.06 and separate_p > 0.05


def test_runs_of_one_task_without_a_partner_are_refused():
    runs = np.array(["run-1", "run-2", "run-3", "task-beacon_run-1", "task-beacon_run-2"])
    with pytest.raises(InputError) as excinfo:
        fold_schemes.pair_runs_across_tasks(runs, np.array([0, 0, 0, 1, 1]), ("lanterns", "beacon"))
    assert "run run-3 has a run for set 'lanterns' but none for set 'beacon'" in str(excinfo.value)
    assert "leave_one_session_out" in str(excinfo.value)
    assert fold_schemes.task_of_run("ses-1_task-beacon_run-2") == "beacon" and fold_schemes.task_of_run("run-1", "lanterns") == "lanterns"


# ------------------------------------------------ the shipped example configs, planned on the simulated dataset

import yaml  # noqa: E402

from foldwise import plan as study_plan  # noqa: E402
from foldwise.config import validate  # noqa: E402
from foldwise.study import build_study  # noqa: E402

EXAMPLES = Path(__file__).resolve().parents[1] / "config" / "examples"


def example_config(name, written, **changes):
    """A shipped example config with its data paths pointed at a simulated dataset (nothing else changed)."""
    config = yaml.safe_load((EXAMPLES / name).read_text(encoding="utf-8"))
    config["dataset"].update({"bids_root": str(written["raw"]), "derivatives_root": str(written["derivatives"])})
    if "atlas_image" in config["dataset"]:
        config["dataset"].update({"atlas_image": str(written["atlas_image"]), "atlas_labels": str(written["atlas_labels"])})
    for roi in config["rois"]:
        if "image" in roi:
            roi["image"] = str(Path(written["raw"]).parent / "rois" / Path(roi["image"]).name)  # keeps {subject}
    for dotted, value in changes.items():
        node, *parts = dotted.split(".")
        target = config[node]
        for part in parts[:-1]:
            target = target[part]
        target[parts[-1]] = value
    return config


def test_sessions_example_plans_localizer_and_cross_task_jobs(dataset):
    config = validate(example_config("sessions_localizer.yaml", dataset), path="sessions_localizer.yaml")
    study = build_study(config, path="sessions_localizer.yaml")
    assert study.tasks == ("lanterns", "beacon") and study.sessions == ("1", "2")
    glm_jobs = [w for step, w in study_plan.planned_jobs(study) if step == "glm" and w["subject"] == "01"]
    assert glm_jobs == [{"subject": "01"}]  # one GLM job fits every run of the subject, each session and task
    glm_runs = [run["run_id"] for run in study_plan.job_settings(study, "glm", glm_jobs[0])["runs"]]
    assert [Path(path).name for path in study_plan.job_outputs(study, "glm", glm_jobs[0])["patterns"]] == [
        f"sub-01_{run_id}_patterns.nii.gz" for run_id in glm_runs]
    assert glm_runs == ["ses-1_run-1", "ses-1_run-2", "ses-2_run-1", "ses-2_run-2",
                        "ses-1_task-beacon_run-1", "ses-1_task-beacon_run-2", "ses-2_task-beacon_run-1", "ses-2_task-beacon_run-2"]
    mask_jobs = [(step, w["roi"]) for step, w in study_plan.planned_jobs(study) if step in ("roi_mask", "localizer_roi") and w["subject"] == "01"]
    assert ("localizer_roi", "beam") in mask_jobs and ("roi_mask", "beam") not in mask_jobs  # the localizer ROI's own step
    inputs = study_plan.job_inputs(study, "localizer_roi", {"subject": "01", "roi": "beam"})
    assert len(inputs["bold"]) == 4 and all("task-beacon" in path for path in inputs["bold"] + inputs["events"])
    settings = study_plan.job_settings(study, "localizer_roi", {"subject": "01", "roi": "beam"})
    assert set(settings) == {"roi", "subject", "glm", "confounds", "drop_initial_volumes", "condition_column"}
    decode = study_plan.job_settings(study, "decode", {"analysis": "lit_from_shape", "subject": "01", "roi": "ember"})
    assert decode["pattern_tasks"] == {"lanterns": None, "beacon": "beacon"}
    assert "pattern_tasks" not in study_plan.job_settings(study, "decode", {"analysis": "shape", "subject": "01", "roi": "ember"})
    # the design self-check reads the same tasks as decoding
    assert study_plan.job_settings(study, "calibrate", {"analysis": "lit_from_shape"})["pattern_tasks"] == decode["pattern_tasks"]
    assert "pattern_tasks" not in study_plan.job_settings(study, "calibrate", {"analysis": "shape"})


def test_a_task_without_partner_runs_is_refused_before_any_job(tmp_path):
    written = simulated.write_dataset(tmp_path, n_subjects=2, sessions=("1", "2"))
    for path in Path(written["derivatives"]).glob("sub-02/ses-2/func/*task-beacon_run-2_*bold.nii.gz"):
        path.unlink()  # subject 02 lacks its second beacon run of session 2
    config = validate(example_config("sessions_localizer.yaml", written), path="sessions_localizer.yaml")
    with pytest.raises(InputError) as excinfo:
        build_study(config, path="sessions_localizer.yaml")
    assert excinfo.value.field == "analyses[1].set_tasks" and "subject 02" in excinfo.value.problem
    assert "run 1_ses-2_run-2" in excinfo.value.problem or "ses-2_run-2" in excinfo.value.problem


def test_decoding_inside_the_roi_the_same_task_defined_is_refused(dataset):
    config = example_config("sessions_localizer.yaml", dataset)
    config["analyses"][1]["rois"] = ["beam"]
    with pytest.raises(InputError) as excinfo:
        build_study(validate(config, path="s.yaml"), path="s.yaml")
    assert "circular" in excinfo.value.problem and excinfo.value.field == "analyses[1].rois"


def test_native_example_reads_each_subjects_own_roi_image(tmp_path):
    written = simulated.write_dataset(tmp_path, n_subjects=2, sessions=None, runs_per_session=2, subject_rois=True, space="T1w", res="")
    config = validate(example_config("native_space_subject_rois.yaml", written), path="native.yaml")
    study = build_study(config, path="native.yaml")
    for subject in ("01", "02"):
        inputs = study_plan.job_inputs(study, "roi_mask", {"subject": subject, "roi": "ember"})
        assert inputs["image"] == str(tmp_path / "rois" / f"sub-{subject}_ember.nii.gz")
    (tmp_path / "rois" / "sub-02_ember.nii.gz").unlink()
    with pytest.raises(InputError) as excinfo:
        build_study(config, path="native.yaml")
    assert excinfo.value.field == "rois[0].image" and "subject(s) 02" in excinfo.value.problem
    assert excinfo.value.file.endswith("sub-02_ember.nii.gz")


# ------------------------------------------------ end to end: the shipped example configs on a written derivatives dataset

@pytest.mark.e2e
@pytest.mark.slow
@pytest.mark.parametrize("example, layout", [
    ("sessions_localizer.yaml", {"sessions": ("1", "2"), "runs_per_session": 2}),
    ("derivatives_standard_space.yaml", {"sessions": None, "runs_per_session": 3}),
    ("native_space_subject_rois.yaml", {"sessions": None, "runs_per_session": 3, "subject_rois": True, "space": "T1w", "res": ""}),
])
def test_example_config_runs_end_to_end(tmp_path, example, layout):
    import nibabel as nib
    from workflow_support import copy_repository, snakemake

    work = copy_repository(tmp_path / "repo")
    written = simulated.write_dataset(work / "data" / "lanterns", n_subjects=3, **layout)
    snakemake(work, config=f"config/examples/{example}")  # the shipped file, unchanged
    config = yaml.safe_load((EXAMPLES / example).read_text(encoding="utf-8"))
    results = work / config["study"]["results_dir"]  # each example keeps its own results folder
    assert not (work / "results" / "group").exists()
    for analysis in config["analyses"]:
        group = pd.read_csv(results / "group" / analysis["name"] / f"{analysis['name']}_group.tsv", sep="\t")
        assert len(group) > 0
    # The design of a run holds exactly the selected confounds, and the flagged initial volumes are gone.
    run_id = "ses-1_run-1" if layout["sessions"] else "run-1"
    design = pd.read_csv(results / "patterns" / "sub-01" / f"sub-01_{run_id}_design.tsv", sep="\t")
    stem = f"sub-01/ses-1/func/sub-01_ses-1_task-lanterns_run-1" if layout["sessions"] else "sub-01/func/sub-01_task-lanterns_run-1"
    table = pd.read_csv(written["derivatives"] / f"{stem}_desc-confounds_timeseries.tsv", sep="\t", na_values="n/a")
    expected = bids.select_confound_columns(table.columns, config["dataset"]["confounds"])
    assert [column for column in design.columns if column in table.columns] == expected
    assert len(design) == len(table) - simulated.N_UNSTEADY
    if "sessions" in example:
        truth = simulated.responsive_region()
        for subject in written["subjects"]:
            mask = np.asarray(nib.load(results / "masks" / f"sub-{subject}" / f"sub-{subject}_roi-beam_mask.nii.gz").dataobj) > 0
            overlap = (mask & truth).sum()
            print(f"sub-{subject} localizer ROI: {int(mask.sum())} voxels, {int(overlap)} in the responsive region")
            assert mask.sum() == 30 and overlap == 30
        scores = pd.read_csv(results / "decoding" / "lit_from_shape" / "sub-01_summary.tsv", sep="\t")
        assert len(scores) > 0


def test_make_check_prints_each_subject_and_stops_on_a_misspelt_condition(tmp_path, capsys):
    # `make check CONFIG=...` runs foldwise.data.check.main: the overview, exit 0; a misspelling: the message, exit 1.
    written = simulated.write_dataset(tmp_path / "data", n_subjects=2, sessions=("1", "2"))
    config_path = tmp_path / "study.yaml"
    config_path.write_text(yaml.safe_dump(example_config("sessions_localizer.yaml", written)), encoding="utf-8")
    assert dataset_check.main(["--config", str(config_path)]) == 0
    printed = capsys.readouterr().out
    assert "lanterns,beacon" in printed.replace("beacon,lanterns", "lanterns,beacon") and "1,2" in printed
    assert "2 subject(s), 16 run(s): every configured condition found" in printed
    config = example_config("sessions_localizer.yaml", written)
    config["rois"][1]["localizer"]["contrast"] = {"lti": 1, "dark": -1}
    config_path.write_text(yaml.safe_dump(config), encoding="utf-8")
    assert dataset_check.main(["--config", str(config_path)]) == 1
    error = capsys.readouterr().err
    assert "rois[1].localizer.contrast" in error and "has no event 'lti' of task 'beacon' (did you mean 'lit'?)" in error


@pytest.mark.e2e
def test_a_misspelt_condition_stops_the_workflow_before_any_job(tmp_path):
    from workflow_support import copy_repository, snakemake

    work = copy_repository(tmp_path / "repo")
    simulated.write_dataset(work / "data" / "lanterns", n_subjects=2, sessions=("1", "2"),
                            condition_rename={("02", "seen_square"): "seen_sqare"})
    completed = snakemake(work, "--dry-run", config="config/examples/sessions_localizer.yaml", check=False)
    assert completed.returncode != 0
    message = completed.stdout + completed.stderr
    assert "analyses[0].classes.square: subject 02 has no event 'seen_square' of task 'lanterns' (did you mean 'seen_sqare'" in message
    assert message.count("has no event") == 1  # named by two analyses, reported once
    assert not (work / "results" / "patterns").exists()  # no job ran
