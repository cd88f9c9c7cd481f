"""Jobs: the study report, one self-contained HTML page, and the result figures' publication files (I/O at the edges).

``run`` (the report) reads the quality-check images and tables, the decoding
summaries and confusion counts, the group tables and the planned jobs;
writes the PNG of every figure the page embeds (a screen preview of each
result figure, drawn with matplotlib; each quality check drawn into pixels by
``foldwise.report.images``, or the GLM's own design image) and
``index.html`` with them embedded as data URIs, so the page opens from disk
and loads nothing from the network. ``run_publication_files`` (the
``report_files`` step, off the default target) writes the result figures'
PNG 300 dpi, SVG and PDF from the same specifications. The page holds no
clock time: the same inputs give byte-identical files.

Each figure is a part of the job's memo (``foldwise.provenance.memo.part_memo``)
keyed on a digest of exactly the data it draws (its builder's arguments, or
the content of the images it reads): when one ROI's results change, Snakemake
reruns this job, the figures that show that ROI are drawn and every other
figure is restored; the page is then assembled from tables and files.
"""

import functools
import gc
import html
import json
import math
import os
from pathlib import Path

import numpy as np
import pandas as pd

# Absolute imports on purpose: the rule's code hash (foldwise.provenance.hashing.module_closure)
# follows ``from foldwise.x`` imports.
from foldwise.report import figures as page
from foldwise.report import images
from foldwise.report import page as html_page
from foldwise.report import geometry_section
from foldwise.report.catalogue import embedded_files, figure_catalogue, publication_files
from foldwise.report.drawing import clear_text_cache, data_digest, save_preview, save_publication_files
from foldwise.report.summary import answer_sentences
from foldwise.report.terminal import job_warnings
from foldwise.errors import InputError
from foldwise.data.fileio import load_nifti, read_tsv, write_bytes_atomic, write_text_atomic
from foldwise.provenance.hashing import hash_object
from foldwise.provenance.memo import display_path, job_parts

__all__ = ["run", "VERSIONED_PACKAGES", "GROUP_COLUMNS", "SUMMARY_COLUMNS", "CONFUSION_COLUMNS", "ROI_COUNT_COLUMNS"]

from foldwise.provenance.memo import VERSIONED_PACKAGES, package_versions  # noqa: E402 (one list of versioned packages)
from foldwise.contract import GROUP_COLUMNS, parse_count  # noqa: E402 (the group table's columns, defined once)
SUMMARY_COLUMNS = ("subject", "analysis", "roi", "direction", "n_voxels", "n_used", "n_folds", "accuracy",
                   "balanced_accuracy", "chance")
CONFUSION_COLUMNS = ("direction", "n_voxels", "true_class", "predicted_class", "count")
ROI_COUNT_COLUMNS = ("subject", "roi", "n_voxels", "min_voxels")
EVENT_COLUMNS = ("onset", "duration", "trial_type")

_RERUN = "rerun the workflow (snakemake rebuilds what is missing or stale)"
# -- reading -------------------------------------------------------------------------

def _as_list(value):
    if value is None:
        return []
    return [value] if isinstance(value, (str, Path)) else list(value)


def _field_reader(input_index):
    """A function ``(path, input name) -> {subject, run_id, roi, analysis}`` from the plan's input records.

    The plan (``foldwise.plan.report_input_index``) names the fields of every
    input file; the report takes them from there instead of parsing file names.
    """
    if not isinstance(input_index, dict):
        raise InputError(None, "params.input_index", "missing: the report needs the plan's record of every input file",
                         "pass foldwise.plan.report_input_index(study) from the report rule")
    records = {}
    for name, entries in input_index.items():
        for entry in entries:
            records[(name, str(entry["path"]))] = entry

    def fields_of(path, input_name):
        record = records.get((input_name, str(path)))
        if record is None:
            raise InputError(path, input_name, "the file is not among the report's planned inputs",
                             "pass the files the plan lists (foldwise.plan.report_input_index)")
        return record

    return fields_of


def _by_subject(paths, input_name, subjects, fields_of):
    found = {}
    for path in _as_list(paths):
        subject = fields_of(path, input_name)["subject"]
        if subject in found:
            raise InputError(path, "subject", f"a second {input_name} file for subject {subject} (first: {found[subject]})",
                             "pass one file per subject")
        found[subject] = str(path)
    missing = [subject for subject in subjects if subject not in found]
    if missing:
        raise InputError(None, input_name, f"no {input_name} file for subject(s) {', '.join(missing)}", _RERUN)
    return found


def _read_json(path, what):
    try:
        return json.loads(Path(path).read_text(encoding="utf-8"))
    except FileNotFoundError:
        raise InputError(path, "file", f"the {what} does not exist", _RERUN) from None
    except (OSError, ValueError) as error:
        raise InputError(path, "content", f"the {what} is not readable JSON ({error})", _RERUN) from None


def _volume(path, what, shape=None):
    image = load_nifti(path, what=what)
    data = np.asarray(image.get_fdata(caching="unchanged", dtype=np.float32), dtype=np.float64)
    if data.ndim == 4 and data.shape[3] == 1:
        data = data[..., 0]
    if data.ndim != 3:
        raise InputError(path, "dim", f"expected a 3D {what}, got shape {data.shape}", _RERUN)
    if shape is not None and data.shape != tuple(shape):
        raise InputError(path, "dim", f"the {what} has shape {data.shape}, the subject's mean image {tuple(shape)}",
                         "build every image of a subject on one grid (rerun the masks stage)")
    return data, image


def _read_volume(data, path, what, shape=None):
    """:func:`_volume` read once per job: a subject's mean image and brain mask appear in several figures."""
    cache = data.setdefault("volumes", {})
    if path not in cache:
        cache[path] = _volume(path, what)
    values, image = cache[path]
    if shape is not None and values.shape != tuple(shape):
        raise InputError(path, "dim", f"the {what} has shape {values.shape}, the subject's mean image {tuple(shape)}",
                         "build every image of a subject on one grid (rerun the masks stage)")
    return values, image


def _mean_and_brain(data, subject):
    """A subject's mean image (values, image) and brain mask (bool, checked on the mean's grid), read once per job."""
    mean, image = _read_volume(data, data["means"][subject], "mean image")
    brain = _read_volume(data, data["brain_masks"][subject], "brain mask", mean.shape)[0] > 0
    return mean, image, brain


def _repetition_times(sidecars):
    values = []
    for path in _as_list(sidecars):
        record = _read_json(path, "BOLD sidecar")
        value = record.get("RepetitionTime") if isinstance(record, dict) else None
        if isinstance(value, bool) or not isinstance(value, (int, float)) or not value > 0:
            raise InputError(path, "RepetitionTime", f"must be a positive number of seconds, got {value!r}",
                             "write RepetitionTime (s) into the sidecar")
        values.append(float(value))
    if not values:
        raise InputError(None, "sidecars", "no BOLD sidecar was given", "pass every run's sidecar JSON")
    return sorted(set(values))


def _numeric(frame, column, path, integer=False):
    values = pd.to_numeric(frame[column], errors="coerce").to_numpy(dtype=np.float64)
    bad = ~np.isfinite(values) if not integer else (~np.isfinite(values) | (values != np.round(values)))
    if bad.any():
        row = int(np.flatnonzero(bad)[0])
        kind = "a whole number" if integer else "a number"
        raise InputError(path, column, f"value {frame[column].iloc[row]!r} in data row {row + 1} is not {kind}", _RERUN)
    return values


def _read_summaries(paths, analyses, subjects):
    frames = {}
    for path in _as_list(paths):
        frame = read_tsv(path, SUMMARY_COLUMNS, what="decoding summary")
        names = sorted(set(frame["analysis"].astype(str)))
        if len(names) != 1 or names[0] not in analyses:
            raise InputError(path, "analysis", f"expected one analysis of {', '.join(analyses)}, found {names}", _RERUN)
        for column in ("n_used", "balanced_accuracy"):
            _numeric(frame, column, path, integer=column == "n_used")
        frames.setdefault(names[0], []).append(frame)
    combined = {}
    for name in analyses:
        if name not in frames:
            raise InputError(None, "summaries", f"no decoding summary of analysis {name!r}", _RERUN)
        table = pd.concat(frames[name], ignore_index=True)
        missing = [subject for subject in subjects if subject not in set(table["subject"].astype(str))]
        if missing:
            raise InputError(None, "summaries", f"analysis {name!r} has no summary for subject(s) {', '.join(missing)}", _RERUN)
        combined[name] = table
    return combined


