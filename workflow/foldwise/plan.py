"""The study plan: which subjects and runs exist, and every job with its inputs, outputs and settings.

For the demo the runs follow from the demo settings (the dataset does not
exist yet when Snakemake builds its DAG); for a BIDS dataset they are found on
disk with the configured file-name templates.
"""

import re
from dataclasses import dataclass
from typing import Callable

from foldwise import contract

from foldwise.data import bids
from foldwise.data import demo
from foldwise.data.check import study_tasks
from foldwise.errors import InputError
from foldwise.geometry import wiring as geometry_wiring

__all__ = ["StudyPlan", "plan_study", "Step", "STEPS", "planned_jobs", "job_inputs", "job_outputs", "job_output_files", "job_settings",
           "step_outputs", "with_rois", "with_runs", "run_list_rules", "RUN_LIST_STEPS", "roi_list_rules", "ROI_LIST_STEPS", "step_log", "all_job_outputs", "all_provenance_records", "planned_output_counts",
           "report_input_index", "report_figures", "register_steps", "JOB_SOURCES", "calibration_targets", "paper_figure_targets",
           "report_files_settings", "RunLookup"]


class RunLookup:
    """A subject's runs and one run by id, over the ``runs`` attribute (shared by :class:`StudyPlan` and the study model)."""

    def runs_of(self, subject):
        return [run for run in self.runs if run["subject"] == subject]

    def run(self, subject, run_id):
        for run in self.runs:
            if run["subject"] == subject and run["run_id"] == run_id:
                return run
        raise KeyError(f"no run {run_id} for subject {subject}")


@dataclass(frozen=True)
class StudyPlan(RunLookup):
    """Subjects (after exclusion) and their runs, each a dict of entities and paths.

    ``runs`` are the runs whose patterns are estimated (the main task's and
    those of any task an analysis decodes; a run of another task carries
    ``task``); ``localizer_runs`` those of tasks read by localizer ROIs only.
    """

    subjects: tuple
    runs: tuple
    localizer_runs: tuple = ()


def plan_study(study, path="the study config"):
    """Build the StudyPlan of a validated study config (``path`` names it in messages)."""
    dataset = study["dataset"]
    if dataset["source"] == "demo":
        runs = []
        for subject, session, run in demo.planned_runs(study["demo"]):
            files = bids.run_files(dataset["bids_root"], dataset["patterns"], dataset["task"], subject, session, run)
            runs.append({"subject": subject, "session": session, "run": run, "run_id": bids.make_run_id(session, run), **files})
        if dataset["subjects"]:
            known = sorted({run["subject"] for run in runs})
            absent = [subject for subject in dataset["subjects"] if subject not in known]
            if absent:
                raise InputError(path, "dataset.subjects", f"subject(s) {', '.join(absent)} are not in the demo (it has {', '.join(known)})",
                                 "list demo subjects only, or raise demo.n_subjects")
    else:
        runs = bids.discover_runs(dataset["bids_root"], dataset["patterns"], dataset["task"], dataset["subjects"],
                                  derivatives_root=dataset.get("derivatives_root"), space=dataset.get("space"), res=dataset.get("res"))
    chosen = set(dataset["subjects"]) if dataset["subjects"] else {run["subject"] for run in runs}
    chosen -= set(dataset["exclude_subjects"])
    runs = [run for run in runs if run["subject"] in chosen]
    if not runs:
        raise InputError(dataset["bids_root"], "dataset.subjects", "no subject with a run is left to analyse",
                         "check dataset.subjects, dataset.exclude_subjects and dataset.patterns.bold")
    subjects = tuple(sorted(chosen))
    pattern_runs, localizer_runs = list(runs), []
    for task, role in study_tasks(study).items():  # the study's other tasks (several tasks, localizers)
        if task == dataset["task"]:
            continue
        if dataset["source"] == "demo":
            raise InputError(path, "analyses[].task / rois[].localizer.task", f"the demo simulates one task ({dataset['task']}), "
                                                                              f"the config also reads task {task!r}",
                             "use a BIDS dataset for several tasks (docs/datasets.md)")
        found = bids.discover_runs(dataset["bids_root"], dataset["patterns"], task, list(subjects),
                                   derivatives_root=dataset.get("derivatives_root"), space=dataset.get("space"), res=dataset.get("res"),
                                   main_task=False)
        (pattern_runs if role == "patterns" else localizer_runs).extend(found)
    return StudyPlan(subjects=subjects, runs=tuple(pattern_runs), localizer_runs=tuple(localizer_runs))


