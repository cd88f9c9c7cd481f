"""Safety and privacy: configs are data, never code; records and bundles do not give away machines or participants.

- YAML is read with ``yaml.safe_load`` (PyYAML's safe loader builds plain
  values only; https://pyyaml.org/wiki/PyYAMLDocumentation): an object tag is
  refused, and Snakemake's template marker is just an unknown key.
- No code under workflow/ (the package, the scripts, the Snakefile and the
  rules) calls ``eval``, ``exec``, ``compile`` or ``__import__`` on anything but
  a literal, nor loads YAML or pickles unsafely, nor runs a shell command line.
- Provenance records name files relative to the repository: no value starts
  with ``/`` and neither the home folder nor the temporary folder appears.
- The reviewer bundle leaves participant images (``.nii``, ``.nii.gz``) out
  unless ``--include-images`` is given.
"""

import ast
import io
import json
import os
import subprocess
import sys
import tarfile
import tempfile
import tokenize
from pathlib import Path
from types import SimpleNamespace

import numpy as np
import pandas as pd
import pytest

from foldwise.config import load_yaml, validate
from foldwise.errors import InputError
from foldwise.data.fileio import save_nifti, write_tsv
from foldwise.jobs import roi_mask as roi_mask_job
from foldwise.provenance.memo import run_job
from workflow_support import REPO, TINY_STUDY, Named, copy_repository, workflow_environment, write_study

# -- YAML --------------------------------------------------------------------------------------


@pytest.mark.parametrize("tag", ["!!python/object/apply:os.system ['echo owned']", "!!python/name:os.system",
                                 "!!python/object:collections.OrderedDict {}"])
def test_yaml_object_tags_are_refused(tmp_path, tag):
    path = tmp_path / "study.yaml"
    path.write_text(f"study: {tag}\n", encoding="utf-8")
    with pytest.raises(InputError) as raised:
        load_yaml(path)
    assert raised.value.file == str(path) and "tag refused" in raised.value.problem


def test_a_template_expression_stays_text_and_its_marker_is_an_unknown_key(tmp_path):
    """Snakemake's own --configfile loader runs '?expression' values when a file sets __use_yte__; ours does not."""
    path = tmp_path / "study.yaml"
    path.write_text("__use_yte__: true\nstudy:\n  name: ?__import__('os').getpid()\n", encoding="utf-8")
    loaded = load_yaml(path)
    assert loaded["study"]["name"] == "?__import__('os').getpid()"
    with pytest.raises(InputError) as raised:
        validate(loaded, path=str(path))
    assert raised.value.field == "(top level)" and "'__use_yte__'" in raised.value.problem


# -- no evaluation of anything anywhere in workflow/ ------------------------------------------------
EVALUATING_BUILTINS = {"eval", "exec", "compile", "__import__"}
UNSAFE_LOADS = {("yaml", "load"), ("yaml", "unsafe_load"), ("yaml", "full_load"), ("pickle", "load"), ("pickle", "loads"),
                ("os", "system"), ("os", "popen")}


def _is_literal(node):
    try:
        ast.literal_eval(node)
    except (ValueError, TypeError, SyntaxError, MemoryError, RecursionError):
        return False
    return True


def python_findings(source, name="<source>"):
    """Calls in Python ``source`` that could run text as code: (name, line, what)."""
    findings = []
    for node in ast.walk(ast.parse(source, filename=name)):
        if not isinstance(node, ast.Call):
            continue
        function = node.func
        if isinstance(function, ast.Name) and function.id in EVALUATING_BUILTINS:
            arguments = list(node.args) + [keyword.value for keyword in node.keywords]
            if not all(_is_literal(argument) for argument in arguments):
                findings.append((name, node.lineno, f"{function.id}() on a non-literal"))
        if isinstance(function, ast.Attribute) and isinstance(function.value, ast.Name):
            if (function.value.id, function.attr) in UNSAFE_LOADS:
                findings.append((name, node.lineno, f"{function.value.id}.{function.attr}()"))
        for keyword in node.keywords:
            if keyword.arg == "shell" and not (isinstance(keyword.value, ast.Constant) and keyword.value.value is False):
                findings.append((name, node.lineno, "shell=True"))
    return findings


