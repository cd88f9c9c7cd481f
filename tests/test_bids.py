"""Tests of foldwise.data.bids: file templates, discovery, BOLD, sidecars, events, confounds.

Outside references: real NIfTI files shipped with nibabel's own test data
(nibabel.testing.data_path) read by nibabel itself; the BIDS specification's
entity, events and sidecar rules (bids-specification.readthedocs.io).
"""

import gzip
import json
import os
import shutil
from pathlib import Path

import nibabel as nib
import numpy as np
import pandas as pd
import pytest
from nibabel.testing import data_path as nibabel_data_path

from foldwise.data import bids
from foldwise.errors import InputError

PATTERNS = {
    "bold": "sub-{subject}/func/sub-{subject}_task-{task}_run-{run}_desc-preproc_bold.nii.gz",
    "events": "sub-{subject}/func/sub-{subject}_task-{task}_run-{run}_events.tsv",
    "sidecar": "sub-{subject}/func/sub-{subject}_task-{task}_run-{run}_desc-preproc_bold.json",
    "confounds": "sub-{subject}/func/sub-{subject}_task-{task}_run-{run}_desc-confounds_timeseries.tsv",
    "brain_mask": "",
}
SESSION_PATTERNS = {name: (template.replace("sub-{subject}/func/", "sub-{subject}/ses-{session}/func/")
                           .replace("_task-", "_ses-{session}_task-") if template else "")
                    for name, template in PATTERNS.items()}


def _assert_input_error(excinfo, *parts):
    """The message names the file, the field and the fix (plus any given parts)."""
    error = excinfo.value
    message = str(error)
    assert error.file and error.field and error.fix
    assert "Fix:" in message
    for part in parts:
        assert str(part) in message, (part, message)


def _touch(root, relative):
    path = root / relative
    path.parent.mkdir(parents=True, exist_ok=True)
    path.write_bytes(b"")
    return path


# ---------------------------------------------------------------- run_files


def test_run_files_fills_placeholders_and_leaves_empty_pattern_none(tmp_path):
    files = bids.run_files(tmp_path, PATTERNS, "lanterns", "01", None, "02")
    assert files["bold"] == os.path.join(str(tmp_path), "sub-01/func/sub-01_task-lanterns_run-02_desc-preproc_bold.nii.gz")
    assert files["events"].endswith("sub-01_task-lanterns_run-02_events.tsv")
    assert files["brain_mask"] is None
    with_sessions = bids.run_files(tmp_path, SESSION_PATTERNS, "lanterns", "01", "2", "02")
    assert "sub-01/ses-2/func/sub-01_ses-2_task-lanterns_run-02" in with_sessions["sidecar"]


@pytest.mark.parametrize("template", ["sub-{subject.__class__}_run-{run}.nii", "sub-{0}_run-{run}.nii",
                                      "sub-{subject!r}_run-{run}.nii", "sub-{subject:>4}_run-{run}.nii",
                                      "sub-{acq}_run-{run}.nii", "sub-{subject_run-{run}.nii"])
def test_run_files_refuses_anything_but_whitelisted_placeholders(tmp_path, template):
    with pytest.raises(InputError) as excinfo:
        bids.run_files(tmp_path, {**PATTERNS, "bold": template}, "lanterns", "01", None, "01")
    _assert_input_error(excinfo, "dataset.patterns.bold")


def test_run_files_refuses_labels_that_are_not_bids_labels(tmp_path):
    with pytest.raises(InputError) as excinfo:
        bids.run_files(tmp_path, PATTERNS, "lanterns", "../01", None, "01")
    _assert_input_error(excinfo, "subject", "'../01'")


def test_run_files_session_placeholder_without_session_is_an_error(tmp_path):
    with pytest.raises(InputError) as excinfo:
        bids.run_files(tmp_path, SESSION_PATTERNS, "lanterns", "01", None, "01")
    _assert_input_error(excinfo, "{session}")


# ---------------------------------------------------------------- discover_runs