# -- the jobs of a study: every job's identity, inputs, outputs and settings ---------------
# Built from a foldwise.study.Study (duck-typed here: plan.py is imported by study.py).
# Snakemake's rules take their outputs, inputs and params from these functions,
# so the plan can be tested without Snakemake (tests/test_narrow_keys.py).

@dataclass(frozen=True)
class Step:
    """One step (rule) of the workflow.

    Attributes
    ----------
    identity : str
        Names one job among the step's jobs (a wildcard template): its
        provenance record and log are named after it.
    outputs : callable
        ``outputs(study) -> {output name: path template}`` (the provenance
        record is added by :func:`step_outputs`).
    """

    identity: str
    outputs: Callable


def named_outputs(**names):
    """Outputs by contract name: ``mask="brain_mask"`` -> the contract's template."""
    return lambda study: {output: study.paths.template(name) for output, name in names.items()}


def _demo_outputs(study):
    dataset = study.config["dataset"]
    return {"description": f"{dataset['bids_root']}/dataset_description.json", "atlas": dataset["atlas_image"],
            "atlas_labels": dataset["atlas_labels"], "ground_truth": study.paths.template("demo_truth"),
            "bold": [run["bold"] for run in study.runs], "events": [run["events"] for run in study.runs],
            "sidecars": [run["sidecar"] for run in study.runs], "confounds": [run["confounds"] for run in study.runs]}


def _searchlight_group_outputs(study):
    names = ["mean", "p", "p_fwe"] + (["tfce", "p_tfce"] if study.config["searchlight"]["tfce"] else [])
    outputs = {f"{name}_map": study.paths.template(f"searchlight_{name}") for name in names}
    outputs["table"] = study.paths.template("searchlight_group_table")
    return outputs


def report_figures(study):
    """The report's figure catalogue (entries with ``paths`` and ``preview``; foldwise.report.catalogue, no matplotlib)."""
    from foldwise.report.catalogue import figure_catalogue

    return figure_catalogue(study.config, study.subjects, study.paths.template("report_figures_dir"))


def _report_outputs(study):
    from foldwise.report.catalogue import embedded_files

    # the PNGs the page embeds: result figures' screen previews and the quality checks
    return {"html": study.paths.template("report_html"), "previews": embedded_files(report_figures(study))}


def _report_files_outputs(study):
    from foldwise.report.catalogue import publication_files

    return {"figures": publication_files(report_figures(study))}  # PNG 300 dpi, SVG and PDF of every result figure


STEPS = {
    "demo_dataset": Step("study", _demo_outputs),
    "brain_mask": Step("sub-{subject}", named_outputs(mask="brain_mask", mean="brain_mean", summary="brain_summary")),
    "glm": Step("sub-{subject}", named_outputs(patterns="patterns_image", table="patterns_table", design="design_table",
                                                 design_png="design_figure", resvar="residual_variance", facts="glm_facts")),
    "roi_mask": Step("sub-{subject}_roi-{roi}", named_outputs(mask="roi_mask", info="roi_info")),
    "roi_counts": Step("sub-{subject}", named_outputs(table="roi_counts")),
    "decode": Step("{analysis}_sub-{subject}", named_outputs(scores="decode_scores", null="decode_null", rankings="decode_rankings",
                                                                confusion="decode_confusion")),
    "decode_gather": Step("{analysis}_sub-{subject}", named_outputs(scores="subject_scores", summary="subject_summary")),
    "group": Step("{analysis}", named_outputs(table="group_table", null="group_null", summary="group_summary")),
    "calibrate": Step("{analysis}", named_outputs(table="calibration_table", figure="calibration_figure", summary="calibration_summary")),
    "searchlight_block": Step("{analysis}_sub-{subject}_block-{block}", named_outputs(scores="searchlight_block_scores",
                                                                               null="searchlight_block_null")),
    "searchlight_merge": Step("{analysis}_sub-{subject}", named_outputs(map="searchlight_map", directions="searchlight_directions",
                                                                 null="searchlight_subject_null")),
    "searchlight_group": Step("{analysis}", _searchlight_group_outputs),
    "report": Step("study", _report_outputs),
    "report_files": Step("study", _report_files_outputs),  # off the default target: paper_figure_targets
    "manifest": Step("study", named_outputs(manifest="manifest")),
}


