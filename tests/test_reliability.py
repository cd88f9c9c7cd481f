"""Nothing silently wrong: overrides, forced reruns, package changes, store integrity, the bundle, privacy, leftovers.

One test (or a few) per finding; each failed on the code before these guards
(noted beside it) and passes now. The unit tests run in the quick set; the
end-to-end tests share one tiny demo run (marked e2e and slow).
"""

import json
import os
import shutil
import subprocess
import sys
import tarfile
import time
from pathlib import Path
from types import SimpleNamespace

import pandas as pd
import pytest

from foldwise.config import apply_overrides, load_yaml
from foldwise.errors import InputError
from foldwise.provenance import bundle, memo, runs, store
from foldwise.provenance.environment import CHANGE_VARIABLE, check_environment, read_lock, version_differences
from foldwise.provenance.hashing import hash_file

from workflow_support import REPO, TINY_STUDY, copy_repository, read_manifest, snakemake, workflow_environment, write_study

DEMO_CONFIG = REPO / "config" / "config.yaml"


# -- 1. overrides ---------------------------------------------------------------------------------------
def test_a_nested_override_is_merged_before_validation():
    # Before: --config 'study={seed: 3}' was ignored (or blamed on --configfile); the study ran with the file's seed.
    study = apply_overrides(load_yaml(DEMO_CONFIG), ["config_file=config/config.yaml", "study={seed: 3}"], "config/config.yaml")
    assert study["study"]["seed"] == 3
    assert study["study"]["name"] == load_yaml(DEMO_CONFIG)["study"]["name"]  # a nested mapping merges key by key


def test_dotted_overrides_through_set_reach_nested_keys_and_list_entries():
    # Snakemake's own parser refuses 'study.seed=3' before the workflow starts; `set=` (make ... SET='...') carries them.
    study = apply_overrides(load_yaml(DEMO_CONFIG), ["set=study.seed=5 analyses[0].n_permutations=30 glm.serial_correlation=ignore"],
                            "config/config.yaml")
    assert (study["study"]["seed"], study["analyses"][0]["n_permutations"], study["glm"]["serial_correlation"]) == (5, 30, "ignore")


def test_a_quoted_override_stays_text():
    # Values are read with yaml.safe_load (YAML 1.1 rules): a quoted '01' is the string 01, not the number 1.
    study = apply_overrides(load_yaml(DEMO_CONFIG), ["set=study.name='01'"], "config/config.yaml")
    assert study["study"]["name"] == "01"


@pytest.mark.parametrize("entry, named", [
    ("study={sede: 3}", "'sede'"),                                 # unknown key, named with its suggestion
    ("set=study.seed=x", "study.seed=x"),                           # wrong type, the entry as typed
    ("set=analyses[9].n_permutations=3", "analyses[9]"),            # no such list entry
    ("set=analyses.n_permutations=3", "not a mapping"),             # a list reached as a mapping
    ("glm=[1", "not plain YAML"),                                   # malformed value
    ("set=study", "dotted.key=value"),                              # no value
])
def test_an_override_that_cannot_be_honoured_is_refused_naming_what_was_passed(entry, named):
    with pytest.raises(InputError) as raised:
        apply_overrides(load_yaml(DEMO_CONFIG), [entry], "config/config.yaml")
    assert raised.value.file == "--config"
    assert named in str(raised.value)
    assert "Fix:" in str(raised.value)


def test_configfile_is_still_refused():
    with pytest.raises(InputError, match="--configfile"):
        apply_overrides(load_yaml(DEMO_CONFIG), [], "config/config.yaml", configfiles=[Path("x.yaml")])


# -- 2. forced means forced ------------------------------------------------------------------------------
def test_an_edit_keeping_size_and_mtime_is_a_hash_cache_miss(tmp_path):
    # Before: the cache key was (path, size, mtime), so `cp -p`/`rsync -t` edits kept the stale hash.
    events = tmp_path / "events.tsv"
    events.write_text("onset\tduration\ttrial_type\n0\t1\tseen_round\n")
    cache = memo.MemoStore(tmp_path / "store")
    before = cache.content_hash(events)
    stamp = os.stat(events)
    time.sleep(0.02)
    events.write_text("onset\tduration\ttrial_type\n0\t1\tseen_stars\n")  # same size
    os.utime(events, ns=(stamp.st_atime_ns, stamp.st_mtime_ns))
    assert os.stat(events).st_size == stamp.st_size and os.stat(events).st_mtime_ns == stamp.st_mtime_ns
    assert cache.content_hash(events) == hash_file(events) != before