def _read_group_tables(paths, analyses):
    tables = {}
    for path in _as_list(paths):
        table = read_tsv(path, GROUP_COLUMNS, what="group table")
        names = sorted(set(table["analysis"].astype(str)))
        if len(names) != 1 or names[0] not in analyses:
            raise InputError(path, "analysis", f"expected one analysis of {', '.join(analyses)}, found {names}", _RERUN)
        if names[0] in tables:
            raise InputError(path, "analysis", f"a second group table of analysis {names[0]!r}", "pass one table per analysis")
        tables[names[0]] = (table, str(path))
    missing = [name for name in analyses if name not in tables]
    if missing:
        raise InputError(None, "group_tables", f"no group table of analysis(es) {', '.join(missing)}", _RERUN)
    return tables


def _read_confusions(paths, analyses, fields_of):
    found = {}
    for path in _as_list(paths):
        fields = fields_of(path, "confusions")
        analysis = fields["analysis"]
        if analysis not in analyses:
            raise InputError(path, "analysis", f"the confusion table is of analysis {analysis!r}, not one of the study's "
                             f"({', '.join(analyses)})", "pass the confusion files the decoding stage writes")
        frame = read_tsv(path, CONFUSION_COLUMNS, what="confusion table")
        _numeric(frame, "count", path, integer=True)
        found[(analysis, fields["subject"], fields["roi"])] = (frame, str(path))
    return found


def _roi_counts(paths, subjects, rois):
    frames = []
    for path in _as_list(paths):
        frame = read_tsv(path, ROI_COUNT_COLUMNS, what="ROI voxel-count table")
        for column in ("n_voxels", "min_voxels"):
            _numeric(frame, column, path, integer=True)
        frames.append(frame)
    if not frames:
        raise InputError(None, "roi_counts", "no ROI voxel-count table was given", _RERUN)
    table = pd.concat(frames, ignore_index=True)
    table["subject"], table["roi"] = table["subject"].astype(str), table["roi"].astype(str)
    table["n_voxels"] = pd.to_numeric(table["n_voxels"]).astype(np.int64)
    table["min_voxels"] = pd.to_numeric(table["min_voxels"]).astype(np.int64)
    missing = [f"sub-{s}/{r}" for s in subjects for r in rois
               if not ((table["subject"] == s) & (table["roi"] == r)).any()]
    if missing:
        raise InputError(None, "roi_counts", f"no voxel count for {', '.join(missing[:6])}", _RERUN)
    return table


def _package_versions():
    """python and the packages whose versions key the memo (foldwise.provenance.memo.VERSIONED_PACKAGES)."""
    return [(name, version or "not installed") for name, version in package_versions().items()]


def _check_params(params):
    for key in ("study", "subjects", "runs"):
        if key not in params:
            raise InputError(None, f"params.{key}", "missing from the report job's params", "pass it from the report rule")
    study = params["study"]
    if not isinstance(study, dict) or not study.get("analyses") or not study.get("rois"):
        raise InputError(None, "params.study", "not a validated study config (no analyses or rois)",
                         "pass the validated study config")
    subjects = [str(subject) for subject in params["subjects"]]
    if not subjects or len(set(subjects)) != len(subjects):
        raise InputError(None, "params.subjects", f"expected distinct subject ids, got {params['subjects']!r}",
                         "pass the study's subjects")
    runs = params["runs"]
    if not isinstance(runs, dict) or any(subject not in runs or not runs[subject] for subject in subjects):
        raise InputError(None, "params.runs", "expected subject -> list of run ids for every subject",
                         "pass the run ids of every subject")
    return study, subjects, {subject: [str(run) for run in runs[subject]] for subject in subjects}


def _check_outputs(outputs, study, subjects, publication=False):
    """The catalogue, after checking that the declared outputs are exactly its files (the page's or the publication files)."""
    key = "figures" if publication else "previews"
    declared = [str(Path(path)) for path in _as_list(outputs.get(key))]
    if not declared or (not publication and "html" not in outputs):
        needed = "figures" if publication else "html and previews"
        raise InputError(None, "outputs", f"the {'report_files' if publication else 'report'} job needs the outputs {needed}",
                         "declare them in the rule (foldwise.plan.step_outputs)")
    # The last declared file is a quality-check PNG (the report) or a publication file: both lie in the figures folder.
    folder = str(Path(declared[-1]).parent)
    catalogue = figure_catalogue(study, subjects, figures_dir=folder)
    planned = [str(Path(path)) for path in (publication_files(catalogue) if publication else embedded_files(catalogue))]
    if declared != planned:
        extra = sorted(set(declared) - set(planned))
        lacking = [path for path in planned if path not in set(declared)]
        function = "publication_files" if publication else "embedded_files"
        raise InputError(None, f"outputs.{key}", f"the declared {key} differ from foldwise.report.catalogue.{function} "
                         f"(not planned: {extra[:3]}; not declared: {lacking[:3]}; or another order)",
                         f"declare exactly {function}(figure_catalogue(study config, subjects)) as the rule's output {key}")
    return catalogue


# -- drawing -------------------------------------------------------------------------

def _file_identity(parts, path, what):
    """The content hash of an input image a figure draws (the image itself is read only if the figure is drawn)."""
    if not Path(path).is_file():
        raise InputError(path, "file", f"the {what} does not exist", _RERUN)
    return parts.file_hash(path)


def _built(build):
    """The identity of a figure drawn from small data: the builder's name and the digest of its arguments."""
    return {"builder": build.func.__name__, "data": data_digest(list(build.args), build.keywords)}


# Result figures whose builder can reuse a figure of the same arrangement (``pool``): the previews of every ROI of
# an analysis are drawn on one figure per kind, its artists' data replaced (foldwise.report.figures.curve_figure).
_REUSABLE_KINDS = ("curve", "confusion")


def _draw_or_restore(parts, entry, identity, build, publication=False, pool=None):
    """Restore the figure's files when its data did not change, else draw them.

    The report job writes the PNG the page embeds (a result figure's screen
    preview, or a quality check's own PNG); the ``report_files`` job writes
    a result figure's publication files. ``build()`` returns a matplotlib
    figure or, for a quality check, the PNG's bytes. ``pool`` (previews
    only) keeps the figures that later previews of the same kind reuse.
    """
    outputs = ({Path(path).suffix.lstrip("."): path for path in entry["paths"]} if publication
               else {"preview": entry["preview"]})
    part = f"figure-{entry['stem']}"
    if parts.restore(part, identity, outputs):
        return False
    # A figure makes ~10^5 objects tied in reference cycles: the automatic collector would scan the job's whole
    # heap (tables, images) many times per figure. Paused while drawing, then the young generation alone is
    # collected, which holds the figure once it is dropped (measured: ~25% of the drawing CPU).
    collecting = gc.isenabled()
    gc.disable()
    try:
        drawn = build(pool=pool) if pool is not None and entry["kind"] in _REUSABLE_KINDS else build()
        if isinstance(drawn, bytes):
            write_bytes_atomic(entry["preview"], drawn)
        elif publication:
            save_publication_files(drawn, entry["paths"])
        else:
            save_preview(drawn, entry["preview"])
        del drawn
    finally:
        gc.collect(0)
        if collecting:
            gc.enable()
    parts.store(part, identity, outputs)
    return True


def _classes(analysis):
    if analysis["kind"] == "cross":
        return list(next(iter(analysis["sets"].values())))
    return list(analysis["classes"])


def _text_list(items, limit=12):
    items = [str(item) for item in items]
    return ", ".join(items[:limit]) + (f" and {len(items) - limit} more" if len(items) > limit else "")


# -- page sections --------------------------------------------------------------------

def _results_dir(study):
    """The study's results folder, as the page names it (study.results_dir)."""
    return study.get("study", {}).get("results_dir", "results")


def _paragraph(text):
    return f"<p>{html.escape(text)}</p>"


