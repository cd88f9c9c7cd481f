"""Job: fold-aware decoding of one subject x analysis x ROI, with its permutation null.

Reads the subject's per-run pattern images and tables and the ROI mask,
keeps the analysis's conditions, and writes the per-fold scores, the
permutation null, the training-fold voxel rankings and the confusion counts
(columns of the data contract, foldwise.contract).

Randomness: the permutations come from
``default_rng(seed_from(seed, "permutation", subject, analysis))`` -- without
the ROI, so permutation k relabels the patterns identically in every ROI of a
subject (the group stage's maximum statistic across ROIs needs that joint
null); the random voxel orders of selection ``none`` come from
``default_rng(seed_from(seed, "voxel_order", subject, analysis, roi))``.
"""

import numpy as np
import pandas as pd

from foldwise.contract import CONFUSION_COLUMNS, NULL_COLUMNS, PATTERN_TABLE_COLUMNS, RANKING_COLUMNS, SCORE_COLUMNS, count_label, read_roi_mask
from foldwise.decoding.curves import decode_cross, decode_curve, resolve_counts
from foldwise.decoding.permutations import count_as_float, subject_p
from foldwise.errors import InputError
from foldwise.data.fileio import write_tsv
from foldwise.data.patterns import analysis_task_rows, files_label, read_pattern_set
from foldwise.decoding.folds import check_training_classes, make_folds, pair_runs_across_tasks
from foldwise.provenance.hashing import seed_from

__all__ = [
    "TABLE_COLUMNS",
    "SCORE_COLUMNS",
    "NULL_COLUMNS",
    "RANKING_COLUMNS",
    "CONFUSION_COLUMNS",
    "permutation_rng",
    "analysis_labels",
    "run",
]

TABLE_COLUMNS = PATTERN_TABLE_COLUMNS  # the columns of every table: defined once, in the data contract
_RUN_SEPARATOR = "+"  # joins the held-out runs of a fold in test_runs


def permutation_rng(seed, subject, analysis_name):
    """The permutation generator of a subject x analysis: the same for every ROI (no ROI in its identity)."""
    return np.random.default_rng(seed_from(seed, "permutation", subject, analysis_name))


def _check_params(params):
    for key in ("analysis", "subject", "roi", "seed"):
        if key not in params:
            raise InputError(None, f"params.{key}", "missing from the job's params", "pass analysis, subject, roi and seed")
    analysis = params["analysis"]
    required = ("name", "kind", "selection", "voxel_counts", "classifier", "svm_c", "logistic_c", "demean_patterns", "folds", "n_permutations")
    missing = [key for key in required if key not in analysis]
    if missing:
        raise InputError(None, "analysis", f"the analysis entry lacks {', '.join(missing)}", "validate the config so defaults are filled in")
    if analysis["kind"] not in ("within", "cross"):
        raise InputError(None, f"analyses[{analysis['name']}].kind", f"unknown kind {analysis['kind']!r}", "use within or cross")
    return analysis, str(params["subject"]), str(params["roi"]), int(params["seed"])


def analysis_labels(analysis, table, subject, tables_label):
    """Class (and set) of every pattern of the analysis; the other patterns are dropped.

    Parameters
    ----------
    analysis : dict
        The analysis config entry (``classes`` for ``within``, ``sets`` for ``cross``).
    table : pandas.DataFrame
        The pattern set's table (:func:`foldwise.data.patterns.read_pattern_set`).
    subject : str
    tables_label : str
        Names the pattern tables in errors.

    Returns
    -------
    keep : ndarray of bool, shape (n_rows,)
    labels : ndarray of int
        Class index of each kept pattern.
    set_index : ndarray of int or None
        0/1 for the two sets of a cross analysis (None for ``within``).
    class_names : list of str
    set_names : list of str or None
    """
    name = analysis["name"]
    conditions = table["condition"].to_numpy()
    present = set(conditions.tolist())
    if analysis["kind"] == "within":
        classes = analysis.get("classes") or {}
        if len(classes) < 2:
            raise InputError(None, f"analyses[{name}].classes", f"decoding needs at least two classes, got {list(classes)}", "define two or more classes")
        class_of, set_of = {}, None
        for index, (klass, members) in enumerate(classes.items()):
            for condition in members:
                if condition in class_of:
                    raise InputError(None, f"analyses[{name}].classes", f"condition {condition!r} belongs to two classes",
                                     "put each condition in one class")
                class_of[condition] = index
        class_names, set_names = list(classes), None
    else:
        sets = analysis.get("sets") or {}
        if len(sets) != 2:
            raise InputError(None, f"analyses[{name}].sets", f"cross-decoding needs exactly two sets, got {list(sets)}", "define two sets")
        set_names = list(sets)
        class_names = list(sets[set_names[0]])
        if sorted(sets[set_names[1]]) != sorted(class_names) or len(class_names) < 2:
            raise InputError(None, f"analyses[{name}].sets", f"the sets must map the same two or more classes, got {list(sets[set_names[0]])} "
                             f"and {list(sets[set_names[1]])}", "give both sets the same class labels")
        class_of, set_of = {}, {}
        for set_number, set_name in enumerate(set_names):
            for klass, condition in sets[set_name].items():
                if condition in class_of:
                    raise InputError(None, f"analyses[{name}].sets", f"condition {condition!r} appears twice", "use each condition once")
                class_of[condition] = class_names.index(klass)
                set_of[condition] = set_number
    absent = [condition for condition in class_of if condition not in present]
    if absent:
        raise InputError(tables_label, "condition", f"subject {subject}: analysis {name!r} names condition(s) {absent} found in none of the "
                         f"subject's pattern tables (found: {sorted(present)[:12]})", "fix the condition names in the analysis or model them in the GLM")
    keep = np.array([condition in class_of for condition in conditions], dtype=bool)
    labels = np.array([class_of[condition] for condition in conditions[keep]], dtype=np.int64)
    set_index = None if set_of is None else np.array([set_of[condition] for condition in conditions[keep]], dtype=np.int64)
    return keep, labels, set_index, class_names, set_names


