"""The content memo and provenance records (foldwise.provenance.memo), without Snakemake."""

import json
import multiprocessing
import os
from pathlib import Path
from types import SimpleNamespace

import pytest

from foldwise.errors import InputError
from foldwise.provenance.hashing import hash_file
from foldwise.provenance.memo import MemoStore, memo_key, relative_path, run_job
from workflow_support import Named


def _fake_smk(tmp_path, settings, source_text="alpha"):
    source = tmp_path / "in.txt"
    if not source.exists():
        source.write_text(source_text)
    return SimpleNamespace(
        input=Named(source=str(source)),
        output=Named(doubled=str(tmp_path / "out" / "doubled.txt"), provenance=str(tmp_path / "prov" / "job.json")),
        params=Named(settings=settings, code="code-v1"),
        log=[str(tmp_path / "logs" / "job.log")],
        wildcards=Named(subject="01"),
        config={"study": {"store_dir": str(tmp_path / "store")}},
    )


def _double(inputs, outputs, settings, log):
    _double.calls += 1
    text = Path(inputs["source"]).read_text()
    os.makedirs(os.path.dirname(outputs["doubled"]), exist_ok=True)
    with open(outputs["doubled"], "w") as handle:
        handle.write(text * settings["times"])


_double.calls = 0


def test_second_run_restores_byte_identical_output(tmp_path, monkeypatch):
    monkeypatch.chdir(tmp_path)
    _double.calls = 0
    smk = _fake_smk(tmp_path, {"times": 2})
    run_job(smk, "double", _double)
    first = Path(smk.output.doubled).read_text()
    first_record = json.loads(Path(smk.output.provenance).read_text())
    os.unlink(smk.output.doubled)  # Snakemake deletes outputs before a rerun
    run_job(smk, "double", _double)
    assert _double.calls == 1, "the second run must come from the memo"
    assert Path(smk.output.doubled).read_text() == first == "alphaalpha"
    record = json.loads(Path(smk.output.provenance).read_text())
    assert record["restored_from_memo"] is True and first_record["restored_from_memo"] is False
    assert record["key"] == first_record["key"]
    assert record["outputs"][0]["sha256"] == hash_file(smk.output.doubled)
    assert "restored from the content memo" in Path(smk.log[0]).read_text()


def _double_with_a_warning(inputs, outputs, settings, log):
    log.warning("subject 01: the lantern flickered %d times", 3)
    _double(inputs, outputs, settings, log)


def test_a_restored_job_logs_the_warnings_of_the_run_that_computed_it(tmp_path, monkeypatch):
    # The report lists every job's warnings from the logs: a restore must not lose them.
    monkeypatch.chdir(tmp_path)
    _double.calls = 0
    smk = _fake_smk(tmp_path, {"times": 2})
    run_job(smk, "double", _double_with_a_warning)
    os.unlink(smk.output.doubled)
    run_job(smk, "double", _double_with_a_warning)
    log_text = Path(smk.log[0]).read_text()
    assert _double.calls == 1 and "restored from the content memo" in log_text
    assert "WARNING subject 01: the lantern flickered 3 times" in log_text.splitlines()


def test_changed_settings_or_input_content_recompute(tmp_path, monkeypatch):
    monkeypatch.chdir(tmp_path)
    _double.calls = 0
    run_job(_fake_smk(tmp_path, {"times": 2}), "double", _double)
    run_job(_fake_smk(tmp_path, {"times": 3}), "double", _double)
    assert _double.calls == 2
    (tmp_path / "in.txt").write_text("beta")
    run_job(_fake_smk(tmp_path, {"times": 3}), "double", _double)
    assert _double.calls == 3
    assert Path(tmp_path / "out" / "doubled.txt").read_text() == "betabetabeta"
    # Reverting the input brings the earlier entry back without computing.
    (tmp_path / "in.txt").write_text("alpha")
    run_job(_fake_smk(tmp_path, {"times": 3}), "double", _double)
    assert _double.calls == 3
    assert Path(tmp_path / "out" / "doubled.txt").read_text() == "alphaalphaalpha"


def test_damaged_entry_is_discarded_and_recomputed(tmp_path, monkeypatch):
    monkeypatch.chdir(tmp_path)
    _double.calls = 0
    smk = _fake_smk(tmp_path, {"times": 2})
    run_job(smk, "double", _double)
    key = json.loads(Path(smk.output.provenance).read_text())["key"]
    stored = MemoStore(tmp_path / "store").entry_dir(key) / "0"
    os.unlink(smk.output.doubled)  # break the hard link before damaging the entry
    os.chmod(stored, 0o644)
    stored.write_text("garbage")
    run_job(smk, "double", _double)
    assert _double.calls == 2
    assert Path(smk.output.doubled).read_text() == "alphaalpha"


