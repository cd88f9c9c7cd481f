"""A whole study from empty results, measured against its own read floor.

Simulates a study with the demo simulator at a larger grid (by default 8
subjects x 7 runs, a 64 x 64 x 38 grid whose ellipsoidal brain holds about
59,000 voxels, 8 trials per condition per run: about 180 volumes per run,
stored as int16 .nii.gz with a scale factor, as scanners export them), 9 ROIs,
a within and a cross analysis with 1,000 permutations and the correlation
classifier. The simulation and the int16 conversion are not timed (and can
be kept between invocations with --data). Then, in one invocation:

1. the read floor: every BOLD file read once with nibabel as float32
   (``nib.load(path).get_fdata(dtype=np.float32)``), CPU seconds of this
   process; measured before and after the study run, the smaller of the two
   per file counts (the slower read measured other processes);
2. the study from empty results (no results folder, no memo store) through
   Snakemake with the local profile, exactly as a user runs it: wall time and
   the CPU time of Snakemake and every job process;
3. per rule: jobs, in-job CPU (from ``run_job``'s start to its provenance
   record: memo hashing, the step, the figure, the record; the records'
   ``cpu_time_s``), in-job wall (``wall_time_s``), the CPU of the whole job
   processes (interpreter start, imports, Snakemake's script preamble and
   the job), and the fixed cost per job = process CPU - in-job CPU;
4. the GLM job of each run against the float32 read of that run, the brain
   mask of each subject against the reads of that subject's runs, and
   ``wall x cores / summed in-job wall``;
5. a one-ROI change (one ROI loses a label) rerun on the finished study;
6. unless --no-demo: the demo study (config/config.yaml) from empty results,
   and its one-ROI change.

Process CPU comes from a ``sitecustomize`` module the benchmark puts first on
the job processes' PYTHONPATH: at exit each Python process appends its own
CPU time (``getrusage(RUSAGE_SELF)``) to a log (at ``os._exit`` too, with
which a job script ends once its files are written). It changes no job's work.

The machine may be shared: wall times move with other processes, CPU times
hardly do. The ratios printed are measured in this one invocation. The
workflow measured is a commit (HEAD by default, extracted with git
archive); with --baseline REV the same study (same files) is also run with
the workflow of another commit, so before and after come from one
invocation too.

    .venv/bin/python benchmarks/bench_study.py                   # the full shape (long: tens of minutes here)
    .venv/bin/python benchmarks/bench_study.py --small           # 3 subjects x 3 runs on a 32 x 32 x 20 grid, 200 permutations
    .venv/bin/python benchmarks/bench_study.py --small --baseline 2b945cc --no-demo
"""

import argparse
import copy
import glob
import json
import os
import resource
import shutil
import statistics
import subprocess
import sys
import tempfile
import time

import nibabel as nib
import numpy as np
import yaml

REPO = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
SNAKEMAKE = os.path.join(REPO, ".venv", "bin", "snakemake")

# Targets of the speed issue (ratios measured in one run).
TARGET_CPU_PER_READ = 7.0
TARGET_WALL_CORES_PER_IN_JOB = 1.3
TARGET_GLM_PER_READ = 1.0
TARGET_MASK_PER_READ = 0.2
TARGET_ROI_CHANGE_STUDY_S = 25.0
TARGET_ROI_CHANGE_DEMO_S = 10.0
TARGET_DEMO_WALL_S = 45.0
TARGET_DEMO_WALL_CORES_PER_IN_JOB = 2.3
TARGET_REPORT_CPU_S = 5.0
TARGET_PAGE_S = 2.0

SHAPES = {
    "full": {"n_subjects": 8, "n_runs": 7, "grid_shape": [64, 64, 38], "trials_per_condition_per_run": 8, "n_permutations": 1000},
    "small": {"n_subjects": 3, "n_runs": 3, "grid_shape": [32, 32, 20], "trials_per_condition_per_run": 4, "n_permutations": 200},
}
CONFOUNDS = ["trans_x", "trans_y", "trans_z", "rot_x", "rot_y", "rot_z"]
# Nine ROIs from the demo atlas's six labels: the three pairs and each side alone.
ROIS = ([{"name": name, "labels": [f"{name}_L", f"{name}_R"]} for name in ("ember", "glow", "hush")]
        + [{"name": f"{name}{side}", "labels": [f"{name}_{side}"]} for name in ("ember", "glow", "hush") for side in ("L", "R")])