def test_discover_runs_finds_sorts_and_names_runs(tmp_path):
    for subject, run in [("02", "10"), ("01", "2"), ("02", "1"), ("01", "1")]:
        _touch(tmp_path, bids.run_files(tmp_path, PATTERNS, "lanterns", subject, None, run)["bold"].split(str(tmp_path) + os.sep)[1])
    _touch(tmp_path, "sub-01/func/sub-01_task-other_run-1_desc-preproc_bold.nii.gz")  # another task
    _touch(tmp_path, "sub-01/func/sub-01_task-lanterns_run-1_events.tsv")  # not a bold file
    runs = bids.discover_runs(tmp_path, PATTERNS, "lanterns")
    assert [(entry["subject"], entry["run"]) for entry in runs] == [("01", "1"), ("01", "2"), ("02", "1"), ("02", "10")]
    assert runs[0]["run_id"] == "run-1" and runs[0]["session"] is None
    assert runs[3] == {"subject": "02", "session": None, "run": "10", "run_id": "run-10",
                       **bids.run_files(tmp_path, PATTERNS, "lanterns", "02", None, "10")}
    assert [entry["subject"] for entry in bids.discover_runs(tmp_path, PATTERNS, "lanterns", subjects=["02"])] == ["02", "02"]


def test_discover_runs_with_sessions_builds_run_id(tmp_path):
    for session in ("2", "1"):
        relative = f"sub-01/ses-{session}/func/sub-01_ses-{session}_task-lanterns_run-01_desc-preproc_bold.nii.gz"
        _touch(tmp_path, relative)
    runs = bids.discover_runs(tmp_path, SESSION_PATTERNS, "lanterns")
    assert [entry["run_id"] for entry in runs] == ["ses-1_run-01", "ses-2_run-01"]


def test_discover_runs_missing_root(tmp_path):
    with pytest.raises(InputError) as excinfo:
        bids.discover_runs(tmp_path / "nowhere", PATTERNS, "lanterns")
    _assert_input_error(excinfo, "nowhere", "dataset.bids_root")


def test_discover_runs_listed_subject_absent_lists_found(tmp_path):
    _touch(tmp_path, "sub-01/func/sub-01_task-lanterns_run-1_desc-preproc_bold.nii.gz")
    _touch(tmp_path, "sub-03/func/sub-03_task-lanterns_run-1_desc-preproc_bold.nii.gz")
    with pytest.raises(InputError) as excinfo:
        bids.discover_runs(tmp_path, PATTERNS, "lanterns", subjects=["01", "02"])
    _assert_input_error(excinfo, "dataset.subjects", "subject 02", "found: 01, 03")


def test_discover_runs_subject_folder_without_runs(tmp_path):
    _touch(tmp_path, "sub-01/func/sub-01_task-lanterns_run-1_desc-preproc_bold.nii.gz")
    _touch(tmp_path, "sub-02/func/sub-02_task-rest_run-1_desc-preproc_bold.nii.gz")
    # without a subject list, a subject with only other tasks is skipped
    assert [entry["subject"] for entry in bids.discover_runs(tmp_path, PATTERNS, "lanterns")] == ["01"]
    with pytest.raises(InputError) as excinfo:
        bids.discover_runs(tmp_path, PATTERNS, "lanterns", subjects=["01", "02"])
    _assert_input_error(excinfo, "subject 02 has no run", "dataset.subjects")


def test_discover_runs_nothing_found(tmp_path):
    (tmp_path / "sub-01").mkdir()
    with pytest.raises(InputError) as excinfo:
        bids.discover_runs(tmp_path, PATTERNS, "lanterns")
    _assert_input_error(excinfo, "dataset.patterns.bold", "'lanterns'")


def test_discover_runs_two_files_for_one_run(tmp_path):
    _touch(tmp_path, "sub-01/func/sub-01_task-lanterns_run-1_desc-preproc_bold.nii.gz")
    _touch(tmp_path, "sub-01/func/sub-01_task-lanterns_run-01_desc-preproc_bold.nii.gz")
    with pytest.raises(InputError) as excinfo:
        bids.discover_runs(tmp_path, PATTERNS, "lanterns")
    _assert_input_error(excinfo, "two files", "run-01", "run-1_", "duplicate")