def test_input_error_exits_with_the_message(tmp_path, monkeypatch, capsys):
    monkeypatch.chdir(tmp_path)

    def refuse(inputs, outputs, settings, log):
        raise InputError("in.txt", "onset", "row 3 is not a number", "write seconds as numbers")

    with pytest.raises(SystemExit) as raised:
        run_job(_fake_smk(tmp_path, {"times": 1}), "refuse", refuse)
    assert raised.value.code == 1
    assert "foldwise: in.txt: onset: row 3 is not a number. Fix: write seconds as numbers" in capsys.readouterr().err
    assert not os.path.exists(tmp_path / "prov" / "job.json")


def test_memo_key_depends_on_every_part():
    base = dict(step="s", code="c", settings={"a": 1}, input_hashes={"x": ["h"]}, output_names={"o": 1})
    keys = {memo_key(**base)}
    for part, value in [("step", "t"), ("code", "d"), ("settings", {"a": 2}), ("input_hashes", {"x": ["i"]}), ("output_names", {"o": 2})]:
        keys.add(memo_key(**{**base, part: value}))
    assert len(keys) == 6


def test_relative_path_never_reveals_the_machine(tmp_path):
    assert relative_path(tmp_path / "a" / "b.txt", root=tmp_path) == "a/b.txt"
    assert relative_path("/home/someone/secret/data.nii.gz", root=tmp_path) == "<outside>/data.nii.gz"


def _store_same_entry(args):
    root, source, key = args
    outputs = {"out": source}
    MemoStore(root).store(key, outputs, {"step": "race"})
    return True


def test_parallel_writers_of_one_entry_leave_one_complete_entry(tmp_path):
    source = tmp_path / "payload.bin"
    source.write_bytes(os.urandom(1 << 20))
    key = "ab" + "0" * 62
    with multiprocessing.get_context("fork").Pool(4) as pool:
        assert all(pool.map(_store_same_entry, [(str(tmp_path / "store"), str(source), key)] * 16))
    entry = MemoStore(tmp_path / "store").entry_dir(key)
    record = json.loads(Path(entry / "entry.json").read_text())
    assert record["files"][0]["sha256"] == hash_file(source) == hash_file(entry / "0")
    assert os.listdir(tmp_path / "store" / "incoming") == []


def test_in_process_jobs_match_job_processes_and_fail_without_ending_the_process(tmp_path, monkeypatch, capsys):
    # run_in_process (a rule's run: block inside Snakemake) must give the same outputs and record as run_job,
    # and bad input must raise (Snakemake then marks the job failed) instead of calling sys.exit.
    import threading

    from foldwise.provenance.memo import JobFailed, run_in_process

    monkeypatch.chdir(tmp_path)
    _double.calls = 0
    (tmp_path / "a").mkdir()
    (tmp_path / "b").mkdir()
    by_process = _fake_smk(tmp_path / "a", {"times": 2})
    run_job(by_process, step="double", job=_double)
    smk = _fake_smk(tmp_path / "b", {"times": 2})
    results = []
    # Two jobs in two threads at once, as Snakemake runs them: each log holds only its own job's lines.
    second = _fake_smk(tmp_path / "b", {"times": 3})
    second.output = Named(doubled=str(tmp_path / "b" / "out" / "tripled.txt"), provenance=str(tmp_path / "b" / "prov" / "job3.json"))
    second.log = [str(tmp_path / "b" / "logs" / "job3.log")]
    threads = [threading.Thread(target=lambda s=s: results.append(run_in_process("double", _double, s.input, s.output, s.params,
                                                                                  s.wildcards, s.log, s.config)))
               for s in (smk, second)]
    for thread in threads:
        thread.start()
    for thread in threads:
        thread.join()
    assert Path(smk.output.doubled).read_bytes() == Path(by_process.output.doubled).read_bytes() == b"alphaalpha"
    assert Path(second.output.doubled).read_text() == "alpha" * 3
    first_record = json.loads(Path(by_process.output.provenance).read_text())
    record = json.loads(Path(smk.output.provenance).read_text())
    assert record["key"] == first_record["key"] and record["outputs"][0]["sha256"] == first_record["outputs"][0]["sha256"]
    assert record["cpu_time_s"] >= 0
    for log_path, other_key in ((smk.log[0], json.loads(Path(second.output.provenance).read_text())["key"]), (second.log[0], record["key"])):
        assert other_key not in Path(log_path).read_text()

    def refuse(inputs, outputs, settings, log):
        raise InputError("in.txt", "times", "not a number", "give a whole number")

    broken = _fake_smk(tmp_path / "b", {"times": "x"})
    with pytest.raises(JobFailed, match="in.txt: times: not a number"):
        run_in_process("double", refuse, broken.input, broken.output, broken.params, broken.wildcards, broken.log, broken.config)
    assert "foldwise: in.txt: times: not a number" in capsys.readouterr().err