SITECUSTOMIZE = '''\
# Written by benchmarks/bench_study.py: each Python process appends its own CPU time at exit.
import atexit as _atexit
import os as _os
import time as _time

_LOG = _os.environ.get("FOLDWISE_BENCH_PROCESS_LOG")
if _LOG:
    _STARTED = _time.perf_counter()

    def _foldwise_bench_record():
        import json
        import resource
        import sys
        usage = resource.getrusage(resource.RUSAGE_SELF)
        line = json.dumps({"argv0": sys.argv[0] if sys.argv else "", "cpu_s": usage.ru_utime + usage.ru_stime,
                           "wall_s": _time.perf_counter() - _STARTED})
        with open(_LOG, "a", encoding="utf-8") as handle:
            handle.write(line + "\\n")

    _atexit.register(_foldwise_bench_record)

    # A job script ends with os._exit once its files are written (memo.run_job, end_process): no atexit
    # hooks run then, so the record is taken just before.
    _real_exit = _os._exit

    def _recorded_exit(status):
        _foldwise_bench_record()
        _real_exit(status)

    _os._exit = _recorded_exit
'''


def write_text(path, text):
    os.makedirs(os.path.dirname(path), exist_ok=True)
    with open(path, "w", encoding="utf-8") as handle:
        handle.write(text)
    return path


def snapshot_tree(revision, destination):
    """The workflow as committed at ``revision`` (git archive), so other people's unfinished edits are not measured."""
    os.makedirs(destination)
    archive = subprocess.run(["git", "-C", REPO, "archive", "--format=tar", revision], capture_output=True, check=True).stdout
    subprocess.run(["tar", "-x", "-C", destination], input=archive, check=True)
    commit = subprocess.run(["git", "-C", REPO, "rev-parse", "--short", revision], capture_output=True, text=True, check=True).stdout.strip()
    return destination, commit


def children_cpu_s():
    usage = resource.getrusage(resource.RUSAGE_CHILDREN)
    return usage.ru_utime + usage.ru_stime


def run_snakemake(tree, folder, study_path, scratch, cores, *extra):
    """(wall s, CPU s of Snakemake and all its jobs, job-process log lines) of one Snakemake run in ``folder``."""
    process_log = os.path.join(scratch, f"processes-{time.monotonic_ns()}.jsonl")
    environment = dict(os.environ, PYTHONPATH=os.pathsep.join([os.path.join(scratch, "site"), os.path.join(tree, "workflow")]),
                       FOLDWISE_BENCH_PROCESS_LOG=process_log, OPENBLAS_NUM_THREADS="1", OMP_NUM_THREADS="1", MKL_NUM_THREADS="1")
    command = [SNAKEMAKE, "--snakefile", os.path.join(tree, "Snakefile"), "--directory", folder,
               "--profile", os.path.join(tree, "config", "profiles", "local"), "--cores", str(cores), *extra,
               "--config", f"config_file={study_path}"]  # last: --config takes every word after it
    cpu_before_s = children_cpu_s()
    started = time.perf_counter()
    completed = subprocess.run(command, capture_output=True, text=True, env=environment)
    wall_s = time.perf_counter() - started
    cpu_s = children_cpu_s() - cpu_before_s
    if completed.returncode != 0:
        tail = "\n".join((completed.stdout + completed.stderr).splitlines()[-40:])
        sys.exit(f"bench_study: snakemake failed ({completed.returncode}) in {folder}:\n{tail}")
    processes = []
    if os.path.exists(process_log):
        with open(process_log, encoding="utf-8") as handle:
            processes = [json.loads(line) for line in handle if line.strip()]
    return wall_s, cpu_s, processes