def _check_sets_in_runs(set_index, runs, set_names, subject, tables_label):
    for set_number, set_name in enumerate(set_names):
        missing = sorted(set(runs.tolist()) - set(runs[set_index == set_number].tolist()))
        if missing:
            raise InputError(tables_label, "condition", f"subject {subject}: set {set_name!r} has no pattern in run {missing[0]}",
                             "model both sets' conditions in every run, or leave that run out of the dataset")


def _count_labels(voxel_counts):
    return [count_label(count) for count in voxel_counts]


def _score_rows(result, subject, name, roi, voxel_counts):
    counts = _count_labels(voxel_counts)
    test_runs = [_RUN_SEPARATOR.join(map(str, runs)) for runs in result.test_runs]
    n_folds = len(test_runs)
    frames = []
    for direction, scores in result.directions.items():
        # rows: count-major, fold-minor (the contract's order within a direction)
        frames.append(pd.DataFrame({
            "subject": subject, "analysis": name, "roi": roi, "direction": direction,
            "n_voxels": np.repeat(counts, n_folds), "n_used": np.repeat(result.n_used, n_folds),
            "fold": np.tile(np.arange(1, n_folds + 1), len(counts)), "test_runs": np.tile(test_runs, len(counts)),
            "n_train": np.tile(scores.n_train, len(counts)), "n_test": np.tile(scores.n_test, len(counts)),
            "accuracy": scores.accuracy.T.ravel(), "balanced_accuracy": scores.balanced_accuracy.T.ravel(),
            # the subject's permutation p of the fold-mean balanced accuracy (one value per count, repeated per fold)
            "p_perm": np.repeat(subject_p(scores.balanced_accuracy.mean(axis=0), scores.null_balanced_accuracy, result.null_exact), n_folds),
            "p_min": result.p_min, "n_relabelings": count_as_float(result.n_relabelings), "null_exact": result.null_exact}))
    return pd.concat(frames, ignore_index=True)[list(SCORE_COLUMNS)]


def _null_rows(result, subject, name, roi, voxel_counts):
    counts = _count_labels(voxel_counts)
    n_permutations = result.permuted_labels.shape[0]
    frames = []
    for direction, scores in result.directions.items():
        frames.append(pd.DataFrame({
            "subject": subject, "analysis": name, "roi": roi, "direction": direction,
            "n_voxels": np.repeat(counts, n_permutations), "permutation": np.tile(np.arange(1, n_permutations + 1), len(counts)),
            "balanced_accuracy": scores.null_balanced_accuracy.T.ravel(), "accuracy": scores.null_accuracy.T.ravel()}))
    return pd.concat(frames, ignore_index=True)[list(NULL_COLUMNS)]


def _ranking_rows(result, coordinates, cross):
    frames = []
    for train_set, rankings in result.rankings.items():
        scores = result.voxel_scores[train_set]
        n_folds, n_voxels = rankings.shape
        voxels = rankings.ravel()
        frame = pd.DataFrame({
            "fold": np.repeat(np.arange(1, n_folds + 1), n_voxels), "rank": np.tile(np.arange(1, n_voxels + 1), n_folds),
            "voxel_index": voxels, "i": coordinates[voxels, 0], "j": coordinates[voxels, 1], "k": coordinates[voxels, 2],
            "score": np.full(voxels.size, np.nan) if scores is None else np.take_along_axis(scores, rankings, axis=1).ravel()})
        if cross:
            frame.insert(0, "train_set", train_set)
        frames.append(frame)
    return pd.concat(frames, ignore_index=True)


def _confusion_rows(result, class_names, voxel_counts):
    counts = _count_labels(voxel_counts)
    n_classes = len(class_names)
    frames = []
    for direction, scores in result.directions.items():
        frames.append(pd.DataFrame({
            "direction": direction, "n_voxels": np.repeat(counts, n_classes * n_classes),
            "true_class": np.tile(np.repeat(class_names, n_classes), len(counts)),
            "predicted_class": np.tile(class_names, n_classes * len(counts)), "count": scores.confusion.ravel()}))
    return pd.concat(frames, ignore_index=True)[list(CONFUSION_COLUMNS)]