def _study_section(study, subjects, runs, trials, repetition_times, voxel_size_mm, config_file, versions, overrides=()):
    run_counts = sorted({len(runs[subject]) for subject in subjects})
    first_runs = runs[subjects[0]]
    if all(runs[subject] == first_runs for subject in subjects):
        runs_text = f"{len(first_runs)} per subject ({_text_list(first_runs)})"
    elif len(run_counts) == 1:
        runs_text = f"{run_counts[0]} per subject (run ids differ between subjects)"
    else:
        runs_text = "; ".join(f"sub-{subject}: {len(runs[subject])}" for subject in subjects)
    glm = study.get("glm", {})
    source = study["dataset"]["source"]
    rows = [
        ("study name", study.get("study", {}).get("name", "study")),
        ("dataset", "simulated demo (the invented lanterns study)" if source == "demo" else f"BIDS dataset at {display_path(study['dataset']['bids_root'])}"),
        ("subjects", f"{len(subjects)}: {_text_list(subjects, 30)}"),
        ("runs", runs_text),
        ("repetition time (s)", ", ".join(f"{value:g}" for value in repetition_times)),
        ("voxel size (mm)", " x ".join(f"{value:g}" for value in voxel_size_mm)),
        ("GLM", f"serial correlation {glm.get('serial_correlation')}, patterns {glm.get('pattern_mode')}, statistic "
                f"{glm.get('statistic')}, high-pass cutoff {glm.get('highpass_s')} s, HRF derivatives {glm.get('hrf_derivatives')}"),
        ("ROIs", _text_list(roi["name"] for roi in study["rois"])),
        ("analyses", _text_list(f"{a['name']} ({a['kind']})" for a in study["analyses"])),
        ("config file", display_path(config_file) or "given with --configfile"),
        ("command-line overrides (--config, merged before validation)", ", ".join(overrides) or "none"),
        ("config hash (sha256 of the validated config)", hash_object(study)),
        ("versions", ", ".join(f"{name} {version}" for name, version in versions)),
    ]
    trial_rows = [(row.condition, row.min_per_run if row.min_per_run == row.max_per_run
                   else f"{row.min_per_run} to {row.max_per_run}", row.runs_with_trials)
                  for row in trials.itertuples(index=False)]
    return (html_page.html_table(("item", "value"), rows, caption="The study at a glance")
            + html_page.html_table(("condition", "trials per run", "runs with trials"), trial_rows,
                              caption=f"Trials per condition per run (over all {sum(len(r) for r in runs.values())} runs)")
            + _paragraph("This page holds no clock time: the same inputs, config and environment give a byte-identical "
                         f"page and figures. Job times and memory use are in {_results_dir(study)}/provenance/ (one JSON record per job)."))


_FAMILY_WORDS = {
    "per_direction": "all ROIs and voxel counts of one direction (one family per direction)",
    "all_directions": "all ROIs, voxel counts and directions of an analysis (one family per analysis)",
    "all_analyses": "all ROIs, voxel counts and directions of every analysis (one family for the study)",
}


def _inference_text(study):
    """Methods: what each family is and how to run the design self-check (the report never depends on it)."""
    group = study.get("group", {})
    family = group.get("family", "per_direction")
    scale = ("standardised by the mean and SD of its own null" if group.get("fwe_method", "standardised") == "standardised"
             else "replaced by its own null p-value (single-step min-p)")
    return _paragraph(
        f"Family-wise correction (group.family = {family}): the family is {_FAMILY_WORDS[family]}. Each cell (ROI x "
        f"voxel count x direction) is first {scale}, so that the widest nulls do not dominate, then the maximum over "
        "the family gives p_fwe (Nichols & Holmes 2002; Westfall & Young 1993). With per_direction, each direction "
        "answers its own question and is corrected on its own; all_directions puts every direction of an analysis in "
        "one family; all_analyses takes each analysis's maximum and applies Bonferroni over the analyses. The "
        "family-wise corrected prevalence bound is the maximum over the same family of the minimum statistic "
        "(Allefeld, Görgen & Haynes 2016). A voxel count at or above an ROI's size is reported once, as all, and "
        "enters the family once.") + _paragraph(
        "Design self-check: make calibrate CONFIG=<your config> runs this study's own analyses (its subjects' designs, "
        "folds, voxel counts, classifier and selection) on noise patterns of the same shapes, many times, and writes "
        "the false-positive rate of every test against alpha with binomial 99% bounds to "
        f"{_results_dir(study)}/calibration/<analysis>_calibration.tsv (with a figure, .png, and a text summary, .txt). It is not "
        "part of the default run and this page does not depend on it.")


def _cautions_section(alpha, dataset_source, family="per_direction"):
    family = _FAMILY_WORDS[family]
    items = [
        "Research use only. These results are not for clinical or diagnostic decisions about any person.",
        "A group test on accuracies (the t-test, the Wilcoxon test and the permutation test of the group mean) asks "
        "whether the average accuracy in the population is above chance. It says nothing about how many people show "
        "the effect: a significant mean is compatible with an effect in only a few people. How widespread an effect is "
        "is what prevalence inference addresses (Allefeld, Görgen & Haynes 2016, NeuroImage, from memory): the "
        "prevalence bound is the share of the population that, at least, shows the effect.",
        f"The voxel-count sweep tests many counts in many ROIs. The corrected p-value (family-wise, by the maximum "
        f"statistic over {family}; Nichols & Holmes 2002) accounts for that; the "
        f"uncorrected p-values do not. Stars in the curves mark corrected p below {alpha:g}. Do not pick the best "
        f"count and report its uncorrected p.",
        "Voxel selection was done inside the training folds: voxels were scored and ranked on the training runs "
        "only, so the held-out run never influenced which voxels were used for testing it.",
        "Confusion matrices are descriptive: they show which classes are mistaken for which, not a test.",
    ]
    if dataset_source == "demo":
        items.append("These data are simulated (the invented lanterns study): the results show whether the workflow "
                     "recovers the codes the simulation built in, nothing about real brains.")
    return "<div class=\"caution\"><ul>" + "".join(f"<li>{html.escape(item)}</li>" for item in items) + "</ul></div>"


_GLM_FACT_KEYS = ("confounds", "n_dropped_initial_volumes", "n_dropped_events_rows")


def _read_glm_facts(paths, fields_of):
    """Per run, what the GLM job recorded (jobs/glm.run_facts): {(subject, run_id): facts}."""
    facts = {}
    for path in _as_list(paths):
        fields = fields_of(path, "glm_facts")
        record = _read_json(path, "GLM facts of a run")
        missing = [key for key in _GLM_FACT_KEYS if not isinstance(record, dict) or key not in record]
        if missing:
            raise InputError(path, ", ".join(missing), "missing from the GLM facts of the run", _RERUN)
        facts[(fields["subject"], fields["run_id"])] = record
    return facts


def _glm_facts_table(facts, subjects, runs):
    """Subject x run: the confounds in the design, initial volumes dropped, events rows dropped (n/a or empty condition)."""
    rows = []
    for subject in subjects:
        for run_id in runs[subject]:
            record = facts.get((subject, run_id))
            if record is None:
                continue
            names = record["confounds"]
            confounds = f"{len(names)}: {_text_list(names, 8)}" if names else "none"
            rows.append([f"sub-{subject}", run_id, confounds, int(record["n_dropped_initial_volumes"]),
                         int(record["n_dropped_events_rows"])])
    return html_page.html_table(["subject", "run", "confound columns in the design", "initial volumes dropped",
                                 "events rows dropped"], rows, table_id="glm-facts", caption=(
        "What the GLM of each run used: the confound columns that entered its design (after dropping columns that are "
        "all zero once the initial volumes are cut), the initial volumes left out, and the events rows left out "
        "because their condition was n/a or empty"))


def _roi_count_table(counts, subjects, rois):
    rows = []
    for subject in subjects:
        own = counts[counts["subject"] == subject]
        rows.append([f"sub-{subject}"] + [int(own.loc[own["roi"] == roi, "n_voxels"].iloc[0]) for roi in rois])
    means = [counts.loc[counts["roi"] == roi, "n_voxels"].mean() for roi in rois]
    rows.append(["mean"] + [f"{value:.1f}" for value in means])
    rows.append(["minimum required"] + [int(counts.loc[counts["roi"] == roi, "min_voxels"].max()) for roi in rois])
    return html_page.html_table(["subject"] + [f"ROI {roi} (voxels)" for roi in rois], rows,
                           caption="ROI voxel counts per subject (inside the brain mask), with the configured minimum")