def test_discover_runs_needs_run_placeholder(tmp_path):
    with pytest.raises(InputError) as excinfo:
        bids.discover_runs(tmp_path, {**PATTERNS, "bold": "sub-{subject}/func/sub-{subject}_bold.nii.gz"}, "lanterns")
    _assert_input_error(excinfo, "{run}")


# ---------------------------------------------------------------- load_bold


def test_load_bold_matches_nibabel_on_a_shipped_file_with_scaling():
    # Source: nibabel's test data; functional.nii is int16 with scl_slope ~0.0754 and scl_inter ~3100.8.
    path = os.path.join(nibabel_data_path, "functional.nii")
    reference = nib.load(path)
    assert reference.dataobj.slope != 1.0  # the case must exercise scaling
    data, affine, header = bids.load_bold(path)
    assert data.dtype == np.float32 and data.shape == reference.shape == (17, 21, 3, 20)
    np.testing.assert_allclose(data, reference.get_fdata(dtype=np.float32), rtol=0, atol=0)
    np.testing.assert_array_equal(affine, reference.affine)
    assert header.get_zooms() == reference.header.get_zooms()


@pytest.mark.parametrize("name", ["example4d.nii.gz", "example_nifti2.nii.gz"])
def test_load_bold_gzip_and_nifti2_shipped_files(name):
    # Source: nibabel's test data (a gzip NIfTI-1 and a NIfTI-2 file), read by nibabel itself.
    path = os.path.join(nibabel_data_path, name)
    reference = nib.load(path)
    data, affine, _ = bids.load_bold(path)
    assert data.shape == reference.shape
    np.testing.assert_array_equal(data, reference.get_fdata(dtype=np.float32))
    np.testing.assert_array_equal(affine, reference.affine)


def test_load_bold_refuses_a_3d_image():
    # Source: nibabel's test data; anatomical.nii is a 3D volume.
    path = os.path.join(nibabel_data_path, "anatomical.nii")
    with pytest.raises(InputError) as excinfo:
        bids.load_bold(path)
    _assert_input_error(excinfo, "anatomical.nii", "dim", "4D", "(33, 41, 25)")


