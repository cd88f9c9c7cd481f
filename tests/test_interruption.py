"""Interruption and concurrency: a killed run leaves nothing that looks finished, and two writers cannot corrupt anything.

End to end (marked ``e2e``) on a mini demo study (2 subjects x 2 runs, 2 ROIs,
one analysis: 20 jobs):

- one uninterrupted run, during which a second workflow process on the same
  folder is started: it must stop on Snakemake's directory lock, and the
  first run must still finish with an intact manifest;
- a run killed (SIGKILL to its whole process group) while a decode job is
  running, then rerun: the manifest must equal the uninterrupted one, and at
  no point may a file at an output's name, or an entry of the content store,
  be half-written.

Without Snakemake: processes racing ``MemoStore.restore`` against
``MemoStore.store`` on the same keys, and several ``run_job`` writers of one
key, leave complete entries only and restore only complete outputs.
"""

import copy
import json
import logging
import multiprocessing
import os
import signal
import subprocess
import sys
import time
from pathlib import Path
from types import SimpleNamespace

import pandas as pd
import pytest

from foldwise.provenance.hashing import hash_file
from foldwise.provenance.memo import MemoStore, run_job
from test_privacy import private_record_problems
from workflow_support import TINY_STUDY, Named, copy_repository, read_manifest, snakemake, workflow_environment, write_study

MINI_STUDY = copy.deepcopy(TINY_STUDY)
MINI_STUDY["study"]["name"] = "mini"
MINI_STUDY["demo"].update(n_subjects=2, n_runs=2)
MINI_STUDY["rois"] = MINI_STUDY["rois"][:2]
MINI_STUDY["analyses"] = MINI_STUDY["analyses"][:1]
MINI_STUDY["group"]["n_draws"] = 100

LOCK_MESSAGE = "Error: Directory cannot be locked."
POLL_S = 0.01
START_TIMEOUT_S = 300


def _start_workflow(workdir):
    """Start Snakemake in its own process group (so the whole group can be killed), output to a file."""
    output = open(workdir / "workflow-output.txt", "w", encoding="utf-8")
    command = [sys.executable, "-m", "snakemake", "--profile", "config/profiles/local", "--cores", "2",
               "--config", "config_file=config/study.yaml"]
    process = subprocess.Popen(command, cwd=workdir, env=workflow_environment(workdir), stdout=output,
                               stderr=subprocess.STDOUT, start_new_session=True)
    output.close()
    return process


def _wait_for(condition, process, what):
    waited = 0.0
    while not condition():
        if process.poll() is not None:
            raise AssertionError(f"the workflow ended ({process.returncode}) before {what}")
        if waited > START_TIMEOUT_S:
            raise AssertionError(f"no {what} after {START_TIMEOUT_S} s")
        time.sleep(POLL_S)
        waited += POLL_S


def _running_decode_jobs(workdir):
    """Decode jobs that have opened their log but not yet written their provenance record."""
    logs = workdir / "results" / "logs" / "decode"
    records = workdir / "results" / "provenance" / "decode"
    return sorted(log.stem for log in (logs.glob("*.log") if logs.is_dir() else []) if not (records / f"{log.stem}.json").exists())


def _mini_repository(tmp_path_factory, name):
    workdir = copy_repository(tmp_path_factory.mktemp(name) / "repo")
    write_study(workdir, MINI_STUDY)
    return workdir


# -- what "nothing half-written" means, checked on a results folder ---------------------------------
def store_problems(store):
    """Entries of the content store whose files do not match their entry.json (or that have none)."""
    problems = []
    objects = Path(store) / "objects"
    for entry in sorted(objects.glob("*/*")) if objects.is_dir() else []:
        try:
            record = json.loads((entry / "entry.json").read_text(encoding="utf-8"))
        except (OSError, ValueError) as error:
            problems.append(f"{entry.name}: no readable entry.json ({error})")
            continue
        if record.get("key") != entry.name:
            problems.append(f"{entry.name}: entry.json names key {record.get('key')}")
        for number, file in enumerate(record["files"]):
            stored = entry / str(number)
            if not stored.is_file() or hash_file(stored) != file["sha256"] or stored.stat().st_size != file["size"]:
                problems.append(f"{entry.name}: file {number} does not match entry.json")
        extra = sorted({path.name for path in entry.iterdir()} - {"entry.json"} - {str(n) for n in range(len(record["files"]))})
        if extra:
            problems.append(f"{entry.name}: unexpected files {extra}")
    return problems


def half_written_outputs(workdir, reference):
    """Files at an output's name whose content is not the finished content (the reference run's sha256)."""
    wrong = []
    for row in reference.itertuples():
        path = workdir / row.path
        if path.exists() and hash_file(path) != row.sha256:
            wrong.append(row.path)
    return wrong


