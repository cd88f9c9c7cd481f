# Shared wiring: the validated study config, the runs of every subject, path
# templates, named input functions and the narrow-key helper.
import os
import re

os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")  # one BLAS thread per job: same bits whatever --cores
os.environ.setdefault("OMP_NUM_THREADS", "1")

from foldwise.config import apply_overrides, load_yaml, validate
from foldwise.provenance.environment import check_environment, versioned_code
from foldwise.provenance.runs import finish_run, start_run
from foldwise.errors import InputError
from foldwise.data.fileio import check_output_folder
from foldwise.provenance.hashing import code_hash, hash_object
from foldwise.report.figures import figure_catalogue
from foldwise.plan import plan_study


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
    check_output_folder("results", "results folder")
    check_output_folder(STUDY["study"]["store_dir"], "study.store_dir")
    PLAN = plan_study(STUDY, path=CONFIG_FILE)
except InputError as error:
    raise WorkflowError(f"foldwise: {error}") from None
config.clear()
config.update(STUDY)  # scripts read study.store_dir from here


onstart:
    start_run(workflow.dag, "results", STUDY["study"]["store_dir"])  # leftovers of a killed run; forced jobs skip the memo

SCRIPTS = os.path.join(workflow.basedir, "workflow", "scripts")
SUBJECTS = PLAN.subjects
ROI_NAMES = [roi["name"] for roi in STUDY["rois"]]
ANALYSES = {analysis["name"]: analysis for analysis in STUDY["analyses"]}

wildcard_constraints:
    subject="[A-Za-z0-9]+",
    run_id="(ses-[A-Za-z0-9]+_)?run-[A-Za-z0-9]+",
    roi="[A-Za-z0-9]+",
    analysis="[A-Za-z0-9][A-Za-z0-9_]*",
    block="[0-9]+",

# -- output path templates (the data contract of DESIGN.md) ------------------
DEMO_DESCRIPTION = os.path.join(STUDY["dataset"]["bids_root"], "dataset_description.json")
DEMO_TRUTH = "results/demo/ground_truth.json"
BRAIN_MASK = "results/masks/sub-{subject}/sub-{subject}_brainmask.nii.gz"
BRAIN_MEAN = "results/masks/sub-{subject}/sub-{subject}_mean.nii.gz"
BRAIN_SUMMARY = "results/masks/sub-{subject}/sub-{subject}_brainmask.json"
PATTERN_STEM = "results/patterns/sub-{subject}/sub-{subject}_{run_id}"
ROI_MASK = "results/masks/sub-{subject}/sub-{subject}_roi-{roi}_mask.nii.gz"
ROI_INFO = "results/masks/sub-{subject}/sub-{subject}_roi-{roi}.json"
ROI_COUNTS = "results/masks/sub-{subject}/sub-{subject}_roi_counts.tsv"
DECODE_STEM = "results/decoding/{analysis}/sub-{subject}/sub-{subject}_roi-{roi}"
SUBJECT_SCORES = "results/decoding/{analysis}/sub-{subject}_scores.tsv"
SUBJECT_SUMMARY = "results/decoding/{analysis}/sub-{subject}_summary.tsv"
GROUP_STEM = "results/group/{analysis}/{analysis}"
PATTERNS_IMAGE = f"{PATTERN_STEM}_patterns.nii.gz"
PATTERNS_TABLE = f"{PATTERN_STEM}_patterns.tsv"
DESIGN_TABLE = f"{PATTERN_STEM}_design.tsv"
DESIGN_FIGURE = f"{PATTERN_STEM}_design.png"
RESIDUAL_VARIANCE = f"{PATTERN_STEM}_resvar.nii.gz"
DECODE_SCORES = f"{DECODE_STEM}_scores.tsv"
DECODE_NULL = f"{DECODE_STEM}_null.tsv.gz"
DECODE_RANKINGS = f"{DECODE_STEM}_rankings.tsv.gz"
DECODE_CONFUSION = f"{DECODE_STEM}_confusion.tsv"
GROUP_TABLE = f"{GROUP_STEM}_group.tsv"
GROUP_NULL = f"{GROUP_STEM}_group_null.tsv.gz"
GROUP_SUMMARY = f"{GROUP_STEM}_summary.txt"
SEARCHLIGHT_BLOCK = "results/searchlight/{analysis}/sub-{subject}/sub-{subject}_block-{block}"
SEARCHLIGHT_SUBJECT = "results/searchlight/{analysis}/sub-{subject}_searchlight"
SEARCHLIGHT_GROUP = "results/searchlight/{analysis}/{analysis}_searchlight"
MANIFEST = "results/manifest.tsv"
REPORT_PROVENANCE = ["results/provenance/report/study.json"]


