"""Tests of foldwise.decoding.folds: run-wise folds and the training-class check."""

import numpy as np
import pytest
from sklearn.model_selection import LeaveOneGroupOut

from foldwise.errors import InputError
from foldwise.decoding.folds import check_training_classes, held_out_runs, make_folds


def _runs(n_runs=4, per_run=3):
    return np.repeat([f"run-{index:02d}" for index in range(1, n_runs + 1)], per_run)


def test_leave_one_run_out_equals_sklearn_leave_one_group_out():
    # Reference: sklearn.model_selection.LeaveOneGroupOut (holds out each group once, groups in sorted order).
    runs = np.array(["run-03", "run-01", "run-02", "run-01", "run-03", "run-02", "run-04"])
    ours = make_folds(runs)
    theirs = list(LeaveOneGroupOut().split(np.zeros((runs.size, 1)), groups=runs))
    assert len(ours) == len(theirs) == 4
    for (train, test), (ref_train, ref_test) in zip(ours, theirs):
        np.testing.assert_array_equal(train, ref_train)
        np.testing.assert_array_equal(test, ref_test)
        assert train.dtype == np.int64


def test_leave_one_run_out_partitions_patterns_and_never_splits_a_run():
    runs = _runs(5, 4)
    folds = make_folds(runs)
    tested = np.concatenate([test for _, test in folds])
    np.testing.assert_array_equal(np.sort(tested), np.arange(runs.size))  # every pattern tested exactly once
    for train, test in folds:
        assert np.intersect1d(train, test).size == 0
        assert np.unique(runs[test]).size == 1
        assert np.intersect1d(runs[train], runs[test]).size == 0


def test_run_groups_are_contiguous_array_split_groups():
    # Stated rule: sorted unique runs cut by np.array_split; 5 runs in 2 groups -> {1,2,3} and {4,5}.
    runs = _runs(5, 2)
    folds = make_folds(runs, scheme="run_groups", n_groups=2)
    assert held_out_runs(runs, folds) == [["run-01", "run-02", "run-03"], ["run-04", "run-05"]]
    # Reference: LeaveOneGroupOut over the run -> group map gives the same folds.
    group_of = {run: index for index, group in enumerate(np.array_split(np.unique(runs), 2)) for run in group}
    groups = np.array([group_of[run] for run in runs])
    for (train, test), (ref_train, ref_test) in zip(folds, LeaveOneGroupOut().split(runs[:, None], groups=groups)):
        np.testing.assert_array_equal(train, ref_train)
        np.testing.assert_array_equal(test, ref_test)


def test_run_groups_with_as_many_groups_as_runs_is_leave_one_run_out():
    runs = _runs(4, 2)
    for (train, test), (ref_train, ref_test) in zip(make_folds(runs, "run_groups", 4), make_folds(runs)):
        np.testing.assert_array_equal(train, ref_train)
        np.testing.assert_array_equal(test, ref_test)


@pytest.mark.parametrize("runs, scheme, n_groups, field", [
    (["run-01", "run-01"], "leave_one_run_out", 2, "run_id"),
    ([], "leave_one_run_out", 2, "run_id"),
    (["run-01", "run-02"], "kfold", 2, "folds.scheme"),
    (["run-01", "run-02", "run-03"], "run_groups", 4, "folds.n_groups"),
    (["run-01", "run-02", "run-03"], "run_groups", 1, "folds.n_groups"),
    (["run-01", "run-02", "run-03"], "run_groups", True, "folds.n_groups"),
])
def test_make_folds_rejects_bad_arguments(runs, scheme, n_groups, field):
    with pytest.raises(InputError) as error:
        make_folds(np.array(runs), scheme, n_groups)
    assert error.value.field == field


def test_check_training_classes_names_subject_run_and_class():
    runs = _runs(3, 2)
    labels = np.array([0, 1, 0, 1, 0, 2])  # class 2 ("star") only in run-03
    folds = make_folds(runs)
    with pytest.raises(InputError) as error:
        check_training_classes(labels, runs, folds, ["round", "square", "star"], "07", file="tables.tsv")
    message = str(error.value)
    assert "subject 07" in message and "run-03" in message and "'star'" in message and "tables.tsv" in message


def test_check_training_classes_passes_when_every_fold_has_every_class():
    runs = _runs(3, 3)
    labels = np.tile([0, 1, 2], 3)
    check_training_classes(labels, runs, make_folds(runs), ["round", "square", "star"], "01")


def test_held_out_runs_of_leave_one_run_out():
    runs = np.array(["b", "a", "c", "a"])
    assert held_out_runs(runs, make_folds(runs)) == [["a"], ["b"], ["c"]]