#: The group table's columns on the page: (table column, header, tooltip). Add a column here once.
GROUP_PAGE_COLUMNS = (
    ("roi", "ROI", ""),
    ("direction", "direction", "train->test sets; a<->b is the mean of both transfers"),
    ("n_voxels", "n_voxels", "voxels selected inside the training folds ('all': the whole ROI)"),
    ("n_subjects", "subjects", ""),
    ("chance", "chance", "chance level of balanced accuracy"),
    ("mean", "mean balanced accuracy", "group mean of the subjects' fold-mean balanced accuracy"),
    ("ci", "95% CI of the mean", "t-based confidence interval of the group mean"),
    ("t", "t", "one-sample t statistic against chance"),
    ("p_t", "p (t-test, uncorrected)", ""),
    ("p_wilcoxon", "p (Wilcoxon, uncorrected)", ""),
    ("p_perm", "p (permutation, uncorrected)", ""),
    ("effect_size", "effect size", "standardised effect: group mean minus chance over the SD across subjects"),
    ("p_fwe", "p_fwe (family-wise corrected)", "maximum statistic over the family named in the caption"),
    ("survives", "survives", "p_fwe below alpha"),
    ("prevalence_p_global", "prevalence: p (global null)", "p of 'no subject has an effect'"),
    ("prevalence_gamma0", "prevalence: lower bound", "the population share with an effect exceeds this, at alpha"),
    ("prevalence_gamma0_fwe", "prevalence: lower bound (FWE)", "the same bound, family-wise corrected over the family"),
    ("prevalence_p_majority", "prevalence: p (majority)", "p of 'at most half the population has an effect'"),
    ("n_used", "voxels used", "voxels actually used per subject (a count at or above the ROI size is 'all')"),
)


def family_text(families):
    """The family of ``p_fwe`` in words, from the group table's ``family`` column.

    Examples
    --------
    >>> family_text(["direction within", "direction seen->heard"])
    'one family per direction (every ROI x voxel count of that direction)'
    >>> family_text(["all directions"])
    'one family: every ROI x voxel count x direction of the analysis'
    """
    names = sorted({str(name) for name in families if isinstance(name, str) and name})
    if not names or all(name.startswith("direction ") for name in names):
        return "one family per direction (every ROI x voxel count of that direction)"
    if names == ["all directions"]:
        return "one family: every ROI x voxel count x direction of the analysis"
    if names == ["all analyses"]:
        return ("one family over the study: every ROI x voxel count x direction of each analysis, "
                "Bonferroni over the analyses' maxima")
    return "families: " + ", ".join(names)


def gamma0_max_text(table):
    """The largest prevalence bound the design can reach, with what it implies for the majority test."""
    values = pd.to_numeric(table["prevalence_gamma0_max"], errors="coerce").dropna()
    if values.empty:
        return ""
    value = float(values.max())
    return (f"Largest prevalence lower bound this design can reach: {value:.2f}"
            + (" (below 0.5: the majority test cannot succeed with these subjects and draws)." if value < 0.5 else "."))


def p_min_warning(table, alpha):
    """A warning where some subject's smallest attainable permutation p exceeds ``alpha`` (or '')."""
    p_min = pd.to_numeric(table["subject_p_min"], errors="coerce")
    over = table[p_min > alpha]
    if over.empty:
        return ""
    return (f"Warning: in {len(over)} of {len(table)} rows some subject's smallest attainable permutation p "
            f"(up to {float(p_min[p_min > alpha].max()):.3g}) exceeds alpha {alpha:g}: that subject's own test "
            "cannot reach significance there (too few distinct relabelings in its design).")


def _group_table(table, alpha, n_draws=None):
    """The group table; columns that are constant (subjects, chance) move into the caption."""
    constant = {column: table[column].nunique(dropna=False) == 1 for column in ("n_subjects", "chance")}
    shown = [entry for entry in GROUP_PAGE_COLUMNS if not constant.get(entry[0], False)]
    rows, classes = [], []
    for row in table.itertuples(index=False):
        survives = math.isfinite(float(row.p_fwe)) and float(row.p_fwe) < alpha
        interval = (f"[{html_page.format_number(row.ci_low)},\u00a0{html_page.format_number(row.ci_high)}]"
                    if math.isfinite(float(row.ci_low)) else "n/a")
        cells = {"roi": row.roi, "direction": page.direction_label(str(row.direction)), "n_voxels": row.n_voxels,
                 "n_subjects": int(row.n_subjects), "chance": html_page.format_number(row.chance),
                 "mean": html_page.format_number(row.mean), "ci": interval, "t": html_page.format_number(row.t, 2),
                 "p_t": html_page.format_p(row.p_t), "p_wilcoxon": html_page.format_p(row.p_wilcoxon),
                 "p_perm": html_page.format_p(row.p_perm), "p_fwe": html_page.format_p(row.p_fwe, n_draws),
                 "survives": "yes" if survives else "no", "prevalence_p_global": html_page.format_p(row.prevalence_p_global),
                 "prevalence_gamma0": html_page.format_number(row.prevalence_gamma0, 2),
                 "prevalence_gamma0_fwe": html_page.format_number(row.prevalence_gamma0_fwe, 2),
                 "prevalence_p_majority": html_page.format_p(row.prevalence_p_majority),
                 "effect_size": html_page.format_number(row.effect_size, 2),
                 "n_used": "n/a" if pd.isna(row.n_used) else str(row.n_used)}
        rows.append([cells[key] for key, _, _ in shown])
        classes.append("survives" if survives else "")
    caption = "Group statistics (one-sided: above chance)"
    if constant["n_subjects"]:
        caption += f", {int(table['n_subjects'].iloc[0])} subjects"
    if constant["chance"]:
        caption += f", chance {html_page.format_number(table['chance'].iloc[0])}"
    caption += (f". Rows in bold survive the family-wise correction (p_fwe < {alpha:g}); family of p_fwe: "
                f"{family_text(table['family'])}. {gamma0_max_text(table)}")
    warning = p_min_warning(table, alpha)
    return (html_page.html_table([header for _, header, _ in shown], rows, caption=caption.strip(), row_classes=classes,
                                 wide=True, header_titles=[title for _, _, title in shown])
            + (f"<p class=\"caveat\">{html.escape(warning)}</p>" if warning else ""))


def _analysis_text(analysis):
    if analysis["kind"] == "cross":
        sets = "; ".join(f"set {name}: " + ", ".join(f"{label} = {condition}" for label, condition in classes.items())
                         for name, classes in analysis["sets"].items())
        kind = f"cross-decoding between two sets ({sets})"
    else:
        kind = "decoding of the classes " + "; ".join(f"{label} = {' + '.join(conditions)}"
                                                      for label, conditions in analysis["classes"].items())
    folds = analysis.get("folds", {}).get("scheme", "leave_one_run_out").replace("_", "-")
    return (f"{kind}. Classifier {analysis.get('classifier')}, voxel selection {analysis.get('selection')} (inside the "
            f"training folds), voxel counts {_text_list(analysis.get('voxel_counts', []))}, folds {folds}, "
            f"{analysis.get('n_permutations')} permutations per subject.")


def _truth_text(truth, roi):
    decodes = ((truth or {}).get("rois", {}).get(roi) or {}).get("decodes")
    if not decodes:
        return ""
    yes = [key.replace("_", " ") for key, value in decodes.items() if value]
    no = [key.replace("_", " ") for key, value in decodes.items() if not value]
    return _paragraph(f"Demo ground truth for ROI {roi} (what the simulation built in): decodes "
                      f"{_text_list(yes) if yes else 'nothing'}{'; does not decode ' + _text_list(no) if no else ''}.")


def _provenance_section(study, config_file, versions, records, overrides=()):
    commands = page.reproduce_commands(config_file, study["dataset"]["source"], overrides)
    command_html = "".join(f"<p>{html.escape(what)}:</p><pre><code>{html.escape(command)}</code></pre>"
                           for what, command in commands)
    summary = page.manifest_summary(records)
    rows = [list(row) for row in summary.itertuples(index=False)]
    rows.append(["all steps", int(summary["jobs"].sum()), int(summary["output_files"].sum())])
    return (command_html
            + html_page.html_table(("package", "version"), versions, caption="Package versions of this run")
            + html_page.html_table(("step", "jobs", "output files"), rows,
                              caption="Jobs before this report, counted from their provenance records")
            + _paragraph(f"{_results_dir(study)}/manifest.tsv lists every output file with its sha256 and the job that made it; "
                         f"{_results_dir(study)}/provenance/ holds one record per job (inputs and outputs with their sha256, settings, "
                         "code hash, versions). make bundle packs the results for reviewers and make verify "
                         "recomputes them and compares.")
            + _paragraph(f"Config hash: {hash_object(study)}"))


# -- the job ---------------------------------------------------------------------------