def simulate(tree, data_root, shape, scratch):
    """The study's BIDS dataset and atlas, simulated once by the demo rule of ``tree``, BOLD converted to int16."""
    description = os.path.join(data_root, "results", "demo", "bids", "dataset_description.json")
    if os.path.exists(description):
        print(f"bench_study: reusing the simulated dataset in {data_root}")
        return os.path.join(data_root, "results", "demo")
    os.makedirs(data_root, exist_ok=True)
    study = {"study": {"name": "lantern-speed-data", "seed": 20261201},
             "dataset": {"source": "demo", "confounds": CONFOUNDS},
             "demo": {key: shape[key] for key in ("n_subjects", "n_runs", "grid_shape", "trials_per_condition_per_run")},
             "rois": ROIS[:1],
             "analyses": [{"name": "shape", "kind": "within", "classes": {"round": ["seen_round"], "square": ["seen_square"]}}]}
    study_path = write_text(os.path.join(data_root, "simulate.yaml"), yaml.safe_dump(study, sort_keys=False))
    print("bench_study: simulating the dataset (not timed) ...", flush=True)
    run_snakemake(tree, data_root, study_path, scratch, 2, "results/demo/bids/dataset_description.json")
    for path in sorted(glob.glob(os.path.join(data_root, "results", "demo", "bids", "sub-*", "func", "*_bold.nii.gz"))):
        image = nib.load(path)
        converted = nib.Nifti1Image(image.get_fdata(dtype=np.float32), image.affine, image.header)
        converted.set_data_dtype(np.int16)  # nibabel picks scl_slope/scl_inter for the range
        nib.save(converted, path)
    return os.path.join(data_root, "results", "demo")


def bold_files(demo_root):
    return sorted(glob.glob(os.path.join(demo_root, "bids", "sub-*", "func", "*_bold.nii.gz")))


def read_floor(paths):
    """CPU seconds of a nibabel float32 read of each file."""
    seconds = {}
    for path in paths:
        started = time.process_time()
        data = nib.load(path).get_fdata(dtype=np.float32)
        seconds[path] = time.process_time() - started
        del data
    return seconds


def study_config(shape, demo_root):
    n_permutations = shape["n_permutations"]
    return {
        "study": {"name": "lantern-speed", "seed": 20261201},
        "dataset": {"source": "bids", "bids_root": os.path.join(demo_root, "bids"),
                    "atlas_image": os.path.join(demo_root, "atlas", "atlas.nii.gz"),
                    "atlas_labels": os.path.join(demo_root, "atlas", "atlas_labels.tsv"), "confounds": CONFOUNDS},
        "glm": {"serial_correlation": "ar1_whiten", "statistic": "t", "pattern_mode": "per_condition"},
        "rois": copy.deepcopy(ROIS),
        "analyses": [
            {"name": "shape", "kind": "within", "classes": {"round": ["seen_round"], "square": ["seen_square"], "star": ["seen_star"]},
             "classifier": "correlation_centroid", "n_permutations": n_permutations},
            {"name": "shape_seen_heard", "kind": "cross", "classifier": "correlation_centroid", "n_permutations": n_permutations,
             "sets": {"seen": {"round": "seen_round", "square": "seen_square", "star": "seen_star"},
                      "heard": {"round": "heard_round", "square": "heard_square", "star": "heard_star"}}},
        ],
        "group": {"n_draws": 10000},
        "searchlight": {"enabled": False},
    }


def one_roi_changed(study):
    changed = copy.deepcopy(study)
    changed["rois"][0]["labels"] = changed["rois"][0]["labels"][:1]  # one ROI becomes one-sided
    return changed


def provenance_records(folder):
    records = []
    for path in glob.glob(os.path.join(folder, "results", "provenance", "*", "*.json")):
        with open(path, encoding="utf-8") as handle:
            record = json.load(handle)
        record["_rule"] = os.path.basename(os.path.dirname(path))
        record["_path"] = path
        records.append(record)
    return records


def record_stamps(folder):
    """Provenance record -> mtime_ns: a job that ran (computed or restored) rewrote its record."""
    return {path: os.stat(path).st_mtime_ns for path in glob.glob(os.path.join(folder, "results", "provenance", "*", "*.json"))}


def script_rule(argv0):
    """The rule of a job process from Snakemake's temporary script name (``tmpXXXX.<script>.py``), else a label."""
    name = os.path.basename(argv0)
    parts = name.split(".")
    if name.startswith("tmp") and len(parts) >= 3 and parts[-1] == "py":
        return {"demo_dataset": "demo_dataset"}.get(parts[-2], parts[-2])
    return "snakemake" if "snakemake" in name else f"other ({name or '-'})"