def test_the_hash_cache_keeps_no_path(tmp_path):
    # Before: each cache file held the input's absolute path (every user's folders in a shared store).
    source = tmp_path / "private-folder" / "bold.nii.gz"
    source.parent.mkdir()
    source.write_bytes(b"x" * 100)
    memo.MemoStore(tmp_path / "store").content_hash(source)
    texts = [path.read_text() for path in (tmp_path / "store" / "hashes").rglob("*.json")]
    assert texts and not any("private-folder" in text or str(tmp_path) in text for text in texts)


class _Named(dict):
    """Enough of Snakemake's namedlist for run_job: attribute access and items()."""

    def __getattr__(self, name):
        return self[name]


def _job(tmp_path, text="alpha"):
    source = tmp_path / "in.txt"
    source.write_text(text)
    return SimpleNamespace(
        input=_Named(source=str(source)),
        output=_Named(copied=str(tmp_path / "out" / "copied.txt"), provenance=str(tmp_path / "prov" / "job.json")),
        params=_Named(settings={"k": 1}, code="code-v1"), log=[str(tmp_path / "logs" / "job.log")],
        wildcards=_Named(), config={"study": {"store_dir": str(tmp_path / "store")}})


def _copy_job(inputs, outputs, settings, log):
    _copy_job.calls += 1
    Path(outputs["copied"]).parent.mkdir(parents=True, exist_ok=True)
    Path(outputs["copied"]).write_text(Path(inputs["source"]).read_text())


_copy_job.calls = 0


def test_a_forced_job_bypasses_the_memo(tmp_path, monkeypatch):
    # Before: a job forced by --forcerun/--forceall restored its outputs from the memo like any other.
    monkeypatch.chdir(tmp_path)
    monkeypatch.delenv(memo.FORCED_JOBS_VARIABLE, raising=False)
    smk = _job(tmp_path)
    memo.run_job(smk, "copy", _copy_job)
    calls = _copy_job.calls
    memo.run_job(smk, "copy", _copy_job)
    assert _copy_job.calls == calls  # restored
    listing = tmp_path / "forced.txt"
    listing.write_text(f"{smk.output.provenance}\n")
    monkeypatch.setenv(memo.FORCED_JOBS_VARIABLE, str(listing))
    memo.run_job(smk, "copy", _copy_job)
    assert _copy_job.calls == calls + 1  # recomputed
    assert "forced by Snakemake" in Path(smk.log[0]).read_text()


# -- 3. environment drift ------------------------------------------------------------------------------
def test_a_package_version_that_differs_from_the_lock_stops_the_run(tmp_path):
    # Before: after a patch-version change of pandas the workflow said "Nothing to be done".
    lock = tmp_path / "lock.txt"
    lock.write_text("numpy==2.4.6\npandas==3.1.1\nscikit_learn==1.8.0\n# a comment\n")
    installed = {"python": "3.11.7", "numpy": "2.4.6", "pandas": "3.1.2", "scikit-learn": "1.8.0", "foldwise": "0.1.0"}
    with pytest.raises(InputError) as raised:
        check_environment(lock, installed=installed, environ={})
    message = str(raised.value)
    assert "pandas 3.1.1 locked, 3.1.2 installed" in message and "make env" in message
    assert raised.value.field == "pandas"


def test_the_lock_names_are_compared_in_normal_form_and_the_opt_in_lets_the_run_go_on(tmp_path):
    lock = tmp_path / "lock.txt"
    lock.write_text("scikit_learn==1.8.0\nPyYAML==6.0.3\n")
    assert read_lock(lock) == {"scikit-learn": "1.8.0", "pyyaml": "6.0.3"}
    installed = {"scikit-learn": "1.9.0", "PyYAML": "6.0.3", "python": "3.11.7"}
    assert version_differences(read_lock(lock), installed) == [("scikit-learn", "1.8.0", "1.9.0")]
    assert check_environment(lock, installed=installed, environ={CHANGE_VARIABLE: "rerun"}) == [("scikit-learn", "1.8.0", "1.9.0")]


def test_this_environment_matches_the_repository_lock():
    assert check_environment(REPO / "requirements" / "lock.txt", environ={}) == []


