"""Studies side by side: ``study.results_dir`` moves every output of a study into its own folder.

Quick tests: the paths (every planned job's outputs, inputs and log
of a study with another results folder are the demo's paths under
that folder, and nothing else changes), the checks of the folder
(foldwise.results_folder; the messages themselves are rows of
docs/bad-input-table.md), the run guard's forced records, the bundle and the
store's default manifest. End to end (marked e2e, slow): two configs with
different results folders run the tiny study in one checkout; switching
back schedules nothing and leaves the other study's files untouched.
"""

import copy
import json
import subprocess
import sys
import tarfile
from pathlib import Path
from types import SimpleNamespace

import pandas as pd
import pytest

from foldwise import contract, plan
from foldwise.config import load_study_config, validate
from foldwise.errors import InputError
from foldwise.provenance import bundle, memo, runs, store
from foldwise.provenance.hashing import hash_file
from foldwise.results_folder import CLAIM_FILE
from foldwise.study import build_study
from workflow_support import REPO, TINY_STUDY, copy_repository, scheduled_jobs, snakemake, workflow_environment, write_study

DEMO_FILES = (("bids_root", "demo/bids"), ("atlas_image", "demo/atlas/atlas.nii.gz"), ("atlas_labels", "demo/atlas/atlas_labels.tsv"))


def with_results_dir(study, results_dir):
    """A copy of a study config with its own results folder (the demo's simulated files inside it)."""
    study = copy.deepcopy(study)
    study["study"]["results_dir"] = results_dir
    study["dataset"].update({key: f"{results_dir}/{tail}" for key, tail in DEMO_FILES})
    return study


def _job_paths(study):
    """step, wildcards -> every path of the job (outputs, inputs, log), in plan order."""
    jobs = {}
    for step, wildcards in plan.planned_jobs(study):
        paths = []
        for mapping in (plan.job_outputs(study, step, wildcards), plan.job_inputs(study, step, wildcards)):
            for value in mapping.values():
                paths += value if isinstance(value, list) else [value]
        paths += [plan.step_log(study, step).format(**wildcards)]
        jobs[(step, tuple(sorted(wildcards.items())))] = [str(path) for path in paths]
    return jobs


# -- the paths ------------------------------------------------------------------------------------------
def test_the_default_results_folder_gives_the_contract_templates():
    paths = contract.ResultPaths()
    assert {name: paths.template(name) for name in contract.TEMPLATES} == contract.TEMPLATES
    assert paths.provenance("group", "{analysis}") == contract.provenance_path("group", "{analysis}") == "results/provenance/group/{analysis}.json"


def test_every_path_of_a_study_moves_under_its_results_folder_and_nothing_else_changes():
    demo = load_study_config(REPO / "config" / "config.yaml")
    moved = validate(with_results_dir(demo, "studies/b"), path="config/study_b.yaml")
    before, after = _job_paths(build_study(demo, "config/config.yaml")), _job_paths(build_study(moved, "config/study_b.yaml"))
    assert list(before) == list(after)  # the same jobs
    for job, paths in before.items():
        # the same paths, each with "results/" replaced by "studies/b/" (written out here, not through contract.under_results)
        expected = ["studies/b/" + path[len("results/"):] if path.startswith("results/") else path for path in paths]
        assert after[job] == expected, job
        assert all(path.startswith("studies/b/") for path in after[job]), job  # the demo's data lives there too


def test_a_template_outside_the_default_results_folder_is_refused():
    with pytest.raises(ValueError, match="not under the default results folder"):
        contract.under_results("elsewhere/x.tsv", "results_b")


def test_the_report_finds_a_geometry_map_in_any_results_folder():
    assert contract.relative_to_results("geometry_searchlight_figure", analysis="shape") == "geometry/shape/shape_searchlight.png"


# -- the checks (their messages: docs/bad-input-table.md) ----------------------------------------------
def _refusal(study):
    with pytest.raises(InputError) as raised:
        validate(study, path="config/study_b.yaml")
    return raised.value


@pytest.mark.parametrize("results_dir, field, words", [
    ("/tmp/results_b", "study.results_dir", "absolute path"),
    ("~/results_b", "study.results_dir", "absolute path"),
    ("../results_b", "study.results_dir", "leaves the checkout"),
    ("results_b/../results_c", "study.results_dir", "not a plain relative folder"),
    ("results b", "study.results_dir", "not a plain relative folder"),
    ("results_{subject}", "study.results_dir", "not a plain relative folder"),
    (".", "study.results_dir", "leaves the checkout"),
    ("workflow/out", "study.results_dir", "workflow/ folder"),
    ("tests", "study.results_dir", "tests/ folder"),
    ("results/.store", "study.results_dir", "is the memo store"),
    ("results/.store/b", "study.results_dir", "inside the memo store"),
])
def test_results_folders_that_would_collide_are_refused(results_dir, field, words):
    error = _refusal(with_results_dir(TINY_STUDY, results_dir) if not results_dir.startswith(("/", "~")) else
                     {**copy.deepcopy(TINY_STUDY), "study": {"name": "tiny", "results_dir": results_dir}})
    assert (error.file, error.field) == ("config/study_b.yaml", field) and words in error.problem, str(error)