def rule_table(records, processes):
    """rule -> {jobs, in-job cpu, in-job wall, process cpu, processes} for one run."""
    table = {}
    for record in records:
        row = table.setdefault(record["_rule"], {"jobs": 0, "in_cpu_s": 0.0, "in_wall_s": 0.0, "proc_cpu_s": 0.0, "procs": 0,
                                                 "has_cpu": True})
        row["jobs"] += 1
        row["in_wall_s"] += record["wall_time_s"]
        if "cpu_time_s" in record:
            row["in_cpu_s"] += record["cpu_time_s"]
        else:
            row["has_cpu"] = False
    for process in processes:
        row = table.setdefault(script_rule(process["argv0"]), {"jobs": 0, "in_cpu_s": 0.0, "in_wall_s": 0.0, "proc_cpu_s": 0.0,
                                                               "procs": 0, "has_cpu": False})
        row["proc_cpu_s"] += process["cpu_s"]
        row["procs"] += 1
    return table


def measure_study(label, tree, data_root, demo_root, shape, scratch, cores, reads_s):
    folder = os.path.join(scratch, "study-" + label.replace(" ", "-"))
    os.makedirs(folder)
    study = study_config(shape, demo_root)
    study_path = write_text(os.path.join(folder, "study.yaml"), yaml.safe_dump(study, sort_keys=False))
    print(f"bench_study: [{label}] the study from empty results ...", flush=True)
    wall_s, cpu_s, processes = run_snakemake(tree, folder, study_path, scratch, cores)
    records = provenance_records(folder)
    before = record_stamps(folder)
    write_text(study_path, yaml.safe_dump(one_roi_changed(study), sort_keys=False))
    print(f"bench_study: [{label}] one-ROI change ...", flush=True)
    roi_wall_s, roi_cpu_s, _ = run_snakemake(tree, folder, study_path, scratch, cores)
    after = record_stamps(folder)
    roi_jobs = sum(1 for path, stamp in after.items() if before.get(path) != stamp)
    roi_records = [record for record in provenance_records(folder) if before.get(record["_path"]) != after[record["_path"]]]
    result = {"label": label, "wall_s": wall_s, "cpu_s": cpu_s, "records": records, "processes": processes,
              "roi_wall_s": roi_wall_s, "roi_cpu_s": roi_cpu_s, "roi_jobs": roi_jobs, "roi_records": roi_records, "cores": cores}
    shutil.rmtree(folder, ignore_errors=True)
    return result


def measure_demo(label, tree, scratch, cores):
    folder = os.path.join(scratch, "demo-" + label.replace(" ", "-"))
    os.makedirs(folder)
    with open(os.path.join(tree, "config", "config.yaml"), encoding="utf-8") as handle:
        study = yaml.safe_load(handle)
    study_path = write_text(os.path.join(folder, "demo.yaml"), yaml.safe_dump(study, sort_keys=False))
    print(f"bench_study: [{label}] the demo from empty results ...", flush=True)
    wall_s, cpu_s, processes = run_snakemake(tree, folder, study_path, scratch, cores)
    records = provenance_records(folder)
    write_text(study_path, yaml.safe_dump(one_roi_changed(study), sort_keys=False))
    roi_wall_s, roi_cpu_s, _ = run_snakemake(tree, folder, study_path, scratch, cores)
    shutil.rmtree(folder, ignore_errors=True)
    in_wall_s = sum(record["wall_time_s"] for record in records)
    in_cpu_s = sum(record.get("cpu_time_s", 0.0) for record in records)
    return {"label": label, "jobs": len(records), "wall_s": wall_s, "cpu_s": cpu_s, "in_wall_s": in_wall_s, "in_cpu_s": in_cpu_s,
            "ratio": wall_s * cores / in_wall_s, "roi_wall_s": roi_wall_s, "roi_cpu_s": roi_cpu_s, "cores": cores}


def subject_of(path):
    return os.path.basename(path).split("_")[0][len("sub-"):]


def verdict(value, target):
    return f"target <= {target:g}: {'met' if value <= target else 'NOT met'}"


def glm_read_ratios(records, reads_s):
    """([read s of each GLM job's runs], [in-job CPU / that read]) over the GLM records.

    A GLM job reads one run or, one job per subject, all the subject's runs
    (each listed as a ``bold`` input of its record): its reads are summed.
    Records without ``cpu_time_s`` (older commits) use their wall time.
    """
    by_name = {os.path.basename(path): seconds for path, seconds in reads_s.items()}
    reads, ratios = [], []
    for record in records:
        if record["_rule"] != "glm":
            continue
        read_s = sum(by_name[os.path.basename(item["path"])] for item in record["inputs"] if item["name"] == "bold")
        reads.append(read_s)
        ratios.append(record.get("cpu_time_s", record["wall_time_s"]) / read_s)
    return reads, ratios