def _drawing_data(inputs, params, study, subjects, repetition_times):
    """Everything the figures draw, read and checked: tables, and the paths of the images (read when drawn)."""
    analyses = {analysis["name"]: analysis for analysis in study["analyses"] if analysis["kind"] != "geometry"}  # decoding analyses
    roi_names = [roi["name"] for roi in study["rois"]]
    fields_of = _field_reader(params.get("input_index"))
    roi_mask_paths = {}
    for path in _as_list(inputs.get("roi_masks")):
        fields = fields_of(path, "roi_masks")
        roi_mask_paths[(fields["subject"], fields["roi"])] = str(path)
    counts = _roi_counts(inputs.get("roi_counts"), subjects, roi_names)
    return {"design_images": _by_subject(inputs.get("design_images"), "design_images", subjects, fields_of),
            "brain_masks": _by_subject(inputs.get("brain_masks"), "brain_masks", subjects, fields_of),
            "means": _by_subject(inputs.get("means"), "means", subjects, fields_of), "roi_mask_paths": roi_mask_paths,
            "roi_names": roi_names, "resvar": _as_list(inputs.get("resvar")), "analyses": analyses, "counts": counts,
            "tr_s": repetition_times[0] if len(repetition_times) == 1 else None,
            "group_tables": _read_group_tables(inputs.get("group_tables"), list(analyses)),
            "summaries": _read_summaries(inputs.get("summaries"), list(analyses), subjects),
            "confusions": _read_confusions(inputs.get("confusions"), list(analyses), fields_of), "subjects": subjects,
            "roi_mean_voxels": {roi: float(counts.loc[counts["roi"] == roi, "n_voxels"].mean()) for roi in roi_names},
            "alpha": float(study.get("group", {}).get("alpha", 0.05)), "study": study, "clusters": {},
            "fields_of": fields_of, "searchlight": _searchlight_inputs(inputs, study), "parts": job_parts()}


def _paper_figures_command(config_file):
    """The command that writes the result figures' publication files (the ``paper_figures`` target)."""
    config_part = ("" if config_file in (None, "", "config/config.yaml")
                   else f" --config config_file={config_file}")
    return f".venv/bin/snakemake --profile config/profiles/local --cores 2{config_part} paper_figures"


def run_publication_files(inputs, outputs, params, log):
    """Write the publication files of the result figures (PNG 300 dpi, SVG, PDF): the ``report_files`` job.

    Parameters
    ----------
    inputs : dict
        The report's inputs (the same files; the page's own, such as events
        and sidecars, are read only for the repetition time).
    outputs : dict
        ``figures``: exactly ``publication_files(figure_catalogue(study, subjects))``.
    params : dict
        ``study``, ``subjects``, ``runs`` and ``input_index``, as the report's.
    log : logging.Logger

    Notes
    -----
    Each figure is drawn from the same specification as its preview on the
    page (same data, same builder), laid out once and saved in every format
    (``foldwise.report.drawing.save_publication_files``); a figure whose data
    did not change is restored from the part memo.
    """
    study, subjects, _ = _check_params(params)
    catalogue = _check_outputs(outputs, study, subjects, publication=True)
    data = _drawing_data(inputs, params, study, subjects, _repetition_times(inputs.get("sidecars")))
    entries = [entry for entry in catalogue if entry["publication"]]
    specifications = [_FIGURE_SPECIFICATIONS[entry["kind"]](entry, data, log) for entry in entries]
    for entry, (identity, build, _, _) in zip(entries, specifications):
        _draw_or_restore(data["parts"], entry, identity, build, publication=True)


def run(inputs, outputs, params, log):
    """Write the study report: ``index.html`` and the PNG of every figure it embeds.

    Parameters
    ----------
    inputs : dict
        ``design_images`` (the GLM's design PNG of each subject's first run), ``events`` and
        ``sidecars`` (every run's), ``brain_masks``, ``means`` and
        ``roi_counts`` (per subject), ``roi_masks`` (per subject x ROI),
        ``resvar`` (the first subject's first run), ``glm_facts`` (every
        run's GLM facts JSON), ``summaries`` (per
        analysis x subject), ``confusions`` (per analysis x subject x ROI),
        ``group_tables`` (per analysis), ``provenance`` (every other job's
        record) and, for the demo, ``ground_truth``.
    outputs : dict
        ``html`` and ``previews`` (exactly ``embedded_files(figure_catalogue(study, subjects))``:
        the result figures' screen previews and the quality checks' PNGs).
    params : dict
        ``study`` (the validated config), ``subjects``, ``runs`` (subject ->
        run ids) and ``config_file`` (str or None).
    log : logging.Logger
        Notes the confusion counts chosen when the configured one is absent.
    """
    study, subjects, runs = _check_params(params)
    catalogue = _check_outputs(outputs, study, subjects)
    clear_text_cache()  # the previews' text layouts and glyphs are kept for this job only
    config_file = display_path(params.get("config_file"))  # never an absolute path in the report
    versions = _package_versions()
    repetition_times = _repetition_times(inputs.get("sidecars"))
    events = [read_tsv(path, EVENT_COLUMNS, what="events table") for path in _as_list(inputs.get("events"))]
    if not events:
        raise InputError(None, "events", "no events table was given", "pass every run's events TSV")
    trials = page.trials_per_condition(events)
    data = _drawing_data(inputs, params, study, subjects, repetition_times)
    glm_facts = _read_glm_facts(inputs.get("glm_facts"), data["fields_of"])
    records = [_read_json(path, "provenance record") for path in _as_list(inputs.get("provenance"))]
    if not records and params.get("planned_jobs"):
        # The workflow passes the planned jobs instead of their records: records carry run times, and
        # reading them would make the page recompute whenever any job was merely restored.
        records = [{"step": step, "outputs": [None] * int(n_outputs)}
                   for step, jobs in params["planned_jobs"].items() for n_outputs in jobs]
    for path, record in zip(_as_list(inputs.get("provenance")), records):
        if not isinstance(record, dict) or "step" not in record or not isinstance(record.get("outputs"), list):
            raise InputError(path, "step, outputs", "not a provenance record of a foldwise job", _RERUN)
    truth = _read_json(inputs["ground_truth"], "demo ground truth") if inputs.get("ground_truth") else None
    # Read and check everything first, draw afterwards: bad input stops the job before any drawing
    # (the images of the quality-check figures are checked when those figures are drawn).
    specifications = [_FIGURE_SPECIFICATIONS[entry["kind"]](entry, data, log) for entry in catalogue]
    blocks, pool = {}, {}
    for entry, (identity, build, alt, caption) in zip(catalogue, specifications):
        _draw_or_restore(data["parts"], entry, identity, build, pool=pool)
        blocks[entry["stem"]] = (Path(entry["preview"]).read_bytes(), alt, caption)
    means, counts, alpha, analyses = data["means"], data["counts"], data["alpha"], data["analyses"]
    roi_names, group_tables = data["roi_names"], data["group_tables"]
    first_mean = load_nifti(means[subjects[0]], what="mean image")
    voxel_size_mm = tuple(float(size) for size in first_mean.header.get_zooms()[:3])
    warnings = _read_warnings(params.get("job_logs") or [])
    context = {"study": study, "subjects": subjects, "runs": runs, "trials": trials, "alpha": alpha, "counts": counts,
               "roi_names": roi_names, "analyses": analyses, "group_tables": group_tables, "truth": truth,
               "glm_facts": glm_facts,
               "catalogue": catalogue, "blocks": blocks,
               "files_href": Path(os.path.relpath(Path(catalogue[-1]["paths"][0]).parent, Path(outputs["html"]).parent)).as_posix(),
               "clusters": data["clusters"], "warnings": warnings, "paper_command": _paper_figures_command(config_file),
               "n_draws": int(study.get("group", {}).get("n_draws", 0)) or None,
               "repetition_times": repetition_times, "voxel_size_mm": voxel_size_mm, "config_file": config_file,
               "versions": versions, "records": records, "geometry": geometry_section.read(inputs),
               "overrides": [str(entry) for entry in params.get("overrides") or []]}
    sections = [section(context) for section in SECTIONS]
    title = f"foldwise study report: {study.get('study', {}).get('name', 'study')}"
    write_text_atomic(outputs["html"], html_page.render_page(title, [section for section in sections if section]))


# -- the page, one function per section (each returns (id, heading, HTML, contents entries) or None) ----------

def _figure(context, entry, heading=None, heading_id=None):
    png, alt, caption = context["blocks"][entry["stem"]]
    formats = [Path(path).name.split(".", 1)[1] for path in entry["paths"]]
    note = ("written on request by the paper_figures target: see the top of Results per analysis" if entry["publication"]
            else None)
    return html_page.figure_block(png, entry["stem"], alt, caption, formats=formats, heading=heading,
                                  heading_id=heading_id, files_dir=context["files_href"], files_note=note)