def provenance_path(rule_name, pattern):
    """Where a job's provenance record goes: results/provenance/<rule>/<wildcards>.json."""
    return f"results/provenance/{rule_name}/{pattern}.json"


def log_path(rule_name, pattern):
    return f"results/logs/{rule_name}/{pattern}.log"


def step_code(script_name, *modules):
    """Hash of a step's script and every package module it imports (narrow code key)."""
    return versioned_code(code_hash(os.path.join(SCRIPTS, script_name), *modules))  # versions in: an upgrade reruns


# -- runs ----------------------------------------------------------------------
def subject_runs(subject):
    return PLAN.runs_of(subject)


def run_record(wildcards):
    return PLAN.run(wildcards.subject, wildcards.run_id)


def subject_bold(wildcards):
    return [run["bold"] for run in subject_runs(wildcards.subject)]


def subject_pattern_files(wildcards):
    return [expand(PATTERNS_IMAGE, subject=wildcards.subject, run_id=run["run_id"])[0]
            for run in subject_runs(wildcards.subject)]


def subject_pattern_tables(wildcards):
    return [expand(PATTERNS_TABLE, subject=wildcards.subject, run_id=run["run_id"])[0]
            for run in subject_runs(wildcards.subject)]


def all_pattern_files():
    return [expand(PATTERNS_IMAGE, subject=run["subject"], run_id=run["run_id"])[0] for run in PLAN.runs]


def analysis_rois(name):
    return ANALYSES[name]["rois"] or ROI_NAMES


def print_group_summaries():
    for name in ANALYSES:
        path = expand(GROUP_SUMMARY, analysis=name)[0]
        if os.path.isfile(path):
            print(open(path, encoding="utf-8").read().rstrip())


# -- narrow settings: exactly the config each step reads ---------------------
# Each rule's params carry `settings` (this dict) and `code` (the hash of the
# code it runs), so Snakemake's params trigger reruns exactly what changed.
def demo_settings():
    dataset = STUDY["dataset"]
    return {"demo": STUDY["demo"], "seed": STUDY["study"]["seed"], "task": dataset["task"], "bids_root": dataset["bids_root"],
            "patterns": dataset["patterns"], "confounds": dataset["confounds"]}


def brain_mask_settings(wildcards):
    return {"brain_mask": STUDY["brain_mask"], "subject": wildcards.subject}


def glm_settings(wildcards):
    run = run_record(wildcards)
    return {"glm": STUDY["glm"], "confounds": STUDY["dataset"]["confounds"], "subject": run["subject"],
            "session": run["session"], "run_id": run["run_id"]}


def roi_entry(name):
    return next(roi for roi in STUDY["rois"] if roi["name"] == name)


def roi_settings(wildcards):
    return {"roi": roi_entry(wildcards.roi), "subject": wildcards.subject}


def subject_settings(wildcards):
    return {"subject": wildcards.subject}


def analysis_without_roi_list(name):
    """An analysis entry minus its ROI list: one ROI's job does not depend on the others."""
    return {key: value for key, value in ANALYSES[name].items() if key != "rois"}


def decode_settings(wildcards):
    return {"analysis": analysis_without_roi_list(wildcards.analysis), "subject": wildcards.subject, "roi": wildcards.roi,
            "seed": STUDY["study"]["seed"]}


def decode_gather_settings(wildcards):
    return {"analysis": analysis_without_roi_list(wildcards.analysis), "subject": wildcards.subject}


def group_settings(wildcards):
    return {"group": STUDY["group"], "analysis": ANALYSES[wildcards.analysis], "subjects": list(SUBJECTS),
            "seed": STUDY["study"]["seed"]}


# -- named input functions ---------------------------------------------------
def brain_mask_inputs(wildcards):
    inputs = {"bold": subject_bold(wildcards)}
    given = subject_runs(wildcards.subject)[0]["brain_mask"]
    if given:
        inputs["given_mask"] = given
    return inputs


def glm_inputs(wildcards):
    run = run_record(wildcards)
    inputs = {"bold": run["bold"], "events": run["events"], "sidecar": run["sidecar"],
              "mask": expand(BRAIN_MASK, subject=run["subject"])[0]}
    if STUDY["dataset"]["confounds"]:
        inputs["confounds"] = run["confounds"]
    return inputs