def report_study(result, reads_s):
    label, cores = result["label"], result["cores"]
    records = result["records"]
    table = rule_table(records, result["processes"])
    floor_s = sum(reads_s.values())
    in_wall_s = sum(record["wall_time_s"] for record in records)
    has_cpu = all("cpu_time_s" in record for record in records)
    in_cpu_s = sum(record.get("cpu_time_s", 0.0) for record in records)
    print(f"\n== [{label}] study from empty results: {len(records)} jobs on --cores {cores}")
    print(f"{'rule':16s} {'jobs':>5s} {'in-job CPU s':>13s} {'in-job wall s':>14s} {'process CPU s':>14s} {'fixed CPU/job s':>16s}")
    for rule in sorted(table, key=lambda name: -table[name]["proc_cpu_s"]):
        row = table[rule]
        if row["jobs"] and not row["procs"]:
            fixed = f"{'in-process':>16s}"  # a run: block in Snakemake's own process: its cost is in the snakemake row
        elif row["jobs"] and row["has_cpu"]:
            fixed = f"{(row['proc_cpu_s'] - row['in_cpu_s']) / row['jobs']:16.2f}"
        else:
            fixed = f"{'':>16s}"
        in_cpu = f"{row['in_cpu_s']:13.1f}" if row["has_cpu"] and row["jobs"] else f"{'n/a':>13s}"
        print(f"{rule:16s} {row['jobs'] or row['procs']:5d} {in_cpu} {row['in_wall_s']:14.1f} {row['proc_cpu_s']:14.1f} {fixed}")
    jobs_cpu_s = sum(row["proc_cpu_s"] for name, row in table.items() if name != "snakemake")
    total_in_cpu = f"{in_cpu_s:13.1f}" if has_cpu else f"{'n/a':>13s}"
    all_processes_s = jobs_cpu_s + table.get("snakemake", {}).get("proc_cpu_s", 0.0)
    print(f"{'total':16s} {len(records):5d} {total_in_cpu} {in_wall_s:14.1f} {all_processes_s:14.1f}")
    print("  (process CPU of 'snakemake': the scheduler process itself, with the jobs it runs in-process; "
          "n/a: this tree's records hold no cpu_time_s)")
    print(f"\n  wall {result['wall_s']:.1f} s, CPU {result['cpu_s']:.1f} s (Snakemake + every job, getrusage of children)")
    print(f"  of which outside the Python processes' own records: {result['cpu_s'] - all_processes_s:.1f} s (the exit after its record of "
          f"a Python process that exits normally -- module teardown, about 0.1-0.4 s; job scripts end with os._exit --, "
          f"the shells that start script jobs, any solver)")
    print(f"  read floor (every BOLD file once, nibabel float32): {floor_s:.1f} s CPU over {len(reads_s)} files")
    print(f"  total CPU / read floor          {result['cpu_s'] / floor_s:6.2f}   {verdict(result['cpu_s'] / floor_s, TARGET_CPU_PER_READ)}")
    ratio = result["wall_s"] * cores / in_wall_s
    print(f"  wall x cores / summed in-job wall {ratio:6.2f}   {verdict(ratio, TARGET_WALL_CORES_PER_IN_JOB)}")
    if has_cpu:
        # Jobs in Snakemake's process are threads: their in-job wall includes waits for the interpreter lock,
        # so the same ratio on in-job CPU (the work itself) is the stricter reading.
        print(f"  wall x cores / summed in-job CPU  {result['wall_s'] * cores / in_cpu_s:6.2f}   (the stricter reading: "
              f"threads' in-job wall includes waits for the interpreter lock)")
        print(f"  total CPU - summed in-job CPU   {result['cpu_s'] - in_cpu_s:6.1f} s  (start-up, imports, Snakemake)")
    glm_processes = sorted(process["cpu_s"] for process in result["processes"] if script_rule(process["argv0"]) == "glm")
    glm_reads_s, glm_ratios = glm_read_ratios(records, reads_s)
    if glm_ratios:
        what = "in-job CPU" if has_cpu else "in-job WALL (no cpu_time_s)"
        median = statistics.median(glm_ratios)
        print(f"  GLM job {what} / float32 read of its runs: median {median:.2f}, max {max(glm_ratios):.2f} over {len(glm_ratios)} jobs"
              f"   {verdict(median, TARGET_GLM_PER_READ)} (median)")
        if glm_processes and len(glm_processes) == len(glm_reads_s):
            ratio = sum(glm_processes) / sum(glm_reads_s)
            print(f"  GLM job process CPU (start-up, imports and all) / read of its runs: {sum(glm_processes):.1f} s / "
                  f"{sum(glm_reads_s):.1f} s = {ratio:.2f} over {len(glm_processes)} processes")
    reads_by_subject = {}
    for path, seconds in reads_s.items():
        reads_by_subject[subject_of(path)] = reads_by_subject.get(subject_of(path), 0.0) + seconds
    mask_ratios = [(record["cpu_time_s"] if "cpu_time_s" in record else record["wall_time_s"]) / reads_by_subject[record["wildcards"]["subject"]]
                   for record in records if record["_rule"] == "brain_mask"]
    if mask_ratios:
        median = statistics.median(mask_ratios)
        print(f"  brain mask in-job {'CPU' if has_cpu else 'WALL'} / reads of the subject's runs: median {median:.3f}, "
              f"max {max(mask_ratios):.3f}   {verdict(median, TARGET_MASK_PER_READ)} (median)")
    report_lines(table, records, result["roi_records"])
    print(f"  one-ROI change: wall {result['roi_wall_s']:.1f} s, CPU {result['roi_cpu_s']:.1f} s, {result['roi_jobs']} jobs ran"
          f"   {verdict(result['roi_wall_s'], TARGET_ROI_CHANGE_STUDY_S)} (wall; the target is for the full shape)")
    rerun = {}
    for record in result["roi_records"]:
        row = rerun.setdefault(record["_rule"], [0, 0.0, 0, 0])
        row[0] += 1
        row[1] += record.get("cpu_time_s", record["wall_time_s"])
        parts = record.get("parts", [])
        row[2] += sum(1 for part in parts if not part.get("restored"))
        row[3] += len(parts)
    print("    rerun per rule (jobs, in-job CPU s, parts computed / parts): "
          + "; ".join(f"{rule} {row[0]}, {row[1]:.1f}, {row[2]}/{row[3]}" for rule, row in sorted(rerun.items())))