# -- 4. integrity --------------------------------------------------------------------------------------
def test_a_restore_is_a_copy_so_a_changed_store_object_cannot_reach_the_result(tmp_path, monkeypatch):
    # Before: restores were hard links; writing into the store object changed the result file too.
    monkeypatch.chdir(tmp_path)
    monkeypatch.delenv(memo.FORCED_JOBS_VARIABLE, raising=False)
    smk = _job(tmp_path, "true value")
    memo.run_job(smk, "copy", _copy_job)
    os.unlink(smk.output.copied)
    memo.run_job(smk, "copy", _copy_job)  # restored
    result = Path(smk.output.copied)
    stored = next((tmp_path / "store" / "objects").rglob("0"))
    assert os.stat(result).st_ino != os.stat(stored).st_ino
    os.chmod(stored, 0o644)
    stored.write_text("bad value!")
    assert result.read_text() == "true value"
    damaged = store.check_store(tmp_path / "store")
    assert [problem for _, problem in damaged] == ["file 0 differs from its sha256 (changed after it was stored)"]


def test_an_output_changed_after_its_job_is_named_at_the_end_of_the_run(tmp_path, monkeypatch):
    monkeypatch.chdir(tmp_path)
    monkeypatch.delenv(memo.FORCED_JOBS_VARIABLE, raising=False)
    smk = _job(tmp_path)
    memo.run_job(smk, "copy", _copy_job)
    assert runs.output_differences([smk.output.provenance], tmp_path / "store") == []
    Path(smk.output.copied).write_text("edited")
    with pytest.raises(InputError) as raised:
        runs.finish_run([smk.output.provenance], tmp_path / "store")
    assert raised.value.file == os.path.relpath(smk.output.copied) and "provenance record" in raised.value.problem


def test_leftovers_of_a_killed_run_are_removed_and_live_staging_is_kept(tmp_path):
    # Before: `.part` files and incoming/ folders of a killed run stayed for good.
    results, store_dir = tmp_path / "results", tmp_path / "results" / ".store"
    (results / "patterns").mkdir(parents=True)
    part = results / "patterns" / ".sub-01_patterns.tsv.abc123.part"
    restore = results / "patterns" / ".sub-01_patterns.tsv.4242.restore"
    kept = results / "patterns" / "sub-01_patterns.tsv"
    for path in (part, restore, kept):
        path.write_text("x")
    incoming = store_dir / "incoming"
    dead = incoming / f"abcdef123456.{runs._HOST}.999999999.x1"
    alive = incoming / f"abcdef123456.{runs._HOST}.{os.getpid()}.x2"
    foreign_old = incoming / "abcdef123456.otherhost.17.x3"
    foreign_new = incoming / "abcdef123456.otherhost.18.x4"
    for folder in (dead, alive, foreign_old, foreign_new):
        folder.mkdir(parents=True)
    os.utime(foreign_old, (time.time() - 2 * runs.LEFTOVER_AGE_S,) * 2)
    removed = runs.remove_leftovers(results, store_dir)
    assert not part.exists() and not restore.exists() and kept.exists()
    assert not dead.exists() and not foreign_old.exists() and alive.exists() and foreign_new.exists()
    assert len(removed) == 4


def _stored(store_dir, key, files):
    """Write a store entry by hand: {number: bytes}."""
    entry = Path(store_dir) / "objects" / key[:2] / key
    entry.mkdir(parents=True)
    listed = []
    for number, data in enumerate(files):
        (entry / str(number)).write_bytes(data)
        listed.append({"name": "out", "index": number, "sha256": hash_file(entry / str(number)), "size": len(data)})
    (entry / "entry.json").write_text(json.dumps({"key": key, "files": listed}))
    return entry


def test_store_clean_drops_entries_no_manifest_reaches(tmp_path):
    # Before: the store only grew.
    kept = _stored(tmp_path / "store", "a" * 64, [b"kept"])
    dropped = _stored(tmp_path / "store", "b" * 64, [b"old study"])
    damaged = _stored(tmp_path / "store", "c" * 64, [b"kept"])
    (damaged / "0").write_bytes(b"kepT")  # bit rot, same size
    manifest = tmp_path / "manifest.tsv"
    pd.DataFrame({"path": ["results/x.tsv"], "sha256": [hash_file(kept / "0")], "job": ["x"]}).to_csv(manifest, sep="\t", index=False)
    summary = store.clean_store(tmp_path / "store", [manifest], min_age_s=0)
    assert (summary["kept"], summary["dropped"]) == (1, 2)
    assert kept.exists() and not dropped.exists() and not damaged.exists()
    with pytest.raises(InputError, match="manifest does not exist"):
        store.clean_store(tmp_path / "store", [tmp_path / "none.tsv"], min_age_s=0)