def test_a_store_inside_the_results_folder_is_accepted_and_so_are_nested_plain_names():
    validate(with_results_dir(TINY_STUDY, "studies/lanterns.v2"), path="config/study_b.yaml")
    study = with_results_dir(TINY_STUDY, "results_b")
    study["study"]["store_dir"] = "results_b/.store"
    assert validate(study, path="config/study_b.yaml")["study"]["results_dir"] == "results_b"


def test_a_bids_study_may_read_a_dataset_inside_its_results_folder_but_not_write_into_its_dataset():
    study = copy.deepcopy(TINY_STUDY)
    study["dataset"] = {"source": "bids", "bids_root": "results/demo/bids", "derivatives_root": "prep"}
    validate(study, path="config/study_b.yaml")  # e.g. the demo's simulated dataset, read as BIDS
    study["study"]["results_dir"] = "prep/out"
    error = _refusal(study)
    assert error.field == "study.results_dir" and "dataset.derivatives_root 'prep'" in error.problem


def test_a_checkout_inside_the_dataset_may_keep_its_results_folder(tmp_path, monkeypatch):
    checkout = tmp_path / "dataset" / "code" / "foldwise"  # the dataset's code/ folder holds the checkout
    checkout.mkdir(parents=True)
    monkeypatch.chdir(checkout)
    study = copy.deepcopy(TINY_STUDY)
    study["dataset"] = {"source": "bids", "bids_root": "../.."}
    assert validate(study, path="config/study.yaml")["study"]["results_dir"] == "results"


def test_a_results_folder_may_be_a_symbolic_link_to_another_disk(tmp_path, monkeypatch):
    from foldwise.results_folder import check_results_writable

    (tmp_path / "scratch").mkdir()
    (tmp_path / "checkout").mkdir()
    (tmp_path / "checkout" / "results_b").symlink_to(tmp_path / "scratch")
    monkeypatch.chdir(tmp_path / "checkout")
    study = validate(with_results_dir(TINY_STUDY, "results_b"), path="config/study_b.yaml")
    check_results_writable(study, "config/study_b.yaml")  # no error: the link's target is writable
    (tmp_path / "scratch" / "x.tsv.part").write_text("left by a killed run")
    assert runs.remove_leftovers("results_b", "results/.store") == ["results_b/x.tsv.part"]  # the run guard walks the link's target


def test_each_of_the_demos_files_must_lie_inside_its_results_folder():
    for key, _ in DEMO_FILES:
        study = with_results_dir(TINY_STUDY, "results_b")
        study["dataset"][key] = "results/demo/elsewhere"
        assert _refusal(study).field == f"dataset.{key}"


def test_a_folder_last_run_by_another_existing_config_gives_a_warning(tmp_path, monkeypatch):
    from foldwise.results_folder import claim_results_dir, shared_results_warning

    monkeypatch.chdir(tmp_path)
    (tmp_path / "config").mkdir()
    for name in ("study_a.yaml", "study_b.yaml"):
        (tmp_path / "config" / name).write_text("study: {name: x}\n")
    assert shared_results_warning("results", "config/study_a.yaml") is None  # never run
    claim_results_dir("results", "config/study_a.yaml")
    assert shared_results_warning("results", "./config/study_a.yaml") is None  # the same file, spelt otherwise
    assert "last run by config/study_a.yaml" in shared_results_warning("results", "config/study_b.yaml")
    assert shared_results_warning("results_b", "config/study_b.yaml") is None  # another folder
    (tmp_path / "config/study_a.yaml").unlink()  # renamed or removed: this config takes the folder over
    assert shared_results_warning("results", "config/study_b.yaml") is None


# -- the run guard, the bundle, the store ------------------------------------------------------------------
def test_forced_records_are_those_of_this_results_folder():
    forced = SimpleNamespace(forced=True)
    jobs = [SimpleNamespace(output=["results_b/group/x.tsv", "results_b/provenance/group/x.json"]),
            SimpleNamespace(output=["results/provenance/group/x.json"])]
    dag = SimpleNamespace(needrun_jobs=lambda: jobs, reason=lambda job: forced)
    assert runs.forced_records(dag, "results_b") == ["results_b/provenance/group/x.json"]
    assert runs.forced_records(dag) == ["results/provenance/group/x.json"]