def _entry(context, stem):
    return next(entry for entry in context["catalogue"] if entry["stem"] == stem)


def _summary_section(context):
    """The answer first: per analysis, what survives correction, where and how large, in plain words."""
    alpha, parts = context["alpha"], ["<div class=\"answer\">"]
    for name, analysis in context["analyses"].items():
        table = context["group_tables"][name][0]
        lines = answer_sentences(table, alpha, context["n_draws"], page.curve_directions(analysis),
                                 page.analysis_rois(context["study"], analysis))
        n_found = sum(1 for _, _, found, _ in lines if found)
        parts.append(f"<h3><a href=\"#{html_page.anchor('analysis', name)}\">Analysis {html.escape(name)}</a>: "
                     f"{n_found} of {len(lines)} ROI x direction results above chance after correction</h3><ul>")
        for roi, direction, found, sentence in lines:
            target = html_page.anchor("analysis", name, "roi", roi)
            parts.append(f"<li{' class=' + chr(34) + 'found' + chr(34) if found else ''}><a href=\"#{target}\">ROI "
                         f"{html.escape(roi)}</a>, <span title=\"{html.escape(html_page.direction_tooltip(direction))}\">"
                         f"{html.escape(direction)}</span>: {html.escape(sentence)}</li>")
        parts.append("</ul>")
        facts = [f"Corrected p (p_fwe < {alpha:g}): {family_text(table['family'])}.", gamma0_max_text(table),
                 p_min_warning(table, alpha)]
        parts.append(_paragraph(" ".join(fact for fact in facts if fact)))
    n_warnings = len(context["warnings"])
    scale = ("each cell standardised by the mean and SD of its own null first"
             if context["study"].get("group", {}).get("fwe_method", "standardised") == "standardised"
             else "each cell entered by its own null p-value, single-step min-p")
    parts.append(_paragraph(f"Corrected p: family-wise, maximum statistic over the family named above ({scale}), "
                            f"alpha {alpha:g}. This run logged {n_warnings} "
                            f"warning{'s' if n_warnings != 1 else ''} (listed under Warnings)."))
    parts.append("<p class=\"caveat\">Research use only, not for clinical decisions. Above chance at the group level "
                 "means the mean accuracy over subjects exceeds chance; it does not say how many people show the effect "
                 "(that is what the prevalence lower bound addresses). See Cautions.</p></div>")
    return ("summary", "Summary: the answer", "".join(parts), ())


def _analysis_block(context, name, analysis):
    table = context["group_tables"][name][0]
    rois = page.analysis_rois(context["study"], analysis)
    directions = page.curve_directions(analysis)
    legend = "; ".join(f"{direction} = {html_page.direction_tooltip(direction)}" for direction in directions)
    parts = [f"<h3 id=\"{html_page.anchor('analysis', name)}\">Analysis {html.escape(name)}</h3>",
             _paragraph(_analysis_text(analysis)), _paragraph(f"Directions: {legend}.")]
    for roi in rois:
        parts.append(_truth_text(context["truth"], roi))
        parts.append(_figure(context, _entry(context, f"{name}_roi-{roi}_curve"), heading=f"ROI {roi}",
                             heading_id=html_page.anchor("analysis", name, "roi", roi)))
        parts.append(_figure(context, _entry(context, f"{name}_roi-{roi}_confusion")))
    parts.append(_figure(context, _entry(context, f"{name}_rois"), heading=f"ROIs compared (analysis {name})",
                         heading_id=html_page.anchor("analysis", name, "rois")))
    parts.append(_group_table(table, context["alpha"], context["n_draws"]))
    entries = [(html_page.anchor("analysis", name, "roi", roi), f"ROI {roi}") for roi in rois]
    entries.append((html_page.anchor("analysis", name, "rois"), "ROIs compared"))
    return "".join(parts), (html_page.anchor("analysis", name), f"Analysis {name}", entries)


def _results_section(context):
    """Per analysis: curves and group confusion per ROI, the ROI comparison, the group table."""
    intro = _paragraph("Score: balanced accuracy (the mean of the per-class hit rates, a proportion), averaged over "
                       "the test folds of each subject. Colours follow the colour-blind-safe palette of Okabe & Ito "
                       "(2008); images use the cividis and viridis colour maps; every mark is also told apart by "
                       "shape or position.") + _paragraph(
        "The page shows each result figure at screen resolution. Its publication files (PNG at 300 dpi, SVG with "
        "text kept as text, PDF with embedded fonts; linked under each figure) are written only when asked, by "
        f"{context['paper_command']} (the same figures, from the same data).")
    blocks = [_analysis_block(context, name, analysis) for name, analysis in context["analyses"].items()]
    return ("results", "Results per analysis", intro + "".join(block for block, _ in blocks),
            [entry for _, entry in blocks])


def _cluster_table(table):
    if table.empty:
        return _paragraph("No voxel survives the family-wise correction: no cluster to list.")
    rows = [[row.direction, int(row.cluster), int(row.n_voxels_cluster), f"{row.volume_mm3:g}",
             html_page.format_number(row.peak_margin), html_page.format_p(row.peak_p_fwe),
             f"{row.peak_x_mm:g}", f"{row.peak_y_mm:g}", f"{row.peak_z_mm:g}"] for row in table.itertuples(index=False)]
    header = ["direction", "cluster", "size (voxels)", "size (mm³)", f"peak {page.SEARCHLIGHT_QUANTITY}",
              "peak p_fwe", "peak x (mm)", "peak y (mm)", "peak z (mm)"]
    return html_page.html_table(header, rows, wide=True, caption=(
        "Clusters of searchlight centres with corrected p below alpha (26-neighbour connectivity), largest first; "
        "the peak is the centre with the largest margin over chance. Voxel-wise correction: the table says where, "
        "it is not a cluster-level test."))


def _maps_section(context):
    """Searchlight group maps with their cluster and peak tables (absent when the searchlight is off)."""
    entries = [entry for entry in context["catalogue"] if entry["kind"] == "searchlight"]
    if not entries:
        return None
    parts = [_paragraph(
        f"Each brain voxel's score is the cross-validated balanced accuracy in a sphere around it; the group map is "
        f"the {page.SEARCHLIGHT_QUANTITY} (the mean over subjects of balanced accuracy minus its chance level), tested "
        "by the permutation group test with voxel-wise maximum-statistic family-wise correction. A significant voxel "
        "means its sphere carries information, not that the voxel itself does.")]
    toc = []
    for entry in entries:
        name = entry["analysis"]
        target = html_page.anchor("map", name)
        parts.append(_figure(context, entry, heading=f"Searchlight map of analysis {name}", heading_id=target))
        parts.append(_cluster_table(context["clusters"][name]))
        toc.append((target, f"Map of analysis {name}"))
    return ("maps", "Searchlight maps", "".join(parts), toc)


def _quality_section(context):
    """Quality checks: designs, masks, ROI voxel counts, residual variance."""
    catalogue = context["catalogue"]
    figures = {kind: "".join(_figure(context, e) for e in catalogue if e["kind"] == kind)
               for kind in ("design", "brainmask", "roimasks", "resvar")}
    inner = ("<h3 id=\"qc-designs\">Design matrices (first run of each subject)</h3><div class=\"gallery\">"
             + figures["design"] + "</div>"
             + "<h3 id=\"qc-glm-runs\">Confounds and dropped data per run</h3>"
             + _glm_facts_table(context["glm_facts"], context["subjects"], context["runs"])
             + "<h3 id=\"qc-masks\">Brain masks</h3>" + figures["brainmask"]
             + "<h3 id=\"qc-roi-masks\">ROI placement in every subject</h3>" + figures["roimasks"]
             + "<h3 id=\"qc-roi-counts\">ROI voxel counts</h3>"
             + _roi_count_table(context["counts"], context["subjects"], context["roi_names"])
             + "<h3 id=\"qc-residual-variance\">GLM residual variance</h3>" + figures["resvar"])
    entries = [("qc-designs", "Design matrices"), ("qc-glm-runs", "Confounds and dropped data per run"),
               ("qc-masks", "Brain masks"), ("qc-roi-masks", "ROI placement"), ("qc-roi-counts", "ROI voxel counts"),
               ("qc-residual-variance", "GLM residual variance")]
    return ("quality-checks", "Quality checks", inner, entries)


