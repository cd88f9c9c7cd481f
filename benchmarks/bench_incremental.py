"""Incremental reruns on the demo study: touched-but-unchanged inputs, one changed ROI.

Prints one table of wall times measured in one run on this machine:
the full run; a rerun after touching every dataset and intermediate file
(content unchanged); a rerun after changing one ROI's definition. Targets
(the incremental-rerun issue): touched rerun <= 0.1 x full run; one-ROI
change <= (1 / number of ROIs) x the full run's decode time + a fixed
overhead, which is reported (the DAG build and the group/report/manifest jobs).

    .venv/bin/python benchmarks/bench_incremental.py [--config config/config.yaml]
"""

import argparse
import copy
import json
import os
import sys
import tempfile
import time
from pathlib import Path

import yaml

sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "tests"))
from workflow_support import copy_repository, snakemake  # noqa: E402


def _timed(workdir, config):
    started = time.perf_counter()
    snakemake(workdir, config=config)
    return time.perf_counter() - started


def _step_seconds(workdir, step):
    """Sum of the in-job wall times of one step, from its provenance records."""
    records = (Path(workdir) / "results" / "provenance" / step).glob("*.json")
    return sum(json.loads(record.read_text())["wall_time_s"] for record in records)


def main():
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--config", default="config/config.yaml")
    arguments = parser.parse_args()
    with tempfile.TemporaryDirectory() as folder:
        workdir = copy_repository(Path(folder) / "repo")
        config_path = workdir / arguments.config
        study = yaml.safe_load(config_path.read_text())
        full_s = _timed(workdir, arguments.config)
        decode_s = _step_seconds(workdir, "decode")
        touched_at = time.time() + 2
        for part in ("results/demo", "results/masks", "results/patterns"):
            for root, _, names in os.walk(workdir / part):
                for name in names:
                    os.utime(os.path.join(root, name), (touched_at, touched_at))
        touched_s = _timed(workdir, arguments.config)
        changed = copy.deepcopy(study)
        first = changed["rois"][0]
        first["labels"] = first["labels"][:1]  # one ROI becomes one-sided
        config_path.write_text(yaml.safe_dump(changed, sort_keys=False))
        roi_s = _timed(workdir, arguments.config)
        n_rois = len(study["rois"])
    budget_s = decode_s / n_rois
    rows = [
        ("full run (s)", full_s, ""),
        ("touched-but-unchanged rerun (s)", touched_s, f"ratio {touched_s / full_s:.3f} (target <= 0.1)"),
        ("one-ROI change (s)", roi_s, f"decode share {budget_s:.1f} s + overhead {roi_s - budget_s:.1f} s"),
        ("full run's in-job decode time (s)", decode_s, f"{n_rois} ROIs"),
    ]
    print(f"{'measure':40s} {'value':>9s}  note")
    for name, value, note in rows:
        print(f"{name:40s} {value:9.1f}  {note}")


if __name__ == "__main__":
    main()