def roi_inputs(wildcards):
    roi = roi_entry(wildcards.roi)
    inputs = {"brain_mask": expand(BRAIN_MASK, subject=wildcards.subject)[0]}
    if "labels" in roi:
        inputs["atlas"] = STUDY["dataset"]["atlas_image"]
        inputs["atlas_labels"] = STUDY["dataset"]["atlas_labels"]
    elif "image" in roi:
        inputs["image"] = roi["image"]
    return inputs


def subject_roi_infos(wildcards):
    return expand(ROI_INFO, subject=wildcards.subject, roi=ROI_NAMES)


def subject_analysis_scores(wildcards):
    return expand(DECODE_SCORES, analysis=wildcards.analysis, subject=wildcards.subject,
                  roi=analysis_rois(wildcards.analysis))


def analysis_summaries(wildcards):
    return expand(SUBJECT_SUMMARY, analysis=wildcards.analysis, subject=SUBJECTS)


def analysis_nulls(wildcards):
    return expand(DECODE_NULL, analysis=wildcards.analysis, subject=SUBJECTS,
                  roi=analysis_rois(wildcards.analysis))


def planned_jobs_list():
    """Every job of the study as a pair of rule name and wildcards; the manifest and the default target come from it."""
    jobs = [("demo_dataset", {})] if STUDY["dataset"]["source"] == "demo" else []
    jobs += [("brain_mask", {"subject": subject}) for subject in SUBJECTS]
    jobs += [("glm", {"subject": run["subject"], "run_id": run["run_id"]}) for run in PLAN.runs]
    jobs += [("roi_mask", {"subject": subject, "roi": roi}) for subject in SUBJECTS for roi in ROI_NAMES]
    jobs += [("roi_counts", {"subject": subject}) for subject in SUBJECTS]
    for name in ANALYSES:
        jobs += [("decode", {"analysis": name, "subject": subject, "roi": roi}) for subject in SUBJECTS for roi in analysis_rois(name)]
        jobs += [("decode_gather", {"analysis": name, "subject": subject}) for subject in SUBJECTS]
        jobs += [("group", {"analysis": name})]
    for name in SEARCHLIGHT_ANALYSES:
        jobs += [("searchlight_block", {"analysis": name, "subject": subject, "block": str(block)})
                 for subject in SUBJECTS for block in SEARCHLIGHT_BLOCKS]
        jobs += [("searchlight_merge", {"analysis": name, "subject": subject}) for subject in SUBJECTS]
        jobs += [("searchlight_group", {"analysis": name})]
    jobs += [("report", {})]
    return jobs


def job_outputs(rule_name, wildcards):
    """The output files of one planned job, from its rule's templates."""
    templates = getattr(rules, rule_name).rule.output
    # Snakemake writes the global wildcard constraints into the templates: drop them before filling in.
    plain = [re.sub(r"\{(\w+),[^{}]*\}", r"{\1}", str(template)) for template in templates]
    return [expand(template, **{key: [value] for key, value in wildcards.items()})[0] for template in plain]


def all_provenance_records():
    """Every job's provenance record: the manifest is built from them."""
    return [path for rule_name, wildcards in planned_jobs_list() for path in job_outputs(rule_name, wildcards)
            if path.startswith("results/provenance/")]


def all_job_outputs():
    """Every output file of every planned job: the default target, so a deleted file is made again."""
    return [path for rule_name, wildcards in planned_jobs_list() for path in job_outputs(rule_name, wildcards)]


# -- searchlight ---------------------------------------------------------------
SEARCHLIGHT = STUDY["searchlight"]
SEARCHLIGHT_ANALYSES = SEARCHLIGHT["analyses"] if SEARCHLIGHT["enabled"] else []
SEARCHLIGHT_BLOCKS = list(range(SEARCHLIGHT["n_blocks"]))


def searchlight_method():
    """The searchlight settings a job reads (not the list of analyses nor the switch)."""
    return {key: value for key, value in SEARCHLIGHT.items() if key not in ("enabled", "analyses")}


def searchlight_block_settings(wildcards):
    return {"searchlight": searchlight_method(), "analysis": analysis_without_roi_list(wildcards.analysis),
            "subject": wildcards.subject, "block": int(wildcards.block), "seed": STUDY["study"]["seed"]}


def searchlight_merge_settings(wildcards):
    return {"searchlight": searchlight_method(), "analysis": analysis_without_roi_list(wildcards.analysis),
            "subject": wildcards.subject}


def searchlight_group_settings(wildcards):
    return {"searchlight": searchlight_method(), "analysis": analysis_without_roi_list(wildcards.analysis),
            "subjects": list(SUBJECTS), "group": STUDY["group"], "seed": STUDY["study"]["seed"]}


