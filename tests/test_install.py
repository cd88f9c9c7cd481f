"""An installable package: `pip install .` into a clean virtual environment, then a tiny study run from it.

The clean venv gets its third-party packages from this environment's
site-packages (a .pth line: no download, no registry), never foldwise itself:
the run folder holds the workflow (Snakefile, rules, scripts, config) without
workflow/foldwise, so every job imports the installed package.
"""

import shutil
import subprocess
import sys
import sysconfig
from pathlib import Path

import pytest
import yaml

from workflow_support import REPO, TINY_STUDY, copy_repository

pytestmark = [pytest.mark.e2e, pytest.mark.slow]


def _run(command, cwd, env=None):
    completed = subprocess.run(command, cwd=cwd, capture_output=True, text=True, env=env)
    assert completed.returncode == 0, f"{' '.join(map(str, command))} failed:\n{completed.stdout[-3000:]}\n{completed.stderr[-5000:]}"
    return completed


@pytest.fixture(scope="module")
def installed(tmp_path_factory):
    """(python of a clean venv with foldwise installed from a copy of the tree, that copy)."""
    root = tmp_path_factory.mktemp("install")
    source = copy_repository(root / "source")
    venv = root / "venv"
    _run([sys.executable, "-m", "venv", str(venv)], cwd=root)
    python = venv / "bin" / "python"
    purelib = Path(_run([str(python), "-c", "import sysconfig; print(sysconfig.get_paths()['purelib'])"], cwd=root).stdout.strip())
    # The venv's own setuptools is older than the build backend the project pins: use the pinned one from this environment.
    _run([str(python), "-m", "pip", "uninstall", "--yes", "--quiet", "setuptools"], cwd=root)
    (purelib / "_foldwise_test_dependencies.pth").write_text(sysconfig.get_paths()["purelib"] + "\n", encoding="utf-8")
    _run([str(python), "-m", "pip", "install", "--quiet", "--disable-pip-version-check", "--no-deps", "--no-build-isolation", "--no-index",
          str(source)], cwd=root)
    return python, source


def _clean_environment():
    import os

    env = {key: value for key, value in os.environ.items() if key not in ("PYTHONPATH", "VIRTUAL_ENV")}
    return dict(env, OPENBLAS_NUM_THREADS="1", OMP_NUM_THREADS="1")


def test_the_installed_package_is_whole(installed):
    python, source = installed
    probe = ("import foldwise, foldwise.config as c, foldwise.jobs.decode, foldwise.jobs.searchlight_block, foldwise.study, "
             "foldwise.plan, foldwise.contract, pathlib; print(foldwise.__file__); print(c.SCHEMA_PATH); "
             "print(pathlib.Path(c.SCHEMA_PATH).read_text(encoding='utf-8') == pathlib.Path(r'%s').read_text(encoding='utf-8'))"
             % (source / "config" / "schema.yaml"))
    lines = _run([str(python), "-c", probe], cwd=python.parent, env=_clean_environment()).stdout.split()
    package_file, schema, same = lines
    assert str(python.parents[1]) in package_file, f"foldwise imported from {package_file}, not the venv"
    assert Path(schema).is_file() and not Path(schema).is_symlink() and str(python.parents[1]) in schema
    assert same == "True", "the installed schema differs from config/schema.yaml"


def test_a_tiny_study_runs_from_the_installed_package(installed, tmp_path):
    python, source = installed
    run_dir = tmp_path / "study"
    shutil.copytree(source, run_dir, ignore=shutil.ignore_patterns("foldwise", "*.egg-info", "build"))
    assert not (run_dir / "workflow" / "foldwise").exists()
    study = {**TINY_STUDY, "analyses": TINY_STUDY["analyses"][:1]}  # one analysis keeps it short
    (run_dir / "config" / "study.yaml").write_text(yaml.safe_dump(study, sort_keys=False), encoding="utf-8")
    _run([str(python), "-m", "snakemake", "--profile", "config/profiles/local", "--cores", "2", "--config", "config_file=config/study.yaml"],
         cwd=run_dir, env=_clean_environment())
    manifest = (run_dir / "results" / "manifest.tsv").read_text(encoding="utf-8").splitlines()
    assert manifest[0].split("\t")[:2] == ["path", "sha256"]
    assert any(line.startswith("results/group/shape/shape_group.tsv\t") for line in manifest)
    assert (run_dir / "results" / "report" / "index.html").is_file()
