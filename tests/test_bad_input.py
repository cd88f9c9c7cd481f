"""The bad-input table: every case a user can get wrong, with the exact message they read.

Each case builds its bad input in a temporary folder, calls the reader, job
function or validator that catches it, and checks the exact text. A message
reaches the user prefixed ``foldwise: `` (a config error as Snakemake's
WorkflowError from workflow/rules/common.smk, a job error from
``foldwise.provenance.memo.run_job``, exit status 1); warnings go to the job's log and to
stderr as ``foldwise WARNING: ``.

docs/bad-input-table.md is this table: ``test_the_documented_table_is_this_table``
compares the two, and ``python tests/test_bad_input.py`` prints the table.
In the messages, ``<folder>`` stands for the folder that holds the user's files.
"""

import contextlib
import copy
import io
import json
import logging
import multiprocessing
import os
import shutil
import sys
import tempfile
import traceback
from dataclasses import dataclass
from pathlib import Path
from types import SimpleNamespace

import numpy as np
import pandas as pd
import pytest

from foldwise.data import bids
from foldwise.config import load_yaml, validate
from foldwise.errors import InputError
from foldwise.data.fileio import check_output_folder, save_nifti, write_text_atomic, write_tsv
from foldwise.jobs import brain_mask as brain_mask_job
from foldwise.jobs import decode as decode_job
from foldwise.jobs import group as group_job
from foldwise.jobs import report as report_job
from foldwise.jobs import roi_mask as roi_mask_job
from foldwise.provenance.memo import run_job
from foldwise.plan import plan_study
from workflow_support import Named

REPO = Path(__file__).resolve().parents[1]
TABLE_PATH = REPO / "docs" / "bad-input-table.md"
FOLDER = "<folder>"
LOG = logging.getLogger("test_bad_input")

# A small invented lanterns study, written out here so the messages do not depend on the demo config.
LANTERNS = {
    "study": {"name": "lanterns", "seed": 3},
    "dataset": {"source": "demo"},
    "demo": {"n_subjects": 3, "n_runs": 2},
    "rois": [{"name": "ember", "labels": ["ember_L", "ember_R"]}, {"name": "glow", "labels": ["glow_L", "glow_R"]},
             {"name": "hush", "labels": ["hush_L", "hush_R"]}],
    "analyses": [{"name": "shape", "kind": "within",
                  "classes": {"round": ["seen_round"], "square": ["seen_square"], "star": ["seen_star"]}}],
}
AFFINE = np.diag([3.0, 3.0, 3.0, 1.0])
GRID = (6, 5, 4)


@dataclass(frozen=True)
class Case:
    """One row of the table: what goes wrong, where it is caught, and how the check is built."""

    name: str
    where: str
    build: object  # folder -> Expectation


@dataclass(frozen=True)
class Expectation:
    """``call()`` and the message it must give (``<folder>`` for the case's folder).

    kind: ``error`` (raises InputError), ``warning`` (logs one warning to the
    logger passed in), ``exit`` (``call()`` returns the exit code and stderr of
    a job run through ``run_job``).
    """

    call: object
    message: str
    kind: str = "error"


CASES = []


def case(name, where):
    def register(build):
        CASES.append(Case(name, where, build))
        return build
    return register


def _study(**changes):
    """A deep copy of LANTERNS with ``path -> value`` changes (``"analyses.0.classes"``)."""
    study = copy.deepcopy(LANTERNS)
    for dotted, value in changes.items():
        *parents, last = dotted.split(".")
        node = study
        for part in parents:
            node = node[int(part)] if isinstance(node, list) else node[part]
        if isinstance(node, list):
            node[int(last)] = value
        else:
            node[last] = value
    return study


def _validating(study):
    return lambda: validate(study, path="config/study.yaml")


def _planning(study):
    return lambda: plan_study(validate(study, path="config/study.yaml"), path="config/study.yaml")


def _bold_file_names(dataset, subjects=("01", "02"), runs=("1", "2")):
    """Empty files named like BOLD runs (discovery reads names only)."""
    for subject in subjects:
        for run in runs:
            path = dataset / f"sub-{subject}" / "func" / f"sub-{subject}_task-lanterns_run-{run}_desc-preproc_bold.nii.gz"
            path.parent.mkdir(parents=True, exist_ok=True)
            path.write_bytes(b"")


def _bids_study(folder):
    return _study(**{"dataset": {"source": "bids", "bids_root": str(folder / "bids")}})


def _events(folder, text):
    path = folder / "sub-01_task-lanterns_run-1_events.tsv"
    path.write_text(text, encoding="utf-8")
    return lambda: bids.read_events(path, 100, 2.0)


def _noise_bold(path, shape=GRID + (12,), seed=0):
    data = 100.0 + np.random.default_rng(seed).standard_normal(shape)
    save_nifti(path, data, AFFINE)
    return data


# -- config files and the config ------------------------------------------------------------
@case("malformed YAML (bad indentation)", "config.load_yaml, before any job")
def _malformed_yaml(folder):
    path = folder / "study.yaml"
    path.write_text("study:\n  name: lanterns\n   seed: 3\n", encoding="utf-8")
    return Expectation(lambda: load_yaml(path), f"{FOLDER}/study.yaml: line 3, column 8: malformed YAML (mapping values are not "
                                                "allowed here). Fix: fix the indentation or quoting at that line")


@case("config file missing", "config.load_yaml, before any job")
def _missing_config(folder):
    return Expectation(lambda: load_yaml(folder / "study.yaml"), f"{FOLDER}/study.yaml: file: the config file does not exist. "
                                                                "Fix: create it or pass the right path (make study CONFIG=path)")


@case("config is a list, not a mapping", "config.load_yaml, before any job")
def _list_config(folder):
    path = folder / "study.yaml"
    path.write_text("- dataset\n- rois\n", encoding="utf-8")
    return Expectation(lambda: load_yaml(path), f"{FOLDER}/study.yaml: (top level): expected a mapping of keys, found list. "
                                                "Fix: start the file with keys such as 'dataset:'")


@case("YAML tag that builds an object (!!python/object)", "config.load_yaml (yaml.safe_load), before any job")
def _yaml_object_tag(folder):
    path = folder / "study.yaml"
    path.write_text("study: !!python/object/apply:os.system ['echo hello']\n", encoding="utf-8")
    return Expectation(lambda: load_yaml(path), f"{FOLDER}/study.yaml: line 1, column 8: malformed YAML: tag refused (could not "
                                                "determine a constructor for the tag 'tag:yaml.org,2002:python/object/apply:os.system'); "
                                                "a config holds plain values only, never objects. Fix: remove the tag (the word "
                                                "starting with '!') and write a plain value")


@case("unknown config key (misspelt)", "config.validate (schema), before any job")
def _unknown_key(folder):
    study = _study()
    study["analyses"][0]["clasifier"] = "linear_svm"
    return Expectation(_validating(study), "config/study.yaml: analyses[0]: unknown key 'clasifier' (did you mean 'classifier'?). "
                                           "Fix: remove or rename it; allowed keys here: classes, classifier, demean_patterns, folds, "
                                           "geometry, kind, logistic_c, n_permutations, name, rois, selection, set_tasks, sets, svm_c, task, voxel_counts")


@case("key that is not text (unquoted 1:)", "config.validate, before any job")
def _number_key(folder):
    study = _study(**{"analyses.0.classes": {1: ["seen_round"], 2: ["seen_square"]}})
    return Expectation(_validating(study), "config/study.yaml: analyses[0].classes: the key 1 is not text (YAML reads unquoted "
                                           "numbers, true/false and null as values). Fix: quote the key ('1':) or rename it")


@case("wrong type", "config.validate (schema), before any job")
def _wrong_type(folder):
    return Expectation(_validating(_study(**{"demo.n_subjects": "five"})),
                       "config/study.yaml: demo.n_subjects: expected integer, found 'five'. "
                       "Fix: give demo.n_subjects a value of type integer")


@case("analysis with one class", "config.validate (schema), before any job")
def _one_class(folder):
    return Expectation(_validating(_study(**{"analyses.0.classes": {"round": ["seen_round"]}})),
                       "config/study.yaml: analyses[0].classes: decoding needs at least 2 classes, found 1 (round). "
                       "Fix: define two or more classes, each a list of conditions")


@case("non-positive voxel count", "config.validate (schema), before any job")
def _zero_voxels(folder):
    study = _study()
    study["analyses"][0]["voxel_counts"] = [0, 50, "all"]
    return Expectation(_validating(study), "config/study.yaml: analyses[0].voxel_counts[0]: 0 is not a voxel count. "
                                           "Fix: use a whole number of at least 1, or 'all'")