def searchlight_block_scores(wildcards):
    return expand(f"{SEARCHLIGHT_BLOCK}_scores.npy", analysis=wildcards.analysis, subject=wildcards.subject, block=SEARCHLIGHT_BLOCKS)


def searchlight_block_nulls(wildcards):
    return expand(f"{SEARCHLIGHT_BLOCK}_null.npy", analysis=wildcards.analysis, subject=wildcards.subject, block=SEARCHLIGHT_BLOCKS)


def searchlight_subject_maps(wildcards):
    return expand(f"{SEARCHLIGHT_SUBJECT}_map.nii.gz", analysis=wildcards.analysis, subject=SUBJECTS)


def searchlight_subject_nulls(wildcards):
    return expand(f"{SEARCHLIGHT_SUBJECT}_null.npy", analysis=wildcards.analysis, subject=SUBJECTS)


def all_brain_masks(wildcards):
    return expand(BRAIN_MASK, subject=SUBJECTS)


def searchlight_group_outputs():
    names = ["mean_map", "p_map", "p_fwe_map"] + (["tfce_map", "p_tfce_map"] if SEARCHLIGHT["tfce"] else [])
    outputs = {name: f"{SEARCHLIGHT_GROUP}_{name.replace('_map', '')}.nii.gz" for name in names}
    outputs["table"] = f"{SEARCHLIGHT_GROUP}_group.tsv"
    return outputs


# -- the report ------------------------------------------------------------------
def first_run_id(subject):
    return subject_runs(subject)[0]["run_id"]


def report_inputs(wildcards):
    inputs = {
        "designs": [expand(DESIGN_TABLE, subject=s, run_id=first_run_id(s))[0] for s in SUBJECTS],
        "events": [run["events"] for run in PLAN.runs],
        "sidecars": [run["sidecar"] for run in PLAN.runs],
        "brain_masks": expand(BRAIN_MASK, subject=SUBJECTS),
        "means": expand(BRAIN_MEAN, subject=SUBJECTS),
        "roi_masks": expand(ROI_MASK, subject=SUBJECTS, roi=ROI_NAMES),
        "roi_counts": expand(ROI_COUNTS, subject=SUBJECTS),
        "resvar": expand(RESIDUAL_VARIANCE, subject=SUBJECTS[0], run_id=first_run_id(SUBJECTS[0])),
        "summaries": [path for name in ANALYSES for path in expand(SUBJECT_SUMMARY, analysis=name, subject=SUBJECTS)],
        "confusions": [path for name in ANALYSES for path in expand(DECODE_CONFUSION, analysis=name,
                                                                    subject=SUBJECTS, roi=analysis_rois(name))],
        "group_tables": expand(GROUP_TABLE, analysis=list(ANALYSES)),
    }
    if SEARCHLIGHT_ANALYSES:
        inputs["searchlight_means"] = expand(f"{SEARCHLIGHT_GROUP}_mean.nii.gz", analysis=SEARCHLIGHT_ANALYSES)
        inputs["searchlight_p_fwe"] = expand(f"{SEARCHLIGHT_GROUP}_p_fwe.nii.gz", analysis=SEARCHLIGHT_ANALYSES)
        inputs["searchlight_directions"] = expand(f"{SEARCHLIGHT_SUBJECT}_directions.tsv", analysis=SEARCHLIGHT_ANALYSES,
                                                  subject=SUBJECTS[0])
    if STUDY["dataset"]["source"] == "demo":
        inputs["ground_truth"] = DEMO_TRUTH
    return inputs


def planned_jobs():
    """step -> [number of output files of each planned job], for the page's provenance summary.

    Counted from the DAG, not read from the provenance records: those carry run
    times, so reading them would recompute the page after every restore.
    """
    jobs = {}
    for rule_name, wildcards in planned_jobs_list():
        if rule_name != "report":
            n_outputs = len(job_outputs(rule_name, wildcards)) - 1  # minus the provenance record itself
            jobs.setdefault(rule_name, []).append(n_outputs)
    return jobs


def report_settings():
    return {"study": STUDY, "subjects": list(SUBJECTS), "config_file": CONFIG_FILE, "planned_jobs": planned_jobs(),
            "runs": {subject: [run["run_id"] for run in subject_runs(subject)] for subject in SUBJECTS}}


def report_figure(entry, path):
    """Curve figures (SVG) go into Snakemake's --report with their caption; every file is an output."""
    if entry["kind"] != "curve" or not path.endswith(".svg"):
        return path
    return report(path, caption=os.path.join(workflow.basedir, entry["caption"]), category=entry["category"],
                  subcategory=entry["analysis"], labels={"analysis": entry["analysis"], "ROI": entry["roi"]})
