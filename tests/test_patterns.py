"""Tests of foldwise.data.patterns: the one reader of a subject's pattern set (decode, searchlight, calibrate).

Expected values come from reading the files directly with nibabel and numpy
(brute force), not from the reader under test.
"""

import logging

import nibabel as nib
import numpy as np
import pandas as pd
import pytest

from foldwise.contract import read_brain_mask
from foldwise.data.fileio import save_nifti, write_tsv
from foldwise.data.patterns import analysis_task_rows, pattern_run_labels, read_pattern_set, read_pattern_tables
from foldwise.errors import InputError
from foldwise.jobs import calibrate, searchlight_block

AFFINE = np.diag([3.0, 3.0, 3.0, 1.0])
GRID = (6, 5, 4)
CONDITIONS = ("seen_round", "seen_square", "heard_round", "heard_square")


def _write_runs(folder, runs, subject="01", rng=None):
    """One pattern image and table per (session, run_id) pair; returns image paths, table paths and the brain mask path."""
    rng = rng or np.random.default_rng(5)
    images, tables = [], []
    for session, run_id in runs:
        stem = folder / f"sub-{subject}_{session or 'x'}_{run_id}"
        data = rng.standard_normal(GRID + (len(CONDITIONS) * 2,)).astype(np.float32)
        save_nifti(f"{stem}_patterns.nii.gz", data, AFFINE)
        write_tsv(f"{stem}_patterns.tsv", pd.DataFrame({
            "volume": np.arange(data.shape[3]), "subject": subject, "session": session or "n/a", "run_id": run_id,
            "condition": list(CONDITIONS) * 2, "trial_index": np.arange(data.shape[3]), "onset_s": 8.0 * np.arange(data.shape[3])}))
        images.append(f"{stem}_patterns.nii.gz")
        tables.append(f"{stem}_patterns.tsv")
    brain = np.zeros(GRID, dtype=np.uint8)
    brain[1:5, 1:4, :] = 1
    mask_path = folder / f"sub-{subject}_brainmask.nii.gz"
    save_nifti(mask_path, brain, AFFINE, dtype=np.uint8)
    return images, tables, str(mask_path)


def test_run_labels_carry_the_session_once():
    table = pd.DataFrame({"session": ["2", "2", "ses-1", np.nan, "n/a"], "run_id": ["ses-2_run-01", "run-01", "run-01", "run-03", "run-04"]})
    # the GLM's own form (session 2, run id ses-2_run-01) is kept; a bare run id gets its session in front
    assert pattern_run_labels(table) == ["ses-2_run-01", "ses-2_run-01", "ses-1_run-01", "run-03", "run-04"]


def test_the_pattern_set_equals_a_direct_read_in_run_then_volume_order(tmp_path):
    runs = [("1", "ses-1_run-2"), ("1", "ses-1_run-1"), ("2", "ses-2_task-beacon_run-1")]
    images, tables, mask_path = _write_runs(tmp_path, runs)
    mask, affine = read_brain_mask(mask_path)
    pattern_set = read_pattern_set(images, tables, "sub-01", mask, affine, mask_path)
    # brute force: nibabel's data of each file in the order run label, then volume; voxels in C order of the mask
    expected_order = sorted(range(len(runs)), key=lambda index: runs[index][1])
    expected = np.vstack([np.asarray(nib.load(images[index]).dataobj, dtype=np.float64)[mask].T for index in expected_order])
    np.testing.assert_array_equal(pattern_set.patterns, expected)
    assert pattern_set.table["run"].tolist() == [runs[index][1] for index in expected_order for _ in range(8)]
    assert pattern_set.table["task"].tolist() == [None] * 16 + ["beacon"] * 8  # the main task's runs carry no task part
    np.testing.assert_array_equal(pattern_set.coordinates, np.argwhere(mask))
    reversed_set = read_pattern_set(images[::-1], tables[::-1], "01", mask, affine, mask_path)  # the order of the files does not matter
    np.testing.assert_array_equal(reversed_set.patterns, pattern_set.patterns)
    pd.testing.assert_frame_equal(reversed_set.table.drop(columns="source"), pattern_set.table.drop(columns="source"))
    tables_only = read_pattern_tables(tables, "01")
    pd.testing.assert_frame_equal(tables_only, pattern_set.table)


