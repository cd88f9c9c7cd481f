"""Cross-validation folds that keep runs independent.

Patterns from one fMRI run share that run's noise and drift, so a fold never
splits a run: every run is held out whole. Folds are returned as pairs of
integer index arrays into the patterns, in the order of the sorted unique run
labels, so the same runs always give the same folds.
"""

import re

import numpy as np

from foldwise.errors import InputError

__all__ = ["FOLD_SCHEMES", "make_folds", "held_out_runs", "check_training_classes", "session_of_run", "fold_table", "task_of_run",
           "pair_runs_across_tasks"]

FOLD_SCHEMES = ("leave_one_run_out", "run_groups", "leave_one_session_out")
_SESSION_RE = re.compile(r"(?:^|_)ses-([A-Za-z0-9]+)_")
_TASK_RE = re.compile(r"(?:^|_)task-([A-Za-z0-9]+)_")


def session_of_run(run_label):
    """The session label inside a run label (``"ses-2_run-01"`` -> ``"2"``), or None without one.

    Examples
    --------
    >>> session_of_run("ses-2_run-01"), session_of_run("run-01")
    ('2', None)
    """
    found = _SESSION_RE.search(str(run_label))
    return found.group(1) if found else None


def _natural(label):
    return (0, int(label), label) if label.isdigit() else (1, 0, label)


def make_folds(run_labels, scheme="leave_one_run_out", n_groups=2):
    """Split patterns into folds that hold out whole runs.

    Parameters
    ----------
    run_labels : array_like, shape (n_patterns,)
        The run of each pattern (strings or integers; sorted with ``np.unique``).
    scheme : {"leave_one_run_out", "run_groups", "leave_one_session_out"}
        ``leave_one_run_out``: one fold per run, that run held out.
        ``run_groups``: the sorted unique runs are cut into ``n_groups``
        contiguous groups (``np.array_split``: sizes differ by at most one,
        the larger groups first) and each group is held out once.
        ``leave_one_session_out``: one fold per session (read from the
        ``ses-<label>_`` part of each run label), all its runs held out.
    n_groups : int
        Number of groups for ``run_groups`` (ignored otherwise); at least 2
        and at most the number of runs.

    Returns
    -------
    list of tuple of ndarray
        One ``(train_idx, test_idx)`` pair per fold, int64 index arrays in
        increasing order; the test sets partition the patterns.

    Notes
    -----
    Holding out whole runs is leave-one-group-out cross-validation with runs
    as groups; it keeps the temporal dependence inside a run out of the
    train/test split (Pereira, Mitchell & Botvinick 2009, NeuroImage
    45:S199-S209).

    Examples
    --------
    >>> folds = make_folds(["run-01", "run-01", "run-02", "run-02"])
    >>> [(train.tolist(), test.tolist()) for train, test in folds]
    [([2, 3], [0, 1]), ([0, 1], [2, 3])]
    """
    if scheme not in FOLD_SCHEMES:
        raise InputError(None, "folds.scheme", f"unknown fold scheme {scheme!r}", f"use one of {', '.join(FOLD_SCHEMES)}")
    runs = np.asarray(run_labels)
    if runs.ndim != 1 or runs.size == 0:
        raise InputError(None, "run_id", f"run labels must be a non-empty 1-D array, got shape {runs.shape}",
                         "pass one run label per pattern")
    unique_runs, run_index = np.unique(runs, return_inverse=True)
    n_runs = unique_runs.size
    if n_runs < 2:
        raise InputError(None, "run_id", f"cross-validation needs at least two runs, found {n_runs} ({unique_runs.tolist()})",
                         "provide patterns from two or more runs")
    if scheme == "leave_one_run_out":
        groups = [np.array([run]) for run in range(n_runs)]
    elif scheme == "leave_one_session_out":
        sessions = [session_of_run(run) for run in unique_runs.tolist()]
        if None in sessions:
            raise InputError(None, "folds.scheme", f"leave_one_session_out needs runs in sessions, but run {unique_runs[sessions.index(None)]} "
                                                   "has no session", "use leave_one_run_out, or a dataset with ses-<label> sessions")
        labels = sorted(set(sessions), key=_natural)
        if len(labels) < 2:
            raise InputError(None, "folds.scheme", f"leave_one_session_out needs two or more sessions, found {labels}",
                             "use leave_one_run_out or run_groups")
        session_array = np.asarray(sessions, dtype=object)
        groups = [np.flatnonzero(session_array == label) for label in labels]
    else:
        if isinstance(n_groups, bool) or not isinstance(n_groups, (int, np.integer)) or not 2 <= n_groups <= n_runs:
            raise InputError(None, "folds.n_groups", f"n_groups must be an integer from 2 to the number of runs ({n_runs}), got {n_groups!r}",
                             f"set folds.n_groups between 2 and {n_runs}")
        groups = np.array_split(np.arange(n_runs), int(n_groups))
    folds = []
    for group in groups:
        held_out = np.isin(run_index, group)
        folds.append((np.flatnonzero(~held_out).astype(np.int64), np.flatnonzero(held_out).astype(np.int64)))
    return folds


def held_out_runs(run_labels, folds):
    """The sorted run labels held out in each fold.

    Parameters
    ----------
    run_labels : array_like, shape (n_patterns,)
        The run of each pattern.
    folds : list of tuple of ndarray
        Output of :func:`make_folds`.

    Returns
    -------
    list of list
        For each fold, the sorted unique runs of its test patterns.
    """
    runs = np.asarray(run_labels)
    return [np.unique(runs[test]).tolist() for _, test in folds]


