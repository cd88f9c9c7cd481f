"""Job: fold-aware decoding of every ROI of one subject x analysis, with the permutation nulls.

Reads the subject's per-run pattern images and tables once (over the union
of the analysis's ROI masks), keeps the analysis's conditions, and writes
for each ROI the per-fold scores, the permutation null, the training-fold
voxel rankings and the confusion counts (columns of the data contract,
foldwise.contract). Each ROI is a part of the job's memo: when one ROI
changes, the others are restored, not recomputed.

Randomness: the permutations come from
``default_rng(seed_from(seed, "permutation", subject, analysis))`` -- without
the ROI, so permutation k relabels the patterns identically in every ROI of a
subject (the group stage's maximum statistic across ROIs needs that joint
null); the random voxel orders of selection ``none`` come from
``default_rng(seed_from(seed, "voxel_order", subject, analysis, roi))``.
"""

from dataclasses import dataclass

import numpy as np
import pandas as pd

from foldwise.contract import (CONFUSION_COLUMNS, GRID_TOLERANCE_MM, NULL_COLUMNS, PATTERN_TABLE_COLUMNS, RANKING_COLUMNS, SCORE_COLUMNS,
                               count_label, read_roi_mask)
from foldwise.decoding.curves import decode_cross, decode_curve, resolve_counts
from foldwise.decoding.permutations import count_as_float, subject_p
from foldwise.errors import InputError
from foldwise.data.fileio import write_tsv
from foldwise.data.patterns import analysis_task_rows, files_label, read_pattern_set
from foldwise.decoding.folds import check_training_classes, make_folds, pair_runs_across_tasks
from foldwise.masks.build import same_grid
from foldwise.provenance.hashing import seed_from
from foldwise.provenance.memo import job_parts

__all__ = [
    "TABLE_COLUMNS",
    "SCORE_COLUMNS",
    "NULL_COLUMNS",
    "RANKING_COLUMNS",
    "CONFUSION_COLUMNS",
    "permutation_rng",
    "analysis_labels",
    "OUTPUT_NAMES",
    "SubjectPatterns",
    "read_subject_patterns",
    "decode_roi",
    "run",
]

TABLE_COLUMNS = PATTERN_TABLE_COLUMNS  # the columns of every table: defined once, in the data contract
_RUN_SEPARATOR = "+"  # joins the held-out runs of a fold in test_runs


def permutation_rng(seed, subject, analysis_name):
    """The permutation generator of a subject x analysis: the same for every ROI (no ROI in its identity)."""
    return np.random.default_rng(seed_from(seed, "permutation", subject, analysis_name))


def _check_params(params):
    for key in ("analysis", "subject", "rois", "seed"):
        if key not in params:
            raise InputError(None, f"params.{key}", "missing from the job's params", "pass analysis, subject, rois and seed")
    analysis = params["analysis"]
    required = ("name", "kind", "selection", "voxel_counts", "classifier", "svm_c", "logistic_c", "demean_patterns", "folds", "n_permutations")
    missing = [key for key in required if key not in analysis]
    if missing:
        raise InputError(None, "analysis", f"the analysis entry lacks {', '.join(missing)}", "validate the config so defaults are filled in")
    if analysis["kind"] not in ("within", "cross"):
        raise InputError(None, f"analyses[{analysis['name']}].kind", f"unknown kind {analysis['kind']!r}", "use within or cross")
    rois = [str(roi) for roi in params["rois"]]
    if not rois or len(set(rois)) != len(rois):
        raise InputError(None, "params.rois", f"expected one or more distinct ROI names, got {rois}", "pass the analysis's ROIs, each once")
    return analysis, str(params["subject"]), rois, int(params["seed"])


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


OUTPUT_NAMES = ("scores", "null", "rankings", "confusion")  # one file of each per ROI, lists in the order of params["rois"]


@dataclass(frozen=True)
class SubjectPatterns:
    """One subject's patterns of one analysis, read once for every ROI of the job.

    Everything here is the same for every ROI (rows, labels, runs, folds):
    computed once, it is reused exactly. Only the columns differ per ROI.

    Attributes
    ----------
    patterns : ndarray, shape (n_patterns, n_union_voxels)
        The analysis's patterns over the union of the job's ROI masks
        (voxels in C order of the union).
    union : ndarray of bool, shape (I, J, K)
    labels, set_index, runs, folds, class_names, set_names
        As :func:`analysis_labels` and :func:`foldwise.decoding.folds.make_folds` give them.
    """

    patterns: np.ndarray
    union: np.ndarray
    labels: np.ndarray
    set_index: object
    runs: np.ndarray
    folds: list
    class_names: list
    set_names: object

    def columns(self, inside):
        """The ROI's patterns: the union's columns inside ``inside``, in C order (the order of reading ``inside`` alone)."""
        return self.patterns[:, inside[self.union]]


