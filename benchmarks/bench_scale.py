"""How the workflow's own costs grow with the number of subjects.

A synthetic study of N subjects on a tiny grid (12 x 12 x 10 voxels, 2 runs,
1 ROI, 1 plain-decoding analysis with 10 permutations) isolates what
Snakemake and the wiring cost, not the science. The demo simulator labels
subjects with two digits (at most 99), so the benchmark simulates one demo
subject once and lays out a BIDS dataset of N subjects whose files are hard
links to that subject's files (`dataset.source: bids`; discovery on disk is
part of what is measured). For each N it times a fresh `snakemake` process:

- parse: `--list-rules` (read the Snakefile, validate the config, find the runs);
- dag: `--dag` (parse + build the job graph, no job listing);
- dry run: `-n` (what a user types: graph, file and metadata checks, job list);
- dry run, quiet: `-n --quiet rules` (the same without printing every job).

Then it runs the smallest study for real on `--cores 1` and compares the
total wall time with the sum of the jobs' own times (each job's provenance
record holds the wall time of its step; `benchmark:` files, where a rule has
one, hold the whole job process). The difference divided by the number of
jobs is the per-job overhead: Snakemake's bookkeeping, Python start-up and
imports, the memo's hashing. Last, a dry run of the finished study measures
the "nothing to do" check.

Wall and CPU seconds are both reported: CPU time hardly moves when other
processes share the machine, wall time does.

    .venv/bin/python benchmarks/bench_scale.py                 # N = 25 50 100 200, run N = 25
    .venv/bin/python benchmarks/bench_scale.py --sizes 25 50 --run-size 0   # no real run
"""

import argparse
import csv
import glob
import json
import math
import os
import re
import resource
import shutil
import subprocess
import sys
import tempfile
import time

REPO = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
SNAKEMAKE = os.path.join(REPO, ".venv", "bin", "snakemake")

CONFOUNDS = "[trans_x, trans_y, trans_z, rot_x, rot_y, rot_z]"
ANALYSIS = """\
rois:
  - {name: ember, labels: [ember_L, ember_R]}
analyses:
  - name: shape
    kind: within
    classes: {round: [seen_round], square: [seen_square], star: [seen_star]}
    voxel_counts: [10, all]
    n_permutations: 10
group: {n_draws: 500}
"""
TEMPLATE_STUDY = f"""\
# Written by benchmarks/bench_scale.py: one simulated demo subject, the template of every subject.
study: {{name: lantern-scale-template, seed: 20261201}}
dataset: {{source: demo, confounds: {CONFOUNDS}}}
demo: {{n_subjects: 1, n_runs: 2, grid_shape: [12, 12, 10], trials_per_condition_per_run: 3}}
""" + ANALYSIS
SCALE_STUDY = """\
# Written by benchmarks/bench_scale.py: a synthetic study of {n_subjects} subjects (hard links to one subject).
study: {{name: lantern-scale, seed: 20261201}}
dataset:
  source: bids
  bids_root: {bids_root}
  atlas_image: {atlas_image}
  atlas_labels: {atlas_labels}
  confounds: {confounds}
""" + ANALYSIS.replace("{", "{{").replace("}", "}}")
TEMPLATE_SUBJECT = "01"


def write_file(path, text):
    with open(path, "w", encoding="utf-8") as handle:
        handle.write(text)
    return path


def simulate_template_subject(scratch_root):
    """Run the workflow's demo_dataset rule once: one subject, two runs, the atlas."""
    folder = os.path.join(scratch_root, "template")
    os.makedirs(folder)
    study_path = write_file(os.path.join(folder, "template_study.yaml"), TEMPLATE_STUDY)
    timed_run(snakemake_command(folder, study_path, "--cores", "1", "results/demo/bids/dataset_description.json"))
    return os.path.join(folder, "results", "demo")


def lay_out_study(demo_root, folder, n_subjects):
    """A BIDS dataset of n_subjects whose run files are hard links to the template subject's."""
    template_func = os.path.join(demo_root, "bids", f"sub-{TEMPLATE_SUBJECT}", "func")
    bids_root = os.path.join(folder, "bids")
    os.makedirs(bids_root)
    shutil.copy(os.path.join(demo_root, "bids", "dataset_description.json"), bids_root)
    for index in range(1, n_subjects + 1):
        label = f"{index:03d}"
        func = os.path.join(bids_root, f"sub-{label}", "func")
        os.makedirs(func)
        for name in os.listdir(template_func):
            os.link(os.path.join(template_func, name), os.path.join(func, name.replace(f"sub-{TEMPLATE_SUBJECT}_", f"sub-{label}_")))
    text = SCALE_STUDY.format(n_subjects=n_subjects, bids_root=bids_root, confounds=CONFOUNDS,
                              atlas_image=os.path.join(demo_root, "atlas", "atlas.nii.gz"),
                              atlas_labels=os.path.join(demo_root, "atlas", "atlas_labels.tsv"))
    return write_file(os.path.join(folder, "scale_study.yaml"), text)