def test_store_check_exit_status(tmp_path, capsys):
    _stored(tmp_path / "store", "d" * 64, [b"fine"])
    assert store.main(["check", "--store", str(tmp_path / "store")]) == 0
    broken = _stored(tmp_path / "store", "e" * 64, [b"fine"])
    (broken / "0").unlink()
    assert store.main(["check", "--store", str(tmp_path / "store")]) == 1
    assert "DAMAGED: objects/ee/" in capsys.readouterr().out


# -- 5. the bundle -------------------------------------------------------------------------------------
def _git(repository, *arguments):
    environment = dict(os.environ, GIT_AUTHOR_NAME="t", GIT_AUTHOR_EMAIL="t@t", GIT_COMMITTER_NAME="t", GIT_COMMITTER_EMAIL="t@t")
    subprocess.run(["git", *arguments], cwd=repository, check=True, capture_output=True, env=environment)


def _write(path, text):
    path.parent.mkdir(parents=True, exist_ok=True)
    path.write_text(text, encoding="utf-8")
    return path


def _record(repository, name, step, outputs, inputs=(), settings=None):
    """A provenance record whose key matches its fields (as run_job writes it)."""
    record = {"step": step, "wildcards": {}, "code_hash": "c0de", "settings": settings or {"n_permutations": 100},
              "versions": memo.package_versions(), "empty_inputs": [],
              "inputs": [{"name": "table", "path": path, "sha256": hash_file(repository / path)} for path in inputs],
              "outputs": [{"name": "table", "path": path, "sha256": hash_file(repository / path)} for path in outputs]}
    record["key"] = bundle._record_key(record)
    _write(repository / "results" / "provenance" / step / f"{name}.json", json.dumps(record, indent=1))
    return record


@pytest.fixture(scope="module")
def two_studies(tmp_path_factory):
    """A git checkout where study "old" ran first (analysis shape) and then study "tiny" (analysis carry) with an untracked config."""
    repository = copy_repository(tmp_path_factory.mktemp("two") / "repository")
    _git(repository, "init", "-q")
    _git(repository, "add", "-A", ".")
    _git(repository, "commit", "-q", "-m", "copy")
    write_study(repository, TINY_STUDY)  # config/study.yaml: not committed
    _write(repository / "results/group/shape/shape_group.tsv", "roi\tmean\nember\t0.9\n")  # the earlier study's
    _record(repository, "shape", "group", ["results/group/shape/shape_group.tsv"])
    _write(repository / "results/decoding/carry/sub-01_scores.tsv", "roi\tscore\nember\t0.5\n")
    _write(repository / "results/group/carry/carry_group.tsv", "roi\tmean\nember\t0.4\n")
    _write(repository / "results/report/index.html",
           '<html><figure id="fig-carry_roi-ember_curve"><img src="data:curve"></figure>'
           '<figure id="fig-sub-01_masks"><img src="data:MEANBOLD"></figure><figure id="fig-sub-01_resvar"><img src="data:RESVAR"></figure></html>')
    _write(repository / "results/report/figures/sub-01_masks.png", "png")
    _record(repository, "carry_sub-01", "decode_gather", ["results/decoding/carry/sub-01_scores.tsv"])
    _record(repository, "carry", "group", ["results/group/carry/carry_group.tsv"], inputs=["results/decoding/carry/sub-01_scores.tsv"])
    _record(repository, "study", "report", ["results/report/index.html", "results/report/figures/sub-01_masks.png"])
    listed = ["results/decoding/carry/sub-01_scores.tsv", "results/group/carry/carry_group.tsv", "results/report/index.html",
              "results/report/figures/sub-01_masks.png"]
    pd.DataFrame({"path": listed, "sha256": [hash_file(repository / p) for p in listed], "job": "x"}).to_csv(
        repository / "results/manifest.tsv", sep="\t", index=False)
    _record(repository, "study", "manifest", ["results/manifest.tsv"])
    return repository


