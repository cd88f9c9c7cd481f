"""Every intermediate hashed: narrow reruns, the content memo, the manifest, the reviewer bundle.

End-to-end on a tiny demo study (3 subjects x 3 runs, 3 ROIs, a plain and a
cross-decoding analysis). One base run is made once; each test works on its
own copy of it.
"""

import copy
import json
import os
import shutil
import subprocess
import sys
import tarfile
import time

import pytest

from workflow_support import (TINY_STUDY, copy_repository, file_states, read_manifest, scheduled_jobs, snakemake,
                              workflow_environment, write_study)

pytestmark = [pytest.mark.e2e, pytest.mark.slow]


@pytest.fixture(scope="module")
def base_run(tmp_path_factory):
    workdir = copy_repository(tmp_path_factory.mktemp("base") / "repo")
    write_study(workdir, TINY_STUDY)
    started = time.perf_counter()
    snakemake(workdir)
    return workdir, time.perf_counter() - started


def _copy_of(base_run, tmp_path):
    workdir = tmp_path / "repo"
    shutil.copytree(base_run[0], workdir, symlinks=True)  # copy2 keeps mtimes, so nothing looks new
    return workdir


def _rules(jobs):
    return sorted({rule for rule, _ in jobs})


def test_nothing_to_do_after_a_full_run(base_run, tmp_path):
    workdir = _copy_of(base_run, tmp_path)
    assert scheduled_jobs(workdir) == []


def test_changing_one_roi_reruns_only_that_roi(base_run, tmp_path):
    workdir = _copy_of(base_run, tmp_path)
    before = file_states(workdir, read_manifest(workdir))
    study = copy.deepcopy(TINY_STUDY)
    study["rois"][1]["labels"] = ["glow_L"]  # glow becomes left-only
    write_study(workdir, study)
    jobs = scheduled_jobs(workdir)
    rois = {wildcards.get("roi") for rule, wildcards in jobs if "roi" in wildcards}
    assert rois == {"glow"}, jobs
    assert set(_rules(jobs)) <= {"roi_mask", "roi_counts", "decode", "decode_gather", "group", "report", "manifest", "all"}
    assert "glm" not in _rules(jobs) and "brain_mask" not in _rules(jobs)
    snakemake(workdir)
    after = file_states(workdir, read_manifest(workdir))
    # The report and group tables are expected to rerun; every other ROI's own files must not.
    untouched = [path for path in before if "roi-glow" not in path and not path.startswith("results/report/")
                 and ("roi-" in path or "/patterns/" in path)]
    assert untouched, "expected outputs of other ROIs and the patterns"
    # One decode job writes every ROI of its subject x analysis: it reruns as a whole, and the other ROIs' files
    # are restored from its part memo (same bytes, a new mtime); every other file keeps its bytes and its mtime.
    decoded = [path for path in untouched if path.startswith("results/decoding/")]
    assert decoded, "expected decode outputs of other ROIs"
    changed = [path for path in untouched if (after[path][0] if path in decoded else after[path]) !=
               (before[path][0] if path in decoded else before[path])]
    assert changed == [], f"outputs of other ROIs changed (hash, or mtime outside the decode jobs): {changed[:5]}"
    records = sorted((workdir / "results" / "provenance" / "decode").glob("*.json"))
    assert len(records) == 6  # 3 subjects x 2 analyses, each rerun
    for path in records:
        parts = [(part["part"], part["restored"]) for part in json.loads(path.read_text())["parts"]]
        assert parts == [("roi-ember", True), ("roi-glow", False), ("roi-hush", True)], (path.name, parts)


def test_changing_one_analysis_classifier_reruns_only_that_analysis(base_run, tmp_path):
    workdir = _copy_of(base_run, tmp_path)
    study = copy.deepcopy(TINY_STUDY)
    study["analyses"][1]["classifier"] = "gaussian_nb"
    write_study(workdir, study)
    jobs = scheduled_jobs(workdir)
    analyses = {wildcards.get("analysis") for rule, wildcards in jobs if "analysis" in wildcards}
    assert analyses == {"carry"}, jobs
    assert set(_rules(jobs)) <= {"decode", "decode_gather", "group", "report", "manifest", "all"}