# The workflow measured: a snapshot of the working tree taken at start (see
# snapshot_tree), so edits made while the benchmark runs do not change it midway.
WORKFLOW_ROOT = REPO


def snapshot_tree(scratch_root):
    """Copy what git sees of the working tree (tracked + untracked, not ignored) into scratch_root."""
    listing = subprocess.run(["git", "-C", REPO, "ls-files", "-z", "--cached", "--others", "--exclude-standard"],
                             capture_output=True, check=True).stdout.decode()
    destination = os.path.join(scratch_root, "workflow-snapshot")
    for relative in filter(None, listing.split("\0")):
        source = os.path.join(REPO, relative)
        if os.path.isfile(source):  # tracked files deleted in the working tree are skipped
            os.makedirs(os.path.dirname(os.path.join(destination, relative)), exist_ok=True)
            shutil.copy2(source, os.path.join(destination, relative))
    return destination


def snakemake_command(folder, study_path, *extra):
    # The snapshot's Snakefile run in a scratch folder: results/ and .snakemake/ land there.
    return [SNAKEMAKE, "--snakefile", os.path.join(WORKFLOW_ROOT, "Snakefile"), "--directory", folder,
            "--profile", os.path.join(WORKFLOW_ROOT, "config", "profiles", "local"), "--config", f"config_file={study_path}", *extra]


def job_environment():
    environment = dict(os.environ)
    # The snapshot's package, whatever the venv's editable install points at.
    environment["PYTHONPATH"] = os.path.join(WORKFLOW_ROOT, "workflow")
    for name in ("OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS", "MKL_NUM_THREADS"):
        environment[name] = "1"
    return environment


def children_cpu_s():
    usage = resource.getrusage(resource.RUSAGE_CHILDREN)
    return usage.ru_utime + usage.ru_stime


def timed_run(command):
    """(wall s, CPU s of the process and its children, output) of one command.

    CPU time is reported beside wall time because it hardly moves when other
    processes share the machine; a failure stops the benchmark.
    """
    cpu_before_s = children_cpu_s()
    started = time.perf_counter()
    completed = subprocess.run(command, capture_output=True, text=True, env=job_environment())
    wall_s = time.perf_counter() - started
    cpu_s = children_cpu_s() - cpu_before_s
    if completed.returncode != 0:
        tail = "\n".join((completed.stdout + completed.stderr).splitlines()[-30:])
        sys.exit(f"bench_scale: command failed ({completed.returncode}): {' '.join(command)}\n{tail}")
    return wall_s, cpu_s, completed.stdout + completed.stderr


def job_count(dry_run_output):
    """The `total` row of Snakemake's job-stats table."""
    match = re.search(r"^total\s+(\d+)\s*$", dry_run_output, flags=re.MULTILINE)
    if not match:
        sys.exit("bench_scale: no 'total' row in the dry run's job stats; has Snakemake's output changed?")
    return int(match.group(1))


# (name, snakemake arguments); the quiet dry run last, its job table gives the job count.
PLANNING_COMMANDS = [("parse", ["--list-rules"]), ("dag", ["--dag"]), ("dry_run", ["-n"]),
                     ("dry_run_quiet", ["-n", "--quiet", "rules"])]
PLANNING_LABELS = {"parse": "parse", "dag": "dag", "dry_run": "dry run (-n)", "dry_run_quiet": "dry run, quiet"}


def measure_planning(n_subjects, demo_root, scratch_root, repeats):
    folder = tempfile.mkdtemp(prefix=f"scale-{n_subjects}-", dir=scratch_root)
    study_path = lay_out_study(demo_root, folder, n_subjects)
    row = {"n_subjects": n_subjects, "repeats": repeats}
    for key, extra in PLANNING_COMMANDS:
        # The fastest of a few repeats: the slower ones measure other processes
        # (the advice of Python's timeit documentation).
        timings = [timed_run(snakemake_command(folder, study_path, *extra)) for _ in range(repeats)]
        row[f"{key}_wall_s"] = min(wall_s for wall_s, _, _ in timings)
        row[f"{key}_cpu_s"] = min(cpu_s for _, cpu_s, _ in timings)
    row["n_jobs"] = job_count(timings[-1][2])  # the last command is the quiet dry run
    shutil.rmtree(folder)
    return row