def step_outputs(study, step):
    """Output templates of a step (wildcards unfilled), its provenance record last."""
    return {**STEPS[step].outputs(study), "provenance": study.paths.provenance(step, STEPS[step].identity)}


# Steps whose one job (per subject x analysis) writes each output once per ROI of the analysis:
# step -> rois(study, wildcards), the order of the job's output lists.
ROI_LIST_STEPS = {"decode": lambda study, w: list(study.analyses[w["analysis"]].rois)}


def with_rois(templates, rois):
    """Output templates with ``{roi}`` filled for each ROI: each becomes a list in the order of ``rois`` (the others stay)."""
    return {name: [template.replace("{roi}", roi) for roi in rois] if isinstance(template, str) and "{roi}" in template else template
            for name, template in templates.items()}


def roi_list_rules(study, step):
    """The rules of a step in ``ROI_LIST_STEPS``: ``[(analysis names, ROI names)]``, one per distinct ROI list.

    A rule's outputs cannot depend on a wildcard, so the analyses that
    decode another list of ROIs get a rule of their own (constrained to
    their names); with every analysis on the same ROIs, there is one rule.
    """
    groups = {}
    for name, analysis in study.analyses.items():
        if step in analysis.steps:
            groups.setdefault(tuple(analysis.rois), []).append(name)
    return [(tuple(names), rois) for rois, names in groups.items()]


# Steps whose one job (per subject) writes each output once per run of the subject:
# step -> run_ids(study, wildcards), the order of the job's output lists.
RUN_LIST_STEPS = {"glm": lambda study, w: [run["run_id"] for run in study.runs_of(w["subject"])]}


def with_runs(templates, run_ids):
    """Output templates with ``{run_id}`` filled for each run: each becomes a list in the order of ``run_ids`` (the others stay)."""
    return {name: [template.replace("{run_id}", run_id) for run_id in run_ids]
            if isinstance(template, str) and "{run_id}" in template else template for name, template in templates.items()}


def run_list_rules(study, step):
    """The rules of a step in ``RUN_LIST_STEPS``: ``[(subjects, run ids)]``, one per distinct list of run ids.

    A rule's outputs cannot depend on a wildcard, so subjects with other
    runs (a missing run, another session) get a rule of their own
    (constrained to their labels); when every subject has the same runs,
    there is one rule.
    """
    groups = {}
    for subject in study.subjects:
        groups.setdefault(tuple(RUN_LIST_STEPS[step](study, {"subject": subject})), []).append(subject)
    return [(tuple(subjects), run_ids) for run_ids, subjects in groups.items()]


def step_log(study, step):
    return study.paths.log(step, STEPS[step].identity)


def planned_jobs(study):
    """Every job of the study as ``(step, wildcards)``, in pipeline order (the manifest and the default target)."""
    subjects = study.subjects
    jobs = [("demo_dataset", {})] if study.is_demo else []
    jobs += [("brain_mask", {"subject": subject}) for subject in subjects]
    jobs += [("glm", {"subject": subject}) for subject in subjects]  # every run of the subject in one job
    jobs += roi_jobs(study, "roi_mask")  # an ROI kind with a step of its own (RoiKind.step) plans its jobs through register_steps
    jobs += [("roi_counts", {"subject": subject}) for subject in subjects]
    for name, analysis in study.analyses.items():
        steps = analysis.steps
        if "decode" in steps:
            jobs += [("decode", {"analysis": name, "subject": subject}) for subject in subjects]  # every ROI of the analysis in one job
        if "decode_gather" in steps:
            jobs += [("decode_gather", {"analysis": name, "subject": subject}) for subject in subjects]
        if "group" in steps:
            jobs += [("group", {"analysis": name})]
    for source in JOB_SOURCES:  # steps registered by an analysis or ROI kind (register_steps): geometry analyses, localizer ROIs
        jobs += source(study)
    for name in study.searchlight_analyses:
        jobs += [("searchlight_block", {"analysis": name, "subject": subject, "block": str(block)})
                 for subject in subjects for block in study.searchlight_blocks]
        jobs += [("searchlight_merge", {"analysis": name, "subject": subject}) for subject in subjects]
        jobs += [("searchlight_group", {"analysis": name})]
    jobs += [("report", {})]
    return jobs


