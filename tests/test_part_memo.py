"""The per-part memo: a job rerun by Snakemake recomputes only the parts whose own inputs changed."""

import json
import os
from pathlib import Path
from types import SimpleNamespace

import pytest

from foldwise.provenance.hashing import hash_file
from foldwise.provenance.memo import part_memo, run_job


class _Named(dict):
    """Stands in for Snakemake's Namedlist: items() plus attribute access."""

    def __getattr__(self, name):
        return self[name]


def _two_part_job(tmp_path, texts, times=2):
    """A job with two parts ("a", "b"): each copies its own source file ``times`` times."""
    sources = {}
    for name, text in texts.items():
        sources[name] = tmp_path / f"{name}.txt"
        if not sources[name].exists() or sources[name].read_text() != text:
            sources[name].write_text(text)
    return SimpleNamespace(
        input=_Named(sources=[str(sources[name]) for name in sorted(sources)]),
        output=_Named(copies=[str(tmp_path / "out" / f"{name}.txt") for name in sorted(sources)],
                      provenance=str(tmp_path / "prov" / "job.json")),
        params=_Named(settings={"times": times}, code="code-v1"),
        log=[str(tmp_path / "logs" / "job.log")],
        wildcards=_Named(subject="01"),
        config={"study": {"store_dir": str(tmp_path / "store")}},
    )


COMPUTED = []


def _copy_parts(inputs, outputs, settings, log):
    parts = part_memo()
    for source, copy in zip(inputs["sources"], outputs["copies"]):
        label = Path(source).stem
        identity = {"times": settings["times"], "source": parts.file_hash(source)}
        if parts.restore(label, identity, {"copy": copy}):
            continue
        COMPUTED.append(label)
        if "b" in label:
            log.warning("part %s: the lantern flickered", label)
        os.makedirs(os.path.dirname(copy), exist_ok=True)
        Path(copy).write_text(Path(source).read_text() * settings["times"])
        parts.store(label, identity, {"copy": copy})


def _rerun(smk):
    for path in smk.output.copies:  # Snakemake removes a job's outputs before it reruns
        Path(path).unlink(missing_ok=True)
    COMPUTED.clear()
    run_job(smk, "copy_parts", _copy_parts)
    return json.loads(Path(smk.output.provenance).read_text())


def test_a_changed_part_is_the_only_one_recomputed(tmp_path, monkeypatch):
    monkeypatch.chdir(tmp_path)
    first = _rerun(_two_part_job(tmp_path, {"a": "ember", "b": "glow"}))
    assert COMPUTED == ["a", "b"] and [part["restored"] for part in first["parts"]] == [False, False]
    # Part b's source changes: the job reruns as a whole, part a comes from the store.
    smk = _two_part_job(tmp_path, {"a": "ember", "b": "hush"})
    second = _rerun(smk)
    assert COMPUTED == ["b"]
    assert [(part["part"], part["restored"]) for part in second["parts"]] == [("a", True), ("b", False)]
    assert [Path(path).read_text() for path in smk.output.copies] == ["emberember", "hushhush"]
    assert second["parts"][0]["key"] == first["parts"][0]["key"] and second["parts"][1]["key"] != first["parts"][1]["key"]
    # Restored files are the stored bytes, and the provenance record lists their hashes.
    assert {item["sha256"] for item in second["outputs"]} == {hash_file(path) for path in smk.output.copies}


def test_a_setting_or_code_change_recomputes_every_part(tmp_path, monkeypatch):
    monkeypatch.chdir(tmp_path)
    _rerun(_two_part_job(tmp_path, {"a": "ember", "b": "glow"}))
    _rerun(_two_part_job(tmp_path, {"a": "ember", "b": "glow"}, times=3))
    assert COMPUTED == ["a", "b"]
    smk = _two_part_job(tmp_path, {"a": "ember", "b": "glow"}, times=3)
    smk.params["code"] = "code-v2"
    _rerun(smk)
    assert COMPUTED == ["a", "b"]


def test_a_restored_part_logs_the_warnings_it_was_computed_with(tmp_path, monkeypatch):
    # The report lists every job's warnings from the logs: restoring a part must not lose them.
    monkeypatch.chdir(tmp_path)
    _rerun(_two_part_job(tmp_path, {"a": "ember", "b": "glow"}))
    _rerun(_two_part_job(tmp_path, {"a": "hush", "b": "glow"}))
    assert COMPUTED == ["a"]
    assert "WARNING part b: the lantern flickered" in Path(tmp_path / "logs" / "job.log").read_text().splitlines()


def test_memo_off_and_damaged_entries_recompute(tmp_path, monkeypatch):
    monkeypatch.chdir(tmp_path)
    _rerun(_two_part_job(tmp_path, {"a": "ember", "b": "glow"}))
    monkeypatch.setenv("FOLDWISE_MEMO", "off")
    _rerun(_two_part_job(tmp_path, {"a": "ember", "b": "hush"}))
    assert COMPUTED == ["a", "b"]
    monkeypatch.delenv("FOLDWISE_MEMO")
    # Damage every stored copy of part a: the memo discards the entry and computes the part again.
    for stored in (tmp_path / "store" / "objects").rglob("0"):
        if stored.read_text() == "emberember":
            os.chmod(stored, 0o644)
            stored.write_text("tampered!!")
    _rerun(_two_part_job(tmp_path, {"a": "ember", "b": "dusk"}))
    assert COMPUTED == ["a", "b"]
    assert Path(tmp_path / "out" / "a.txt").read_text() == "emberember"


def test_part_memo_outside_a_job_is_refused():
    with pytest.raises(RuntimeError, match="only inside a job"):
        part_memo()