def temporary_files(workdir):
    """Leftover temporaries: atomic writes' ``.<name>.<random>.part`` and the store's staging folders."""
    parts = sorted(str(path.relative_to(workdir)) for path in (workdir / "results").rglob("*.part"))
    incoming = workdir / "results" / ".store" / "incoming"
    staging = sorted(str(path.relative_to(workdir)) for path in incoming.iterdir()) if incoming.is_dir() else []
    return parts, staging


def manifest_problems(workdir):
    """Outputs listed in the manifest whose file is missing or does not hash to the listed sha256."""
    return [row.path for row in read_manifest(workdir).itertuples()
            if not (workdir / row.path).is_file() or hash_file(workdir / row.path) != row.sha256]


# -- the uninterrupted run, with a second process trying the same folder -----------------------------
@pytest.fixture(scope="module")
def reference_run(tmp_path_factory):
    workdir = _mini_repository(tmp_path_factory, "reference")
    first = _start_workflow(workdir)
    try:
        _wait_for(lambda: any((workdir / ".snakemake" / "locks").glob("*.lock")), first, "directory lock")
        # The mini study finishes in ~6 s and a second Snakemake needs ~3 s to reach the lock: the first run and
        # its jobs are paused (SIGSTOP to the group) while the second tries, so the lock is certainly held.
        os.killpg(first.pid, signal.SIGSTOP)
        try:
            second = snakemake(workdir, check=False)
            first_still_running = first.poll() is None
        finally:
            os.killpg(first.pid, signal.SIGCONT)
        first.wait(timeout=900)
    finally:
        if first.poll() is None:
            os.killpg(first.pid, signal.SIGKILL)
    output = (workdir / "workflow-output.txt").read_text(encoding="utf-8")
    return SimpleNamespace(workdir=workdir, returncode=first.returncode, output=output, second=second,
                           first_still_running=first_still_running)


@pytest.mark.e2e
def test_a_second_workflow_on_the_same_folder_stops_on_the_lock(reference_run):
    second = reference_run.second
    assert reference_run.first_still_running, "the second process must have run while the first held the lock"
    assert second.returncode != 0
    assert LOCK_MESSAGE in second.stdout + second.stderr
    assert "--unlock" in second.stdout + second.stderr
    assert reference_run.returncode == 0, reference_run.output[-4000:]
    assert manifest_problems(reference_run.workdir) == []
    assert store_problems(reference_run.workdir / "results" / ".store") == []


@pytest.mark.e2e
def test_the_uninterrupted_run_records_no_machine_paths(reference_run):
    records = sorted((reference_run.workdir / "results" / "provenance").rglob("*.json"))
    assert len(records) >= len(set(read_manifest(reference_run.workdir)["job"]))  # one per job, the manifest's own too
    assert {str(path.relative_to(reference_run.workdir)): private_record_problems(path) for path in records
            if private_record_problems(path)} == {}


# -- the interrupted run --------------------------------------------------------------------------------
@pytest.mark.e2e
def test_a_killed_run_leaves_nothing_half_written_and_reruns_to_the_same_manifest(reference_run, tmp_path_factory):
    reference = read_manifest(reference_run.workdir)
    workdir = _mini_repository(tmp_path_factory, "interrupted")
    process = _start_workflow(workdir)
    try:
        _wait_for(lambda: _running_decode_jobs(workdir), process, "decode job")
    finally:
        os.killpg(process.pid, signal.SIGKILL)  # the workflow and every job it started
        process.wait()
    interrupted = _running_decode_jobs(workdir)
    assert interrupted, "the kill must land while a decode job runs"
    finished = {path: path.stat().st_mtime_ns for path in (workdir / "results" / "provenance").rglob("*.json")}
    assert not (workdir / "results" / "manifest.tsv").exists()
    assert half_written_outputs(workdir, reference) == []
    assert store_problems(workdir / "results" / ".store") == []
    parts, _ = temporary_files(workdir)  # store staging folders may be left in incoming/: restore never reads there
    assert all(Path(part).name.startswith(".") for part in parts), parts  # never at an output's own name

    locked = snakemake(workdir, check=False)  # a kill leaves Snakemake's lock behind
    assert locked.returncode != 0 and LOCK_MESSAGE in locked.stdout + locked.stderr
    snakemake(workdir, "--unlock")
    rerun = snakemake(workdir)
    assert "decode" in rerun.stdout + rerun.stderr

    pd.testing.assert_frame_equal(read_manifest(workdir), reference)
    assert manifest_problems(workdir) == []
    assert half_written_outputs(workdir, reference) == []
    assert store_problems(workdir / "results" / ".store") == []
    for name in interrupted:
        assert (workdir / "results" / "provenance" / "decode" / f"{name}.json").is_file()
    # Jobs done before the kill did not run again, except a job that wrote its record in the instant before the
    # kill, before Snakemake noted it as finished: Snakemake reruns it (and the run guard recomputes it, as it
    # does every job that was running at a kill). On 2 cores at most 2 jobs can be in that instant; jobs in
    # Snakemake's own process (threads) wait for its bookkeeping longer than job processes did, so this happens.
    rerun_records = [path for path in finished if path.stat().st_mtime_ns != finished[path]]
    assert len(rerun_records) <= 2 and len(finished) - len(rerun_records) >= 1, rerun_records