def run(inputs, outputs, params, log):
    """Decode one subject x analysis x ROI and write scores, null, rankings and confusion.

    Parameters
    ----------
    inputs : dict
        ``patterns`` (list of per-run 4D NIfTI), ``tables`` (their TSVs, same
        order), ``mask`` (the ROI mask).
    outputs : dict
        ``scores`` (TSV), ``null`` (TSV.gz), ``rankings`` (TSV.gz), ``confusion`` (TSV).
    params : dict
        ``analysis`` (the config entry, defaults filled), ``subject``, ``roi``, ``seed``.
    log : logging.Logger
        Receives warnings (counts beyond the ROI size, unconverged fits).

    Raises
    ------
    InputError
        Bad files, conditions absent from every table, fewer than two
        classes, a class absent from a training fold, a set missing from a run.
    """
    analysis, subject, roi, seed = _check_params(params)
    name = analysis["name"]
    table_paths = [inputs["tables"]] if isinstance(inputs["tables"], str) else list(inputs["tables"])
    tables_label = files_label(table_paths)
    inside, mask_affine = read_roi_mask(inputs["mask"])
    pattern_set = read_pattern_set(inputs["patterns"], table_paths, subject, inside, mask_affine, inputs["mask"])
    pattern_tasks = params.get("pattern_tasks")  # an analysis of another task, or sets from two tasks (absent: the main task)
    # another task's runs may reuse a condition name: keep the analysis's task(s) before picking by condition
    of_task = analysis_task_rows(pattern_set.table, analysis, pattern_tasks)
    patterns, table, coordinates = pattern_set.patterns[of_task], pattern_set.table[of_task].reset_index(drop=True), pattern_set.coordinates
    keep, labels, set_index, class_names, set_names = analysis_labels(analysis, table, subject, tables_label)
    patterns, runs = patterns[keep], table["run"].to_numpy()[keep]
    scheme, n_groups = analysis["folds"].get("scheme", "leave_one_run_out"), analysis["folds"].get("n_groups", 2)
    if pattern_tasks and set_index is not None and len(set(pattern_tasks.values())) == 2:
        # Sets from two tasks: run k of each task (or each session) is one fold unit, held out together.
        try:
            runs = pair_runs_across_tasks(runs, set_index, set_names, scheme)
        except InputError as error:
            raise InputError(tables_label, error.field, f"subject {subject}: {error.problem}", error.fix) from None
    try:
        folds = make_folds(runs, scheme, n_groups)
    except InputError as error:  # name the subject's tables, where the runs come from
        raise InputError(tables_label, error.field, f"subject {subject}: {error.problem}", error.fix) from None
    if set_index is None:
        check_training_classes(labels, runs, folds, class_names, subject, file=tables_label)
    else:
        _check_sets_in_runs(set_index, runs, set_names, subject, tables_label)
        for set_number in (0, 1):
            members = set_index == set_number
            check_training_classes(labels[members], runs[members], make_folds(runs[members], scheme, n_groups), class_names, subject,
                                   file=tables_label)
    voxel_counts = list(analysis["voxel_counts"])
    n_voxels = patterns.shape[1]
    _, too_large = resolve_counts(voxel_counts, n_voxels)
    if too_large:  # said once per ROI by the group stage, which also reports such counts once (as all)
        log.info("subject %s, ROI %s has %d voxels: voxel count(s) %s exceed it and use all %d (see n_used)",
                 subject, roi, n_voxels, ", ".join(map(str, too_large)), n_voxels)
    options = {"folds": folds, "n_classes": len(class_names), "classifier": analysis["classifier"], "selection": analysis["selection"],
               "demean_patterns": analysis["demean_patterns"], "svm_c": analysis["svm_c"], "logistic_c": analysis["logistic_c"],
               "n_permutations": int(analysis["n_permutations"]), "rng": permutation_rng(seed, subject, name),
               "selection_rng": np.random.default_rng(seed_from(seed, "voxel_order", subject, name, roi))}
    if set_index is None:
        result = decode_curve(patterns, labels, runs, voxel_counts, **options)
    else:
        result = decode_cross(patterns, labels, set_index, runs, voxel_counts, set_names=tuple(set_names), **options)
    if result.n_not_converged:
        log.warning("subject %s, ROI %s: %d logistic-regression fit(s) stopped before converging (scikit-learn's default max_iter)",
                    subject, roi, result.n_not_converged)
    write_tsv(outputs["scores"], _score_rows(result, subject, name, roi, voxel_counts))
    write_tsv(outputs["null"], _null_rows(result, subject, name, roi, voxel_counts))
    write_tsv(outputs["rankings"], _ranking_rows(result, coordinates, set_index is not None))
    write_tsv(outputs["confusion"], _confusion_rows(result, class_names, voxel_counts))