_ENDING_SCRIPT = '''
import atexit, os, sys
from pathlib import Path
from types import SimpleNamespace
sys.path.insert(0, {tests!r})
from test_memo import Named
from foldwise.errors import InputError
from foldwise.provenance.memo import run_job

root = Path({root!r})
atexit.register(lambda: (root / "teardown-ran").write_text("yes"))  # what os._exit skips

def job(inputs, outputs, settings, log):
    if settings["fail"]:
        raise InputError("in.txt", "times", "not a number", "give a whole number")
    log.info("the job's last log line")
    print("stdout text still buffered", end="")  # no newline: flushed by run_job, or lost
    Path(outputs["doubled"]).parent.mkdir(parents=True, exist_ok=True)
    Path(outputs["doubled"]).write_text("alphaalpha")

smk = SimpleNamespace(input=Named(), output=Named(doubled=str(root / "out.txt"), provenance=str(root / "prov.json")),
                      params=Named(settings={{"fail": {fail}}}, code="c"), log=[str(root / "job.log")],
                      wildcards=Named(), config={{"study": {{"store_dir": str(root / "store")}}}})
run_job(smk, "double", job, end_process=True)
(root / "returned").write_text("yes")  # never reached with end_process
'''


@pytest.mark.parametrize("fail", [False, True])
def test_end_process_exits_after_every_file_is_written_and_only_on_success(tmp_path, fail):
    # A job script passes end_process=True: after the record and the log are written the process ends with
    # os._exit(0) (no interpreter teardown, no atexit hooks), its buffered stdout flushed; a failure still
    # prints the one foldwise: line and exits 1 through the normal exit (atexit hooks run).
    import subprocess
    import sys

    tests = os.path.dirname(os.path.abspath(__file__))
    script = tmp_path / "job_script.py"
    script.write_text(_ENDING_SCRIPT.format(tests=tests, root=str(tmp_path), fail=fail))
    environment = dict(os.environ, PYTHONPATH=os.pathsep.join([os.path.join(os.path.dirname(tests), "workflow"), tests]))
    completed = subprocess.run([sys.executable, str(script)], capture_output=True, text=True, cwd=tmp_path, env=environment, timeout=120)
    assert not (tmp_path / "returned").exists()
    if fail:
        assert completed.returncode == 1
        assert "foldwise: in.txt: times: not a number. Fix: give a whole number" in completed.stderr
        assert (tmp_path / "teardown-ran").exists() and not (tmp_path / "prov.json").exists()
        return
    assert completed.returncode == 0, completed.stderr
    assert completed.stdout == "stdout text still buffered"
    assert not (tmp_path / "teardown-ran").exists(), "end_process must skip the interpreter's teardown"
    assert (tmp_path / "out.txt").read_text() == "alphaalpha"
    record = json.loads((tmp_path / "prov.json").read_text())
    assert record["outputs"][0]["sha256"] == hash_file(tmp_path / "out.txt")
    log_text = (tmp_path / "job.log").read_text()
    assert "the job's last log line" in log_text and "computed (key" in log_text


_TINY_SNAKEFILE = '''
rule all:
    input: "out/doubled.txt"

rule double:
    input: source="in.txt"
    output: doubled="out/doubled.txt", provenance="prov/double.json"
    params: settings={"times": 2}, code="c"
    log: "logs/double.log"
    script: "double.py"
'''

_TINY_SCRIPT = '''
from pathlib import Path
from foldwise.provenance.memo import run_job

def double(inputs, outputs, settings, log):
    Path(outputs["doubled"]).write_text(Path(inputs["source"]).read_text() * 2)

run_job(snakemake, step="double", job=double, end_process=True)
'''


def test_snakemake_sees_a_job_that_ends_its_process_as_finished(tmp_path):
    # Snakemake judges a script job by its exit status and its outputs: both must be in place after os._exit,
    # and a second invocation must find nothing to do (no incomplete-output marker left behind).
    import subprocess
    import sys

    (tmp_path / "Snakefile").write_text(_TINY_SNAKEFILE)
    (tmp_path / "double.py").write_text(_TINY_SCRIPT)
    (tmp_path / "in.txt").write_text("alpha")
    snakemake = os.path.join(os.path.dirname(sys.executable), "snakemake")
    package = os.path.join(os.path.dirname(os.path.dirname(os.path.abspath(__file__))), "workflow")
    environment = dict(os.environ, PYTHONPATH=package)
    command = [snakemake, "--cores", "1", "--directory", str(tmp_path), "--snakefile", str(tmp_path / "Snakefile"),
               "--config", f"study={{'store_dir': '{tmp_path / 'store'}'}}"]
    first = subprocess.run(command, capture_output=True, text=True, env=environment, timeout=300)
    assert first.returncode == 0, first.stderr[-2000:]
    assert (tmp_path / "out" / "doubled.txt").read_text() == "alphaalpha"
    assert json.loads((tmp_path / "prov" / "double.json").read_text())["step"] == "double"
    again = subprocess.run(command + ["--dry-run"], capture_output=True, text=True, env=environment, timeout=300)
    assert again.returncode == 0 and "Nothing to be done" in again.stdout + again.stderr, again.stdout + again.stderr
