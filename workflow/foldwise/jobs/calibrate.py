"""Job: the design self-check of one analysis -- the study's own analysis run on noise, many times.

Reads every subject's pattern tables (runs, trials, conditions; no images)
and ROI voxel counts, rebuilds each subject's design exactly as the decode
step sees it (classes or sets, folds, voxel counts, classifier, selection,
permutations), draws noise patterns of those shapes, decodes them with the
project's own functions, runs the group tests, and counts how often each test
rejects at each alpha over ``calibrate.n_studies`` noise studies. Writes the
table (``foldwise.stats.calibration.CALIBRATION_COLUMNS``), a figure of the
rates against their binomial 99% bounds, and a short text summary.

Randomness: noise study ``k`` draws subject ``s``'s patterns from
``default_rng(seed_from(seed, "calibrate_noise", analysis, k, s))``, its
relabelings (shared by the subject's ROIs, as in the decode step) from
``..."calibrate_permutation"...`` and the group draws from
``..."calibrate_group", analysis, k``.
"""

import time

import numpy as np
import pandas as pd

from foldwise.contract import read_table
from foldwise.data.fileio import save_figure, write_text_atomic, write_tsv
from foldwise.data.patterns import analysis_task_rows, files_label, plain_subject, read_pattern_tables
from foldwise.decoding.folds import make_folds, pair_runs_across_tasks
from foldwise.errors import InputError
from foldwise.jobs.decode import analysis_labels
from foldwise.provenance.hashing import seed_from
from foldwise.stats import calibration

__all__ = ["run", "subject_design", "ALPHAS"]

ALPHAS = (0.05, 0.01)


def subject_design(analysis, table_paths, roi_sizes, subject, pattern_tasks=None):
    """One subject's :class:`foldwise.stats.calibration.SubjectDesign` from its pattern tables.

    Parameters
    ----------
    analysis : dict
        The analysis entry (defaults filled).
    table_paths : list of str
        The subject's per-run pattern tables.
    roi_sizes : dict of str to int
    subject : str
    pattern_tasks : dict, optional
        The task of each part of the analysis (the study's ``pattern_tasks``); omitted: the main task.
    """
    table = read_pattern_tables(table_paths, subject)  # the one reader of a subject's pattern set, tables only
    table = table[analysis_task_rows(table, analysis, pattern_tasks)].reset_index(drop=True)  # the analysis's task(s) only
    keep, labels, set_index, class_names, set_names = analysis_labels(analysis, table, subject, files_label(table_paths))
    runs = table["run"].to_numpy()[keep]
    scheme = analysis["folds"].get("scheme", "leave_one_run_out")
    if pattern_tasks and set_index is not None and len(set(pattern_tasks.values())) == 2:
        runs = pair_runs_across_tasks(runs, set_index, set_names, scheme)  # as decoding does: run k of each task is one fold unit
    folds = make_folds(runs, scheme, analysis["folds"].get("n_groups", 2))
    return calibration.SubjectDesign(labels=labels, runs=runs, folds=folds, roi_sizes=roi_sizes, set_index=set_index), class_names, set_names


def _roi_sizes(paths, rois):
    sizes = {}
    for path in paths:
        frame = read_table("roi_counts", path)
        for subject, roi, n_voxels in zip(frame["subject"], frame["roi"], frame["n_voxels"]):
            sizes.setdefault(plain_subject(subject), {})[str(roi)] = int(n_voxels)
    for subject, by_roi in sizes.items():
        missing = [roi for roi in rois if roi not in by_roi]
        if missing:
            raise InputError(paths[0], "roi", f"subject {subject} has no voxel count for ROI(s) {missing}", "rerun the ROI steps")
    return sizes


def _figure(table, path, name):
    import matplotlib

    matplotlib.use("Agg")
    from matplotlib import pyplot

    rows = table.reset_index(drop=True)
    # small and plain: the figure is saved at 300 dpi (fileio.save_figure), so every inch costs render time
    height_in = 0.16 * len(rows) / len(ALPHAS) + 1.4
    figure, axes = pyplot.subplots(1, len(ALPHAS), figsize=(3.6 * len(ALPHAS), height_in), squeeze=False)
    for axis, alpha in zip(axes[0], ALPHAS):
        part = rows[rows["alpha"] == alpha].reset_index(drop=True)
        positions = np.arange(len(part))[::-1]
        axis.hlines(positions, part["bound_low"], part["bound_high"], color="0.7", linewidth=5, label="binomial 99% bounds")
        axis.plot(part["level"], positions, "|", color="0.3", markersize=10, label="calibrated rate")
        inside = part["within_bounds"].to_numpy(dtype=bool)
        axis.plot(part["rate"][inside], positions[inside], "o", color="#2a6f97", label="measured rate")
        axis.plot(part["rate"][~inside], positions[~inside], "x", color="#b23a48", markersize=9, label="above bounds")
        labels = [f"{test.replace('group ', '').replace(' (any in family)', ', any')} | {direction}"
                  for test, direction in zip(part["test"], part["direction"])]
        axis.set_yticks(positions, labels if alpha == ALPHAS[0] else [""] * len(labels), fontsize=5)  # same rows in both panels
        axis.tick_params(axis="x", labelsize=6)
        axis.axvline(alpha, color="0.5", linestyle=":", linewidth=1)
        axis.set_xlabel("false-positive rate on noise", fontsize=7)
        axis.set_title(f"alpha {alpha:g}", fontsize=8)
    axes[0][0].legend(fontsize=5, loc="lower right")
    figure.suptitle(f"Design self-check of {name}: every test on noise shaped like the study", fontsize=8)
    # margins in inches (title and axis label), whatever the number of rows
    figure.subplots_adjust(left=0.32, right=0.98, wspace=0.08, bottom=0.45 / height_in, top=1 - 0.55 / height_in)
    save_figure(figure, path)
    pyplot.close(figure)


