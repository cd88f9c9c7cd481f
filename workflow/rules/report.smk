# The study report: one self-contained HTML page (figures embedded) plus every
# figure as PNG and SVG; the figure list comes from foldwise.report.figure_catalogue.
from foldwise.report import figure_catalogue

REPORT_HTML = "results/report/index.html"
REPORT_FIGURES = figure_catalogue(STUDY, SUBJECTS)  # figures_dir defaults to results/report/figures


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


rule report:
    input:
        unpack(report_inputs),
    output:
        html=REPORT_HTML,
        figures=[report_figure(entry, path) for entry in REPORT_FIGURES for path in entry["paths"]],
        provenance=REPORT_PROVENANCE[0],
    params:
        settings=report_settings(),
        code=step_code("report.py"),
    log:
        log_path("report", "study"),
    benchmark:
        "results/benchmarks/report/study.tsv"
    threads: 1
    resources:
        mem_mb=2000,
        runtime=20,
    conda:
        "../envs/foldwise.yaml"
    script:
        "../scripts/report.py"
