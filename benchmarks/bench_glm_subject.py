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

With ``--repeats N`` the modes run N times, interleaved with reads, and the
smallest CPU of each GLM job and each read counts (on a shared machine CPU
times grow with other processes' cache and memory traffic). CPU is user +
system time, as the target counts it; the ratio of user time alone is
printed too, because the system time (mostly page faults of fresh memory:
~29,000 per float32 read here) varied from 0.1 to 1.3 s for the same read
on this shared machine, while the user time stayed within 0.28-0.37 s.

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
import resource
import shutil
import statistics
import sys
import tempfile

import yaml

sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))
import bench_study  # noqa: E402 (the shared helpers: simulated layout, process log, read floor)

MODES = {"OLS": "ignore", "AR(1)": "ar1_whiten"}

# bench_study's hook, with user and system time apart.
SITECUSTOMIZE = bench_study.SITECUSTOMIZE.replace(
    '"cpu_s": usage.ru_utime + usage.ru_stime,', '"cpu_s": usage.ru_utime + usage.ru_stime, "user_s": usage.ru_utime,')


def read_floor(paths):
    """(user + system, user) CPU seconds of a nibabel float32 read of each file."""
    seconds = {}
    for path in paths:
        before = resource.getrusage(resource.RUSAGE_SELF)
        data = bench_study.nib.load(path).get_fdata(dtype=bench_study.np.float32)
        after = resource.getrusage(resource.RUSAGE_SELF)
        del data
        user_s = after.ru_utime - before.ru_utime
        seconds[path] = (user_s + after.ru_stime - before.ru_stime, user_s)
    return seconds


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
    glm_processes = [process for process in processes if bench_study.script_rule(process["argv0"]).startswith("glm")]
    records = []
    for path in glob.glob(os.path.join(folder, "results", "provenance", "glm", "*.json")):
        with open(path, encoding="utf-8") as handle:
            records.append(json.load(handle))
    shutil.rmtree(folder, ignore_errors=True)
    return {"wall_s": wall_s, "process_cpu_s": [process["cpu_s"] for process in glm_processes],
            "process_user_s": [process["user_s"] for process in glm_processes],
            "in_job_cpu_s": [record["cpu_time_s"] for record in records]}


def main(argv):
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--data", required=True, help="a dataset folder made by bench_study.py --prepare-only --data")
    parser.add_argument("--tree", default=bench_study.REPO, help="the workflow measured (default: this working tree)")
    parser.add_argument("--cores", type=int, default=1)
    parser.add_argument("--repeats", type=int, default=1, help="run each mode this many times; the smallest CPU counts")
    arguments = parser.parse_args(argv)
    demo_root = os.path.join(os.path.abspath(arguments.data), "results", "demo")
    paths = bench_study.bold_files(demo_root)
    if not paths:
        sys.exit(f"bench_glm_subject: no BOLD files under {demo_root}; run bench_study.py --prepare-only --data {arguments.data}")
    subjects = sorted({bench_study.subject_of(path) for path in paths})
    scratch = tempfile.mkdtemp(prefix="foldwise-bench-glm-")
    try:
        bench_study.write_text(os.path.join(scratch, "site", "sitecustomize.py"), SITECUSTOMIZE)
        reads = [read_floor(paths)]
        results = {}
        for _ in range(arguments.repeats):
            for label, mode in MODES.items():
                result = measure_mode(arguments.tree, demo_root, scratch, mode, arguments.cores)
                if label not in results or sum(result["process_cpu_s"]) < sum(results[label]["process_cpu_s"]):
                    results[label] = result
            reads.append(read_floor(paths))
    finally:
        shutil.rmtree(scratch, ignore_errors=True)
    reads_s = {path: min(read[path][0] for read in reads) for path in paths}
    read_s = sum(reads_s.values())
    read_user_s = sum(min(read[path][1] for read in reads) for path in paths)
    print(f"bench_glm_subject: {len(subjects)} subject(s), {len(paths)} runs, {arguments.repeats} repeat(s); float32 read of all runs {read_s:.2f} s CPU "
          f"(median run {statistics.median(reads_s.values()):.3f} s)")
    print(f"  per run (user + system): {', '.join(f'{value:.2f}' for value in reads_s.values())} s; user time of all reads {read_user_s:.2f} s")
    print(f"{'mode':<7} {'GLM processes':>13} {'process CPU s':>13} {'in-job CPU s':>12} {'process / read':>14} {'in-job / read':>13} "
          f"{'user / user':>11}  target")
    for label, result in results.items():
        process_s, in_job_s, user_s = sum(result["process_cpu_s"]), sum(result["in_job_cpu_s"]), sum(result["process_user_s"])
        ratio = process_s / read_s
        print(f"{label:<7} {len(result['process_cpu_s']):>13} {process_s:>13.2f} {in_job_s:>12.2f} {ratio:>14.2f} "
              f"{in_job_s / read_s:>13.2f} {user_s / read_user_s:>11.2f}  <= 1.0 {'met' if ratio <= 1.0 else 'NOT met'}")
    return 0


if __name__ == "__main__":
    sys.exit(main(sys.argv[1:]))