def test_two_sessions_with_the_same_run_label_stay_two_runs_for_the_searchlight(tmp_path):
    """The searchlight's former reader took run_id alone and refused run-1 of session 2 as a repeat of session 1's."""
    images, tables, mask_path = _write_runs(tmp_path, [("1", "run-1"), ("1", "run-2"), ("2", "run-1"), ("2", "run-2")])
    mask, affine = read_brain_mask(mask_path)
    pattern_set = read_pattern_set(images, tables, "01", mask, affine, mask_path)
    assert sorted(set(pattern_set.table["run"])) == ["ses-1_run-1", "ses-1_run-2", "ses-2_run-1", "ses-2_run-2"]
    analysis = {"name": "shape", "kind": "within", "classes": {"round": ["seen_round"], "square": ["seen_square"]},
                "folds": {"scheme": "leave_one_session_out", "n_groups": 2}, "svm_c": 1.0, "demean_patterns": False}
    settings = {"radius_mm": 3.0, "classifier": "correlation_centroid", "n_blocks": 1, "n_permutations": 3}
    outputs = {"scores": str(tmp_path / "scores.npy"), "null": str(tmp_path / "null.npy")}
    searchlight_block.run({"patterns": images, "tables": tables, "mask": mask_path}, outputs,
                          {"searchlight": settings, "analysis": analysis, "subject": "01", "block": 0, "seed": 3}, logging.getLogger("test"))
    assert np.load(outputs["scores"]).shape == (int(mask.sum()), 1) and np.load(outputs["null"]).shape == (3, int(mask.sum()), 1)


def test_the_reader_refuses_a_repeated_run_another_subject_and_another_grid(tmp_path):
    images, tables, mask_path = _write_runs(tmp_path, [("1", "ses-1_run-1"), ("2", "ses-2_run-1")])
    mask, affine = read_brain_mask(mask_path)
    with pytest.raises(InputError, match="run ses-1_run-1 appears in more than one pattern table"):
        read_pattern_set([images[0], images[0]], [tables[0], tables[0]], "01", mask, affine, mask_path)
    with pytest.raises(InputError, match=r"belongs to subject\(s\) \['01'\], this job reads subject 02"):
        read_pattern_tables(tables, "02")
    shifted = AFFINE.copy()
    shifted[0, 3] += 0.01  # 10 times the grid tolerance
    with pytest.raises(InputError, match="voxel centres lie more than 0.001 mm from the mask's"):
        read_pattern_set(images, tables, "01", mask, shifted, mask_path)
    with pytest.raises(InputError, match=r"the pattern image has shape \(6, 5, 4, 8\), the mask .* \(6, 5, 3\)"):
        read_pattern_set(images, tables, "01", mask[:, :, :3], affine, mask_path)
    with pytest.raises(InputError, match="2 pattern images but 1 tables"):
        read_pattern_set(images, tables[:1], "01", mask, affine, mask_path)


def test_another_task_reusing_a_condition_name_stays_out_of_the_searchlight_and_the_self_check(tmp_path):
    """Rows used to be picked by condition alone: a second task's runs with the same condition names were mixed in."""
    main_runs = [("n/a", "run-1"), ("n/a", "run-2")]
    images, tables, mask_path = _write_runs(tmp_path, main_runs + [("n/a", "task-beacon_run-1"), ("n/a", "task-beacon_run-2")])
    analysis = {"name": "shape", "kind": "within", "classes": {"round": ["seen_round"], "square": ["seen_square"]},
                "folds": {"scheme": "leave_one_run_out", "n_groups": 2}, "svm_c": 1.0, "demean_patterns": False}
    settings = {"radius_mm": 3.0, "classifier": "correlation_centroid", "n_blocks": 1, "n_permutations": 3}
    scores = {}
    for label, count in (("both_tasks", 4), ("main_only", 2)):
        outputs = {"scores": str(tmp_path / f"{label}_scores.npy"), "null": str(tmp_path / f"{label}_null.npy")}
        searchlight_block.run({"patterns": images[:count], "tables": tables[:count], "mask": mask_path}, outputs,
                              {"searchlight": settings, "analysis": analysis, "subject": "01", "block": 0, "seed": 3},
                              logging.getLogger("test"))
        scores[label] = (np.load(outputs["scores"]), np.load(outputs["null"]))
    # the beacon runs change nothing: same scores and null as reading the main task's runs alone
    np.testing.assert_array_equal(scores["both_tasks"][0], scores["main_only"][0])
    np.testing.assert_array_equal(scores["both_tasks"][1], scores["main_only"][1])
    design, _, _ = calibrate.subject_design(analysis, tables, {"ember": 10}, "01")
    assert sorted(set(design.runs.tolist())) == ["run-1", "run-2"]
    beacon, _, _ = calibrate.subject_design(analysis, tables, {"ember": 10}, "01", {"within": "beacon"})
    assert sorted(set(beacon.runs.tolist())) == ["task-beacon_run-1", "task-beacon_run-2"]


def test_a_cross_analysis_takes_each_set_from_its_own_task():
    table = pd.DataFrame({"condition": ["seen_round", "heard_round", "seen_round", "heard_round"],
                          "task": [None, None, "beacon", "beacon"]})
    analysis = {"kind": "cross", "sets": {"seen": {"round": "seen_round"}, "heard": {"round": "heard_round"}}}
    assert analysis_task_rows(table, analysis).tolist() == [True, True, False, False]
    assert analysis_task_rows(table, analysis, {"seen": None, "heard": "beacon"}).tolist() == [True, False, False, True]