def figure_parts(record):
    parts = record.get("parts", [])
    drawn = sum(1 for part in parts if not part.get("restored"))
    return f"{drawn} of {len(parts)} parts computed" if parts else "no parts recorded"


def report_lines(table, records, roi_records):
    """The report's CPU from empty, and the report job of the one-ROI change (its figures of other ROIs restored)."""
    reports = [record for record in records if record["_rule"] == "report"]
    if not reports:
        return
    record = reports[0]
    in_job_s = record.get("cpu_time_s", float("nan"))
    if table.get("report", {}).get("procs"):
        process = table["report"]["proc_cpu_s"]
        print(f"  report from empty: in-job CPU {in_job_s:.1f} s, wall {record['wall_time_s']:.1f} s, "
              f"process CPU {process:.1f} s ({figure_parts(record)})   {verdict(process, TARGET_REPORT_CPU_S)} (process CPU)")
    else:  # a thread of Snakemake's process, which has imported what the job needs but matplotlib (imported inside the job)
        print(f"  report from empty: in-job CPU {in_job_s:.1f} s, wall {record['wall_time_s']:.1f} s, in Snakemake's process "
              f"({figure_parts(record)})   {verdict(in_job_s, TARGET_REPORT_CPU_S)} (in-job CPU)")
    again = [record for record in roi_records if record["_rule"] == "report"]
    if again:
        record = again[0]
        print(f"  report after the one-ROI change: in-job CPU {record.get('cpu_time_s', float('nan')):.1f} s, wall "
              f"{record['wall_time_s']:.1f} s ({figure_parts(record)}); the page assembly is this less the figures drawn"
              f"   {verdict(record['wall_time_s'], TARGET_PAGE_S)} (in-job wall, an upper bound of the page's)")


