"""Helpers for tests: copy the repository, write a tiny study, run Snakemake, or stand in for what Snakemake hands a job."""

import os
import shutil
import subprocess
import sys
from pathlib import Path

import pandas as pd
import yaml

REPO = Path(__file__).resolve().parents[1]
_SKIPPED = {".venv", "results", ".snakemake", ".git", ".pytest_cache", ".hypothesis", "__pycache__"}

TINY_STUDY = {
    "study": {"name": "tiny", "seed": 7},
    "dataset": {"source": "demo", "confounds": ["trans_x", "trans_y", "trans_z", "rot_x", "rot_y", "rot_z"]},
    "demo": {"n_subjects": 3, "n_runs": 3, "grid_shape": [16, 18, 12], "trials_per_condition_per_run": 2},
    "glm": {"serial_correlation": "ignore"},
    "rois": [{"name": "ember", "labels": ["ember_L", "ember_R"]}, {"name": "glow", "labels": ["glow_L", "glow_R"]},
             {"name": "hush", "labels": ["hush_L", "hush_R"]}],
    "analyses": [
        {"name": "shape", "kind": "within", "classes": {"round": ["seen_round"], "square": ["seen_square"], "star": ["seen_star"]},
         "voxel_counts": [10, 50, "all"], "classifier": "correlation_centroid", "n_permutations": 20},
        {"name": "carry", "kind": "cross", "voxel_counts": [10, 50, "all"], "classifier": "correlation_centroid", "n_permutations": 20,
         "sets": {"seen": {"round": "seen_round", "square": "seen_square", "star": "seen_star"},
                  "heard": {"round": "heard_round", "square": "heard_square", "star": "heard_star"}}},
    ],
    "group": {"n_draws": 500},
}


class Named(dict):
    """Stands in for Snakemake's named lists (a job's input, output, params, wildcards): items, also as attributes."""

    def __getattr__(self, name):
        try:
            return self[name]
        except KeyError:
            raise AttributeError(name) from None


def copy_repository(destination):
    """Copy the working tree (code and config, not results or environments) to ``destination``."""
    destination = Path(destination)

    def ignore(folder, names):
        return [name for name in names if name in _SKIPPED or name.endswith(".egg-info")]

    shutil.copytree(REPO, destination, ignore=ignore, symlinks=True)
    return destination


def write_study(workdir, study, name="study.yaml"):
    path = Path(workdir) / "config" / name
    path.write_text(yaml.safe_dump(study, sort_keys=False))
    return path


def workflow_environment(workdir):
    """Environment for a process in a copied repository: its own package first, one BLAS thread."""
    return dict(os.environ, OPENBLAS_NUM_THREADS="1", OMP_NUM_THREADS="1",
                PYTHONPATH=os.pathsep.join([str(Path(workdir) / "workflow"), os.environ.get("PYTHONPATH", "")]))


def snakemake(workdir, *arguments, config="config/study.yaml", cores=2, check=True):
    """Run Snakemake in ``workdir`` with the local profile; return the CompletedProcess."""
    command = [sys.executable, "-m", "snakemake", "--profile", "config/profiles/local", "--cores", str(cores),
               "--config", f"config_file={config}", *arguments]
    completed = subprocess.run(command, cwd=workdir, capture_output=True, text=True, env=workflow_environment(workdir))
    if check and completed.returncode != 0:
        raise AssertionError(f"snakemake {' '.join(arguments)} failed ({completed.returncode}):\n{completed.stdout[-4000:]}\n{completed.stderr[-6000:]}")
    return completed


def scheduled_jobs(workdir, config="config/study.yaml"):
    """The (rule, wildcards) pairs a dry run would execute, parsed from ``snakemake -n``."""
    completed = snakemake(workdir, "--dry-run", "--quiet", "host", config=config)  # the profile hides the rule blocks; show them
    jobs, rule = [], None
    for line in (completed.stdout + completed.stderr).splitlines():
        stripped = line.strip()
        if stripped.startswith(("rule ", "localrule ")) and stripped.endswith(":"):
            rule = stripped.split()[1].rstrip(":")
            jobs.append([rule, {}])
        elif stripped.startswith("wildcards:") and jobs:
            pairs = [item.split("=", 1) for item in stripped[len("wildcards:"):].split(",") if "=" in item]
            jobs[-1][1] = {key.strip(): value.strip() for key, value in pairs}
    return [(rule, wildcards) for rule, wildcards in jobs]


def read_manifest(workdir):
    return pd.read_csv(Path(workdir) / "results" / "manifest.tsv", sep="\t")


def file_states(workdir, manifest):
    """path -> (sha256 from the manifest, mtime_ns on disk) for every listed output."""
    return {row.path: (row.sha256, os.stat(Path(workdir) / row.path).st_mtime_ns) for row in manifest.itertuples()}