def snakemake_findings(source, name="<rules>"):
    """The same, token by token, for Snakemake files (not Python, but Python's tokens)."""
    findings = []
    tokens = [token for token in tokenize.generate_tokens(io.StringIO(source).readline)
              if token.type not in (tokenize.NL, tokenize.NEWLINE, tokenize.COMMENT, tokenize.INDENT, tokenize.DEDENT)]
    for index, token in enumerate(tokens):
        before = tokens[index - 1].string if index >= 1 else ""
        owner = tokens[index - 2].string if index >= 2 else ""
        after = tokens[index + 1].string if index + 1 < len(tokens) else ""
        if token.type != tokenize.NAME:
            continue
        if after == "(" and before != "." and token.string in EVALUATING_BUILTINS:
            findings.append((name, token.start[0], f"{token.string}()"))
        if after == "(" and before == "." and (owner, token.string) in UNSAFE_LOADS:
            findings.append((name, token.start[0], f"{owner}.{token.string}()"))
        if token.string == "shell" and after == ":" and before != ".":
            findings.append((name, token.start[0], "shell: directive"))
    return findings


def _workflow_sources():
    python = sorted((REPO / "workflow").rglob("*.py"))
    rules = sorted((REPO / "workflow").rglob("*.smk")) + [REPO / "Snakefile"]
    return python, rules


def test_the_scanners_find_what_they_look_for():
    planted = "import yaml\nx = eval(text)\nexec(compile(code, 'f', 'exec'))\nyaml.load(handle)\nrun(command, shell=True)\n"
    assert sorted(what for _, _, what in python_findings(planted)) == sorted([
        "eval() on a non-literal", "exec() on a non-literal", "compile() on a non-literal", "yaml.load()", "shell=True"])
    assert python_findings("import re\nre.compile(pattern)\neval('1 + 1')\nyaml.safe_load(handle)\n") == []
    rules = "X = eval(config['x'])\nrule a:\n    shell:\n        'echo {input}'\ny = re.compile('a')\nz = yaml.load(f)\n"
    assert [what for _, _, what in snakemake_findings(rules)] == ["eval()", "shell: directive", "yaml.load()"]


def test_no_code_in_workflow_evaluates_text():
    python, rules = _workflow_sources()
    assert REPO / "workflow" / "rules" / "common.smk" in rules and len(python) > 10
    findings = []
    for path in python:
        findings += python_findings(path.read_text(encoding="utf-8"), str(path.relative_to(REPO)))
    for path in rules:
        findings += snakemake_findings(path.read_text(encoding="utf-8"), str(path.relative_to(REPO)))
    assert findings == []


# -- provenance records ------------------------------------------------------------------------------------


def _strings(value):
    if isinstance(value, dict):
        for key, item in value.items():
            yield str(key)
            yield from _strings(item)
    elif isinstance(value, list):
        for item in value:
            yield from _strings(item)
    elif isinstance(value, str):
        yield value


def private_record_problems(record_path):
    """What in one provenance JSON reveals the machine: absolute paths, the home or temporary folder."""
    text = Path(record_path).read_text(encoding="utf-8")
    revealing = {folder for folder in (os.path.expanduser("~"), tempfile.gettempdir(), os.path.realpath(tempfile.gettempdir()))
                 if folder not in ("", "/")}
    problems = [f"absolute path {value!r}" for value in _strings(json.loads(text)) if value.startswith("/")]
    problems += [f"mentions {folder}" for folder in sorted(revealing) if folder in text]
    return problems


def test_a_provenance_record_names_files_relative_to_the_repository(tmp_path, monkeypatch):
    """An ROI image kept outside the repository, given by its absolute path, as labs do."""
    repository, elsewhere = tmp_path / "repository", tmp_path / "lab-share"
    (repository / "results" / "masks").mkdir(parents=True)
    elsewhere.mkdir()
    affine = np.diag([3.0, 3.0, 3.0, 1.0])
    brain, roi = np.zeros((6, 5, 4), dtype=np.uint8), np.zeros((6, 5, 4), dtype=np.uint8)
    brain[1:5, 1:4, 1:3], roi[1:4, 1:4, 1:3] = 1, 1
    save_nifti(repository / "results" / "masks" / "sub-01_brainmask.nii.gz", brain, affine, dtype=np.uint8)
    save_nifti(elsewhere / "glow_roi.nii.gz", roi, affine, dtype=np.uint8)
    entry = {"name": "glow", "image": str(elsewhere / "glow_roi.nii.gz"), "min_voxels": 5}
    smk = SimpleNamespace(
        input=Named(brain_mask="results/masks/sub-01_brainmask.nii.gz", image=entry["image"]),
        output=Named(mask="results/masks/sub-01_roi-glow_mask.nii.gz", info="results/masks/sub-01_roi-glow.json",
                      provenance="results/provenance/roi_mask/sub-01_roi-glow.json"),
        params=Named(settings={"roi": entry, "subject": "01"}, code="code-hash"), log=["results/logs/roi_mask/sub-01_roi-glow.log"],
        wildcards=Named(subject="01", roi="glow"), config={"study": {"store_dir": "results/.store"}})
    monkeypatch.chdir(repository)
    run_job(smk, "roi_mask", roi_mask_job.run)
    record = repository / smk.output.provenance
    assert private_record_problems(record) == []
    inputs = {item["name"]: item["path"] for item in json.loads(record.read_text(encoding="utf-8"))["inputs"]}
    assert inputs == {"brain_mask": "results/masks/sub-01_brainmask.nii.gz", "image": "<outside>/glow_roi.nii.gz"}