def report_demo(result):
    print(f"\n== [{result['label']}] demo (config/config.yaml) from empty results: {result['jobs']} jobs")
    print(f"  wall {result['wall_s']:.1f} s, CPU {result['cpu_s']:.1f} s, summed in-job wall {result['in_wall_s']:.1f} s   "
          f"{verdict(result['wall_s'], TARGET_DEMO_WALL_S)} (wall)")
    print(f"  wall x cores / summed in-job wall {result['ratio']:.2f}   {verdict(result['ratio'], TARGET_DEMO_WALL_CORES_PER_IN_JOB)}")
    if result["in_cpu_s"]:
        print(f"  wall x cores / summed in-job CPU  {result['wall_s'] * result['cores'] / result['in_cpu_s']:.2f}   (the stricter reading)")
    print(f"  one-ROI change: wall {result['roi_wall_s']:.1f} s, CPU {result['roi_cpu_s']:.1f} s   "
          f"{verdict(result['roi_wall_s'], TARGET_ROI_CHANGE_DEMO_S)} (wall)")


def parse_arguments(argv):
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--small", action="store_true", help="a quick shape: 3 subjects x 3 runs, 32 x 32 x 20 grid, 200 permutations")
    parser.add_argument("--subjects", type=int, help="override the shape's number of subjects")
    parser.add_argument("--runs", type=int, help="override the shape's runs per subject")
    parser.add_argument("--grid", type=int, nargs=3, help="override the shape's grid")
    parser.add_argument("--permutations", type=int, help="override the shape's permutations")
    parser.add_argument("--trials", type=int, help="override the shape's trials per condition per run (8: about 180 volumes)")
    parser.add_argument("--cores", type=int, default=2)
    parser.add_argument("--data", help="keep the simulated dataset in this folder (reused when it exists)")
    parser.add_argument("--rev", default="HEAD", help="the commit measured (default HEAD: committed code only)")
    parser.add_argument("--baseline", help="also run the study (and demo) with the workflow of this commit, e.g. an earlier one")
    parser.add_argument("--no-demo", action="store_true", help="skip the demo from empty results")
    parser.add_argument("--no-study", action="store_true", help="only the demo")
    parser.add_argument("--prepare-only", action="store_true", help="only simulate the dataset into --data (for a later run)")
    return parser.parse_args(argv)


def main(argv):
    arguments = parse_arguments(argv)
    shape = dict(SHAPES["small" if arguments.small else "full"])
    for key, value in (("n_subjects", arguments.subjects), ("n_runs", arguments.runs), ("grid_shape", arguments.grid),
                       ("n_permutations", arguments.permutations), ("trials_per_condition_per_run", arguments.trials)):
        if value is not None:
            shape[key] = list(value) if key == "grid_shape" else value
    load_1min = os.getloadavg()[0]
    print(f"bench_study: {os.cpu_count()} CPUs, load average {load_1min:.1f} at start (other processes inflate wall times); "
          f"shape {shape}")
    scratch = tempfile.mkdtemp(prefix="foldwise-bench-study-")
    try:
        write_text(os.path.join(scratch, "site", "sitecustomize.py"), SITECUSTOMIZE)
        trees = []
        for label, revision in [("now", arguments.rev)] + ([("baseline", arguments.baseline)] if arguments.baseline else []):
            tree, commit = snapshot_tree(revision, os.path.join(scratch, f"tree-{label}"))
            trees.append((f"{label} {commit}", tree))
            print(f"bench_study: '{label}' is commit {commit} ({revision})")
        studies, demos = [], []
        if not arguments.no_study:
            data_root = os.path.abspath(arguments.data) if arguments.data else os.path.join(scratch, "data")
            demo_root = simulate(trees[0][1], data_root, shape, scratch)
            if arguments.prepare_only:
                print(f"bench_study: dataset ready in {data_root}")
                return 0
            paths = bold_files(demo_root)
            first_reads = read_floor(paths)
            for label, tree in trees:
                studies.append(measure_study(label, tree, data_root, demo_root, shape, scratch, arguments.cores, first_reads))
            second_reads = read_floor(paths)
            reads_s = {path: min(first_reads[path], second_reads[path]) for path in paths}
            print(f"\nread floor measured twice (before and after the runs): {sum(first_reads.values()):.1f} s and "
                  f"{sum(second_reads.values()):.1f} s CPU; the per-file minimum, {sum(reads_s.values()):.1f} s, is used")
            for result in studies:
                report_study(result, reads_s)
        if not arguments.no_demo:
            demos = [measure_demo(label, tree, scratch, arguments.cores) for label, tree in trees]
            for result in demos:
                report_demo(result)
    finally:
        shutil.rmtree(scratch, ignore_errors=True)
    return 0


if __name__ == "__main__":
    sys.exit(main(sys.argv[1:]))