def _warnings_section(context):
    """Every warning the run's jobs logged, with its job."""
    warnings = context["warnings"]
    if not warnings:
        inner = _paragraph("No job of this run logged a warning.")
    else:
        inner = (_paragraph(f"{len(warnings)} warning{'s' if len(warnings) != 1 else ''}, as the jobs logged them "
                            f"(job: step and its wildcards; full logs under {_results_dir(context.get('study', {}))}/logs/).")
                 + "<ul class=\"warnings\">" + "".join(f"<li><strong>{html.escape(job)}</strong>: {html.escape(text)}</li>"
                                                  for job, text in warnings) + "</ul>")
    return ("warnings", f"Warnings ({len(warnings)})", inner, ())


def _cautions_page_section(context):
    return ("cautions", "Cautions: how to read these results",
            _cautions_section(context["alpha"], context["study"]["dataset"]["source"],
                              context["study"].get("group", {}).get("family", "per_direction")), ())


def _methods_section(context):
    return ("study", "Study and methods", _study_section(
        context["study"], context["subjects"], context["runs"], context["trials"], context["repetition_times"],
        context["voxel_size_mm"], context["config_file"], context["versions"], context["overrides"])
        + _inference_text(context["study"]), ())


def _provenance_page_section(context):
    return ("provenance", "Provenance", _provenance_section(context["study"], context["config_file"], context["versions"],
                                                            context["records"], context["overrides"]), ())


#: The page's sections in order: the answer, results, maps, quality checks, warnings, then how it was done.
SECTIONS = (_summary_section, _results_section, _maps_section, geometry_section.section, _quality_section, _warnings_section,
            _cautions_page_section, _methods_section, _provenance_page_section)


def _read_warnings(job_logs):
    """(job, message) for every WARNING line of the jobs' logs, in plan order (see foldwise.report.terminal)."""
    return job_warnings(job_logs)


def _searchlight_inputs(inputs, study):
    """analysis name -> (mean map, FWE p map, directions table) paths, in the config's searchlight order."""
    searchlight = study.get("searchlight") or {}
    names = searchlight.get("analyses", []) if searchlight.get("enabled") else []
    lists = [_as_list(inputs.get(key)) for key in ("searchlight_means", "searchlight_p_fwe", "searchlight_directions")]
    if any(len(paths) != len(names) for paths in lists):
        raise InputError(None, "searchlight_means, searchlight_p_fwe, searchlight_directions",
                         f"expected one file of each per searchlight analysis ({len(names)})", "pass them from the report rule")
    return {name: tuple(paths[index] for paths in lists) for index, name in enumerate(names)}


def _average_mean_image(data):
    """The mean over subjects of their mean images (the first subject's alone when the grids differ)."""
    subjects = data["subjects"]
    first, image = _volume(data["means"][subjects[0]], "mean image")
    total, n_used = first.copy(), 1
    for subject in subjects[1:]:
        values, other = _volume(data["means"][subject], "mean image")
        if values.shape != first.shape or not np.allclose(other.affine, image.affine):
            return first, f"sub-{subjects[0]}'s mean image (the subjects' grids differ)"
        total += values
        n_used += 1
    return total / n_used, f"the mean of the {n_used} subjects' mean images"


def _searchlight_specification(entry, data, log):
    name = entry["analysis"]
    mean_path, p_fwe_path, directions_path = data["searchlight"][name]
    subject = data["subjects"][0]
    background, underlay = _average_mean_image(data)
    brain = _volume(data["brain_masks"][subject], "brain mask", background.shape)[0] > 0
    means = load_nifti(mean_path, what="searchlight mean map")
    p_fwe = load_nifti(p_fwe_path, what="searchlight FWE p map")
    directions = read_tsv(directions_path, ("volume", "direction"), what="searchlight directions")["direction"].tolist()
    mean_values = np.asarray(means.dataobj, dtype=np.float64).reshape(background.shape + (-1,))
    p_values = np.asarray(p_fwe.dataobj, dtype=np.float64).reshape(background.shape + (-1,))
    data["clusters"][name] = page.searchlight_clusters(mean_values, p_values, directions, means.affine, data["alpha"])
    build = functools.partial(page.searchlight_figure, mean_values, p_values, directions, background, brain, means.affine,
                              data["alpha"], f"analysis {name}: group searchlight maps")
    return (_built(build), build, f"group searchlight maps of analysis {name}",
            f"Analysis {name}: group {page.SEARCHLIGHT_QUANTITY} per searchlight sphere centre, shown only where the "
            f"voxel-wise family-wise corrected p is below {data['alpha']:g}, over {underlay}; the same slices in every "
            "row; coordinates in mm, L and R mark the subject's left and right.")


def _design_specification(entry, data, log):
    subject = entry["subject"]
    path = data["design_images"][subject]
    run_id = data["fields_of"](path, "design_images")["run_id"]
    # The GLM job drew this run's design (foldwise.glm.design_image); the report shows that picture, not a second drawing.
    identity = {"builder": "glm_design_image", "image": _file_identity(data["parts"], path, "design image")}

    def build():
        png = Path(path).read_bytes()
        if not png.startswith(b"\x89PNG\r\n\x1a\n"):
            raise InputError(path, "content", "the design image is not a PNG", _RERUN)
        return png

    tr_text = f"; repetition time {data['tr_s']:g} s" if data["tr_s"] else ""
    return (identity, build, f"Design matrix of sub-{subject}, {run_id}",
            f"sub-{subject}, {run_id}: the design as the GLM job drew it: one row per regressor (named at the left, "
            f"in the design's column order), one column per scan{tr_text}; each regressor scaled to its largest "
            "magnitude on a diverging scale, zero in white.")


def _brainmask_specification(entry, data, log):
    subject = entry["subject"]
    parts, title = data["parts"], f"sub-{subject}: brain mask on the mean image"
    # Keyed on the images' contents: they are read only when the figure is drawn.
    identity = {"builder": "brain_mask_png", "title": title,
                "mean": _file_identity(parts, data["means"][subject], "mean image"),
                "brain": _file_identity(parts, data["brain_masks"][subject], "brain mask")}

    def build():
        mean, image, brain = _mean_and_brain(data, subject)
        return images.brain_mask_png(mean, brain, image.affine, title)

    return (identity, build, f"Brain mask of sub-{subject}",
            f"sub-{subject}: the brain mask (yellow outline) over the subject's mean BOLD image, three slices through "
            "the planes with the most brain voxels. Check that it covers the brain without large gaps and stops at its "
            "edge.")


def _roimasks_specification(entry, data, log):
    roi = entry["roi"]
    parts, subjects = data["parts"], data["subjects"]
    for subject in subjects:
        if (subject, roi) not in data["roi_mask_paths"]:
            raise InputError(None, "roi_masks", f"no mask of ROI {roi} for subject {subject}", _RERUN)
    title = f"ROI {roi} in every subject, over the subject's mean image"
    colour = images.roi_colour(data["roi_names"].index(roi))
    # One ROI's placement in every subject: a change to this ROI's masks redraws this figure only.
    identity = {"builder": "roi_masks_png", "title": title, "colour": list(colour),
                "subjects": [[subject, _file_identity(parts, data["means"][subject], "mean image"),
                              _file_identity(parts, data["brain_masks"][subject], "brain mask"),
                              _file_identity(parts, data["roi_mask_paths"][(subject, roi)], "ROI mask")]
                             for subject in subjects]}

    def build():
        rows, affine = [], None
        for subject in subjects:
            mean, image, brain = _mean_and_brain(data, subject)
            affine = image.affine if affine is None else affine
            mask = _volume(data["roi_mask_paths"][(subject, roi)], "ROI mask", mean.shape)[0] > 0
            rows.append((f"sub-{subject}", mean, brain, mask))
        return images.roi_masks_png(roi, rows, affine, colour, title)

    return (identity, build, f"ROI {roi} in every subject",
            f"ROI {roi} (filled and outlined) and the brain mask (yellow outline) over each subject's mean BOLD image, one "
            "row per subject with its ROI voxel count, slices through the planes with the most ROI voxels of that "
            "subject. Check that the ROI lies where it should, inside the brain, in every subject.")