@case("voxel counts out of order", "config.validate, before any job")
def _counts_out_of_order(folder):
    study = _study()
    study["analyses"][0]["voxel_counts"] = [50, 10, "all"]
    return Expectation(_validating(study), "config/study.yaml: analyses[0].voxel_counts: counts [50, 10] are not increasing. "
                                           "Fix: list the counts from small to large ('all' last)")


@case("negative permutation count", "config.validate (schema), before any job")
def _negative_permutations(folder):
    study = _study()
    study["analyses"][0]["n_permutations"] = -1
    return Expectation(_validating(study), "config/study.yaml: analyses[0].n_permutations: -1 is out of range (minimum 0). "
                                           "Fix: give analyses[0].n_permutations a value within the range")


@case("unknown classifier", "config.validate (schema), before any job")
def _unknown_classifier(folder):
    study = _study()
    study["analyses"][0]["classifier"] = "random_forest"
    return Expectation(_validating(study), "config/study.yaml: analyses[0].classifier: 'random_forest' is not one of "
                                           "['linear_svm', 'logistic_l2', 'shrinkage_lda', 'correlation_centroid', 'gaussian_nb']. "
                                           "Fix: choose one of linear_svm, logistic_l2, shrinkage_lda, correlation_centroid, gaussian_nb")


@case("analysis names an ROI that is not defined", "config.validate (references), before any job")
def _unknown_roi_reference(folder):
    study = _study()
    study["analyses"][0]["rois"] = ["embr"]
    return Expectation(_validating(study), "config/study.yaml: analyses[0].rois: unknown ROI 'embr' (did you mean 'ember'?). "
                                           "Fix: use one of ember, glow, hush or define it under rois")


@case("two ROIs with one name", "config.validate (references), before any job")
def _duplicate_roi(folder):
    study = _study()
    study["rois"].append({"name": "ember", "labels": ["hush_L"]})
    return Expectation(_validating(study), "config/study.yaml: rois[].name: the ROI name 'ember' is used twice. "
                                           "Fix: give each ROI a unique name")


@case("file-name pattern with a placeholder other than subject/session/task/run", "bids.run_files, before any job")
def _bad_placeholder(folder):
    study = _study(**{"dataset.patterns": {"bold": "sub-{subject.__class__}/func/run-{run}_bold.nii.gz"}})
    return Expectation(_planning(study), "the study config: dataset.patterns.bold: the placeholder {subject.__class__} in "
                                         "'sub-{subject.__class__}/func/run-{run}_bold.nii.gz' is not allowed. "
                                         "Fix: use only {subject} {session} {task} {run} {space} {res}, without format specs")


# -- the dataset: finding subjects and runs (workflow_plan.plan_study, before any job) ---------
@case("dataset path missing", "bids.discover_runs via workflow_plan.plan_study, before any job")
def _missing_dataset(folder):
    return Expectation(_planning(_bids_study(folder)), f"{FOLDER}/bids: dataset.bids_root: the dataset folder does not exist. "
                                                       "Fix: correct dataset.bids_root or create the dataset there")


@case("a listed subject absent from the dataset", "bids.discover_runs via workflow_plan.plan_study, before any job")
def _absent_subject(folder):
    _bold_file_names(folder / "bids")
    study = _bids_study(folder)
    study["dataset"]["subjects"] = ["01", "05"]
    return Expectation(_planning(study), f"{FOLDER}/bids: dataset.subjects: subject 05 is not in the dataset (found: 01, 02). "
                                         "Fix: correct dataset.subjects or add the subject's files")


@case("a listed subject absent from the demo", "workflow_plan.plan_study, before any job")
def _absent_demo_subject(folder):
    study = _study(**{"dataset.subjects": ["09"]})
    return Expectation(_planning(study), "config/study.yaml: dataset.subjects: subject(s) 09 are not in the demo (it has 01, 02, 03). "
                                         "Fix: list demo subjects only, or raise demo.n_subjects")


@case("a subject with no usable run (folder without runs of the task)", "bids.discover_runs via workflow_plan.plan_study, before any job")
def _subject_without_runs(folder):
    _bold_file_names(folder / "bids")
    (folder / "bids" / "sub-03" / "anat").mkdir(parents=True)
    study = _bids_study(folder)
    study["dataset"]["subjects"] = ["01", "02", "03"]
    return Expectation(_planning(study), f"{FOLDER}/bids/sub-03/func/sub-03_task-lanterns_run-{{run}}_desc-preproc_bold.nii.gz: "
                                         "dataset.subjects: subject 03 has no run of task 'lanterns'. "
                                         "Fix: add its BOLD runs or remove 03 from dataset.subjects")


@case("two files for the same run (run-1 and run-01)", "bids.discover_runs via workflow_plan.plan_study, before any job")
def _two_files_one_run(folder):
    _bold_file_names(folder / "bids")
    _bold_file_names(folder / "bids", subjects=("01",), runs=("01",))
    return Expectation(_planning(_bids_study(folder)),
                       f"{FOLDER}/bids/sub-01/func/sub-01_task-lanterns_run-1_desc-preproc_bold.nii.gz: dataset.patterns.bold: "
                       "two files for subject 01, run 1: sub-01/func/sub-01_task-lanterns_run-01_desc-preproc_bold.nii.gz and "
                       "sub-01/func/sub-01_task-lanterns_run-1_desc-preproc_bold.nii.gz. "
                       "Fix: remove or rename the duplicate so each run has one BOLD file")


# -- per-run files (read by the brain-mask and GLM jobs) ---------------------------------------
@case("empty events file (0 bytes)", "bids.read_events (GLM job)")
def _empty_events(folder):
    return Expectation(_events(folder, ""), f"{FOLDER}/sub-01_task-lanterns_run-1_events.tsv: header: the events file is empty. "
                                            "Fix: write a header line and at least one row")


@case("events file with a header but no events", "bids.read_events (GLM job)")
def _header_only_events(folder):
    return Expectation(_events(folder, "onset\tduration\ttrial_type\n"),
                       f"{FOLDER}/sub-01_task-lanterns_run-1_events.tsv: rows: the events file has a header but no events. "
                       "Fix: add one row per event")


@case("events missing a required column", "bids.read_events (GLM job)")
def _events_without_duration(folder):
    return Expectation(_events(folder, "onset\ttrial_type\n4\tseen_round\n"),
                       f"{FOLDER}/sub-01_task-lanterns_run-1_events.tsv: duration: required column(s) missing from the events "
                       "file (found: onset, trial_type). Fix: add the column(s) duration")


@case("events row with one cell more than the header (an empty trailing cell is fine)",
      "fileio.read_tsv via bids.read_events (GLM job)")
def _events_extra_cell(folder):
    return Expectation(_events(folder, "onset\tduration\ttrial_type\n4\t2\tseen_round\t\n9\t2\tseen_star\t1.5\n"),
                       f"{FOLDER}/sub-01_task-lanterns_run-1_events.tsv: format: line 3 has 4 cells but the header names 3 "
                       "columns (onset, duration, trial_type). Fix: remove the extra tab-separated cells or name the extra "
                       "column in the header")


@case("negative duration", "bids.read_events (GLM job)")
def _negative_duration(folder):
    return Expectation(_events(folder, "onset\tduration\ttrial_type\n4\t2\tseen_round\n12\t-1\tseen_star\n"),
                       f"{FOLDER}/sub-01_task-lanterns_run-1_events.tsv: duration: row 2 (line 3) has a negative duration -1 s. "
                       "Fix: give durations of 0 s or more")


@case("non-numeric onset", "bids.read_events (GLM job)")
def _text_onset(folder):
    return Expectation(_events(folder, "onset\tduration\ttrial_type\nsoon\t2\tseen_round\n"),
                       f"{FOLDER}/sub-01_task-lanterns_run-1_events.tsv: onset: row 1 (line 2) holds 'soon', not a finite number. "
                       "Fix: write onset as a number (n/a for a missing value)")


@case("onset after the end of the scan", "bids.read_events (GLM job)")
def _late_onset(folder):
    return Expectation(_events(folder, "onset\tduration\ttrial_type\n250\t2\tseen_round\n"),
                       f"{FOLDER}/sub-01_task-lanterns_run-1_events.tsv: onset: row 1 (line 2) starts at 250 s, at or after the "
                       "end of the scan (100 volumes x 2 s = 200 s). Fix: check the onsets are in seconds from the first volume "
                       "and that events and BOLD belong to the same run")