def read_provenance_times(folder):
    """Per job (rule, file stem): the step's wall seconds from its provenance record."""
    times_s = {}
    for path in glob.glob(os.path.join(folder, "results", "provenance", "*", "*.json")):
        with open(path, encoding="utf-8") as handle:
            record = json.load(handle)
        rule = os.path.basename(os.path.dirname(path))
        times_s[(rule, os.path.splitext(os.path.basename(path))[0])] = record["wall_time_s"]
    return times_s


def read_benchmark_times(folder):
    """Per job (rule, file stem): the whole job process's wall seconds from its benchmark: file."""
    times_s = {}
    for path in glob.glob(os.path.join(folder, "results", "benchmarks", "*", "*.tsv")):
        with open(path, encoding="utf-8") as handle:
            rows = list(csv.DictReader(handle, delimiter="\t"))
        rule = os.path.basename(os.path.dirname(path))
        times_s[(rule, os.path.splitext(os.path.basename(path))[0])] = float(rows[0]["s"])
    return times_s


def measure_real_run(n_subjects, cores, demo_root, scratch_root):
    folder = tempfile.mkdtemp(prefix=f"scale-run-{n_subjects}-", dir=scratch_root)
    study_path = lay_out_study(demo_root, folder, n_subjects)
    _, _, quiet_output = timed_run(snakemake_command(folder, study_path, "-n", "--quiet", "rules"))
    n_jobs = job_count(quiet_output) - 1  # `all` runs no code
    wall_s, cpu_s, _ = timed_run(snakemake_command(folder, study_path, "--cores", str(cores)))
    up_to_date_s, _, _ = timed_run(snakemake_command(folder, study_path, "-n"))
    provenance_s = read_provenance_times(folder)
    benchmark_s = read_benchmark_times(folder)
    if len(provenance_s) != n_jobs:
        sys.exit(f"bench_scale: {len(provenance_s)} provenance records for {n_jobs} jobs; cannot attribute job times")
    # A job's benchmark and provenance files share the rule folder and the file stem.
    paired = [(seconds, provenance_s[job]) for job, seconds in benchmark_s.items() if job in provenance_s]
    shutil.rmtree(folder)
    step_sum_s = sum(provenance_s.values())
    return {"n_subjects": n_subjects, "cores": cores, "n_jobs": n_jobs, "wall_s": wall_s, "cpu_s": cpu_s,
            "step_sum_s": step_sum_s,
            "overhead_per_job_s": (wall_s * cores - step_sum_s) / n_jobs,
            "cpu_overhead_per_job_s": (cpu_s - step_sum_s) / n_jobs,
            "n_benchmarked": len(paired),
            "process_minus_step_per_job_s": (sum(b - p for b, p in paired) / len(paired)) if paired else float("nan"),
            "up_to_date_dry_run_s": up_to_date_s}


def growth_exponent(sizes, values):
    """Least-squares slope of log(value) on log(size): 1 is linear growth."""
    xs = [math.log(size) for size in sizes]
    ys = [math.log(value) for value in values]
    mean_x, mean_y = sum(xs) / len(xs), sum(ys) / len(ys)
    return sum((x - mean_x) * (y - mean_y) for x, y in zip(xs, ys)) / sum((x - mean_x) ** 2 for x in xs)


def linear_fit(sizes, values):
    """Least-squares (intercept, slope) of value = intercept + slope * size."""
    mean_x, mean_y = sum(sizes) / len(sizes), sum(values) / len(values)
    slope = (sum((x - mean_x) * (y - mean_y) for x, y in zip(sizes, values))
             / sum((x - mean_x) ** 2 for x in sizes))
    return mean_y - slope * mean_x, slope