def _check_roi_files(inputs, outputs, rois):
    mask_paths = [inputs["masks"]] if isinstance(inputs["masks"], str) else list(inputs["masks"])
    if len(mask_paths) != len(rois):
        raise InputError(None, "inputs.masks", f"{len(mask_paths)} ROI masks for {len(rois)} ROIs {rois}", "pass one mask per ROI, in the order of params.rois")
    named = {}
    for name in OUTPUT_NAMES:
        paths = [outputs[name]] if isinstance(outputs[name], str) else list(outputs[name])
        if len(paths) != len(rois):
            raise InputError(None, f"outputs.{name}", f"{len(paths)} files for {len(rois)} ROIs", "declare one file per ROI, in the order of params.rois")
        named[name] = paths
    return mask_paths, [{name: named[name][index] for name in OUTPUT_NAMES} for index in range(len(rois))]


def _masks_label(mask_paths):
    return mask_paths[0] if len(mask_paths) == 1 else f"{mask_paths[0]} (and {len(mask_paths) - 1} more ROI masks)"


def read_subject_patterns(inputs, analysis, subject, mask_paths, pattern_tasks=None):
    """Read a subject's patterns once over the union of the ROI masks; pick the analysis's rows, labels and folds.

    Parameters
    ----------
    inputs : dict
        ``patterns`` and ``tables`` (per-run files, same order).
    analysis : dict
        The analysis entry (defaults filled).
    subject : str
    mask_paths : list of str
        The ROI masks (one grid).
    pattern_tasks : dict or None
        The task of each part of the analysis when not the main task.

    Returns
    -------
    masks : list of ndarray of bool
        Each ROI's mask, in the order of ``mask_paths``.
    subject_patterns : SubjectPatterns

    Raises
    ------
    InputError
        Masks on different grids, and every check of :func:`run`.
    """
    table_paths = [inputs["tables"]] if isinstance(inputs["tables"], str) else list(inputs["tables"])
    tables_label = files_label(table_paths)
    masks, affine = [], None
    for path in mask_paths:
        inside, mask_affine = read_roi_mask(path)
        if masks and not same_grid(inside.shape, mask_affine, masks[0].shape, affine, GRID_TOLERANCE_MM):
            raise InputError(path, "affine", f"the ROI mask is not on the grid of {mask_paths[0]}", "build every ROI mask of the subject on its one grid")
        if not masks:
            affine = mask_affine
        masks.append(inside)
    union = np.logical_or.reduce(masks)
    pattern_set = read_pattern_set(inputs["patterns"], table_paths, subject, union, affine, _masks_label(mask_paths))
    # another task's runs may reuse a condition name: keep the analysis's task(s) before picking by condition
    of_task = analysis_task_rows(pattern_set.table, analysis, pattern_tasks)
    patterns, table = pattern_set.patterns[of_task], pattern_set.table[of_task].reset_index(drop=True)
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
    return masks, SubjectPatterns(patterns=patterns, union=union, labels=labels, set_index=set_index, runs=runs, folds=folds,
                                  class_names=class_names, set_names=set_names)


