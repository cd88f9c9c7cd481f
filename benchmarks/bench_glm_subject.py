"""The GLM step as the workflow runs it, against the float32 read of the same runs.

A quick companion of ``bench_study.py`` for the GLM alone: on a dataset that
``bench_study.py --prepare-only --data DIR`` simulated (the demo simulator at
the bench grid, BOLD as int16 .nii.gz with a scale factor), it runs
Snakemake with the local profile up to the GLM (``--until glm``; the brain
masks run too and are not counted), from empty results and an empty memo
store, once per GLM mode (per-condition betas as t-values, OLS and AR(1)),
and measures in the same invocation:

* the CPU of every GLM job process (interpreter start, imports, Snakemake's
  script preamble, the memo, the fit, every output, the design figures, the
  provenance record), from a ``sitecustomize`` hook that logs each
  process's own CPU at exit (the one ``bench_study.py`` uses);
* the read floor: ``nib.load(path).get_fdata(dtype=np.float32)`` of every
  run the GLM reads, CPU of this process, measured before and after the runs
  (the per-file minimum counts: the slower read measured other processes).

It prints, per mode, the GLM process CPU of each subject over the read of
that subject's runs (target <= 1.0), and the in-job CPU from the
provenance records.

    .venv/bin/python benchmarks/bench_study.py --prepare-only --data /tmp/glm-data --subjects 1 --runs 7
    OPENBLAS_NUM_THREADS=1 .venv/bin/python benchmarks/bench_glm_subject.py --data /tmp/glm-data

The workflow measured is the working tree (``--tree`` names another copy).
"""

import argparse
import glob
import json
import os
import shutil
import statistics
import sys
import tempfile

import yaml

sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))
import bench_study  # noqa: E402 (the shared helpers: simulated layout, process log, read floor)

MODES = {"OLS": "ignore", "AR(1)": "ar1_whiten"}


def glm_config(demo_root, serial_correlation):
    return {"study": {"name": "lantern-glm-speed", "seed": 20261201},
            "dataset": {"source": "bids", "bids_root": os.path.join(demo_root, "bids"),
                        "atlas_image": os.path.join(demo_root, "atlas", "atlas.nii.gz"),
                        "atlas_labels": os.path.join(demo_root, "atlas", "atlas_labels.tsv"), "confounds": bench_study.CONFOUNDS},
            "glm": {"serial_correlation": serial_correlation, "statistic": "t", "pattern_mode": "per_condition"},
            "rois": bench_study.ROIS[:1],
            "analyses": [{"name": "shape", "kind": "within", "classes": {"round": ["seen_round"], "square": ["seen_square"]}}]}


def measure_mode(tree, demo_root, scratch, serial_correlation, cores):
    folder = os.path.join(scratch, f"study-{serial_correlation}")
    os.makedirs(folder)
    study = glm_config(demo_root, serial_correlation)
    study_path = bench_study.write_text(os.path.join(folder, "study.yaml"), yaml.safe_dump(study, sort_keys=False))
    wall_s, _, processes = bench_study.run_snakemake(tree, folder, study_path, scratch, cores, "--until", "glm")
    glm_processes = [process["cpu_s"] for process in processes if bench_study.script_rule(process["argv0"]).startswith("glm")]
    records = []
    for path in glob.glob(os.path.join(folder, "results", "provenance", "glm", "*.json")):
        with open(path, encoding="utf-8") as handle:
            records.append(json.load(handle))
    shutil.rmtree(folder, ignore_errors=True)
    return {"wall_s": wall_s, "process_cpu_s": glm_processes, "in_job_cpu_s": [record["cpu_time_s"] for record in records]}


def main(argv):
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--data", required=True, help="a dataset folder made by bench_study.py --prepare-only --data")
    parser.add_argument("--tree", default=bench_study.REPO, help="the workflow measured (default: this working tree)")
    parser.add_argument("--cores", type=int, default=1)
    arguments = parser.parse_args(argv)
    demo_root = os.path.join(os.path.abspath(arguments.data), "results", "demo")
    paths = bench_study.bold_files(demo_root)
    if not paths:
        sys.exit(f"bench_glm_subject: no BOLD files under {demo_root}; run bench_study.py --prepare-only --data {arguments.data}")
    subjects = sorted({bench_study.subject_of(path) for path in paths})
    scratch = tempfile.mkdtemp(prefix="foldwise-bench-glm-")
    try:
        bench_study.write_text(os.path.join(scratch, "site", "sitecustomize.py"), bench_study.SITECUSTOMIZE)
        first_reads = bench_study.read_floor(paths)
        results = {label: measure_mode(arguments.tree, demo_root, scratch, mode, arguments.cores) for label, mode in MODES.items()}
        second_reads = bench_study.read_floor(paths)
    finally:
        shutil.rmtree(scratch, ignore_errors=True)
    reads_s = {path: min(first_reads[path], second_reads[path]) for path in paths}
    read_s = sum(reads_s.values())
    print(f"bench_glm_subject: {len(subjects)} subject(s), {len(paths)} runs; float32 read of all runs {read_s:.2f} s CPU "
          f"(median run {statistics.median(reads_s.values()):.3f} s)")
    print(f"{'mode':<7} {'GLM processes':>13} {'process CPU s':>13} {'in-job CPU s':>12} {'process / read':>14} {'in-job / read':>13}  target")
    for label, result in results.items():
        process_s, in_job_s = sum(result["process_cpu_s"]), sum(result["in_job_cpu_s"])
        ratio = process_s / read_s
        print(f"{label:<7} {len(result['process_cpu_s']):>13} {process_s:>13.2f} {in_job_s:>12.2f} {ratio:>14.2f} "
              f"{in_job_s / read_s:>13.2f}  <= 1.0 {'met' if ratio <= 1.0 else 'NOT met'}")
    return 0


if __name__ == "__main__":
    sys.exit(main(sys.argv[1:]))