@case("sidecar without RepetitionTime", "bids.read_tr_s (GLM job)")
def _sidecar_without_tr(folder):
    _noise_bold(folder / "bold.nii.gz")
    sidecar = folder / "bold.json"
    sidecar.write_text(json.dumps({"TaskName": "lanterns"}), encoding="utf-8")
    header = bids.load_bold(folder / "bold.nii.gz")[2]
    return Expectation(lambda: bids.read_tr_s(sidecar, header, folder / "bold.nii.gz"),
                       f"{FOLDER}/bold.json: RepetitionTime: the sidecar has no RepetitionTime. "
                       "Fix: add \"RepetitionTime\": <seconds> to the sidecar")


@case("TR mismatch between sidecar and header", "bids.read_tr_s (GLM job)")
def _tr_mismatch(folder):
    _noise_bold(folder / "bold.nii.gz")  # save_nifti writes pixdim[4] = 1 with units mm, sec: a TR of 1 s
    sidecar = folder / "bold.json"
    sidecar.write_text(json.dumps({"RepetitionTime": 2.0}), encoding="utf-8")
    header = bids.load_bold(folder / "bold.nii.gz")[2]
    return Expectation(lambda: bids.read_tr_s(sidecar, header, folder / "bold.nii.gz"),
                       f"{FOLDER}/bold.json: RepetitionTime: the sidecar says 2 s but the header of {FOLDER}/bold.nii.gz "
                       "(pixdim[4]) says 1 s. Fix: correct whichever is wrong (RepetitionTime in the sidecar or "
                       "pixdim[4]/xyzt_units in the image)")


@case("3D image where a 4D BOLD series is expected", "bids.load_bold (brain-mask and GLM jobs)")
def _three_d_bold(folder):
    save_nifti(folder / "bold.nii.gz", np.ones(GRID), AFFINE)
    return Expectation(lambda: bids.load_bold(folder / "bold.nii.gz"),
                       f"{FOLDER}/bold.nii.gz: dim: expected a 4D BOLD time series, got an image of shape (6, 5, 4). "
                       "Fix: point dataset.patterns.bold at the 4D preprocessed BOLD series, not a 3D volume")