def roi_jobs(study, step):
    """The ``(step, {subject, roi})`` jobs of the ROIs whose masks ``step`` builds (their kind's ``step``)."""
    return [(step, {"subject": subject, "roi": roi}) for subject in study.subjects for roi, entry in study.rois.items() if entry.step == step]


def roi_wildcard(study, step):
    """The ``{roi}`` wildcard constraint of a mask-building rule: the names of its ROIs (two rules never claim one mask)."""
    names = [re.escape(roi) for roi, entry in study.rois.items() if entry.step == step]
    return "|".join(names) if names else "(?!)"  # (?!) matches nothing: a rule with no ROI of its kind


def _fill(template, wildcards):
    return template.format(**wildcards) if wildcards else template


def job_outputs(study, step, wildcards):
    """The output files of one job: {output name: path or list of paths}."""
    templates = step_outputs(study, step)
    if step in ROI_LIST_STEPS:
        templates = with_rois(templates, ROI_LIST_STEPS[step](study, wildcards))
    if step in RUN_LIST_STEPS:
        templates = with_runs(templates, RUN_LIST_STEPS[step](study, wildcards))
    return {name: [_fill(path, wildcards) for path in value] if isinstance(value, list) else _fill(value, wildcards)
            for name, value in templates.items()}


def job_output_files(study, step, wildcards):
    """The output files of one job as one flat list."""
    files = []
    for value in job_outputs(study, step, wildcards).values():
        files += value if isinstance(value, list) else [value]
    return files


def all_job_outputs(study):
    """Every output file of every planned job: the default target, so a deleted file is made again."""
    return [path for step, wildcards in planned_jobs(study) for path in job_output_files(study, step, wildcards)]


def all_provenance_records(study):
    """Every planned job's provenance record: the manifest is built from them."""
    return [job_outputs(study, step, wildcards)["provenance"] for step, wildcards in planned_jobs(study)]


def planned_output_counts(study):
    """step -> [number of output files of each planned job, provenance record aside], for the report's provenance summary."""
    counts = {}
    for step, wildcards in planned_jobs(study):
        if step != "report":
            counts.setdefault(step, []).append(len(job_output_files(study, step, wildcards)) - 1)
    return counts


# -- inputs of each job --------------------------------------------------------------------
def _subject_patterns(study, subject, name):
    return [study.paths.fill(name, subject=subject, run_id=run["run_id"]) for run in study.runs_of(subject)]


def _brain_mask_inputs(study, w):
    inputs = {"bold": [run["bold"] for run in study.runs_of(w["subject"])]}
    given = study.runs_of(w["subject"])[0]["brain_mask"]
    if given:
        inputs["given_mask"] = given
    return inputs


def _glm_inputs(study, w):
    runs = study.runs_of(w["subject"])  # each list in the order of the job's runs (settings["runs"], its output lists)
    inputs = {name: [run[name] for run in runs] for name in ("bold", "events", "sidecar")}
    inputs["mask"] = study.paths.fill("brain_mask", subject=w["subject"])
    dataset = study.config["dataset"]
    if dataset["confounds"] or isinstance(dataset["drop_initial_volumes"], dict):  # flagged volumes are read from the confounds
        inputs["confounds"] = [run["confounds"] for run in runs]
    return inputs


def roi_mask_inputs(study, w):
    """The brain mask and the files the ROI's kind reads (``RoiKind.inputs``); a kind with its own step adds to these."""
    roi = study.rois[w["roi"]]
    # An ROI image may be one per subject: "{subject}" in its path is this subject's label.
    inputs = {name: path.replace("{subject}", w["subject"]) for name, path in roi.inputs(study.config).items()}
    return {"brain_mask": study.paths.fill("brain_mask", subject=w["subject"]), **inputs}


def _decode_inputs(study, w):
    return {"patterns": _subject_patterns(study, w["subject"], "patterns_image"),
            "tables": _subject_patterns(study, w["subject"], "patterns_table"),
            "masks": [study.paths.fill("roi_mask", subject=w["subject"], roi=roi) for roi in study.analyses[w["analysis"]].rois]}