def _write(path, text):
    path.parent.mkdir(parents=True, exist_ok=True)
    path.write_text(text, encoding="utf-8")


def _record(root, results_dir, name, step, outputs):
    record = {"step": step, "wildcards": {}, "code_hash": "c0de", "settings": {"n_permutations": 20}, "versions": memo.package_versions(),
              "empty_inputs": [], "inputs": [],
              "outputs": [{"name": "table", "path": path, "sha256": hash_file(root / path)} for path in outputs]}
    record["key"] = bundle._record_key(record)
    _write(root / results_dir / "provenance" / step / f"{name}.json", json.dumps(record))


def _finished(root, results_dir, analysis):
    """A study's outputs (one group table and the report), records and manifest, as a run leaves them."""
    listed = [f"{results_dir}/group/{analysis}/{analysis}_group.tsv", f"{results_dir}/report/index.html",
              f"{results_dir}/report/figures/sub-01_masks.png"]
    for path in listed:
        _write(root / path, f"{analysis} {path}\n")
    _record(root, results_dir, analysis, "group", listed[:1])
    _record(root, results_dir, "study", "report", listed[1:])
    pd.DataFrame({"path": listed, "sha256": [hash_file(root / p) for p in listed], "job": "x"}).to_csv(
        root / results_dir / "manifest.tsv", sep="\t", index=False)
    _record(root, results_dir, "study", "manifest", [f"{results_dir}/manifest.tsv"])


def test_the_bundle_holds_the_configs_results_folder_only(tmp_path, capsys):
    root = tmp_path / "checkout"
    (root / "requirements").mkdir(parents=True)
    (root / "requirements/lock.txt").write_text((REPO / "requirements/lock.txt").read_text())
    (root / "config").mkdir()
    write_study(root, with_results_dir(TINY_STUDY, "results_b"), name="study_b.yaml")
    _finished(root, "results", "shape")  # another study's, in the default folder
    _finished(root, "studies/c", "shape")  # a third study's, in a folder its run claimed (not a git checkout: no git to ask)
    _write(root / "studies/c" / CLAIM_FILE, "config/study_c.yaml\n")
    _finished(root, "results_b", "carry")
    target = bundle.make_bundle(root, config_path="config/study_b.yaml")
    assert target == root / "results_b/bundle/tiny-bundle.tar.gz" and not (root / "results/bundle").exists()
    with tarfile.open(target) as archive:
        archive.extractall(tmp_path / "unpacked", filter="data")
    unpacked = tmp_path / "unpacked/tiny-bundle"
    names = {path.relative_to(unpacked).as_posix() for path in unpacked.rglob("*") if path.is_file()}
    assert {"results_b/manifest.tsv", "results_b/group/carry/carry_group.tsv", "results_b/provenance/group/carry.json",
            "results_b/provenance/manifest/study.json", "config/study_b.yaml"} <= names
    assert not [name for name in names if name.startswith(("results/", "studies/"))]  # the other studies' files stay out
    assert "results_b/report/index.html" not in names and "results_b/report/figures/sub-01_masks.png" not in names  # participant figures
    assert "results_b/manifest.tsv" in (unpacked / "REVIEW/README.md").read_text()
    capsys.readouterr()
    assert bundle.verify(unpacked, recompute=False, config_path="config/study_b.yaml") == 0
    assert "3 provenance records" in capsys.readouterr().out


def test_make_clean_is_told_the_configs_results_folder_and_never_a_code_folder(tmp_path, monkeypatch, capsys):
    from foldwise import results_folder

    monkeypatch.chdir(tmp_path)
    (tmp_path / "config").mkdir()
    write_study(tmp_path, with_results_dir(TINY_STUDY, "studies/b"), name="study_b.yaml")
    results_folder.main(["--config", "config/study_b.yaml"])
    assert capsys.readouterr().out == "studies/b\n"
    write_study(tmp_path, with_results_dir(TINY_STUDY, "workflow"), name="study_w.yaml")
    with pytest.raises(InputError) as refused:
        results_folder.main(["--config", "config/study_w.yaml"])
    assert refused.value.field == "study.results_dir"


def test_store_clean_keeps_what_the_configs_own_manifest_reaches_by_default(tmp_path, monkeypatch):
    monkeypatch.chdir(tmp_path)
    (tmp_path / "config").mkdir()
    write_study(tmp_path, with_results_dir(TINY_STUDY, "results_b"), name="study_b.yaml")
    assert store._default_manifest("config/study_b.yaml") == "results_b/manifest.tsv"
    code = store.main(["clean", "--config", "config/study_b.yaml", "--store", "results/.store"])
    assert code == 0  # no store yet: nothing to do
    (tmp_path / "results/.store/objects").mkdir(parents=True)
    assert store.main(["clean", "--config", "config/study_b.yaml", "--store", "results/.store"]) == 1  # results_b/manifest.tsv missing


