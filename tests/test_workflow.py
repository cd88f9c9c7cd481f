"""The workflow as a whole: lint, config errors before any job, and the demo against its ground truth."""

import json
import re

import pandas as pd
import pytest

from workflow_support import REPO, TINY_STUDY, copy_repository, snakemake, write_study

pytestmark = [pytest.mark.e2e]


def test_snakemake_lint_is_clean():
    completed = snakemake(REPO, "--lint", config="config/config.yaml")
    assert "Congratulations, your workflow is in a good condition!" in completed.stdout + completed.stderr


def test_a_bad_config_stops_before_any_job(tmp_path):
    workdir = copy_repository(tmp_path / "repo")
    study = json.loads(json.dumps(TINY_STUDY))
    study["analyses"][0]["clasifier"] = "linear_svm"
    write_study(workdir, study)
    completed = snakemake(workdir, "--dry-run", check=False)
    assert completed.returncode != 0
    message = completed.stdout + completed.stderr
    assert "config/study.yaml: analyses[0]: unknown key 'clasifier' (did you mean 'classifier'?)" in message
    assert not (workdir / "results").exists()


@pytest.mark.slow
def test_per_trial_patterns_run_end_to_end(tmp_path):
    # The end-to-end matrix: per-run betas (test_incremental), per-trial betas (here), cross-decoding (both).
    workdir = copy_repository(tmp_path / "repo")
    study = json.loads(json.dumps(TINY_STUDY))
    study["glm"] = {"pattern_mode": "lss", "serial_correlation": "ar1_whiten", "statistic": "beta"}
    study["analyses"] = [study["analyses"][0]]
    study["analyses"][0]["classifier"] = "shrinkage_lda"
    write_study(workdir, study)
    snakemake(workdir)
    table = pd.read_csv(workdir / "results/patterns/sub-01/sub-01_run-01_patterns.tsv", sep="\t", dtype=str)
    assert set(table["condition"]) == {"seen_round", "seen_square", "seen_star", "heard_round", "heard_square", "heard_star"}
    assert len(table) == 6 * study["demo"]["trials_per_condition_per_run"], "one pattern per trial"
    scores = pd.read_csv(workdir / "results/decoding/shape/sub-01_scores.tsv", sep="\t", dtype={"n_voxels": str})
    assert (scores["n_train"] == 2 * 2 * 3).all(), "two runs x two trials x three classes in each training fold"


@pytest.fixture(scope="module")
def demo_results(tmp_path_factory):
    """The default demo study (config/config.yaml), run once."""
    workdir = copy_repository(tmp_path_factory.mktemp("demo") / "repo")
    completed = snakemake(workdir, config="config/config.yaml")
    _DEMO_STDOUT.append(completed.stdout)
    return workdir, completed.stdout + completed.stderr


_DEMO_STDOUT = []


@pytest.fixture(scope="module")
def demo_stdout(demo_results):
    return _DEMO_STDOUT[-1]


def _group(workdir, analysis):
    return pd.read_csv(workdir / f"results/group/{analysis}/{analysis}_group.tsv", sep="\t", dtype={"n_voxels": str})


@pytest.mark.slow
def test_demo_decodes_where_the_ground_truth_says(demo_results):
    workdir, _ = demo_results
    truth = json.loads((workdir / "results/demo/ground_truth.json").read_text())
    alpha = 0.05
    within = _group(workdir, "shape")
    significant = set(within.loc[within["p_fwe"] < alpha, "roi"])
    assert significant == {"ember", "glow"}, within[["roi", "n_voxels", "mean", "p_fwe"]]
    cross = _group(workdir, "shape_seen_heard")
    mean_direction = cross[cross["direction"].str.contains("<->")]
    assert set(mean_direction.loc[mean_direction["p_fwe"] < alpha, "roi"]) == {"ember"}
    for direction in ("seen->heard", "heard->seen"):
        rows = cross[cross["direction"] == direction]
        assert set(rows.loc[rows["p_fwe"] < alpha, "roi"]) == {"ember"}, direction
    seen_within = cross[cross["direction"] == "seen->seen"]
    assert {"ember", "glow"} <= set(seen_within.loc[seen_within["p_fwe"] < alpha, "roi"])
    assert (cross.loc[cross["roi"] == "hush", "p_fwe"] >= alpha).all(), "the null region survives nowhere"
    assert "hush" in truth["rois"]


@pytest.mark.slow
def test_demo_prints_what_survives_and_writes_every_stage(demo_results):
    workdir, output = demo_results
    assert "cells surviving FWE correction" in output
    manifest = pd.read_csv(workdir / "results/manifest.tsv", sep="\t")
    for part in ("results/patterns/", "results/masks/", "results/decoding/", "results/group/"):
        assert manifest["path"].str.startswith(part).any(), part
    subjects = {f"{number:02d}" for number in range(1, 6)}
    for subject in subjects:
        for run in range(1, 5):
            assert (workdir / f"results/patterns/sub-{subject}/sub-{subject}_run-{run:02d}_patterns.nii.gz").is_file()


@pytest.mark.slow
def test_demo_terminal_is_short_and_ends_with_the_report_path(demo_results):
    # The profile's quiet options hide the per-job blocks (the default target's input list ran to 34,280 characters).
    _, output = demo_results
    lines = output.splitlines()
    assert max(len(line) for line in lines) <= 300, max(lines, key=len)[:200]
    assert len(lines) < 8 * 130  # about five short lines per job (124 jobs); the per-job blocks made it 1,889
    assert any(re.search(r"\b\d+ of \d+ steps \(\d+%\) done", line) for line in lines)  # the progress stays


@pytest.mark.slow
def test_demo_stdout_ends_with_the_warning_count_and_the_report_path(demo_stdout):
    lines = [line for line in demo_stdout.splitlines() if line.strip()]
    assert lines[-1] == "foldwise: report: results/report/index.html"
    assert re.fullmatch(r"foldwise: (no warnings\.|\d+ warnings? \(.*\)\.)", lines[-2])