def _resvar_specification(entry, data, log):
    subject = entry["subject"]
    if len(data["resvar"]) != 1:
        raise InputError(None, "resvar", f"expected one residual variance image, got {len(data['resvar'])}",
                         "pass the first subject's first run")
    path = str(data["resvar"][0])
    fields = data["fields_of"](path, "resvar")
    if fields["subject"] != subject:
        raise InputError(path, "subject", f"expected the residual variance of sub-{subject}, got sub-{fields['subject']}",
                         "pass the first subject's first run")
    parts, title = data["parts"], f"sub-{subject} {fields['run_id']}: GLM residual variance"
    identity = {"builder": "resvar_png", "title": title,
                "mean": _file_identity(parts, data["means"][subject], "mean image"),  # its grid is checked
                "resvar": _file_identity(parts, path, "residual variance image"),
                "brain": _file_identity(parts, data["brain_masks"][subject], "brain mask")}

    def build():
        mean, _, brain = _mean_and_brain(data, subject)
        values, image = _read_volume(data, path, "residual variance image", mean.shape)
        return images.resvar_png(values, brain, image.affine, title)

    return (identity, build, f"GLM residual variance of sub-{subject}",
            f"sub-{subject}, {fields['run_id']}: residual variance of the GLM fit per voxel (colour range: 1st to 99th "
            "percentile inside the brain).")


def _rows_by(data, key, table, columns):
    """``table``'s rows per value of ``columns`` (in table order), split once per job and kept in ``data`` under ``key``.

    Every ROI's figure takes its rows from the same tables: one split instead of a pass over the table per figure
    and direction. A value absent from the table gets the table's empty head.
    """
    cache = data.setdefault("_rows_by", {})
    if key not in cache:
        groups = {tuple(str(part) for part in value): rows
                  for value, rows in table.groupby([table[column].astype(str) for column in columns], sort=False)}
        cache[key] = (groups, table.iloc[:0])
    groups, empty = cache[key]
    return lambda *value: groups.get(tuple(str(part) for part in value), empty)


def _curve_specification(entry, data, log):
    name, roi = entry["analysis"], entry["roi"]
    analysis, alpha, roi_mean = data["analyses"][name], data["alpha"], data["roi_mean_voxels"][roi]
    table, path = data["group_tables"][name]
    group_rows = _rows_by(data, ("group", name), table, ("roi", "direction"))
    subject_rows = _rows_by(data, ("summaries", name), data["summaries"][name], ("roi", "direction"))
    panels = []
    for direction in page.curve_directions(analysis):
        rows = group_rows(roi, direction)
        if rows.empty:
            raise InputError(path, "roi, direction", f"no row for ROI {roi}, direction {direction}", _RERUN)
        own = subject_rows(roi, direction)
        try:
            panel = page.curve_data(rows, own, roi_mean, alpha)
        except InputError as error:
            raise InputError(path, error.field, error.problem, error.fix) from None
        panel["label"] = page.direction_label(direction)
        panels.append(panel)
    chance = html_page.format_number(panels[0]["chance"][0])
    caption = (f"Balanced accuracy against the number of voxels (log axis) in ROI {roi}: group mean (thick line) with its "
               f"95% confidence interval (band) over {len(panels[0]['subjects'])} subjects, single subjects (thin lines), "
               f"chance {chance} (dashed). Stars along the top: family-wise corrected p < {alpha:g}. 'all' (the whole ROI, "
               f"{roi_mean:.1f} voxels on average) comes last, after the dotted line. Open circles: the ROI held fewer "
               "voxels than requested for at least one subject.")
    dropped = sorted({count for panel in panels for count in panel["dropped"]}, key=parse_count)
    if dropped:
        caption += (f" Not drawn: {', '.join(dropped)} voxels, larger than every subject's ROI, so identical to 'all'.")
    if len(panels) > 1:
        caption += " Panels: " + "; ".join(f"{panel['label']} ({html_page.direction_tooltip(panel['label'])})"
                                           for panel in panels) + "."
    build = functools.partial(page.curve_figure, panels, f"analysis {name}, ROI {roi}", alpha)
    return _built(build), build, f"Decoding curves of analysis {name} in ROI {roi}", caption


def _chosen_count(data, name, roi, key):
    table = data["group_tables"][name][0]
    available = list(dict.fromkeys(table.loc[table["roi"] == roi, "n_voxels"].astype(str)))
    configured = data["study"].get("report", {}).get(key, 100)
    chosen, exact = page.choose_confusion_count(configured, available, data["roi_mean_voxels"][roi])
    text = f"{chosen} voxels" if exact else f"{chosen} voxels (the configured {configured} is not among the counts tested)"
    return chosen, exact, configured, text


def _confusion_specification(entry, data, log):
    name, roi = entry["analysis"], entry["roi"]
    analysis = data["analyses"][name]
    chosen, exact, configured, count_text = _chosen_count(data, name, roi, "confusion_n_voxels")
    if not exact:
        log.info("analysis %s, ROI %s: no results at %s voxels; confusion matrices at %s", name, roi, configured, chosen)
    classes = _classes(analysis)
    directions = page.curve_directions(analysis)
    shares, at_count = {}, {}
    for direction in directions:
        matrices = []
        for subject in data["subjects"]:
            if (name, subject, roi) not in data["confusions"]:
                raise InputError(None, "confusions", f"no confusion table of analysis {name}, sub-{subject}, ROI {roi}", _RERUN)
            frame, path = data["confusions"][(name, subject, roi)]
            if subject not in at_count:  # the rows at the chosen count, selected once for all directions
                wanted = frame[frame["n_voxels"].astype(str) == chosen]
                # as arrays: a direction's rows are then a numpy selection, not a DataFrame's (~0.1 ms each)
                at_count[subject] = ({name: wanted[name].to_numpy() for name in ("true_class", "predicted_class", "count")},
                                     wanted["direction"].astype(str).to_numpy())
            columns, wanted_directions = at_count[subject]
            selected = wanted_directions == direction
            if not selected.any():
                raise InputError(path, "direction, n_voxels", f"no rows for direction {direction} at {chosen} voxels", _RERUN)
            rows = {name: values[selected] for name, values in columns.items()}
            try:
                matrices.append(page.confusion_matrix(rows, classes))
            except InputError as error:
                raise InputError(path, error.field, error.problem, error.fix) from None
        shares[direction] = page.group_confusion(matrices)
    n_subjects = len(data["subjects"])
    caption = (f"Group confusion matrices at {count_text}: per subject, the test predictions summed over folds and "
               f"each true class's row turned into shares; shown is the mean of the {n_subjects} subjects' shares "
               "(percent; rows sum to 100). Rows are the true classes, columns the predicted ones. Descriptive, not a test.")
    build = functools.partial(page.confusion_figure, shares, directions, classes,
                              f"analysis {name}, ROI {roi}: {count_text}", n_subjects)
    return _built(build), build, f"Group confusion matrices of analysis {name} in ROI {roi}", caption


def _comparison_specification(entry, data, log):
    name = entry["analysis"]
    analysis = data["analyses"][name]
    rois = page.analysis_rois(data["study"], analysis)
    table, path = data["group_tables"][name]
    # One count for every ROI: the configured one when every ROI has it, else each ROI's nearest is not comparable,
    # so the first ROI's choice is used and stated.
    chosen, exact, configured, count_text = _chosen_count(data, name, rois[0], "comparison_n_voxels")
    directions = page.curve_directions(analysis)
    try:
        panels = page.comparison_data(data["summaries"][name], table, rois, directions, chosen)
    except InputError as error:
        raise InputError(path, error.field, error.problem, error.fix) from None
    smaller = [roi for roi, shown in zip(rois, panels[0]["shown_counts"]) if shown != chosen]
    caption = (f"ROIs compared at {count_text}: each dot is one subject's balanced accuracy (spread sideways by rank), "
               "the diamond and bar the group mean and its 95% confidence interval, the dashed line chance; a star "
               f"marks a family-wise corrected p below {data['alpha']:g}."
               + (f" ROI {', '.join(smaller)} {'is' if len(smaller) == 1 else 'are'} smaller than {chosen} voxels in every "
                  f"subject and shown with all {'its' if len(smaller) == 1 else 'their'} voxels, marked (all)."
                  if smaller else ""))
    build = functools.partial(page.comparison_figure, panels, f"analysis {name}: ROIs at {count_text}", data["alpha"])
    return _built(build), build, f"ROI comparison of analysis {name}", caption


_FIGURE_SPECIFICATIONS = {"design": _design_specification, "brainmask": _brainmask_specification,
                          "roimasks": _roimasks_specification,
                          "resvar": _resvar_specification, "curve": _curve_specification,
                          "confusion": _confusion_specification, "searchlight": _searchlight_specification,
                          "comparison": _comparison_specification}
