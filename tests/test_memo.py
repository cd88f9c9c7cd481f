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


class _Named(dict):
    """Stands in for Snakemake's Namedlist: items() plus attribute access."""

    def __getattr__(self, name):
        return self[name]

    def __len__(self):
        return dict.__len__(self)


def _fake_smk(tmp_path, settings, source_text="alpha"):
    source = tmp_path / "in.txt"
    if not source.exists():
        source.write_text(source_text)
    return SimpleNamespace(
        input=_Named(source=str(source)),
        output=_Named(doubled=str(tmp_path / "out" / "doubled.txt"), provenance=str(tmp_path / "prov" / "job.json")),
        params=_Named(settings=settings, code="code-v1"),
        log=[str(tmp_path / "logs" / "job.log")],
        wildcards=_Named(subject="01"),
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
    second.output = _Named(doubled=str(tmp_path / "b" / "out" / "tripled.txt"), provenance=str(tmp_path / "b" / "prov" / "job3.json"))
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