def print_planning_table(rows, target, unit, check=None):
    keys = [f"{name}_{unit}_s" for name, _ in PLANNING_COMMANDS]
    print(f"\nPlanning cost, {unit} seconds of one snakemake process")
    print(f"{'subjects':>15} {'jobs':>6} " + " ".join(f"{PLANNING_LABELS[name]:>15}" for name, _ in PLANNING_COMMANDS))
    for row in rows:
        print(f"{row['n_subjects']:>15} {row['n_jobs']:>6} " + " ".join(f"{row[key]:>15.2f}" for key in keys))
    if len(rows) < 2:
        return
    sizes = [row["n_subjects"] for row in rows]
    first, last = rows[0], rows[-1]
    print(f"{'ratio ' + str(last['n_subjects']) + '/' + str(first['n_subjects']):>15} {'':>6} "
          + " ".join(f"{last[key] / first[key]:>15.2f}" for key in keys)
          + f"   (subjects x{last['n_subjects'] / first['n_subjects']:.0f}, jobs x{last['n_jobs'] / first['n_jobs']:.1f})")
    print(f"{'growth exponent':>15} {'':>6} " + " ".join(f"{growth_exponent(sizes, [r[key] for r in rows]):>15.2f}" for key in keys)
          + "   (slope of log time on log subjects; 1 = linear)")
    fits = [linear_fit(sizes, [r[key] for r in rows]) for key in keys]
    print(f"{'per subject':>15} {'':>6} " + " ".join(f"{slope:>15.4f}" for _, slope in fits)
          + "   (slope of a straight-line fit, seconds per subject)")
    print(f"{'line at ' + str(target):>15} {'':>6} " + " ".join(f"{intercept + slope * target:>15.1f}" for intercept, slope in fits)
          + "   (straight line extrapolated, not measured)")
    if check:
        print(f"{'measured ' + str(target):>15} {check['n_jobs']:>6} " + " ".join(f"{check[key]:>15.1f}" for key in keys)
              + "   (one run, to check the line)")


def print_run_table(result):
    print(f"\nReal run of {result['n_subjects']} subjects on --cores {result['cores']}: {result['n_jobs']} jobs")
    print(f"  wall time                         {result['wall_s']:8.1f} s  (CPU {result['cpu_s']:.1f} s)")
    print(f"  sum of the steps' own times       {result['step_sum_s']:8.1f} s  (provenance wall_time_s)")
    print(f"  overhead per job                  {result['overhead_per_job_s']:8.2f} s  (wall x cores - steps) / jobs")
    print(f"  CPU beyond the steps, per job     {result['cpu_overhead_per_job_s']:8.2f} s  (CPU - steps) / jobs")
    print(f"  job process minus step, per job   {result['process_minus_step_per_job_s']:8.2f} s  "
          f"(benchmark: s - provenance, {result['n_benchmarked']} jobs with a benchmark file)")
    print(f"  dry run when up to date           {result['up_to_date_dry_run_s']:8.1f} s")


def parse_arguments(argv):
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--sizes", type=int, nargs="+", default=[25, 50, 100, 200], help="numbers of subjects to plan")
    parser.add_argument("--run-size", type=int, default=25, help="subjects of the real run (0: no real run)")
    parser.add_argument("--cores", type=int, default=1, help="cores of the real run (1 keeps the overhead arithmetic exact)")
    parser.add_argument("--target", type=int, default=1000, help="number of subjects to extrapolate to")
    parser.add_argument("--repeats", type=int, default=3, help="runs of each planning command; the fastest counts")
    parser.add_argument("--measure-target", action=argparse.BooleanOptionalAction, default=True,
                        help="also plan the --target study once, to check the extrapolation (default: on)")
    parser.add_argument("--json", help="also write the measurements to this JSON file")
    return parser.parse_args(argv)


def main(argv):
    arguments = parse_arguments(argv)
    if not os.access(SNAKEMAKE, os.X_OK):
        sys.exit(f"bench_scale: {SNAKEMAKE} not found; run `make env` first")
    load_1min = os.getloadavg()[0]
    print(f"bench_scale: {os.cpu_count()} CPUs, load average {load_1min:.1f} at start "
          "(other processes on the machine inflate every time below)")
    scratch_root = tempfile.mkdtemp(prefix="foldwise-bench-scale-")
    global WORKFLOW_ROOT
    try:
        WORKFLOW_ROOT = snapshot_tree(scratch_root)
        demo_root = simulate_template_subject(scratch_root)
        planning = [measure_planning(n_subjects, demo_root, scratch_root, arguments.repeats)
                    for n_subjects in sorted(arguments.sizes)]
        check = measure_planning(arguments.target, demo_root, scratch_root, 1) if arguments.measure_target else None
        print(f"(each time: the fastest of {arguments.repeats} runs)")
        print_planning_table(planning, arguments.target, "wall", check)
        print_planning_table(planning, arguments.target, "cpu", check)
        run = measure_real_run(arguments.run_size, arguments.cores, demo_root, scratch_root) if arguments.run_size > 0 else None
        if run:
            print_run_table(run)
    finally:
        shutil.rmtree(scratch_root, ignore_errors=True)
    if arguments.json:
        with open(arguments.json, "w", encoding="utf-8") as handle:
            json.dump({"load_average_1min": load_1min, "planning": planning, "target_check": check, "run": run},
                      handle, indent=1)
    return 0


if __name__ == "__main__":
    sys.exit(main(sys.argv[1:]))