def _group_inputs(study, w):
    analysis = study.analyses[w["analysis"]]
    return {"summaries": [study.paths.fill("subject_summary", analysis=analysis.name, subject=s) for s in study.subjects],
            "nulls": [study.paths.fill("decode_null", analysis=analysis.name, subject=s, roi=roi) for s in study.subjects for roi in analysis.rois]}


def _calibrate_inputs(study, w):
    return {"tables": [path for s in study.subjects for path in _subject_patterns(study, s, "patterns_table")],
            "roi_counts": [study.paths.fill("roi_counts", subject=s) for s in study.subjects]}


def paper_figure_targets(study):
    """The result figures' publication files (``snakemake paper_figures``; not part of the default target)."""
    return job_output_files(study, "report_files", {})


def calibration_targets(study):
    """The design self-check's outputs of every decoding analysis (``make calibrate``; not part of the default target)."""
    return [path for name, analysis in study.analyses.items() if "group" in analysis.steps
            for path in job_output_files(study, "calibrate", {"analysis": name})]


def _searchlight_block_inputs(study, w):
    return {"patterns": _subject_patterns(study, w["subject"], "patterns_image"),
            "tables": _subject_patterns(study, w["subject"], "patterns_table"), "mask": study.paths.fill("brain_mask", subject=w["subject"])}


def _searchlight_merge_inputs(study, w):
    blocks = study.searchlight_blocks
    return {"scores": [study.paths.fill("searchlight_block_scores", block=block, **w) for block in blocks],
            "nulls": [study.paths.fill("searchlight_block_null", block=block, **w) for block in blocks],
            "mask": study.paths.fill("brain_mask", subject=w["subject"])}


def _searchlight_group_inputs(study, w):
    subjects = study.subjects
    return {"maps": [study.paths.fill("searchlight_map", analysis=w["analysis"], subject=s) for s in subjects],
            "nulls": [study.paths.fill("searchlight_subject_null", analysis=w["analysis"], subject=s) for s in subjects],
            "masks": [study.paths.fill("brain_mask", subject=s) for s in subjects]}


def report_input_index(study):
    """The report's inputs as records: {input name: [{"path": ..., "subject": ..., "run_id": ..., "roi": ..., "analysis": ...}]}.

    The report can take the fields of each file from here instead of
    parsing them back out of the path; :func:`job_inputs` of the report
    lists the same paths, in the same order.
    """
    subjects = study.subjects
    first_runs = {subject: study.runs_of(subject)[0]["run_id"] for subject in subjects}
    decoding = {name: analysis for name, analysis in study.analyses.items() if "group" in analysis.steps}  # geometry analyses: below

    def record(name, **fields):
        return {"path": study.paths.fill(name, **fields), **fields}

    index = {
        "design_images": [record("design_figure", subject=s, run_id=first_runs[s]) for s in subjects],
        "events": [{"path": run["events"], "subject": run["subject"], "run_id": run["run_id"]} for run in study.runs],
        "sidecars": [{"path": run["sidecar"], "subject": run["subject"], "run_id": run["run_id"]} for run in study.runs],
        "brain_masks": [record("brain_mask", subject=s) for s in subjects],
        "means": [record("brain_mean", subject=s) for s in subjects],
        "roi_masks": [record("roi_mask", subject=s, roi=roi) for s in subjects for roi in study.rois],
        "roi_counts": [record("roi_counts", subject=s) for s in subjects],
        "resvar": [record("residual_variance", subject=subjects[0], run_id=first_runs[subjects[0]])],
        "glm_facts": [record("glm_facts", subject=run["subject"], run_id=run["run_id"]) for run in study.runs],
        "summaries": [record("subject_summary", analysis=name, subject=s) for name in decoding for s in subjects],
        "confusions": [record("decode_confusion", analysis=name, subject=s, roi=roi)
                       for name, analysis in decoding.items() for s in subjects for roi in analysis.rois],
        "group_tables": [record("group_table", analysis=name) for name in decoding],
    }
    if study.searchlight_analyses:
        index["searchlight_means"] = [record("searchlight_mean", analysis=name) for name in study.searchlight_analyses]
        index["searchlight_p_fwe"] = [record("searchlight_p_fwe", analysis=name) for name in study.searchlight_analyses]
        index["searchlight_directions"] = [record("searchlight_directions", analysis=name, subject=subjects[0])
                                           for name in study.searchlight_analyses]
    geometry = [analysis.name for analysis in geometry_wiring.geometry_analyses(study)]
    if geometry:
        for key in ("geometry_group_table", "geometry_summary", "geometry_matrix_figure", "geometry_mds_figure", "geometry_fits_figure"):
            index[key] = [record(key, analysis=name) for name in geometry]
        mapped = [analysis.name for analysis in geometry_wiring.geometry_analyses(study) if analysis.entry["geometry"]["searchlight"]]
        if mapped:
            index["geometry_searchlight_figure"] = [record("geometry_searchlight_figure", analysis=name) for name in mapped]
    if study.is_demo:
        index["ground_truth"] = [{"path": study.paths.template("demo_truth")}]
    return index