def test_touching_every_input_restores_or_skips_every_job(base_run, tmp_path):
    workdir = _copy_of(base_run, tmp_path)
    manifest_before = (workdir / "results" / "manifest.tsv").read_bytes()
    touched_at = time.time() + 5
    for folder in ["results/demo", "results/masks", "results/patterns"]:
        for root, _, names in os.walk(workdir / folder):
            for name in names:
                os.utime(os.path.join(root, name), (touched_at, touched_at))
    snakemake(workdir)
    rerun_logs = [log for log in (workdir / "results" / "logs").rglob("*.log") if log.stat().st_mtime >= touched_at - 5]
    recomputed = [log.name for log in rerun_logs if "computed (key" in log.read_text()]
    assert recomputed == [], f"a touched-but-unchanged input must not recompute anything: {recomputed[:5]}"
    assert (workdir / "results" / "manifest.tsv").read_bytes() == manifest_before


def test_reverting_an_edit_restores_byte_identical_results(base_run, tmp_path):
    workdir = _copy_of(base_run, tmp_path)
    original = read_manifest(workdir)
    study = copy.deepcopy(TINY_STUDY)
    study["analyses"][0]["voxel_counts"] = [10, 25, "all"]
    write_study(workdir, study)
    snakemake(workdir)
    assert not read_manifest(workdir).equals(original)
    write_study(workdir, TINY_STUDY)
    snakemake(workdir)
    reverted = read_manifest(workdir)
    assert reverted.equals(original)
    decode_logs = list((workdir / "results" / "logs" / "decode").glob("shape_*.log"))
    assert decode_logs and all("restored from the content memo" in log.read_text() for log in decode_logs)


def test_adding_a_subject_runs_only_its_jobs_and_the_group(base_run, tmp_path):
    workdir = _copy_of(base_run, tmp_path)
    study = copy.deepcopy(TINY_STUDY)
    study["demo"]["n_subjects"] = 4
    # The demo simulator writes every subject in one job; a real BIDS study adds files instead.
    # So the check is on the per-subject jobs: subject 04's, plus group-level ones.
    write_study(workdir, study)
    jobs = scheduled_jobs(workdir)
    per_subject = {wildcards["subject"] for rule, wildcards in jobs if "subject" in wildcards and rule != "demo_dataset"}
    # the demo job reruns (its settings changed), and the memo then restores any subject whose files are unchanged
    assert "04" in per_subject
    snakemake(workdir)
    recomputed = [log.name for log in (workdir / "results" / "logs").rglob("*.log") if "computed (key" in log.read_text()
                  and log.stat().st_mtime > time.time() - 600 and "sub-0" in log.name]
    assert recomputed and all("sub-04" in name for name in recomputed), recomputed


def test_one_or_two_cores_give_identical_manifests(base_run, tmp_path):
    workdir = copy_repository(tmp_path / "repo")
    write_study(workdir, TINY_STUDY)
    snakemake(workdir, cores=1)
    assert read_manifest(workdir).equals(read_manifest(base_run[0]))


def test_bundle_unpacks_and_verifies_and_names_a_corrupted_result(base_run, tmp_path):
    workdir = _copy_of(base_run, tmp_path)
    environment = workflow_environment(workdir)
    made = subprocess.run([sys.executable, "-m", "foldwise.provenance.bundle", "make", "--config", "config/study.yaml"], cwd=workdir,
                          capture_output=True, text=True, env=environment)
    assert made.returncode == 0, made.stderr
    archive = next((workdir / "results" / "bundle").glob("*.tar.gz"))
    with tarfile.open(archive) as bundle:
        names = bundle.getnames()
        bundle.extractall(tmp_path / "unpacked", filter="data")
    assert not [name for name in names if name.endswith((".nii", ".nii.gz"))], "participant images must be left out"
    assert any(name.endswith("REVIEW/README.md") for name in names)
    unpacked = next((tmp_path / "unpacked").iterdir())
    environment = workflow_environment(unpacked)
    verified = subprocess.run([sys.executable, "-m", "foldwise.provenance.bundle", "verify", "--cores", "2", "--config", "config/study.yaml"],
                              cwd=unpacked, capture_output=True, text=True, env=environment)
    assert verified.returncode == 0, verified.stdout[-3000:] + verified.stderr[-3000:]
    assert "every output reproduces" in verified.stdout
    # Corrupt one bundled result in a fresh unpack: verify names it.
    with tarfile.open(archive) as bundle:
        bundle.extractall(tmp_path / "again", filter="data")
    again = next((tmp_path / "again").iterdir())
    environment = workflow_environment(again)
    table = next((again / "results" / "group").rglob("*_group.tsv"))
    table.write_text(table.read_text().replace("\t0.", "\t9.", 1))
    broken = subprocess.run([sys.executable, "-m", "foldwise.provenance.bundle", "verify", "--check-only", "--config", "config/study.yaml"],
                            cwd=again, capture_output=True, text=True, env=environment)
    assert broken.returncode == 1
    assert f"MISMATCH: {table.relative_to(again).as_posix()}" in broken.stdout