# -- end to end ----------------------------------------------------------------------------------------------
def _snapshot(folder):
    """Every file of a results folder with its sha256 and modification time (ns)."""
    return {path.relative_to(folder).as_posix(): (hash_file(path), path.stat().st_mtime_ns)
            for path in sorted(Path(folder).rglob("*")) if path.is_file()}


@pytest.fixture(scope="module")
def side_by_side(tmp_path_factory):
    """A copied checkout where study A (results_a) ran, then study B (results_b, analysis carry only); the store is shared."""
    workdir = copy_repository(tmp_path_factory.mktemp("side_by_side") / "repo")
    study_a = with_results_dir(TINY_STUDY, "results_a")
    study_b = with_results_dir(TINY_STUDY, "results_b")
    study_b["study"]["name"] = "tiny-b"
    study_b["analyses"] = [entry for entry in study_b["analyses"] if entry["name"] == "carry"]  # another study, the store shared
    write_study(workdir, study_a, name="study_a.yaml")
    write_study(workdir, study_b, name="study_b.yaml")
    snakemake(workdir, config="config/study_a.yaml")
    first_a = _snapshot(workdir / "results_a")
    second = snakemake(workdir, config="config/study_b.yaml")
    return SimpleNamespace(workdir=workdir, first_a=first_a, second=second)


@pytest.mark.e2e
@pytest.mark.slow
def test_two_studies_side_by_side_keep_their_outputs_and_switching_reruns_nothing(side_by_side):
    workdir, first_a = side_by_side.workdir, side_by_side.first_a
    assert "was last run by" not in side_by_side.second.stderr  # two folders: no warning
    assert _snapshot(workdir / "results_a") == first_a  # B wrote nothing of A's (bytes and times)
    first_b = _snapshot(workdir / "results_b")

    # Switching back: Snakemake's dry run has nothing to do, for either study.
    assert scheduled_jobs(workdir, config="config/study_a.yaml") == []
    assert scheduled_jobs(workdir, config="config/study_b.yaml") == []
    # Each study's outputs, provenance, manifest, report and logs are in its own folder; nothing in the default one but the shared store.
    for folder, other in (("results_a", "results_b"), ("results_b", "results_a")):
        manifest = pd.read_csv(workdir / folder / "manifest.tsv", sep="\t")
        assert all(path.startswith(f"{folder}/") for path in manifest["path"]), folder
        assert (workdir / folder / "report/index.html").is_file() and (workdir / folder / "provenance/manifest/study.json").is_file()
        assert (workdir / folder / "logs").is_dir() and (workdir / folder / "demo/bids/dataset_description.json").is_file()
        assert other not in (workdir / folder / "manifest.tsv").read_text()
    assert not (workdir / "results_b/group/shape").exists()
    assert sorted(path.name for path in (workdir / "results").iterdir()) == [".store"]
    # A rerun of A after B: nothing runs, nothing of B changes.
    snakemake(workdir, config="config/study_a.yaml")
    assert _snapshot(workdir / "results_a") == first_a and _snapshot(workdir / "results_b") == first_b


@pytest.mark.e2e
@pytest.mark.slow
def test_the_bundle_of_study_b_holds_its_folder_only_and_verifies(side_by_side, tmp_path):
    """make bundle CONFIG=config/study_b.yaml, then make verify CONFIG=config/study_b.yaml in the unpacked bundle."""
    workdir = side_by_side.workdir
    command = [sys.executable, "-m", "foldwise.provenance.bundle"]
    made = subprocess.run([*command, "make", "--config", "config/study_b.yaml"], cwd=workdir, capture_output=True, text=True,
                          env=workflow_environment(workdir))
    assert made.returncode == 0, made.stderr
    archive = workdir / "results_b/bundle/tiny-b-bundle.tar.gz"
    with tarfile.open(archive) as packed:
        names = [name.split("/", 1)[1] for name in packed.getnames()]
        packed.extractall(tmp_path / "unpacked", filter="data")
    assert "results_b/manifest.tsv" in names and not [name for name in names if name.startswith(("results_a/", "results/"))]
    unpacked = tmp_path / "unpacked/tiny-b-bundle"
    verified = subprocess.run([*command, "verify", "--cores", "2", "--config", "config/study_b.yaml"], cwd=unpacked,
                              capture_output=True, text=True, env=workflow_environment(unpacked))
    assert verified.returncode == 0, verified.stdout[-3000:] + verified.stderr[-3000:]
    assert "every output reproduces" in verified.stdout and (unpacked / "results_b/report/index.html").is_file()