def _make(repository, capsys, include_images=False):
    """make_bundle in this process (as `make bundle CONFIG=config/study.yaml` runs it); returns what it printed on stderr."""
    capsys.readouterr()
    bundle.make_bundle(repository, include_images=include_images, config_path="config/study.yaml")
    return capsys.readouterr().err


def _unpack(repository, destination):
    with tarfile.open(repository / "results/bundle/tiny-bundle.tar.gz") as archive:
        archive.extractall(destination, filter="data")
    return destination / "tiny-bundle"


def test_a_bundle_made_after_two_studies_holds_only_the_second(two_studies, tmp_path, capsys):
    # Before: everything under results/group, results/report and results/provenance was bundled, the earlier study's too.
    warned = _make(two_studies, capsys)
    unpacked = _unpack(two_studies, tmp_path)
    names = {path.relative_to(unpacked).as_posix() for path in unpacked.rglob("*") if path.is_file()}
    assert "results/group/shape/shape_group.tsv" not in names and "results/provenance/group/shape.json" not in names
    assert {"results/group/carry/carry_group.tsv", "results/decoding/carry/sub-01_scores.tsv", "results/provenance/group/carry.json",
            "results/provenance/manifest/study.json", "results/manifest.tsv", "requirements/lock.txt"} <= names
    # The untracked study config is bundled, with a warning, and the README names it for verify.
    assert "config/study.yaml" in names and "config/study.yaml is not tracked by git" in warned
    readme = (unpacked / "REVIEW/README.md").read_text()
    assert "make verify CONFIG=config/study.yaml" in readme and "was not committed" in readme


def test_the_bundled_report_leaves_participant_figures_out_unless_asked(two_studies, tmp_path, capsys):
    # Before: the bundled report embedded slices of every subject's mean BOLD image by default.
    _make(two_studies, capsys)
    unpacked = _unpack(two_studies, tmp_path / "plain")
    page = (unpacked / "REVIEW/report.html").read_text()
    assert "MEANBOLD" not in page and "RESVAR" not in page and "data:curve" in page
    assert not (unpacked / "results/report/index.html").exists()
    assert not (unpacked / "results/report/figures/sub-01_masks.png").exists()
    assert "mean BOLD slices" in (unpacked / "REVIEW/README.md").read_text()
    _make(two_studies, capsys, include_images=True)
    unpacked = _unpack(two_studies, tmp_path / "images")
    assert "MEANBOLD" in (unpacked / "results/report/index.html").read_text()


def _verify(unpacked, capsys, config_path="config/study.yaml"):
    """verify --check-only in this process; returns (exit code, what it printed)."""
    capsys.readouterr()
    code = bundle.verify(unpacked, recompute=False, config_path=config_path)
    return code, capsys.readouterr().out


def test_verify_refuses_a_tampered_provenance_record(two_studies, tmp_path, capsys):
    # Before: make verify checked outputs only; a record edited to claim 1,000 permutations and another numpy passed.
    _make(two_studies, capsys)
    unpacked = _unpack(two_studies, tmp_path)
    assert _verify(unpacked, capsys)[0] == 0
    path = unpacked / "results/provenance/group/carry.json"
    record = json.loads(path.read_text())
    record["settings"]["n_permutations"] = 1000
    path.write_text(json.dumps(record))
    code, printed = _verify(unpacked, capsys)
    assert code == 1 and "results/provenance/group/carry.json" in printed and "memo key" in printed
    record["versions"]["numpy"] = "1.26.0"
    record["key"] = bundle._record_key(record)  # even with a consistent key the version claim fails against the lock
    path.write_text(json.dumps(record))
    code, printed = _verify(unpacked, capsys)
    assert code == 1 and "claims numpy 1.26.0" in printed


def test_verify_names_the_bundles_config(two_studies, tmp_path, capsys):
    # Before: the README told reviewers to run plain `make verify`, which verifies the demo study instead.
    _make(two_studies, capsys)
    unpacked = _unpack(two_studies, tmp_path)
    code, printed = _verify(unpacked, capsys, config_path="config/config.yaml")
    assert code == 2 and "make verify CONFIG=config/study.yaml" in printed