@case("truncated .nii.gz", "fileio.load_nifti via bids.load_bold (brain-mask and GLM jobs)")
def _truncated_bold(folder):
    _noise_bold(folder / "whole.nii.gz")
    data = (folder / "whole.nii.gz").read_bytes()
    (folder / "bold.nii.gz").write_bytes(data[: len(data) // 2])
    return Expectation(lambda: bids.load_bold(folder / "bold.nii.gz"),
                       f"{FOLDER}/bold.nii.gz: content: the BOLD image is truncated or not a NIfTI file (EOFError: Compressed "
                       "file ended before the end-of-stream marker was reached). Fix: re-export or re-copy the file")


@case("corrupt .nii.gz (not gzip at all)", "fileio.load_nifti via bids.load_bold (brain-mask and GLM jobs)")
def _corrupt_bold(folder):
    (folder / "bold.nii.gz").write_bytes(b"<html>a download error page</html>")
    return Expectation(lambda: bids.load_bold(folder / "bold.nii.gz"),
                       f"{FOLDER}/bold.nii.gz: content: the BOLD image is truncated or not a NIfTI file (BadGzipFile: Not a "
                       "gzipped file (b'<h')). Fix: re-export or re-copy the file")


@case("confound column absent", "bids.read_confounds (GLM job)")
def _absent_confound(folder):
    path = folder / "confounds.tsv"
    path.write_text("trans_x\ttrans_y\n0.1\t0.2\n", encoding="utf-8")
    return Expectation(lambda: bids.read_confounds(path, ["trans_x", "rot_x"], 1),
                       f"{FOLDER}/confounds.tsv: rot_x: the confound column is absent (close names: trans_x). "
                       "Fix: correct dataset.confounds to name columns of the confounds table")


@case("BOLD with NaN voxels (excluded from the mask, with a warning)", "brain-mask job (jobs/brain_mask.py)")
def _nan_voxels(folder):
    data = _noise_bold(folder / "clean.nii.gz")
    data[0, 0, 0, 3] = np.nan
    data[2, 2, 2, :] = np.nan
    save_nifti(folder / "bold.nii.gz", data, AFFINE)
    outputs = {name: str(folder / "out" / f"{name}.{suffix}") for name, suffix in
               (("mask", "nii.gz"), ("mean", "nii.gz"), ("summary", "json"))}
    return Expectation(lambda: brain_mask_job.run({"bold": [str(folder / "bold.nii.gz")]}, outputs,
                                                  {"brain_mask": {"mean_fraction": 0.2}, "subject": "01"}, LOG),
                       "subject 01: excluded 2 voxel(s) whose BOLD holds NaN or Inf in some run", kind="warning")


# -- ROI masks (roi_mask job) ----------------------------------------------------------------
def _roi_inputs(folder, atlas_affine=AFFINE):
    brain = np.zeros(GRID, dtype=np.uint8)
    brain[1:5, 1:4, 1:3] = 1
    atlas = np.zeros(GRID, dtype=np.int16)
    atlas[1:3, 1:4, 1:3], atlas[3:5, 1:4, 1:3], atlas[5, :, :] = 1, 2, 3  # label 3 lies outside the brain mask
    save_nifti(folder / "brainmask.nii.gz", brain, AFFINE, dtype=np.uint8)
    save_nifti(folder / "atlas.nii.gz", atlas, atlas_affine, dtype=np.int16)
    write_tsv(folder / "atlas_labels.tsv", pd.DataFrame({"index": [1, 2, 3], "name": ["ember_L", "ember_R", "hush_L"]}))
    return {"brain_mask": str(folder / "brainmask.nii.gz"), "atlas": str(folder / "atlas.nii.gz"),
            "atlas_labels": str(folder / "atlas_labels.tsv")}


def _roi_job(folder, labels, inputs=None, min_voxels=10, name="ember"):
    inputs = inputs or _roi_inputs(folder)
    outputs = {"mask": str(folder / "out" / "roi.nii.gz"), "info": str(folder / "out" / "roi.json")}
    params = {"roi": {"name": name, "labels": labels, "min_voxels": min_voxels}, "subject": "01"}
    return lambda: roi_mask_job.run(inputs, outputs, params, LOG)


@case("atlas in another space (its grid does not overlap the data)", "masks.resample_nearest (ROI job)")
def _atlas_elsewhere(folder):
    shifted = AFFINE.copy()
    shifted[:3, 3] = 500.0
    inputs = _roi_inputs(folder, atlas_affine=shifted)
    return Expectation(_roi_job(folder, ["ember_L"], inputs),
                       f"{FOLDER}/atlas.nii.gz: affine: atlas on a different grid or space: its bounding box shares 0% of the "
                       "smaller grid (atlas [498.5, 498.5, 498.5]..[516.5, 513.5, 510.5] mm, data [-1.5, -1.5, -1.5]..[16.5, "
                       "13.5, 10.5] mm). Fix: give an atlas in the same space as the BOLD data (check both images' sform/qform)")


@case("unknown ROI label", "masks.roi_from_labels (ROI job)")
def _unknown_label(folder):
    return Expectation(_roi_job(folder, ["embr_L"]), f"{FOLDER}/atlas_labels.tsv: labels: unknown label 'embr_L' (closest: "
                                                     "ember_L, ember_R). Fix: use names from the atlas label table's name column")


@case("ROI empty after the brain mask", "masks.restrict_to_brain (ROI job)")
def _roi_outside_brain(folder):
    return Expectation(_roi_job(folder, ["hush_L"], name="hush"),
                       f"{FOLDER}/atlas.nii.gz: rois[hush].min_voxels: subject 01, ROI hush: 0 voxels inside the brain mask "
                       "(20 before masking), fewer than min_voxels = 10. Fix: check that the ROI and the data share one space, "
                       "enlarge the ROI, lower min_voxels, or exclude the subject")


# -- decoding (decode job) ------------------------------------------------------------------
def _pattern_runs(folder, conditions_per_run):
    rng = np.random.default_rng(1)
    images, tables = [], []
    for number, conditions in enumerate(conditions_per_run, start=1):
        image = folder / f"sub-01_run-{number:02d}_patterns.nii.gz"
        table = folder / f"sub-01_run-{number:02d}_patterns.tsv"
        save_nifti(image, rng.standard_normal(GRID + (len(conditions),)), AFFINE)
        write_tsv(table, pd.DataFrame({"volume": range(len(conditions)), "subject": "01", "session": "n/a",
                                       "run_id": f"run-{number:02d}", "condition": conditions, "trial_index": "n/a",
                                       "onset_s": "n/a"}))
        images.append(str(image))
        tables.append(str(table))
    return images, tables


def _decode_job(folder, conditions_per_run, classes):
    images, tables = _pattern_runs(folder, conditions_per_run)
    mask = folder / "roi-ember_mask.nii.gz"
    save_nifti(mask, np.ones(GRID, dtype=np.uint8), AFFINE, dtype=np.uint8)
    analysis = {"name": "shape", "kind": "within", "classes": classes, "selection": "signal", "voxel_counts": [5, "all"],
                "classifier": "correlation_centroid", "svm_c": 1.0, "logistic_c": 1.0, "demean_patterns": False,
                "folds": {"scheme": "leave_one_run_out", "n_groups": 2}, "n_permutations": 5}
    outputs = {name: [str(folder / "out" / f"{name}.tsv")] for name in ("scores", "null", "rankings", "confusion")}  # one file per ROI
    return lambda: decode_job.run({"patterns": images, "tables": tables, "masks": [str(mask)]}, outputs,
                                  {"analysis": analysis, "subject": "01", "rois": ["ember"], "seed": 3}, LOG)


@case("a class absent from a training fold (only in one run)", "folds.check_training_classes (decode job)")
def _class_in_one_run(folder):
    call = _decode_job(folder, [["seen_round", "seen_square"], ["seen_square"], ["seen_square"]],
                       {"round": ["seen_round"], "square": ["seen_square"]})
    return Expectation(call, f"{FOLDER}/sub-01_run-01_patterns.tsv (and 2 more pattern tables): condition: subject 01: with run "
                             "run-01 held out, the training runs hold no pattern of class 'round'. Fix: model that class's "
                             "conditions in more runs, drop the class from the analysis, or use folds.scheme run_groups")


@case("a condition of the analysis in none of the runs", "jobs/decode.analysis_labels (decode job)")
def _condition_nowhere(folder):
    call = _decode_job(folder, [["seen_round", "seen_star"], ["seen_round", "seen_star"]],
                       {"round": ["seen_round"], "square": ["seen_square"]})
    return Expectation(call, f"{FOLDER}/sub-01_run-01_patterns.tsv (and 1 more pattern tables): condition: subject 01: analysis "
                             "'shape' names condition(s) ['seen_square'] found in none of the subject's pattern tables (found: "
                             "['seen_round', 'seen_star']). Fix: fix the condition names in the analysis or model them in the GLM")


# -- group (group job) ---------------------------------------------------------------------
@case("a group of one subject (descriptive only, with a warning)", "group job (jobs/group.py)")
def _group_of_one(folder):
    counts = ("10", "all")
    write_tsv(folder / "sub-01_summary.tsv", pd.DataFrame(
        [{"subject": "01", "analysis": "shape", "roi": "ember", "direction": "within", "n_voxels": count,
          "n_used": 10 if count == "10" else 57,  # an ROI larger than the count (else "10" would be the ROI's "all")
          "n_folds": 2, "accuracy": 0.5, "balanced_accuracy": 0.5, "chance": 1 / 3} for count in counts]))
    write_tsv(folder / "sub-01_roi-ember_null.tsv.gz", pd.DataFrame(
        [{"subject": "01", "analysis": "shape", "roi": "ember", "direction": "within", "n_voxels": count, "permutation": number,
          "balanced_accuracy": 0.3, "accuracy": 0.3} for count in counts for number in (1, 2)]))
    inputs = {"summaries": [str(folder / "sub-01_summary.tsv")], "nulls": [str(folder / "sub-01_roi-ember_null.tsv.gz")]}
    outputs = {"table": str(folder / "out" / "group.tsv"), "null": str(folder / "out" / "null.tsv.gz"),
               "summary": str(folder / "out" / "summary.txt")}
    params = {"group": {"n_draws": 20, "alpha": 0.05, "prevalence": True}, "seed": 3, "subjects": ["01"],
              "analysis": {"name": "shape", "kind": "within", "rois": [], "voxel_counts": [10, "all"]}}
    return Expectation(lambda: group_job.run(inputs, outputs, params, LOG),
                       "only 1 subject(s): descriptive statistics only, inferential columns are n/a (at least 3 are needed)",
                       kind="warning")


# -- where results go (run_job) ---------------------------------------------------------------
def _copy_job(inputs, outputs, settings, log):
    write_text_atomic(outputs["copy"], Path(inputs["source"]).read_text(encoding="utf-8"))


def _fake_job(store_dir="results/.store", output="results/masks/sub-01/copy.txt"):
    Path("in.txt").write_text("lanterns", encoding="utf-8")
    return SimpleNamespace(input=Named(source="in.txt"), output=Named(copy=output, provenance="results/provenance/copy.json"),
                           params=Named(settings={}, code="v1"), log=[], wildcards=Named(subject="01"),
                           config={"study": {"store_dir": store_dir}})


def _run_copy_job(smk):
    """(exit code, stderr) of the copy job run through run_job."""
    stderr = io.StringIO()
    with contextlib.redirect_stderr(stderr):
        try:
            run_job(smk, "copy", _copy_job)
            code = 0
        except SystemExit as stop:
            code = stop.code
    return code, stderr.getvalue()


def _as_unprivileged_user(folder, function):
    """``function()`` run in ``folder`` as a user the file permissions apply to; its result, or its InputError raised here.

    Root ignores permission bits, so as root the call runs in a forked child
    that first drops to uid/gid 65534; otherwise it runs here.
    """
    if os.geteuid() != 0:
        with contextlib.chdir(folder):
            return function()
    context = multiprocessing.get_context("fork")
    answers = context.Queue()

    def child():
        try:
            os.setgid(65534)
            os.setuid(65534)
            with contextlib.chdir(folder):
                answers.put(("result", function()))
        except InputError as error:
            answers.put(("input error", (error.file, error.field, error.problem, error.fix)))
        except BaseException:  # the parent reports it
            answers.put(("failure", traceback.format_exc()))

    process = context.Process(target=child)
    process.start()
    kind, answer = answers.get(timeout=120)
    process.join()
    if kind == "input error":
        raise InputError(*answer)
    assert kind == "result", answer
    return answer


def _in_read_only_workspace(locked_folders, function):
    """``function()`` as an unprivileged user in a fresh world-writable folder whose ``locked_folders`` are read-only."""
    workspace = Path(tempfile.mkdtemp(prefix="foldwise-read-only-"))
    try:
        os.chmod(workspace, 0o777)
        for name in locked_folders:
            (workspace / name).mkdir(parents=True, exist_ok=True)
            for parent in Path(name).parents:  # the folders above it stay writable for the user
                os.chmod(workspace / parent, 0o777)
            os.chmod(workspace / name, 0o555)
        return _as_unprivileged_user(workspace, function)
    finally:
        for name in locked_folders:
            os.chmod(workspace / name, 0o755)
        shutil.rmtree(workspace)


@case("results sub-folder left read-only (e.g. written by another user)", "memo.run_job (every job)")
def _read_only_results(folder):
    return Expectation(lambda: _in_read_only_workspace(["results/masks/sub-01"], lambda: _run_copy_job(_fake_job())),
                       "results/masks/sub-01: permissions: step copy could not write or read this path (permission denied). "
                       "Fix: make the folders of study.results_dir and study.store_dir writable for this user (or remove results left by another "
                       "user), then rerun", kind="exit")


@case("study.store_dir points into a file", "memo.run_job (every job)")
def _store_in_a_file(folder):
    def call():
        with contextlib.chdir(folder):
            Path("store.txt").write_text("not a folder", encoding="utf-8")
            return _run_copy_job(_fake_job(store_dir="store.txt/memo"))

    return Expectation(call, "store.txt: folder: step copy could not write or read this path (a file stands where a folder is "
                             "needed). Fix: move or remove that file, then rerun", kind="exit")


@case("results folder not writable at all", "fileio.check_output_folder (for workflow/rules/common.smk, before any job)")
def _unwritable_results(folder):
    return Expectation(lambda: _in_read_only_workspace(["results"], lambda: check_output_folder("results")),
                       "results: results folder: this user cannot write here (permission denied). Fix: make it writable "
                       "for this user (or remove results left by another user), then rerun")


@case("results is a file, not a folder", "fileio.check_output_folder (for workflow/rules/common.smk, before any job)")
def _results_is_a_file(folder):
    (folder / "results").write_text("a stray file", encoding="utf-8")
    return Expectation(lambda: check_output_folder(folder / "results" / ".store", "study.store_dir"),
                       f"{FOLDER}/results: study.store_dir: a file stands where a folder is needed. "
                       "Fix: move or remove that file, then rerun")


@case("a condition misspelt in one subject's events", "data.check.check_dataset (make check, and at the start of every run, before any job)")
def _misspelt_condition(folder):
    from foldwise.data.check import check_dataset
    study = validate(_bids_study(folder), path="config/study.yaml")
    runs = []
    for subject, label in (("01", "seen_star"), ("02", "seen_stra")):
        stem = folder / "bids" / f"sub-{subject}" / "func" / f"sub-{subject}_task-lanterns_run-1"
        stem.parent.mkdir(parents=True, exist_ok=True)
        save_nifti(f"{stem}_bold.nii.gz", np.zeros(GRID + (10,), dtype=np.float32), AFFINE)
        Path(f"{stem}_bold.json").write_text('{"RepetitionTime": 1.0}', encoding="utf-8")
        events = "onset\tduration\ttrial_type\n" + "".join(f"{2 * i}\t1\t{name}\n" for i, name in enumerate(("seen_round", "seen_square", label)))
        Path(f"{stem}_events.tsv").write_text(events, encoding="utf-8")
        runs.append({"subject": subject, "session": None, "run_id": "run-1", "bold": f"{stem}_bold.nii.gz",
                     "events": f"{stem}_events.tsv", "sidecar": f"{stem}_bold.json"})
    return Expectation(lambda: check_dataset(study, runs, "config/study.yaml"),
                       f"{FOLDER}/bids/sub-02/func/sub-02_task-lanterns_run-1_events.tsv: analyses[0].classes.star: subject 02 has no "
                       "event 'seen_star' of task 'lanterns' (did you mean 'seen_stra'?). Fix: correct the condition name in "
                       "config/study.yaml or in the subject's events files (or leave the subject out with dataset.exclude_subjects)")


@case("derivatives in another space than configured", "bids.discover_runs via plan, before any job")
def _other_space(folder):
    study = _study(**{"dataset": {"source": "bids", "bids_root": str(folder / "raw"), "derivatives_root": str(folder / "prep"),
                                  "space": "tmplA", "patterns": {
                                      "bold": "sub-{subject}/func/sub-{subject}_task-{task}_run-{run}_space-{space}_desc-preproc_bold.nii.gz"}}})
    (folder / "raw").mkdir()
    for run in ("1", "2"):
        path = folder / "prep" / "sub-01" / "func" / f"sub-01_task-lanterns_run-{run}_space-tmplB_desc-preproc_bold.nii.gz"
        path.parent.mkdir(parents=True, exist_ok=True)
        path.write_bytes(b"")
    return Expectation(_planning(study),
                       f"{FOLDER}/prep/sub-{{subject}}/func/sub-{{subject}}_task-{{task}}_run-{{run}}_space-{{space}}_desc-preproc_bold.nii.gz: "
                       "dataset.patterns.bold: no BOLD file of task 'lanterns' matches the pattern (the files that fit the pattern have "
                       "space-tmplB (2 files) where the config asks space-tmplA). Fix: check dataset.bids_root, dataset.derivatives_root, "
                       "dataset.task, dataset.space, dataset.res and dataset.patterns.bold")



@case("brain mask summarised over a single volume", "config.validate (schema), before any job")
def _one_summary_volume(folder):
    # One volume cannot tell a varying voxel from a constant one: 0 (every volume) or at least 2.
    study = _study(**{"brain_mask": {"summary_volumes": 1}})
    return Expectation(_validating(study), "config/study.yaml: brain_mask.summary_volumes: 1 is not valid under any of the given "
                                           "schemas. Fix: correct brain_mask.summary_volumes (see the README's config reference)")


# -- geometry analyses (docs/geometry.md) --
_LANTERN_CONDITIONS = ["seen_round", "seen_square", "seen_star", "heard_round", "heard_square", "heard_star"]


def _geometry_study(models, **extra):
    features = {c: {"modality": c.split("_")[0], "shape": c.split("_")[1]} for c in _LANTERN_CONDITIONS}
    entry = {"name": "lantern_geometry", "kind": "geometry", **extra,
             "geometry": {"conditions": _LANTERN_CONDITIONS[:3], "features": features, "models": models}}
    study = _study()
    study["analyses"].append(entry)
    return study


@case("geometry model that separates no condition pairs", "geometry.wiring.check via config.validate, before any job")
def _flat_geometry_model(folder):
    # Among the three seen conditions the modality never differs: the model is constant and correlates with nothing.
    return Expectation(_validating(_geometry_study([{"name": "modality", "differ_in": ["modality"]}])),
                       "config/study.yaml: analyses[1].geometry.models[0] (modality): the model gives every condition pair the same dissimilarity. "
                       "Fix: change differ_in / only_for so the model separates some pairs from others")


@case("geometry model matrix (TSV) not symmetric", "geometry.models.read_model_tsv via config.validate, before any job")
def _asymmetric_geometry_model(folder):
    path = folder / "model.tsv"
    path.write_text("condition\tseen_round\tseen_square\tseen_star\nseen_round\t0\t1\t2\nseen_square\t1\t0\t3\n"
                    "seen_star\t2\t4\t0\n", encoding="utf-8")
    return Expectation(_validating(_geometry_study([{"name": "custom", "tsv": str(path)}])),
                       f"{FOLDER}/model.tsv: analyses[1].geometry.models[0].tsv: the matrix is not finite, symmetric with a zero diagonal. "
                       "Fix: give a dissimilarity matrix")


@case("geometry analysis that also names decoding classes", "geometry.wiring.check via config.validate, before any job")
def _geometry_with_classes(folder):
    study = _geometry_study([{"name": "shape", "differ_in": ["shape"]}], classes={"a": ["seen_round"], "b": ["seen_star"]})
    return Expectation(_validating(study), "config/study.yaml: analyses[1].classes: a 'geometry' analysis takes 'geometry', "
                                           "not 'classes'. Fix: remove 'classes'")


# -- nothing silently wrong (docs/reliability.md) --
@case("--config override with an unknown key", "config.apply_overrides via common.smk, before any job")
def _override_unknown_key(folder):
    from foldwise.config import apply_overrides
    return Expectation(lambda: apply_overrides(_study(), ["study={sede: 3}"], "config/study.yaml"),
                       "--config: study: unknown key 'sede' (did you mean 'seed'?) (passed as 'study={sede: 3}'). "
                       "Fix: remove or rename it; allowed keys here: name, results_dir, seed, store_dir")


@case("--config override of a list entry the config does not have", "config.apply_overrides via common.smk, before any job")
def _override_missing_entry(folder):
    from foldwise.config import apply_overrides
    return Expectation(lambda: apply_overrides(_study(), ["set=analyses[3].n_permutations=10"], "config/study.yaml"),
                       "--config: set=analyses[3].n_permutations=10: analyses[3] is not an existing list entry. "
                       "Fix: index an entry the config file lists, or pass the whole list: --config 'key=[...]'")


@case("installed package version differs from the lock", "provenance.environment.check_environment via common.smk, before any job")
def _package_drift(folder):
    from foldwise.provenance.environment import check_environment
    (folder / "lock.txt").write_text("numpy==2.4.6\npandas==3.1.1\n", encoding="utf-8")
    installed = {"python": "3.11.7", "numpy": "2.4.6", "pandas": "3.1.2"}
    return Expectation(lambda: check_environment(folder / "lock.txt", installed=installed, environ={}),
                       f"{FOLDER}/lock.txt: pandas: the environment differs from the lock (pandas 3.1.1 locked, 3.1.2 installed); "
                       "results would mix versions. Fix: run `make env` to install the locked versions, or set "
                       "FOLDWISE_PACKAGE_CHANGE=rerun (make ... PACKAGE_CHANGE=rerun) to recompute every job with the installed ones")


@case("RepetitionTime given in milliseconds", "bids.read_tr_s (GLM job; make check)")
def _tr_in_milliseconds(folder):
    (folder / "bold.json").write_text('{"RepetitionTime": 2000}', encoding="utf-8")
    return Expectation(lambda: bids.read_tr_s(folder / "bold.json", None, folder / "bold.nii.gz"),
                       f"{FOLDER}/bold.json: RepetitionTime: 2000 looks like milliseconds (BIDS gives RepetitionTime in seconds). "
                       "Fix: write it in seconds: 2")


@case("input file is a broken symbolic link (annexed content not fetched)", "fileio.load_nifti / read_tsv; bids.discover_runs, before any job")
def _broken_link(folder):
    from foldwise.data.fileio import load_nifti
    os.symlink(folder / ".annex" / "objects" / "missing", folder / "sub-01_bold.nii.gz")
    return Expectation(lambda: load_nifti(folder / "sub-01_bold.nii.gz", what="BOLD image"),
                       f"{FOLDER}/sub-01_bold.nii.gz: file: the BOLD image is a symbolic link whose target is missing (its content "
                       "is not present, as in an annexed dataset whose content was not fetched). Fix: fetch the content "
                       "(e.g. git annex get on the dataset) or replace the link by the real file")


@case("a result changed after its job wrote it", "provenance.runs.finish_run, at the end of every run")
def _result_changed_after_its_job(folder):
    from foldwise.provenance.runs import finish_run
    result = folder / "group.tsv"
    result.write_text("roi\tmean\nember\t0.9\n", encoding="utf-8")
    record = {"outputs": [{"name": "table", "path": str(result), "sha256": "0" * 64}]}
    (folder / "group.json").write_text(json.dumps(record), encoding="utf-8")
    return Expectation(lambda: finish_run([str(folder / "group.json")], folder / "store"),
                       f"{FOLDER}/group.tsv: sha256: its content differs from the sha256 its provenance record lists "
                       f"({FOLDER}/group.json); it was changed after its job wrote it. Fix: delete the file and rerun (its job "
                       "makes it again), or rerun its job with --forcerun <rule>")


@case("a GLM key under its old name (glm.noise_model, glm.oversampling)", "config.validate, before any job")
def _renamed_glm_key(folder):
    study = _study(**{"glm": {"noise_model": "ar1"}})
    return Expectation(_validating(study), "config/study.yaml: glm.noise_model: renamed to glm.serial_correlation (ols is now "
                                           "ignore; ar1 is now ar1_whiten). Fix: write serial_correlation: ar1_whiten under glm: instead")


# -- derivatives datasets, several tasks, localizer ROIs (docs/datasets.md) --
def _simulated_study(folder, example, **layout):
    """A shipped example config pointed at a small simulated derivatives dataset written in ``folder``."""
    sys.path.insert(0, str(REPO / "tests"))
    import derivatives_support as simulated
    import yaml

    written = simulated.write_dataset(folder, n_subjects=2, **layout)
    config = yaml.safe_load((REPO / "config" / "examples" / example).read_text(encoding="utf-8"))
    config["dataset"].update({"bids_root": str(written["raw"]), "derivatives_root": str(written["derivatives"])})
    if "atlas_image" in config["dataset"]:
        config["dataset"].update({"atlas_image": str(written["atlas_image"]), "atlas_labels": str(written["atlas_labels"])})
    for roi in config["rois"]:
        if "image" in roi:
            roi["image"] = str(folder / "rois" / Path(roi["image"]).name)
    return config, written


def _building(config):
    from foldwise.study import build_study
    return lambda: build_study(validate(config, path="config/study.yaml"), path="config/study.yaml")


@case("too few confound columns for {prefix, first}", "bids.select_confound_columns (GLM job)")
def _too_few_components(folder):
    return Expectation(lambda: bids.select_confound_columns(["trans_x", "noise_comp_00"], [{"prefix": "noise_comp_", "first": 3}],
                                                            folder / "c.tsv"),
                       f"{FOLDER}/c.tsv: dataset.confounds: first 3 of noise_comp_* asks for 3 columns but the table has 1 starting "
                       "with 'noise_comp_'. Fix: lower 'first' or correct the prefix")


@case("dropping more initial volumes than a run has", "jobs.glm.run_nuisance (GLM job)")
def _drop_too_many(folder):
    from foldwise.jobs.glm import run_nuisance
    return Expectation(lambda: run_nuisance(None, [], 5, 6),
                       "the study config: dataset.drop_initial_volumes: dropping 5 initial volumes leaves fewer than 2 of the run's 6. "
                       "Fix: lower dataset.drop_initial_volumes (or check the flag columns)")


@case("a run of one task without a partner run of the other (cross-task analysis)", "study.build_study, before any job")
def _unpaired_task_runs(folder):
    config, written = _simulated_study(folder, "sessions_localizer.yaml", sessions=("1",), runs_per_session=2)
    config["analyses"][0]["folds"] = {"scheme": "leave_one_run_out"}
    for path in Path(written["derivatives"]).glob("sub-02/ses-1/func/*task-beacon_run-2_*bold.nii.gz"):
        path.unlink()
    return Expectation(_building(config),
                       "config/study.yaml: analyses[1].set_tasks: subject 02: run ses-1_run-2 has a run for set 'lanterns' but none for "
                       "set 'beacon' (1 unpaired run(s)): a fold holds out one run of each task together, so train and test runs stay "
                       "independent. Fix: give both tasks the same run labels (run-1, run-2, ... in each session), or use folds.scheme "
                       "leave_one_session_out with both tasks in every session")


@case("decoding a localizer task inside the ROI it defined (circular)", "study.build_study, before any job")
def _circular_localizer(folder):
    config, _ = _simulated_study(folder, "sessions_localizer.yaml", sessions=("1",), runs_per_session=2)
    config["analyses"][1]["rois"] = ["beam"]
    return Expectation(_building(config),
                       "config/study.yaml: analyses[1].rois: analysis 'lit_from_shape' decodes task beacon's patterns inside ROI beam, "
                       "which was defined from that task's runs (circular: the selection saw the decoded data). Fix: leave beam out of "
                       "this analysis's rois, or define beam from another task")


@case("a subject without its own ROI image ({subject} in rois[].image)", "study.build_study, before any job")
def _missing_subject_roi(folder):
    config, _ = _simulated_study(folder, "native_space_subject_rois.yaml", sessions=None, runs_per_session=2, subject_rois=True,
                                 space="T1w", res="")
    (folder / "rois" / "sub-02_ember.nii.gz").unlink()
    return Expectation(_building(config),
                       f"{FOLDER}/rois/sub-02_ember.nii.gz: rois[0].image: no ROI image for subject(s) 02 (1 of 2 subjects have one). "
                       "Fix: write each subject's ROI image where the path says ({subject} is the label without sub-), or exclude the "
                       "subject with dataset.exclude_subjects")


@case("geometry voxel-count sweep with correlation distance", "geometry.wiring.check via config.validate, before any job")
def _geometry_sweep_without_cross_validation(folder):
    study = _geometry_study([{"name": "shape", "differ_in": ["shape"]}])
    study["analyses"][1]["geometry"].update({"conditions": _LANTERN_CONDITIONS, "distance": "correlation", "voxel_counts": [10, "all"]})
    return Expectation(_validating(study), "config/study.yaml: analyses[1].geometry.voxel_counts: a voxel-count sweep needs a "
                                           "cross-validated distance (correlation distance is computed on every run at once, so no "
                                           "run is left to test the choice on). Fix: use distance crossnobis or euclidean_cv, or "
                                           "voxel_counts [all]")


@case("geometry voxel counts out of order", "geometry.wiring.check via config.validate, before any job")
def _geometry_counts_out_of_order(folder):
    study = _geometry_study([{"name": "shape", "differ_in": ["shape"]}])
    study["analyses"][1]["geometry"].update({"conditions": _LANTERN_CONDITIONS, "voxel_counts": [50, 10]})
    return Expectation(_validating(study), "config/study.yaml: analyses[1].geometry.voxel_counts: counts [50, 10] are not "
                                           "increasing. Fix: list the counts from small to large ('all' last)")

@case("glm.conditions naming none of a run's trial types", "data.check.check_dataset (make check, and at the start of every run, before any job)")
def _glm_conditions_miss_a_run(folder):
    from foldwise.data.check import check_dataset
    study = validate(_study(**{"dataset": {"source": "bids", "bids_root": str(folder / "bids")},
                               "glm": {"conditions": ["seen_round", "seen_square", "seen_star"]}}), path="config/study.yaml")
    runs = []
    for run, labels in (("1", ("seen_round", "seen_square", "seen_star")), ("2", ("dim_round", "dim_square", "dim_star"))):
        stem = folder / "bids" / "sub-01" / "func" / f"sub-01_task-lanterns_run-{run}"
        stem.parent.mkdir(parents=True, exist_ok=True)
        save_nifti(f"{stem}_bold.nii.gz", np.zeros(GRID + (10,), dtype=np.float32), AFFINE)
        Path(f"{stem}_bold.json").write_text('{"RepetitionTime": 1.0}', encoding="utf-8")
        Path(f"{stem}_events.tsv").write_text("onset\tduration\ttrial_type\n" + "".join(f"{2 * i}\t1\t{name}\n" for i, name in enumerate(labels)),
                                              encoding="utf-8")
        runs.append({"subject": "01", "session": None, "run_id": f"run-{run}", "bold": f"{stem}_bold.nii.gz",
                     "events": f"{stem}_events.tsv", "sidecar": f"{stem}_bold.json"})
    return Expectation(lambda: check_dataset(study, runs, "config/study.yaml"),
                       f"{FOLDER}/bids/sub-01/func/sub-01_task-lanterns_run-2_events.tsv: glm.conditions: none of the listed conditions "
                       "(seen_round, seen_square, seen_star) occurs in this run of task 'lanterns' (its trial types: dim_round, dim_square, "
                       "dim_star). Fix: list the conditions of every decoded task in glm.conditions, or leave it empty (every trial type)")


# -- the study model (foldwise.study): checks of meaning, before any job ----------------------------
_CROSS = {"name": "carry", "kind": "cross", "sets": {"seen": {"round": "seen_round", "square": "seen_square"},
                                                    "heard": {"round": "heard_round", "square": "heard_square"}}}


@case("a condition misspelt in the config (in no subject's events; the searchlight's analysis too)",
      "study.build_study (data.check over the demo's conditions), before any job")
def _misspelt_condition_in_config(folder):
    from foldwise.study import build_study

    study = _study(**{"analyses.0.classes": {"round": ["seen_round", "seen_rond"], "square": ["seen_square"]}})
    study["searchlight"] = {"enabled": True, "analyses": ["shape"]}
    # the closest trial type the subject has, though the config names seen_round already (data.check's did-you-mean)
    problems = "; ".join(f"subject {subject} has no event 'seen_rond' of task 'lanterns' (did you mean 'seen_round'?)"
                         for subject in ("01", "02", "03"))
    return Expectation(lambda: build_study(validate(study, path="config/study.yaml"), path="config/study.yaml"),
                       f"results/demo/bids/sub-01/func/sub-01_task-lanterns_run-01_events.tsv: analyses[0].classes.round: {problems}. "
                       "Fix: correct the condition name in config/study.yaml or in the subject's events files "
                       "(or leave the subject out with dataset.exclude_subjects)")


@case("a condition used by both sets of a cross analysis", "study.check_meaning via config.validate, before any job")
def _condition_in_both_sets(folder):
    study = _study()
    study["analyses"].append(copy.deepcopy(_CROSS))
    study["analyses"][1]["sets"]["heard"]["round"] = "seen_round"
    return Expectation(_validating(study), "config/study.yaml: analyses[1].sets: condition 'seen_round' is used by both sets. "
                                           "Fix: give each set its own conditions")


@case("searchlight names an analysis that does not exist", "study.check_meaning via config.validate, before any job")
def _unknown_searchlight_analysis(folder):
    study = _study()
    study["searchlight"] = {"enabled": True, "analyses": ["shap"]}
    return Expectation(_validating(study), "config/study.yaml: searchlight.analyses: unknown analysis 'shap' (did you mean 'shape'?). "
                                           "Fix: use one of shape")


# -- the pattern set (foldwise.data.patterns: decode, the searchlight, calibrate) ---------------------
@case("pattern images and the mask on different grids", "data.patterns.read_pattern_set (decode and searchlight jobs)")
def _patterns_off_the_mask_grid(folder):
    images, tables = _pattern_runs(folder, [["seen_round", "seen_square"], ["seen_round", "seen_square"]])
    mask = folder / "roi-ember_mask.nii.gz"
    shifted = AFFINE.copy()
    shifted[:3, 3] += 1.5  # half a voxel: another grid of the same shape
    save_nifti(mask, np.ones(GRID, dtype=np.uint8), shifted, dtype=np.uint8)
    analysis = {"name": "shape", "kind": "within", "classes": {"round": ["seen_round"], "square": ["seen_square"]}, "selection": "signal",
                "voxel_counts": [5, "all"], "classifier": "correlation_centroid", "svm_c": 1.0, "logistic_c": 1.0, "demean_patterns": False,
                "folds": {"scheme": "leave_one_run_out", "n_groups": 2}, "n_permutations": 5}
    outputs = {name: [str(folder / "out" / f"{name}.tsv")] for name in ("scores", "null", "rankings", "confusion")}  # one file per ROI
    return Expectation(lambda: decode_job.run({"patterns": images, "tables": tables, "masks": [str(mask)]}, outputs,
                                              {"analysis": analysis, "subject": "01", "rois": ["ember"], "seed": 3}, LOG),
                       f"{FOLDER}/sub-01_run-01_patterns.nii.gz: affine: the patterns' voxel centres lie more than 0.001 mm from the "
                       f"mask's ({FOLDER}/roi-ember_mask.nii.gz): another space or another grid. Fix: compute the patterns and the mask "
                       "on the subject's one grid")


# -- the report (foldwise.jobs.report) -----------------------------------------------------------
@case("a run's GLM facts without a field the report shows", "jobs.report (reading every run's GLM facts, before drawing)")
def _glm_facts_without_a_field(folder):
    path = str(folder / "sub-01_run-01_glm.json")
    write_text_atomic(path, json.dumps({"subject": "01", "run_id": "run-01", "confounds": [], "n_dropped_initial_volumes": 0}))
    fields_of = report_job._field_reader({"glm_facts": [{"path": path, "subject": "01", "run_id": "run-01"}]})
    return Expectation(lambda: report_job._read_glm_facts([path], fields_of),
                       f"{FOLDER}/sub-01_run-01_glm.json: n_dropped_events_rows: missing from the GLM facts of the run. Fix: rerun the "
                       "workflow (snakemake rebuilds what is missing or stale)")


# -- the results folder (study.results_dir; foldwise.results_folder) -----------------------------------
def _with_results_dir(results_dir, **changes):
    """LANTERNS with its own results folder, the demo's files inside it."""
    moved = {f"dataset.{key}": f"{results_dir}/demo/{tail}" for key, tail in
             (("bids_root", "bids"), ("atlas_image", "atlas/atlas.nii.gz"), ("atlas_labels", "atlas/atlas_labels.tsv"))}
    return _study(**{"study.results_dir": results_dir, **moved, **changes})


@case("results folder given as an absolute path", "results_folder.check_results_dir via config.validate, before any job")
def _absolute_results_dir(folder):
    return Expectation(_validating(_study(**{"study.results_dir": "/scratch/lanterns"})),
                       "config/study.yaml: study.results_dir: '/scratch/lanterns' is an absolute path; outputs are named by their path "
                       "inside the checkout (provenance, manifest, bundle). Fix: give a folder relative to the checkout (e.g. results_b); "
                       "for another disk, make that folder a symbolic link to it")


@case("results folder not in plain form (./, .., //, trailing /)", "results_folder.check_results_dir via config.validate, before any job")
def _results_dir_not_plain(folder):
    return Expectation(_validating(_study(**{"study.results_dir": "./results_b/"})),
                       "config/study.yaml: study.results_dir: './results_b/' is not a plain relative folder name. Fix: write it with "
                       "letters, digits, '_', '-', '.' and '/' only, without './', '..', '//' or a trailing '/' (e.g. 'results_b')")


@case("results folder inside the checkout's code or config folders", "results_folder.check_results_dir via config.validate, before any job")
def _results_dir_in_code(folder):
    return Expectation(_validating(_with_results_dir("config/results")),
                       "config/study.yaml: study.results_dir: 'config/results' is inside the checkout's config/ folder, which holds code "
                       "or configs, not outputs. Fix: give a folder of its own at the top of the checkout (e.g. results_b)")


@case("results folder is the memo store", "results_folder.check_results_dir via config.validate, before any job")
def _results_dir_is_the_store(folder):
    return Expectation(_validating(_with_results_dir("shared/memo", **{"study.store_dir": "shared/memo"})),
                       "config/study.yaml: study.results_dir: 'shared/memo' is the memo store (study.store_dir 'shared/memo'), whose "
                       "clean-up removes what no manifest reaches. Fix: give the results and the store different folders (the store "
                       "may sit inside the results folder, as by default: results/.store)")


@case("results folder inside the dataset", "results_folder.check_results_dir via config.validate, before any job")
def _results_dir_in_the_data(folder):
    study = _study(**{"study.results_dir": "data/lanterns/results", "dataset": {"source": "bids", "bids_root": "data/lanterns"}})
    return Expectation(_validating(study),
                       "config/study.yaml: study.results_dir: 'data/lanterns/results' is inside the dataset (dataset.bids_root "
                       "'data/lanterns'): outputs would be written into the data. Fix: give a results folder outside the dataset "
                       "(e.g. results_b)")


@case("a demo study whose simulated files lie outside its results folder", "results_folder.check_results_dir via config.validate, before any job")
def _demo_outside_results(folder):
    return Expectation(_validating(_study(**{"study.results_dir": "results_b"})),
                       "config/study.yaml: dataset.bids_root: the demo writes 'results/demo/bids', which is outside its results folder "
                       "'results_b' (study.results_dir), so another study could overwrite it. Fix: put the demo's files inside the "
                       "results folder: dataset.bids_root: results_b/demo/bids, dataset.atlas_image: results_b/demo/atlas/atlas.nii.gz, "
                       "dataset.atlas_labels: results_b/demo/atlas/atlas_labels.tsv")


@case("the study's results folder not writable", "results_folder.check_results_writable (workflow/rules/common.smk, before any job)")
def _unwritable_results_dir(folder):
    from foldwise.results_folder import check_results_writable

    study = validate(_with_results_dir("results_b"), path="config/study.yaml")
    return Expectation(lambda: _in_read_only_workspace(["results_b"], lambda: check_results_writable(study, "config/study.yaml")),
                       "config/study.yaml: study.results_dir: the results folder 'results_b' cannot be written (results_b: this user "
                       "cannot write here (permission denied)). Fix: make it writable for this user (or remove results left by another "
                       "user), then rerun, or set study.results_dir to a folder this user can write")


# -- one decode job, several ROIs (foldwise.jobs.decode) -----------------------------------------------
@case("ROI masks of one decode job on different grids", "jobs/decode.read_subject_patterns (decode job: every ROI of a subject x analysis)")
def _roi_masks_on_two_grids(folder):
    images, tables = _pattern_runs(folder, [["seen_round", "seen_square"], ["seen_round", "seen_square"]])
    ember, glow = folder / "roi-ember_mask.nii.gz", folder / "roi-glow_mask.nii.gz"
    save_nifti(ember, np.ones(GRID, dtype=np.uint8), AFFINE, dtype=np.uint8)
    shifted = AFFINE.copy()
    shifted[:3, 3] += 1.5  # half a voxel: another grid of the same shape
    save_nifti(glow, np.ones(GRID, dtype=np.uint8), shifted, dtype=np.uint8)
    analysis = {"name": "shape", "kind": "within", "classes": {"round": ["seen_round"], "square": ["seen_square"]}, "selection": "signal",
                "voxel_counts": [5, "all"], "classifier": "correlation_centroid", "svm_c": 1.0, "logistic_c": 1.0, "demean_patterns": False,
                "folds": {"scheme": "leave_one_run_out", "n_groups": 2}, "n_permutations": 5}
    outputs = {name: [str(folder / "out" / f"{roi}_{name}.tsv") for roi in ("ember", "glow")] for name in ("scores", "null", "rankings", "confusion")}
    return Expectation(lambda: decode_job.run({"patterns": images, "tables": tables, "masks": [str(ember), str(glow)]}, outputs,
                                              {"analysis": analysis, "subject": "01", "rois": ["ember", "glow"], "seed": 3}, LOG),
                       f"{FOLDER}/roi-glow_mask.nii.gz: affine: the ROI mask is not on the grid of {FOLDER}/roi-ember_mask.nii.gz. "
                       "Fix: build every ROI mask of the subject on its one grid")


@case("two study configs name one results folder", "results_folder.shared_results_warning (workflow/rules/common.smk, before any job)")
def _shared_results_dir(folder):
    from foldwise.results_folder import claim_results_dir, shared_results_warning

    def call():
        with contextlib.chdir(folder):
            (folder / "config").mkdir()
            for name in ("study_a.yaml", "study_b.yaml"):
                (folder / "config" / name).write_text("study: {name: lanterns}\n", encoding="utf-8")
            claim_results_dir("results", "config/study_a.yaml")  # study_a ran last
            LOG.warning(shared_results_warning("results", "config/study_b.yaml"))

    return Expectation(call, "config/study_b.yaml: study.results_dir: the results folder 'results' was last run by config/study_a.yaml; "
                             "this run replaces that study's outputs there (and switching back reruns them). Fix: give each study "
                             "config its own study.results_dir (e.g. results_study_b)", kind="warning")



@case("a .nii.gz whose gzip stream is whole but holds fewer values than its header says",
      "fileio.load_stored (GLM job: the BOLD file decoded once, its size checked against the header)")
def _short_bold_for_the_glm(folder):
    import gzip

    from foldwise.data.fileio import load_stored

    _noise_bold(folder / "whole.nii.gz")
    raw = gzip.decompress((folder / "whole.nii.gz").read_bytes())
    (folder / "bold.nii.gz").write_bytes(gzip.compress(raw[:-100], mtime=0))
    n_bytes = int(np.prod(GRID)) * 12 * 4  # float32 values of 12 volumes
    return Expectation(lambda: load_stored(folder / "bold.nii.gz", what="BOLD image"),
                       f"{FOLDER}/bold.nii.gz: content: the BOLD image is truncated or not a NIfTI file (ValueError: the header "
                       f"promises {n_bytes} data bytes after byte 352, the file holds {n_bytes - 100}). Fix: re-export or re-copy the file")


# -- the tests -----------------------------------------------------------------------------------
def _numbered():
    return [pytest.param(number, entry, id=f"{number:02d}-{entry.build.__name__.strip('_')}") for number, entry in
            enumerate(CASES, start=1)]


@pytest.mark.parametrize("number, entry", _numbered())
def test_bad_input_gives_the_documented_message(number, entry, tmp_path, caplog):
    folder = tmp_path / "study"
    folder.mkdir()
    expected = entry.build(folder)
    message = expected.message.replace(FOLDER, str(folder))
    if expected.kind == "error":
        with pytest.raises(InputError) as raised:
            expected.call()
        assert str(raised.value) == message
    elif expected.kind == "warning":
        with caplog.at_level(logging.WARNING, logger=LOG.name):
            expected.call()
        warnings = [record.getMessage() for record in caplog.records if record.levelno >= logging.WARNING]
        assert warnings == [message]
    else:
        code, stderr = expected.call()
        assert code == 1, stderr
        assert stderr.splitlines()[-1] == f"foldwise: {message}"


def test_every_case_is_numbered_once_and_has_a_message():
    names = [entry.name for entry in CASES]
    assert len(names) == len(set(names)) >= 25


def _cell(text):
    return text.replace("|", "\\|")


def table_markdown():
    """The Markdown table of docs/bad-input-table.md, built from CASES."""
    lines = ["| # | case | where it is caught | exact message |", "|---|---|---|---|"]
    for number, entry in enumerate(CASES, start=1):
        lines.append(f"| {number} | {_cell(entry.name)} | {_cell(entry.where)} | `{_cell(_message_of(entry))}` |")
    return "\n".join(lines) + "\n"


def _message_of(entry):
    """The case's message with ``<folder>`` kept (the case is built in a throwaway folder)."""
    with tempfile.TemporaryDirectory() as scratch:
        folder = Path(scratch) / "study"
        folder.mkdir()
        with contextlib.chdir(scratch):
            expected = entry.build(folder)
    text = expected.message
    return {"warning": "WARNING " + text, "exit": text}.get(expected.kind, text)


def test_the_documented_table_is_this_table():
    text = TABLE_PATH.read_text(encoding="utf-8")
    start = text.index("| # | case |")
    end = text.index("\n\n", start) + 1 if "\n\n" in text[start:] else len(text)
    assert text[start:end] == table_markdown(), "regenerate with: python tests/test_bad_input.py"


if __name__ == "__main__":
    sys.stdout.write(table_markdown())


def test_the_readme_points_at_the_table():
    # The table lives in docs/bad-input-table.md only; the README's "When the input is wrong" section links it.
    readme = (REPO / "README.md").read_text(encoding="utf-8")
    section = readme.split("## When the input is wrong", 1)[1].split("\n## ", 1)[0]
    assert "(docs/bad-input-table.md)" in section and "| # | case |" not in readme
