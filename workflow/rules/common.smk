# Shared wiring. The study model (foldwise.study) and the plan (foldwise.plan)
# decide everything: subjects and runs, every job's inputs, outputs and exact
# settings. This file only hands them to Snakemake.
import os
import sys

os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")  # one BLAS thread per job: same bits whatever --cores
os.environ.setdefault("OMP_NUM_THREADS", "1")

from foldwise import contract, plan
from foldwise.config import apply_overrides, load_yaml, validate
from foldwise.provenance.environment import check_environment, versioned_code
from foldwise.provenance.runs import finish_run, start_run
from foldwise.errors import InputError
from foldwise.data.fileio import check_output_folder
from foldwise.results_folder import check_results_writable, claim_results_dir, shared_results_warning
from foldwise.provenance.hashing import code_hash
from foldwise.study import build_study


# The study config: `--config config_file=path` names it;
# the default is the demo study. Our own loader reads YAML safely and reports
# a malformed file by line.
CONFIG_FILE = config.pop("config_file", None)
try:
    CONFIG_FILE = CONFIG_FILE or "config/config.yaml"
    # Other --config entries override the file (merged before validation); --configfile is refused.
    OVERRIDES = [entry for entry in workflow.config_settings.config_args or [] if not entry.startswith("config_file=")]
    STUDY = apply_overrides(load_yaml(CONFIG_FILE), OVERRIDES, CONFIG_FILE, workflow.overwrite_configfiles)
    check_environment(os.path.join(workflow.basedir, "requirements", "lock.txt"))
    check_results_writable(STUDY, CONFIG_FILE)  # study.results_dir: every output of this study goes there
    check_output_folder(STUDY["study"]["store_dir"], "study.store_dir")
    MODEL = build_study(STUDY, path=CONFIG_FILE, overrides=OVERRIDES)  # every check of meaning, before any job
    if shared_results_warning(MODEL.results_dir, CONFIG_FILE):  # another config file ran into this results folder last
        print(f"foldwise WARNING: {shared_results_warning(MODEL.results_dir, CONFIG_FILE)}", file=sys.stderr)
except InputError as error:
    raise WorkflowError(f"foldwise: {error}") from None
config.clear()
config.update(STUDY)  # scripts read study.store_dir from here


onstart:
    start_run(workflow.dag, MODEL.results_dir, STUDY["study"]["store_dir"])  # leftovers of a killed run; forced jobs skip the memo
    claim_results_dir(MODEL.results_dir, CONFIG_FILE)  # which config file this results folder belongs to (a real run only)
    # Snakemake 9.27's job-rate limiter (default 100 jobs per 1 s, for submissions to a cluster) arms a
    # 1-s timer at every scheduling round and every timer starts one more round, so the rounds multiply
    # with each job that ends (8,218 rounds in a 175-s full-shape run, profiled; docs/speed.md). On one
    # machine nothing needs the limit: rounds then happen only when a job ends. Cluster runs keep it.
    if workflow.local_exec:
        workflow.scheduler.job_rate_limiter = None

SCRIPTS = os.path.join(workflow.basedir, "workflow", "scripts")
MANIFEST = MODEL.paths.template("manifest")

wildcard_constraints:
    subject="[A-Za-z0-9]+",
    run_id="(ses-[A-Za-z0-9]+_)?(task-[A-Za-z0-9]+_)?run-[A-Za-z0-9]+",
    roi="[A-Za-z0-9]+",
    analysis="[A-Za-z0-9][A-Za-z0-9_]*",
    block="[0-9]+",


# -- what each rule takes from the plan ------------------------------------------------------
def outputs_of(step, rois=None, run_ids=None):
    """The step's output templates (the provenance record last); with ``rois``, one file per ROI (a list each, plan.with_rois);
    with ``run_ids``, one file per run (plan.with_runs)."""
    outputs = plan.step_outputs(MODEL, step)
    outputs = outputs if rois is None else plan.with_rois(outputs, rois)
    return outputs if run_ids is None else plan.with_runs(outputs, run_ids)


def inputs_of(step):
    """A named input function: the job's inputs, from the plan."""
    return lambda wildcards: plan.job_inputs(MODEL, step, wildcards)


def settings_of(step):
    """params.settings: exactly the config subset the step reads (narrow key), from the plan."""
    return lambda wildcards: plan.job_settings(MODEL, step, wildcards)


def step_code(script_name, *modules):
    """Hash of a step's script and every package module it imports (narrow code key)."""
    return versioned_code(code_hash(os.path.join(SCRIPTS, script_name), *modules))  # versions in: an upgrade reruns


def log_of(step):
    return plan.step_log(MODEL, step)


def all_job_outputs():
    """Every output file of every planned job: the default target, so a deleted file is made again."""
    return plan.all_job_outputs(MODEL)


def calibration_targets():
    """The design self-check's outputs (make calibrate), off the default target."""
    return plan.calibration_targets(MODEL)


def all_provenance_records():
    """Every job's provenance record: the manifest is built from them."""
    return plan.all_provenance_records(MODEL)


def print_closing_lines():
    """The run's last lines: how many warnings the jobs logged, then the report's path (the last line)."""
    from foldwise.report.terminal import closing_lines, job_warnings

    for line in closing_lines(len(job_warnings(plan.report_job_logs(MODEL))), MODEL.paths.template("report_html"), MODEL.paths.folder("logs")):
        print(line)


def print_group_summaries():
    from foldwise.report.terminal import fit_lines  # summary lines wrapped for the terminal
    for name in MODEL.analyses:
        path = MODEL.paths.fill("group_summary", analysis=name)
        if os.path.isfile(path):
            print(fit_lines(open(path, encoding="utf-8").read()))
    for path in plan.geometry_wiring.group_summary_paths(MODEL):  # geometry analyses
        if os.path.isfile(path):
            print(fit_lines(open(path, encoding="utf-8").read()))


def report_figure(entry, path):
    """Every figure the page embeds goes into Snakemake's --report with its caption and category."""
    labels = {"figure": entry["stem"]}
    labels.update({key: entry[field] for key, field in (("analysis", "analysis"), ("ROI", "roi"), ("subject", "subject"))
                   if entry[field]})
    return report(path, caption=os.path.join(workflow.basedir, entry["caption"]), category=entry["category"],
                  subcategory=entry["analysis"] or (f"sub-{entry['subject']}" if entry["subject"] else "study"), labels=labels)