def _report_inputs(study, w):
    index = report_input_index(study)
    return {name: records[0]["path"] if name == "ground_truth" else [item["path"] for item in records] for name, records in index.items()}


JOB_INPUTS = {
    "demo_dataset": lambda study, w: {},
    "brain_mask": _brain_mask_inputs,
    "glm": _glm_inputs,
    "roi_mask": roi_mask_inputs,
    "roi_counts": lambda study, w: {"infos": [study.paths.fill("roi_info", subject=w["subject"], roi=roi) for roi in study.rois]},
    "decode": _decode_inputs,
    "decode_gather": lambda study, w: {"scores": [study.paths.fill("decode_scores", roi=roi, **w) for roi in study.analyses[w["analysis"]].rois]},
    "group": _group_inputs,
    "calibrate": _calibrate_inputs,
    "searchlight_block": _searchlight_block_inputs,
    "searchlight_merge": _searchlight_merge_inputs,
    "searchlight_group": _searchlight_group_inputs,
    "report": _report_inputs,
    "report_files": _report_inputs,
    "manifest": lambda study, w: {"records": all_provenance_records(study)},
}


JOB_SOURCES = []  # functions study -> [(step, wildcards)] of registered steps, planned after the decoding steps, before the searchlight


def register_steps(steps, inputs, settings, jobs):
    """Plug in the steps of a new analysis or ROI kind, at one place (docs/architecture.md, "Adding a step").

    Parameters
    ----------
    steps : dict
        step -> :class:`Step` (identity template and outputs).
    inputs : dict
        step -> ``inputs(study, wildcards) -> {name: path or list}``.
    settings : dict
        step -> ``settings(study, wildcards) -> dict``: exactly what the step reads.
    jobs : callable
        ``jobs(study) -> [(step, wildcards)]``: the step's jobs for this study.
    """
    from foldwise.study import STEP_SETTINGS  # late: the study model imports this module

    STEPS.update(steps)
    JOB_INPUTS.update(inputs)
    STEP_SETTINGS.update(settings)
    if jobs not in JOB_SOURCES:
        JOB_SOURCES.append(jobs)


def job_inputs(study, step, wildcards):
    """The input files of one job: {input name: path or list of paths}."""
    return JOB_INPUTS[step](study, dict(wildcards))


def report_job_logs(study):
    """``[step, wildcards in words, log file]`` of every planned job before the report: the page lists their warnings."""
    logs = []
    for step, wildcards in planned_jobs(study):
        if step in ("report", "manifest"):
            continue
        label = " ".join(f"{key}={value}" for key, value in wildcards.items())
        logs.append([step, label, step_log(study, step).format(**wildcards)])
    return logs


def report_settings(study):
    """What the report reads: the whole validated config (the page shows it), subjects, runs, the planned jobs and their logs."""
    return {"study": study.config, "subjects": list(study.subjects), "config_file": study.config_file,
            "overrides": list(study.overrides),  # --config entries merged into the config: the page names them
            "planned_jobs": planned_output_counts(study),
            "runs": {subject: [run["run_id"] for run in study.runs_of(subject)] for subject in study.subjects},
            "job_logs": report_job_logs(study), "input_index": report_input_index(study)}


def report_files_settings(study):
    """What the publication files read: the config, subjects, runs and the inputs' records (not the page's job list)."""
    settings = report_settings(study)
    return {key: settings[key] for key in ("study", "subjects", "runs", "input_index")}


def job_settings(study, step, wildcards):
    """``params.settings`` of one job: exactly the config subset its step reads."""
    if step == "report":
        return report_settings(study)
    if step == "report_files":
        return report_files_settings(study)
    return study.settings(step, wildcards)
