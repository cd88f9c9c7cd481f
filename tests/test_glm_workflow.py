"""End to end through Snakemake: one GLM job per subject, and an edit of one run's events refits only that run.

The tiny demo dataset is simulated once, then copied out of the results folder
and analysed as a BIDS dataset (so an edit of an events file is an edit of
the user's data, not of an output of the demo job). Only the steps up to the
GLM run.
"""

import copy
import json
import shutil

import pytest

from workflow_support import TINY_STUDY, copy_repository, scheduled_jobs, snakemake, write_study

pytestmark = [pytest.mark.e2e, pytest.mark.slow]


def _bids_study(workdir):
    """The tiny study on a BIDS copy of its simulated data."""
    demo = copy.deepcopy(TINY_STUDY)
    write_study(workdir, demo, name="simulate.yaml")
    snakemake(workdir, "--until", "demo_dataset", config="config/simulate.yaml")
    shutil.copytree(workdir / "results" / "demo", workdir / "lanterns")
    shutil.rmtree(workdir / "results")
    study = copy.deepcopy(TINY_STUDY)
    study["dataset"] = {"source": "bids", "bids_root": "lanterns/bids", "atlas_image": "lanterns/atlas/atlas.nii.gz",
                        "atlas_labels": "lanterns/atlas/atlas_labels.tsv", "confounds": TINY_STUDY["dataset"]["confounds"]}
    write_study(workdir, study)


def _parts(workdir, subject):
    record = json.loads((workdir / "results" / "provenance" / "glm" / f"sub-{subject}.json").read_text())
    return [(part["part"], part["restored"]) for part in record["parts"]]


def test_an_events_edit_reruns_one_subjects_glm_and_refits_only_that_run(tmp_path):
    workdir = copy_repository(tmp_path / "repo")
    _bids_study(workdir)
    assert sorted(wildcards["subject"] for rule, wildcards in scheduled_jobs(workdir) if rule == "glm") == ["01", "02", "03"]
    snakemake(workdir, "--until", "glm")
    assert _parts(workdir, "02") == [("run-01", False), ("run-02", False), ("run-03", False)]
    patterns = sorted((workdir / "results" / "patterns").rglob("*.*"))
    before = {path: path.read_bytes() for path in patterns}
    assert len(patterns) == 3 * 3 * 6  # subjects x runs x the files of a run
    events = next((workdir / "lanterns" / "bids" / "sub-02").rglob("*run-02_events.tsv"))
    lines = events.read_text().splitlines()
    header, first = lines[0].split("\t"), lines[1].split("\t")
    onset = header.index("onset")
    first[onset] = f"{float(first[onset]) + 1.0:g}"  # the first trial of run 02 starts a second later
    events.write_text("\n".join([lines[0], "\t".join(first)] + lines[2:]) + "\n")

    glm_jobs = [wildcards for rule, wildcards in scheduled_jobs(workdir) if rule == "glm"]
    assert glm_jobs == [{"subject": "02"}]
    snakemake(workdir, "--until", "glm")
    assert _parts(workdir, "02") == [("run-01", True), ("run-02", False), ("run-03", True)]
    changed = sorted(path.name for path in patterns if path.read_bytes() != before[path])
    assert changed and all(name.startswith("sub-02_run-02_") for name in changed), changed
    assert "sub-02_run-02_design.tsv" in changed