def test_load_bold_refuses_a_truncated_gzip(tmp_path):
    # A real shipped file, cut in half after its gzip stream (source: nibabel's test data).
    compressed = Path(nibabel_data_path, "example4d.nii.gz").read_bytes()
    assert len(gzip.decompress(compressed)) > 0
    truncated = tmp_path / "cut_bold.nii.gz"
    truncated.write_bytes(compressed[: len(compressed) // 2])
    with pytest.raises(InputError) as excinfo:
        bids.load_bold(truncated)
    _assert_input_error(excinfo, "cut_bold.nii.gz", "truncated", "re-copy")


def test_load_bold_missing_file(tmp_path):
    with pytest.raises(InputError) as excinfo:
        bids.load_bold(tmp_path / "absent_bold.nii.gz")
    _assert_input_error(excinfo, "absent_bold.nii.gz", "does not exist")


# ---------------------------------------------------------------- read_tr_s


def _sidecar(tmp_path, content):
    path = tmp_path / "bold.json"
    path.write_text(content if isinstance(content, str) else json.dumps(content))
    return path


def _header(tr, time_unit):
    header = nib.Nifti1Header()
    header.set_data_shape((2, 2, 2, 5))
    header.set_zooms((3.0, 3.0, 3.0, tr))
    header.set_xyzt_units("mm", time_unit)
    return header


def test_read_tr_s_agrees_with_a_shipped_header(tmp_path):
    # Source: nibabel's test data; functional.nii has pixdim[4] = 2.0 with units "sec".
    header = nib.load(os.path.join(nibabel_data_path, "functional.nii")).header
    assert bids.read_tr_s(_sidecar(tmp_path, {"RepetitionTime": 2.0}), header, "functional.nii") == 2.0


def test_read_tr_s_flags_a_shipped_header_that_disagrees(tmp_path):
    # Source: nibabel's test data; example4d.nii.gz stores 2000 in pixdim[4] with units "sec".
    header = nib.load(os.path.join(nibabel_data_path, "example4d.nii.gz")).header
    with pytest.raises(InputError) as excinfo:
        bids.read_tr_s(_sidecar(tmp_path, {"RepetitionTime": 2.0}), header, "example4d.nii.gz")
    _assert_input_error(excinfo, "bold.json", "RepetitionTime", "2 s", "2000 s", "example4d.nii.gz", "pixdim[4]")


@pytest.mark.parametrize("tr, unit", [(2000.0, "msec"), (2.0e6, "usec"), (2.0, "sec"), (2.0005, "sec"),
                                      (0.0, "sec"), (1.0, "unknown"), (2.0, "unknown")])
def test_read_tr_s_header_units_and_unset_values(tmp_path, tr, unit):
    assert bids.read_tr_s(_sidecar(tmp_path, {"RepetitionTime": 2.0}), _header(tr, unit), "b.nii") == 2.0


def test_read_tr_s_mismatch_in_ms_units(tmp_path):
    with pytest.raises(InputError) as excinfo:
        bids.read_tr_s(_sidecar(tmp_path, {"RepetitionTime": 2.0}), _header(2500.0, "msec"), "b.nii")
    _assert_input_error(excinfo, "2.5 s", "2 s")


@pytest.mark.parametrize("content, part", [({"TaskName": "x"}, "no RepetitionTime"), ({"RepetitionTime": "2"}, "'2'"),
                                           ({"RepetitionTime": -1}, "-1"), ("{not json", "not valid JSON")])
def test_read_tr_s_bad_sidecars(tmp_path, content, part):
    with pytest.raises(InputError) as excinfo:
        bids.read_tr_s(_sidecar(tmp_path, content), None, "b.nii")
    _assert_input_error(excinfo, "bold.json", part)


def test_read_tr_s_missing_sidecar(tmp_path):
    with pytest.raises(InputError) as excinfo:
        bids.read_tr_s(tmp_path / "absent.json", None, "sub-01_bold.nii.gz")
    _assert_input_error(excinfo, "absent.json", "sub-01_bold.nii.gz", "RepetitionTime")


# ---------------------------------------------------------------- read_events


def _events(tmp_path, text):
    path = tmp_path / "events.tsv"
    path.write_text(text)
    return path


def test_read_events_reads_bids_columns_and_tolerates_extras(tmp_path):
    path = _events(tmp_path, "onset\tduration\ttrial_type\tresponse_time\n"
                             "16\t2\tseen_round\tn/a\n20.5\tn/a\theard_star\t0.4\n30\t2\tn/a\t1.0\n")
    events = bids.read_events(path, n_scans=50, tr_s=2.0)
    assert list(events.columns) == ["onset", "duration", "trial_type"]
    assert events["onset"].tolist() == [16.0, 20.5]
    assert events["duration"].tolist() == [2.0, 0.0]  # n/a duration: an impulse
    assert events["trial_type"].tolist() == ["seen_round", "heard_star"]  # n/a trial_type: dropped
    assert events.attrs["n_unlabelled"] == 1


def test_read_events_numeric_trial_types_stay_text(tmp_path):
    events = bids.read_events(_events(tmp_path, "onset\tduration\ttrial_type\n1\t1\t1\n3\t1\t02\n"), 10, 2.0)
    assert events["trial_type"].tolist() == ["1", "02"]


@pytest.mark.parametrize("text, parts", [
    ("", ("header", "empty")),
    ("onset\tduration\ttrial_type\n", ("rows", "no events")),
    ("onset\ttrial_type\n1\tseen_round\n", ("duration", "missing")),
    ("onset\tduration\ttrial_type\n1\t2\ta\nsoon\t2\tb\n", ("onset", "row 2", "'soon'")),
    ("onset\tduration\ttrial_type\nn/a\t2\ta\n", ("onset", "row 1", "n/a")),
    ("onset\tduration\ttrial_type\n1\t-2\ta\n", ("duration", "row 1", "negative", "-2")),
    ("onset\tduration\ttrial_type\n1\t2\ta\n100\t2\tb\n", ("onset", "row 2", "100 s", "end of the scan", "100 s")),
    ("onset\tduration\ttrial_type\n1\t2\tn/a\n", ("trial_type", "no event")),
])
def test_read_events_bad_inputs(tmp_path, text, parts):
    with pytest.raises(InputError) as excinfo:
        bids.read_events(_events(tmp_path, text), n_scans=50, tr_s=2.0)
    _assert_input_error(excinfo, "events.tsv", *parts)


def test_read_events_onset_exactly_at_scan_end_is_an_error(tmp_path):
    # The last volume starts at (n_scans - 1) * TR; n_scans * TR is past the scan.
    assert len(bids.read_events(_events(tmp_path, "onset\tduration\ttrial_type\n19.9\t0\ta\n"), 10, 2.0)) == 1
    with pytest.raises(InputError):
        bids.read_events(_events(tmp_path, "onset\tduration\ttrial_type\n20\t0\ta\n"), 10, 2.0)


def test_read_events_missing_file(tmp_path):
    with pytest.raises(InputError) as excinfo:
        bids.read_events(tmp_path / "absent_events.tsv", 10, 2.0)
    _assert_input_error(excinfo, "absent_events.tsv", "does not exist")


# ---------------------------------------------------------------- read_confounds


def _confounds(tmp_path, frame_text):
    path = tmp_path / "confounds.tsv"
    path.write_text(frame_text)
    return path


def test_read_confounds_selects_columns_and_fills_leading_na(tmp_path):
    path = _confounds(tmp_path, "trans_x\ttrans_x_derivative1\tcsf\n0.1\tn/a\t5\n0.2\t0.1\t6\n0.4\t0.2\t7\n")
    matrix = bids.read_confounds(path, ["trans_x_derivative1", "trans_x"], n_scans=3)
    assert matrix.dtype == np.float64
    np.testing.assert_array_equal(matrix, [[0.0, 0.1], [0.1, 0.2], [0.2, 0.4]])
    assert bids.read_confounds(None, [], n_scans=4).shape == (4, 0)


def test_read_confounds_absent_column_lists_close_names(tmp_path):
    path = _confounds(tmp_path, "trans_x\ttrans_y\trot_x\n0\t0\t0\n")
    with pytest.raises(InputError) as excinfo:
        bids.read_confounds(path, ["trans_z"], n_scans=1)
    _assert_input_error(excinfo, "confounds.tsv", "trans_z", "close names", "trans_x", "trans_y", "dataset.confounds")


@pytest.mark.parametrize("text, parts", [
    ("a\n1\n2\n", ("rows", "2 rows", "3 volumes")),
    ("a\n1\nn/a\n3\n", ("a", "row 2", "n/a")),
    ("a\nn/a\nn/a\nn/a\n", ("a", "every row")),
    ("a\n1\nmoved\n3\n", ("a", "row 2", "'moved'")),
])
def test_read_confounds_bad_values(tmp_path, text, parts):
    with pytest.raises(InputError) as excinfo:
        bids.read_confounds(_confounds(tmp_path, text), ["a"], n_scans=3)
    _assert_input_error(excinfo, "confounds.tsv", *parts)


def test_read_confounds_missing_file(tmp_path):
    with pytest.raises(InputError) as excinfo:
        bids.read_confounds(tmp_path / "absent.tsv", ["a"], n_scans=3)
    _assert_input_error(excinfo, "absent.tsv", "does not exist")


def test_bids_round_trip_on_a_copied_shipped_file(tmp_path):
    # A real file placed under a BIDS name is found and read like any run.
    relative = "sub-01/func/sub-01_task-lanterns_run-01_desc-preproc_bold.nii.gz"
    (tmp_path / relative).parent.mkdir(parents=True)
    shutil.copy(os.path.join(nibabel_data_path, "example4d.nii.gz"), tmp_path / relative)
    (run,) = bids.discover_runs(tmp_path, PATTERNS, "lanterns")
    data, _, header = bids.load_bold(run["bold"])
    assert data.shape == (128, 96, 24, 2)
    frame = pd.DataFrame({"onset": [0.0], "duration": [1.0], "trial_type": ["seen_round"]})
    frame.to_csv(run["events"], sep="\t", index=False)
    assert bids.read_events(run["events"], data.shape[3], 2.0)["trial_type"].tolist() == ["seen_round"]


# ------------------------------------------------ derivatives layouts (raw + derivatives roots, space/res)

DERIVATIVE_PATTERNS = {
    "bold": "sub-{subject}/func/sub-{subject}_task-{task}_run-{run}_space-{space}_res-{res}_desc-preproc_bold.nii.gz",
    "events": "sub-{subject}/func/sub-{subject}_task-{task}_run-{run}_events.tsv",
    "sidecar": "task-{task}_bold.json",
    "confounds": "sub-{subject}/func/sub-{subject}_task-{task}_run-{run}_desc-confounds_timeseries.tsv",
    "brain_mask": "sub-{subject}/func/sub-{subject}_task-{task}_run-{run}_space-{space}_res-{res}_desc-brain_mask.nii.gz",
}


def test_run_files_reads_derived_files_from_the_derivatives_root(tmp_path):
    files = bids.run_files(tmp_path / "raw", DERIVATIVE_PATTERNS, "lanterns", "01", None, "2",
                           derivatives_root=tmp_path / "deriv", space="tmplA", res="2")
    assert files["bold"] == str(tmp_path / "deriv/sub-01/func/sub-01_task-lanterns_run-2_space-tmplA_res-2_desc-preproc_bold.nii.gz")
    assert files["brain_mask"].startswith(str(tmp_path / "deriv"))
    assert files["confounds"].startswith(str(tmp_path / "deriv"))
    assert files["events"] == str(tmp_path / "raw/sub-01/func/sub-01_task-lanterns_run-2_events.tsv")
    assert files["sidecar"] == str(tmp_path / "raw/task-lanterns_bold.json")  # BIDS inheritance: one sidecar at the top


def test_run_files_space_placeholder_without_a_space_is_an_error(tmp_path):
    with pytest.raises(InputError) as excinfo:
        bids.run_files(tmp_path, DERIVATIVE_PATTERNS, "lanterns", "01", None, "2", space="tmplA")
    _assert_input_error(excinfo, "dataset.res", "{res}")


def test_discover_runs_in_a_derivatives_tree_with_space_and_res(tmp_path):
    for space in ("tmplA", "native"):
        for run in ("1", "2"):
            _touch(tmp_path / "deriv", f"sub-01/func/sub-01_task-lanterns_run-{run}_space-{space}_res-2_desc-preproc_bold.nii.gz")
    (tmp_path / "raw").mkdir()
    runs = bids.discover_runs(tmp_path / "raw", DERIVATIVE_PATTERNS, "lanterns", derivatives_root=tmp_path / "deriv",
                              space="tmplA", res="2")
    assert [run["run"] for run in runs] == ["1", "2"]
    assert all("space-tmplA" in run["bold"] and run["events"].startswith(str(tmp_path / "raw")) for run in runs)


def test_discover_runs_names_the_space_values_found_near_the_pattern(tmp_path):
    for run in ("1", "2", "3"):
        _touch(tmp_path / "deriv", f"sub-01/func/sub-01_task-lanterns_run-{run}_space-tmplB_res-2_desc-preproc_bold.nii.gz")
    (tmp_path / "raw").mkdir()
    with pytest.raises(InputError) as excinfo:
        bids.discover_runs(tmp_path / "raw", DERIVATIVE_PATTERNS, "lanterns", derivatives_root=tmp_path / "deriv",
                           space="tmplA", res="2")
    _assert_input_error(excinfo, "space-tmplB (3 files)", "asks space-tmplA", "dataset.space")


def test_discover_runs_names_entities_the_pattern_lacks_and_the_closest_file(tmp_path):
    # The pattern has no space- part but every file has one: the message says so and shows the closest file.
    for run in ("1", "2"):
        _touch(tmp_path, f"sub-01/func/sub-01_task-lanterns_run-{run}_space-tmplA_desc-preproc_bold.nii.gz")
    _touch(tmp_path, "sub-01/func/sub-01_task-lanterns_run-1_events.tsv")
    with pytest.raises(InputError) as excinfo:
        bids.discover_runs(tmp_path, PATTERNS, "lanterns")
    _assert_input_error(excinfo, "carry space-tmplA", "add _space-{space}",
                        "closest file: sub-01/func/sub-01_task-lanterns_run-1_space-tmplA_desc-preproc_bold.nii.gz")


def test_discover_runs_missing_derivatives_root(tmp_path):
    with pytest.raises(InputError) as excinfo:
        bids.discover_runs(tmp_path, DERIVATIVE_PATTERNS, "lanterns", derivatives_root=tmp_path / "absent", space="a", res="2")
    _assert_input_error(excinfo, "dataset.derivatives_root")


# ------------------------------------------------ confound selectors, flagged initial volumes, condition column

def test_select_confound_columns_by_name_prefix_and_first_k():
    header = ["trans_x", "noise_comp_10", "noise_comp_02", "spike_vol07", "noise_comp_01", "spike_vol31", "rot_x"]
    chosen = bids.select_confound_columns(header, ["trans_x", "spike_vol*", {"prefix": "noise_comp_", "first": 2}, "trans_x"])
    # by name; every spike column in file order; the two lowest-numbered components (10 sorts after 02 by value)
    assert chosen == ["trans_x", "spike_vol07", "spike_vol31", "noise_comp_01", "noise_comp_02"]
    assert bids.select_confound_columns(["trans_x"], ["spike_vol*"]) == []  # a run without flagged volumes


def test_select_confound_columns_errors_name_the_problem(tmp_path):
    with pytest.raises(InputError) as excinfo:
        bids.select_confound_columns(["trans_x", "trans_y"], ["tran_x"], tmp_path / "c.tsv")
    _assert_input_error(excinfo, "close names: trans_x")
    with pytest.raises(InputError) as excinfo:
        bids.select_confound_columns(["comp_1"], [{"prefix": "comp_", "first": 3}], tmp_path / "c.tsv")
    _assert_input_error(excinfo, "asks for 3 columns", "has 1")


@pytest.mark.parametrize("flags, expected", [
    (np.zeros((5, 0)), 0),
    ([[0], [1], [0]], 0),             # volume 0 unflagged: no initial transient
    ([[1, 0, 0], [0, 1, 0], [0, 0, 0], [0, 0, 1]], 2),  # the late flag is not initial
    ([[1], [1]], 2),
])
def test_count_flagged_initial_volumes(flags, expected):
    assert bids.count_flagged_initial_volumes(flags) == expected


def test_read_events_with_another_condition_column(tmp_path):
    path = tmp_path / "events.tsv"
    path.write_text("onset\tduration\ttrial_type\tcue\n0\t1\tx\tseen_round\n10\t1\tx\tn/a\n", encoding="utf-8")
    events = bids.read_events(path, 20, 2.0, condition_column="cue")
    assert events["trial_type"].tolist() == ["seen_round"] and events.attrs["n_unlabelled"] == 1
    with pytest.raises(InputError) as excinfo:
        bids.read_events(path, 20, 2.0, condition_column="stimulus")
    _assert_input_error(excinfo, "stimulus")