# -- 6. privacy ------------------------------------------------------------------------------------------
def test_display_path_never_shows_an_absolute_path(tmp_path, monkeypatch):
    monkeypatch.chdir(tmp_path)
    assert memo.display_path(str(tmp_path / "config" / "study.yaml")) == "config/study.yaml"
    assert memo.display_path("/home/someone/bids") == "<outside>/bids"
    assert memo.display_path(None) is None


# -- end to end --------------------------------------------------------------------------------------------
@pytest.fixture(scope="module")
def base_run(tmp_path_factory):
    workdir = copy_repository(tmp_path_factory.mktemp("reliability") / "repo")
    write_study(workdir, TINY_STUDY)
    snakemake(workdir)
    return workdir


def _copy_of(base_run, tmp_path):
    workdir = tmp_path / "repo"
    shutil.copytree(base_run, workdir, symlinks=True)  # copy2 keeps mtimes
    return workdir


def _record_of(workdir, relative):
    return json.loads((workdir / relative).read_text())


@pytest.mark.e2e
@pytest.mark.slow
def test_e2e_an_override_changes_the_result_and_the_provenance(base_run, tmp_path):
    workdir = _copy_of(base_run, tmp_path)
    before = read_manifest(workdir).set_index("path")["sha256"]
    snakemake(workdir, "set=analyses[0].n_permutations=30", "--until", "group")
    record = _record_of(workdir, "results/provenance/decode/shape_sub-01.json")
    assert record["settings"]["analysis"]["n_permutations"] == 30 and not record["restored_from_memo"]
    null = "results/decoding/shape/sub-01/sub-01_roi-ember_null.tsv.gz"
    assert hash_file(workdir / null) != before[null]
    untouched = _record_of(workdir, "results/provenance/decode/carry_sub-01.json")
    assert untouched["settings"]["analysis"]["n_permutations"] == 20  # only the overridden analysis reran


@pytest.mark.e2e
@pytest.mark.slow
def test_e2e_a_same_size_same_mtime_edit_with_forcerun_recomputes(base_run, tmp_path):
    workdir = _copy_of(base_run, tmp_path)
    events = workdir / "results/demo/bids/sub-01/func/sub-01_task-lanterns_run-01_events.tsv"
    stamp = os.stat(events)
    lines = events.read_text().splitlines(True)
    rows = [line.split("\t") for line in lines[1:]]
    other = next(k for k in range(1, len(rows)) if len(rows[k][2]) == len(rows[0][2]) and rows[k][2] != rows[0][2])
    rows[0][2], rows[other][2] = rows[other][2], rows[0][2]
    os.chmod(events, 0o644)
    events.write_text(lines[0] + "".join("\t".join(row) for row in rows))
    os.utime(events, ns=(stamp.st_atime_ns, stamp.st_mtime_ns))
    assert os.stat(events).st_size == stamp.st_size
    completed = snakemake(workdir, "--forcerun", "glm", "--until", "glm", check=False)
    record = _record_of(workdir, "results/provenance/glm/sub-01.json")  # one GLM job per subject, every run a part
    assert not record["restored_from_memo"] and not any(part["restored"] for part in record["parts"])  # forced: no restore
    assert [item["sha256"] for item in record["inputs"] if item["name"] == "events"][0] == hash_file(events)
    # The events file is an output of the demo job: the end-of-run check names it as changed after its job.
    assert completed.returncode != 0 and "sub-01_task-lanterns_run-01_events.tsv" in completed.stderr + completed.stdout


@pytest.mark.e2e
@pytest.mark.slow
def test_e2e_a_package_version_other_than_the_lock_stops_the_run(base_run, tmp_path):
    workdir = _copy_of(base_run, tmp_path)
    lock = workdir / "requirements/lock.txt"
    locked = read_lock(lock)["pandas"]
    lock.write_text(lock.read_text().replace(f"pandas=={locked}", "pandas=0.0.1".replace("=", "==")))
    completed = snakemake(workdir, check=False)
    assert completed.returncode != 0
    assert f"pandas 0.0.1 locked, {locked} installed" in completed.stderr and "make env" in completed.stderr