def check_training_classes(labels, run_labels, folds, class_names, subject, file=None):
    """Raise if a fold's training patterns lack one of the classes.

    Parameters
    ----------
    labels : array_like of int, shape (n_patterns,)
        Class index of each pattern, in ``range(len(class_names))``.
    run_labels : array_like, shape (n_patterns,)
        The run of each pattern.
    folds : list of tuple of ndarray
        Output of :func:`make_folds`.
    class_names : sequence of str
        Name of each class index.
    subject : str
        The subject, named in the message.
    file : str or None
        The file to name in the error (e.g. the pattern tables).

    Raises
    ------
    InputError
        Naming the subject, the held-out run(s) and the missing class.

    Notes
    -----
    A classifier never trained on a class can never predict it; rather than
    silently scoring such a fold, the analysis stops (common practice, no source).
    """
    labels = np.asarray(labels)
    class_names = list(class_names)
    if labels.ndim != 1 or labels.shape != np.shape(run_labels):
        raise InputError(file, "condition", f"labels of shape {labels.shape} do not match run labels of shape {np.shape(run_labels)}",
                         "pass one label and one run per pattern")
    for (train, _), runs in zip(folds, held_out_runs(run_labels, folds)):
        present = np.zeros(len(class_names), dtype=bool)
        present[np.unique(labels[train])] = True
        if not present.all():
            missing = class_names[int(np.flatnonzero(~present)[0])]
            raise InputError(
                file, "condition",
                f"subject {subject}: with run {'+'.join(map(str, runs))} held out, the training runs hold no pattern of class {missing!r}",
                "model that class's conditions in more runs, drop the class from the analysis, or use folds.scheme run_groups")


def fold_table(run_labels, folds):
    """One row per fold and run: whether the run trains or tests, with its session.

    Parameters
    ----------
    run_labels : array_like, shape (n_patterns,)
    folds : list of tuple of ndarray
        Output of :func:`make_folds`.

    Returns
    -------
    list of dict
        ``fold``, ``run``, ``session`` (None without sessions), ``role``
        (``train`` or ``test``), ``n_patterns``; the table the session
        tests check (no training run shares a session with a test run).
    """
    runs = np.asarray(run_labels)
    rows = []
    for index, (train, test) in enumerate(folds):
        for role, members in (("train", train), ("test", test)):
            labels, counts = np.unique(runs[members], return_counts=True)
            rows += [{"fold": index, "run": str(label), "session": session_of_run(label), "role": role, "n_patterns": int(count)}
                     for label, count in zip(labels.tolist(), counts.tolist())]
    return rows


def task_of_run(run_label, default=None):
    """The task label inside a run label (``"ses-1_task-beacon_run-2"`` -> ``"beacon"``), or ``default`` without one.

    Runs of the study's main task carry no ``task-`` part; runs of its other
    tasks do.
    """
    found = _TASK_RE.search(str(run_label))
    return found.group(1) if found else default


def pair_runs_across_tasks(run_labels, set_index, set_names=("A", "B"), scheme="leave_one_run_out"):
    """Fold units for a cross analysis whose two sets come from different tasks' runs.

    Parameters
    ----------
    run_labels : array_like of str, shape (n_patterns,)
        The run of each pattern (``task-<label>_`` inside for runs of a task
        other than the main one).
    set_index : array_like of int, shape (n_patterns,)
        0 or 1: the set (and so the task) of each pattern.
    set_names : (str, str)
        Named in messages.
    scheme : str
        The fold scheme; ``leave_one_session_out`` pairs by session instead
        of by run index.

    Returns
    -------
    ndarray of str, shape (n_patterns,)
        Each pattern's unit: its run label without the task part, so run
        ``k`` of one task and run ``k`` of the other (same session) form one
        unit, held out together by :func:`make_folds`; with
        ``leave_one_session_out``, ``ses-<label>_runs`` (the session).

    Raises
    ------
    InputError
        If some unit holds runs of one task only: that run would be held out
        with nothing of the other set to test or train against.

    Notes
    -----
    Runs of different tasks are different scans, so any fold that holds out
    whole runs keeps training and test data independent. Pairing by run
    index makes every fold hold out one run of each task, so each direction
    (A->B, B->A, A->A, B->B) is tested in every fold; with
    ``leave_one_session_out`` the units are then grouped by session.
    """
    runs = np.asarray(run_labels).astype(str)
    sets = np.asarray(set_index)
    if scheme == "leave_one_session_out":
        sessions = [session_of_run(label) for label in runs.tolist()]
        if None in sessions:
            raise InputError(None, "folds.scheme", f"leave_one_session_out needs runs in sessions, but run {runs[sessions.index(None)]} "
                                                   "has no session", "use leave_one_run_out, or a dataset with ses-<label> sessions")
        units = np.array([f"ses-{session}_runs" for session in sessions], dtype=object)
    else:
        units = np.array([re.sub(r"(?<![A-Za-z0-9])task-[A-Za-z0-9]+_", "", label) for label in runs.tolist()], dtype=object)
    lacking = []
    for unit in sorted(set(units.tolist())):
        present = set(sets[units == unit].tolist())
        if present != {0, 1}:
            lacking.append((unit, [set_names[number] for number in sorted(present)]))
    if lacking:
        unit, has = lacking[0]
        other = [name for name in set_names if name not in has]
        raise InputError(None, "folds", f"run {unit} has a run for set {has[0]!r} but none for set {other[0]!r} "
                                        f"({len(lacking)} unpaired run(s)): a fold holds out one run of each task together, "
                                        "so train and test runs stay independent",
                         "give both tasks the same run labels (run-1, run-2, ... in each session), or use folds.scheme "
                         "leave_one_session_out with both tasks in every session")
    return units.astype(str)