def test_the_privacy_check_flags_what_it_should(tmp_path):
    record = tmp_path / "record.json"
    record.write_text(json.dumps({"inputs": [{"path": "/home/someone/data/sub-01_bold.nii.gz"}],
                                  "settings": {"note": f"copied from {tempfile.gettempdir()}/x"}}), encoding="utf-8")
    problems = private_record_problems(record)
    assert problems[0] == "absolute path '/home/someone/data/sub-01_bold.nii.gz'"
    assert any(problem.startswith("mentions ") for problem in problems)


# -- the reviewer bundle -----------------------------------------------------------------------------------
IMAGE_SUFFIXES = (".nii", ".nii.gz")


def _repository_with_results(destination, git):
    """A copy of the repository with a finished-looking results folder (tiny files) and the dataset inside it."""
    repository = copy_repository(destination)
    write_study(repository, TINY_STUDY)
    if git:
        environment = dict(os.environ, GIT_AUTHOR_NAME="t", GIT_AUTHOR_EMAIL="t@t", GIT_COMMITTER_NAME="t",
                           GIT_COMMITTER_EMAIL="t@t")
        for command in (["git", "init", "-q"], ["git", "add", "-A", "."], ["git", "commit", "-q", "-m", "copy"]):
            subprocess.run(command, cwd=repository, check=True, capture_output=True, env=environment)
    affine = np.eye(4)
    images = ["results/demo/bids/sub-01/func/sub-01_task-lanterns_run-01_desc-preproc_bold.nii.gz",
              "results/masks/sub-01/sub-01_brainmask.nii.gz", "results/patterns/sub-01/sub-01_run-01_patterns.nii.gz",
              "results/report/sub-01_mean.nii", "data/bids/sub-02/func/sub-02_task-lanterns_run-01_bold.nii.gz"]
    for name in images:
        save_nifti(repository / name, np.ones((2, 2, 2)), affine)
    tables = ["results/group/shape/shape_group.tsv", "results/decoding/shape/sub-01_scores.tsv"]
    for name in tables:
        write_tsv(repository / name, pd.DataFrame({"roi": ["ember"], "mean": [0.4]}))
    (repository / "results" / "provenance" / "glm").mkdir(parents=True)
    (repository / "results" / "provenance" / "glm" / "sub-01_run-01.json").write_text("{}\n", encoding="utf-8")
    listed = [name for name in images + tables if name.startswith("results/")]
    write_tsv(repository / "results" / "manifest.tsv", pd.DataFrame({"path": listed, "sha256": "0" * 64, "job": "x"}))
    return repository


def _bundle_names(repository, *options):
    completed = subprocess.run([sys.executable, "-m", "foldwise.provenance.bundle", "make", "--config", "config/study.yaml", *options],
                               cwd=repository, capture_output=True, text=True, env=workflow_environment(repository))
    assert completed.returncode == 0, completed.stderr
    with tarfile.open(repository / "results" / "bundle" / "tiny-bundle.tar.gz") as archive:
        return [name.split("/", 1)[1] for name in archive.getnames()]


@pytest.fixture(scope="module")
def cloned_repository(tmp_path_factory):
    return _repository_with_results(tmp_path_factory.mktemp("bundle") / "repository", git=True)


def test_the_bundle_leaves_participant_images_out(cloned_repository):
    names = _bundle_names(cloned_repository)
    assert [name for name in names if name.endswith(IMAGE_SUFFIXES)] == []
    assert {"results/manifest.tsv", "results/group/shape/shape_group.tsv", "config/study.yaml", "REVIEW/README.md"} <= set(names)


def test_the_bundle_takes_the_listed_images_when_asked(cloned_repository):
    names = _bundle_names(cloned_repository, "--include-images")
    assert sorted(name for name in names if name.endswith(IMAGE_SUFFIXES)) == sorted(
        ["results/demo/bids/sub-01/func/sub-01_task-lanterns_run-01_desc-preproc_bold.nii.gz",
         "results/masks/sub-01/sub-01_brainmask.nii.gz", "results/patterns/sub-01/sub-01_run-01_patterns.nii.gz",
         "results/report/sub-01_mean.nii"])


def test_a_bundle_made_outside_git_leaves_a_dataset_inside_the_repository_out(tmp_path):
    repository = _repository_with_results(tmp_path / "unpacked", git=False)
    names = _bundle_names(repository)
    assert [name for name in names if name.endswith(IMAGE_SUFFIXES)] == []