@pytest.mark.e2e
@pytest.mark.slow
def test_e2e_a_changed_store_object_never_reaches_a_result(base_run, tmp_path):
    workdir = _copy_of(base_run, tmp_path)
    manifest = read_manifest(workdir).set_index("path")["sha256"]
    table = "results/patterns/sub-01/sub-01_run-01_patterns.tsv"
    entry = next(path.parent for path in (workdir / "results/.store/objects").rglob("entry.json")
                 if any(item["sha256"] == manifest[table] for item in json.loads(path.read_text())["files"]))
    number = next(index for index, item in enumerate(json.loads((entry / "entry.json").read_text())["files"])
                  if item["sha256"] == manifest[table])
    stored = entry / str(number)
    os.chmod(stored, 0o644)
    with open(stored, "r+b") as handle:  # in place, as bit rot or a write as root would
        first = handle.read(1)
        handle.seek(0)
        handle.write(b"9" if first != b"9" else b"8")
    assert hash_file(workdir / table) == manifest[table]
    rerun = snakemake(workdir)
    assert "Nothing to be done" in rerun.stdout + rerun.stderr
    assert read_manifest(workdir).set_index("path")["sha256"].equals(manifest)
    checked = subprocess.run([sys.executable, "-m", "foldwise.provenance.store", "check", "--config", "config/study.yaml"],
                             cwd=workdir, capture_output=True, text=True, env=workflow_environment(workdir))
    assert checked.returncode == 1 and "1 damaged" in checked.stdout
    # A result changed in place after its job: the run ends with the file named, not with exit 0.
    result = workdir / "results/group/shape/shape_group.tsv"
    result.write_text(result.read_text().replace("\t0.", "\t9.", 1))
    completed = snakemake(workdir, check=False)
    assert completed.returncode != 0 and "results/group/shape/shape_group.tsv" in completed.stdout + completed.stderr


@pytest.mark.e2e
@pytest.mark.slow
def test_e2e_results_hold_no_absolute_path_and_a_stray_part_file_is_gone(base_run, tmp_path):
    workdir = _copy_of(base_run, tmp_path)
    stray = workdir / "results/patterns/sub-01/.sub-01_run-01_patterns.tsv.k1ll3d.part"
    stray.write_text("half")
    (workdir / "results/report/index.html").unlink()  # the next run has a job, so onstart runs
    snakemake(workdir)
    assert not stray.exists()
    needles = [str(workdir), str(workdir.resolve()), str(base_run), str(base_run.resolve())]
    for path in (workdir / "results").rglob("*"):
        if path.is_file() and path.suffix in (".html", ".json", ".tsv", ".txt", ".svg", ".log"):
            text = path.read_text(errors="replace")
            assert not any(needle in text for needle in needles), path


def test_a_second_verify_never_overwrites_the_bundled_evidence(two_studies, tmp_path, capsys, monkeypatch):
    # Before: verify moved the bundled results aside on every call, so a second verify replaced them by its own recomputation.
    _make(two_studies, capsys)
    unpacked = _unpack(two_studies, tmp_path)
    evidence = {path.relative_to(unpacked).as_posix(): path.read_bytes() for path in (unpacked / "results").rglob("*") if path.is_file()}
    written = {"text": None}

    made = [path.relative_to(two_studies).as_posix() for path in (two_studies / "results").rglob("*")
            if path.is_file() and "bundle" not in path.parts]

    def recompute(command, cwd, env):  # stands in for Snakemake: writes every output and record again
        assert env["FOLDWISE_MEMO"] == "off" and "--forceall" in command
        for relative in made:
            target = Path(cwd) / relative
            target.parent.mkdir(parents=True, exist_ok=True)
            data = (two_studies / relative).read_bytes()
            target.write_bytes(written["text"] if written["text"] is not None and relative.endswith("carry_group.tsv") else data)
        return subprocess.CompletedProcess(command, 0)

    monkeypatch.setattr(bundle.subprocess, "run", recompute)
    assert bundle.verify(unpacked, recompute=True, config_path="config/study.yaml") == 0
    kept = unpacked / "REVIEW" / "bundled"
    written["text"] = b"roi\tmean\nember\t0.7\n"  # the second recomputation differs
    assert bundle.verify(unpacked, recompute=True, config_path="config/study.yaml") == 1
    assert "MISMATCH: results/group/carry/carry_group.tsv" in capsys.readouterr().out
    for relative, data in evidence.items():
        if relative != "results/manifest.tsv":  # the reference manifest is REVIEW/manifest.tsv
            assert (kept / relative).read_bytes() == data, relative
    assert (unpacked / "REVIEW/manifest.tsv").read_bytes() == evidence["results/manifest.tsv"]