def run(inputs, outputs, params, log):
    """Calibrate one analysis on noise.

    Parameters
    ----------
    inputs : dict
        ``tables``: every subject's pattern tables (TSV); ``roi_counts``: each subject's ROI counts table.
    outputs : dict
        ``table`` (TSV), ``figure`` (PNG), ``summary`` (text).
    params : dict
        ``analysis`` (entry with ``rois``), ``subjects``, ``group`` (the study's group settings), ``calibrate``
        (``n_studies``, ``n_draws``, ``classifier``), ``seed``, ``n_analyses`` with family ``all_analyses``, and
        ``pattern_tasks`` for an analysis of a task other than the main one.
    log : logging.Logger
    """
    analysis, subjects, group, settings = params["analysis"], [str(s) for s in params["subjects"]], params["group"], params["calibrate"]
    name, rois, seed = analysis["name"], list(analysis["rois"]), int(params["seed"])
    n_studies, n_draws = int(settings["n_studies"]), int(settings["n_draws"])
    table_paths = [inputs["tables"]] if isinstance(inputs["tables"], str) else list(inputs["tables"])
    count_paths = [inputs["roi_counts"]] if isinstance(inputs["roi_counts"], str) else list(inputs["roi_counts"])
    sizes = _roi_sizes(count_paths, rois)
    designs, class_names, set_names = [], None, None
    for subject in subjects:
        own = [path for path in table_paths if f"/sub-{plain_subject(subject)}/" in f"/{path}"]
        if not own:
            raise InputError(None, "tables", f"no pattern table of subject {subject} among the inputs", "pass every subject's tables")
        design, class_names, set_names = subject_design(analysis, own, sizes[plain_subject(subject)], subject, params.get("pattern_tasks"))
        designs.append(design)
    classifier = analysis["classifier"] if settings["classifier"] == "same" else settings["classifier"]
    options = {"classifier": classifier, "selection": analysis["selection"], "demean_patterns": analysis["demean_patterns"],
               "svm_c": analysis["svm_c"], "logistic_c": analysis["logistic_c"], "n_classes": len(class_names)}
    group_settings = {"n_draws": n_draws, "prevalence": group["prevalence"], "fwe_method": group.get("fwe_method", "standardised"),
                      "family": group.get("family", "per_direction"),
                      "n_analyses": int(params.get("n_analyses", 1)) if group.get("family") == "all_analyses" else 1}
    total = {}
    start = time.process_time()
    for study in range(n_studies):
        def rng_of(kind, subject_index, study=study):
            identity = (name, study) if kind == "group" else (name, study, subjects[subject_index])
            return np.random.default_rng(seed_from(seed, f"calibrate_{kind}", *identity))

        counts = calibration.noise_study(designs, rois, analysis["voxel_counts"], options, int(analysis["n_permutations"]),
                                         set_names, 1.0 / len(class_names), ALPHAS, group_settings, rng_of)
        calibration.merge_counts(total, counts)
    cpu_s = time.process_time() - start
    table = pd.DataFrame(calibration.study_calibration_rows(name, total))[list(calibration.CALIBRATION_COLUMNS)]
    write_tsv(outputs["table"], table)
    _figure(table, outputs["figure"], name)
    outside = table[~table["within_bounds"].astype(bool)]
    lines = [f"Design self-check of analysis {name!r}: {n_studies} noise studies of {len(subjects)} subjects x {len(rois)} ROIs, "
             f"each subject's own design (runs, trials, classes, folds, voxel counts {', '.join(map(str, analysis['voxel_counts']))}), "
             f"classifier {classifier}, selection {analysis['selection']}, {analysis['n_permutations']} permutations, "
             f"{n_draws} group draws per study; cost {cpu_s:.1f} s of CPU ({cpu_s / max(1, n_studies):.2f} s per noise study).",
             "Each row: how often a test rejected on pure noise, against the rate a calibrated test has (alpha; for the "
             "subject-level p the attainable level of its discrete null) and the binomial 99% bounds around that rate.",
             ("Every test is at or below its upper bound." if outside.empty else
              f"{len(outside)} row(s) above their upper bound: " + "; ".join(
                  f"{row.test} | {row.direction} at alpha {row.alpha:g}: {row.rate:.3f} > {row.bound_high:.3f}"
                  for row in outside.itertuples())),
             "For research use only; not for clinical or diagnostic decisions."]
    if classifier != analysis["classifier"]:
        lines.insert(1, f"Note: the study decodes with {analysis['classifier']}; this check used {classifier} (calibrate.classifier).")
    for line in lines[2:3]:
        (log.warning if not outside.empty else log.info)(line)
    write_text_atomic(outputs["summary"], "\n".join(lines) + "\n")