# -- racing the content store directly (no Snakemake) -----------------------------------------------------
PAYLOAD_BYTES = 1 << 20
N_KEYS = 12
N_WORKERS = 6


def _payload(key_number):
    return bytes([key_number % 251]) * PAYLOAD_BYTES


def _race_worker(arguments):
    """Store or restore each key in turn (workers alternate roles per key); return what went wrong."""
    root, folder, worker = arguments
    store = MemoStore(root)
    problems = []
    log = logging.getLogger(f"race.{worker}")
    for number in range(N_KEYS):
        key = f"{number:02d}" + f"{number:062d}"
        destination = Path(folder) / f"worker-{worker}" / f"key-{number}.bin"
        if (worker + number) % 2 == 0:
            source = Path(folder) / f"source-{number}.bin"
            store.store(key, {"out": str(source)}, {"step": "race", "worker": worker})
        else:
            deadline = time.monotonic() + 60
            while not store.restore(key, {"out": str(destination)}, log):
                if time.monotonic() > deadline:
                    problems.append(f"key {number}: never restorable")
                    break
                time.sleep(0.001)
            else:
                if destination.read_bytes() != _payload(number):
                    problems.append(f"key {number}: restored content differs")
    return problems


def test_restore_racing_store_only_ever_sees_complete_entries(tmp_path):
    for number in range(N_KEYS):
        (tmp_path / f"source-{number}.bin").write_bytes(_payload(number))
    root = tmp_path / "store"
    with multiprocessing.get_context("fork").Pool(N_WORKERS) as pool:
        problems = pool.map(_race_worker, [(str(root), str(tmp_path), worker) for worker in range(N_WORKERS)])
    assert problems == [[]] * N_WORKERS
    assert store_problems(root) == []
    assert len(list((root / "objects").glob("*/*"))) == N_KEYS
    assert os.listdir(root / "incoming") == []


def _doubling_job(inputs, outputs, settings, log):
    text = Path(inputs["source"]).read_text(encoding="utf-8")
    Path(outputs["doubled"]).parent.mkdir(parents=True, exist_ok=True)
    Path(outputs["doubled"]).write_text(text * settings["times"], encoding="utf-8")


def _run_job_worker(arguments):
    """One run_job of the shared key, writing its own outputs; returns (exit code, key)."""
    folder, worker = arguments
    os.chdir(folder)
    smk = SimpleNamespace(input=Named(source="lantern.txt"),
                          output=Named(doubled=f"out/{worker}/doubled.txt", provenance=f"prov/{worker}.json"),
                          params=Named(settings={"times": 3}, code="v1"), log=[f"logs/{worker}.log"],
                          wildcards=Named(worker=str(worker)), config={"study": {"store_dir": "store"}})
    try:
        run_job(smk, "double", _doubling_job)
    except SystemExit as stop:
        return stop.code, None
    return 0, json.loads(Path(smk.output.provenance).read_text(encoding="utf-8"))["key"]


def test_several_jobs_writing_one_memo_entry_leave_one_complete_entry(tmp_path):
    (tmp_path / "lantern.txt").write_text("round square star " * 50000, encoding="utf-8")
    with multiprocessing.get_context("fork").Pool(N_WORKERS) as pool:
        results = pool.map(_run_job_worker, [(str(tmp_path), worker) for worker in range(2 * N_WORKERS)])
    assert {code for code, _ in results} == {0} and len({key for _, key in results}) == 1
    expected = (tmp_path / "lantern.txt").read_text(encoding="utf-8") * 3
    for worker in range(2 * N_WORKERS):
        assert (tmp_path / "out" / str(worker) / "doubled.txt").read_text(encoding="utf-8") == expected
    assert store_problems(tmp_path / "store") == []
    assert len(list((tmp_path / "store" / "objects").glob("*/*"))) == 1
    assert os.listdir(tmp_path / "store" / "incoming") == []