def decode_roi(subject_patterns, inside, analysis, subject, roi, seed, outputs, log):
    """Decode one ROI of a subject's patterns and write its scores, null, rankings and confusion.

    The same computation, seeds and files as a job of this ROI alone: the
    permutation generator has no ROI in its identity, the random voxel
    orders of selection ``none`` do.
    """
    name = analysis["name"]
    patterns, coordinates = subject_patterns.columns(inside), np.argwhere(inside)
    voxel_counts = list(analysis["voxel_counts"])
    n_voxels = patterns.shape[1]
    _, too_large = resolve_counts(voxel_counts, n_voxels)
    if too_large:  # said once per ROI by the group stage, which also reports such counts once (as all)
        log.info("subject %s, ROI %s has %d voxels: voxel count(s) %s exceed it and use all %d (see n_used)",
                 subject, roi, n_voxels, ", ".join(map(str, too_large)), n_voxels)
    labels, set_index, runs = subject_patterns.labels, subject_patterns.set_index, subject_patterns.runs
    options = {"folds": subject_patterns.folds, "n_classes": len(subject_patterns.class_names), "classifier": analysis["classifier"],
               "selection": analysis["selection"], "demean_patterns": analysis["demean_patterns"], "svm_c": analysis["svm_c"],
               "logistic_c": analysis["logistic_c"], "n_permutations": int(analysis["n_permutations"]),
               "rng": permutation_rng(seed, subject, name),
               "selection_rng": np.random.default_rng(seed_from(seed, "voxel_order", subject, name, roi))}
    if set_index is None:
        result = decode_curve(patterns, labels, runs, voxel_counts, **options)
    else:
        result = decode_cross(patterns, labels, set_index, runs, voxel_counts, set_names=tuple(subject_patterns.set_names), **options)
    if result.n_not_converged:
        log.warning("subject %s, ROI %s: %d logistic-regression fit(s) stopped before converging (scikit-learn's default max_iter)",
                    subject, roi, result.n_not_converged)
    write_tsv(outputs["scores"], _score_rows(result, subject, name, roi, voxel_counts))
    write_tsv(outputs["null"], _null_rows(result, subject, name, roi, voxel_counts))
    write_tsv(outputs["rankings"], _ranking_rows(result, coordinates, set_index is not None))
    write_tsv(outputs["confusion"], _confusion_rows(result, subject_patterns.class_names, voxel_counts))


def run(inputs, outputs, params, log):
    """Decode every ROI of one subject x analysis: the subject's patterns read once, each ROI a part of the job.

    Each ROI is a part of the job's memo (:func:`foldwise.provenance.memo.part_memo`)
    keyed on that ROI's own identity: its name, the analysis settings it
    reads, its mask's content and the subject's pattern files. When
    Snakemake reruns the job because one ROI changed, the other ROIs'
    files are restored, and the patterns are read only if some ROI must
    be computed.

    Parameters
    ----------
    inputs : dict
        ``patterns`` (list of per-run 4D NIfTI), ``tables`` (their TSVs, same
        order), ``masks`` (one ROI mask per ROI, in the order of ``params["rois"]``).
    outputs : dict
        ``scores`` (TSV), ``null`` (TSV.gz), ``rankings`` (TSV.gz), ``confusion`` (TSV):
        each a list with one file per ROI, in the order of ``params["rois"]``.
    params : dict
        ``analysis`` (the config entry, defaults filled), ``subject``, ``rois``,
        ``seed``; ``pattern_tasks`` when the analysis reads another task.
    log : logging.Logger
        Receives warnings (unconverged fits) and notes (counts beyond the ROI size).

    Raises
    ------
    InputError
        Bad files, conditions absent from every table, fewer than two
        classes, a class absent from a training fold, a set missing from a run.
    """
    analysis, subject, rois, seed = _check_params(params)
    mask_paths, roi_outputs = _check_roi_files(inputs, outputs, rois)
    pattern_tasks = params.get("pattern_tasks")  # an analysis of another task, or sets from two tasks (absent: the main task)
    parts = job_parts()
    # What every ROI's part reads besides its own mask: the job's settings without the ROI list, the subject's pattern files.
    shared = {key: value for key, value in params.items() if key != "rois"}
    pattern_files = {name: [parts.file_hash(path) for path in ([inputs[name]] if isinstance(inputs[name], str) else inputs[name])]
                     for name in ("patterns", "tables")}
    masks, subject_patterns = None, None
    for index, roi in enumerate(rois):
        identity = {"roi": roi, "settings": shared, "mask": parts.file_hash(mask_paths[index]), **pattern_files}
        if parts.restore(f"roi-{roi}", identity, roi_outputs[index]):
            continue
        if subject_patterns is None:  # read once, at the first ROI to compute (all ROIs' voxels: the read costs the same)
            masks, subject_patterns = read_subject_patterns(inputs, analysis, subject, mask_paths, pattern_tasks)
        decode_roi(subject_patterns, masks[index], analysis, subject, roi, seed, roi_outputs[index], log)
        parts.store(f"roi-{roi}", identity, roi_outputs[index])
