"""Calibration of foldwise's permutation nulls on pure noise, at small sizes (the large sizes are in
benchmarks/bench_calibration.py), and the pieces of the calibration table.

Outside references, named beside each check: scipy.stats.chi2 (the sampling distribution of a variance,
for the band of the variance ratio), scipy.stats.binom (the 99% interval of a rejection count). The designs
are the invented lanterns demo's: 4 runs, 3 shapes, one pattern per shape, run and (for cross-decoding) set.
"""

from pathlib import Path

import numpy as np
import pytest
from scipy import stats

from foldwise.stats import calibration

N_SUBJECTS = 240


def _design(cross, n_permutations=60):
    runs = np.repeat(np.arange(4), 6)
    sets = np.tile(np.repeat([0, 1], 3), 4)
    labels = np.tile(np.arange(3), 8)
    options = {"classifier": "correlation_centroid", "selection": "signal", "n_classes": 3}
    if cross:
        return calibration.NullDesign(labels=labels, runs=runs, n_voxels=60, voxel_counts=(10, "all"), n_permutations=n_permutations,
                                      set_index=sets, set_names=("seen", "heard"), options=options)
    seen = sets == 0
    return calibration.NullDesign(labels=labels[seen], runs=runs[seen], n_voxels=60, voxel_counts=(10, "all"),
                                  n_permutations=n_permutations, options=options)


@pytest.fixture(scope="module")
def null_records():
    rng = np.random.default_rng(20261203)
    return {"cross": calibration.null_subjects(_design(True), N_SUBJECTS, rng),
            "within": calibration.null_subjects(_design(False), N_SUBJECTS, rng)}


def test_every_direction_has_a_null_as_wide_as_the_observed_scores(null_records):
    # Under H0 the observed fold-mean accuracy is one more draw from the subject's permutation distribution, so
    # its variance across subjects equals the mean null variance (ratio 1). Band: the 99.9% interval of a sample
    # variance over its expectation with n - 1 degrees of freedom (scipy.stats.chi2; a normal approximation for
    # accuracies). The old cross-decoding null (training labels permuted, test labels true) gave 1.4-1.5 for
    # A<->B, A->A and B->B and fails this band.
    low = stats.chi2.ppf(0.0005, N_SUBJECTS - 1) / (N_SUBJECTS - 1)
    high = stats.chi2.ppf(0.9995, N_SUBJECTS - 1) / (N_SUBJECTS - 1)
    directions = []
    for records in null_records.values():
        for direction, record in records.items():
            ratio = calibration.variance_ratio(record["observed"], record["null"])
            assert np.all((ratio >= low) & (ratio <= high)), (direction, ratio.round(3), round(low, 3), round(high, 3))
            directions.append(direction)
    assert directions == ["seen->heard", "heard->seen", "seen<->heard", "seen->seen", "heard->heard", "within"]


def test_subject_level_p_values_hold_their_level(null_records):
    # Share of subject-level p <= alpha: at most the binomial 99% upper bound at alpha, and inside the binomial 99%
    # interval around the attainable level (the exact rejection probability of the discrete null, below alpha;
    # scipy.stats.binom). Per count, so the tests counted are independent subjects.
    for records in null_records.values():
        for direction, record in records.items():
            for alpha in (0.05, 0.01):
                rejections = np.sum(record["p"] <= alpha, axis=0)
                _, high = calibration.binomial_bounds(N_SUBJECTS, alpha)
                assert np.all(rejections <= high), (direction, alpha, rejections, high)
                for count, level in enumerate(record["level"][alpha].mean(axis=0)):
                    low, high = calibration.binomial_bounds(N_SUBJECTS, level)
                    assert low <= rejections[count] <= high, (direction, alpha, count, rejections[count], level)
            assert np.all(record["p"] > 0) and np.all(record["p"] <= 1)


def test_attainable_level_by_hand():
    # Observed 0.5 and four drawn null values: members 0.5, 0.25, 0.5, 0.75, 1.0 (n + 1 = 5). Each member's p within
    # the set: 1.0 -> 1/5, 0.75 -> 2/5, 0.5 -> 4/5 (twice), 0.25 -> 5/5. At alpha 0.2 only the 1.0 member rejects:
    # level 1/5; at alpha 0.4 two of five.
    observed, null = np.array([0.5]), np.array([[0.25], [0.5], [0.75], [1.0]])
    assert calibration.attainable_level(observed, null, False, 0.2)[0] == pytest.approx(0.2)
    assert calibration.attainable_level(observed, null, False, 0.4)[0] == pytest.approx(0.4)
    assert calibration.attainable_level(observed, null, False, 0.1)[0] == 0.0
    # exact: the null lists the members itself (the actual labeling among them)
    assert calibration.attainable_level(observed, null, True, 0.25)[0] == pytest.approx(0.25)


def test_group_tests_hold_their_level_on_small_null_groups(null_records):
    # 24 disjoint groups of 10 null subjects per direction: the count of groups with any family-wise rejection at
    # alpha .05 stays within the binomial 99% upper bound (scipy.stats.binom) in every direction.
    rng = np.random.default_rng(5)
    for records in null_records.values():
        for direction, record in records.items():
            counts = calibration.group_false_positives(record, 1 / 3, 10, 200, (0.05,), rng)
            assert counts["n_groups"] == 24
            _, high = calibration.binomial_bounds(24, 0.05)
            assert counts["p_fwe"][0] <= high, (direction, counts["p_fwe"])
            _, high_cells = calibration.binomial_bounds(24 * counts["n_cells"], 0.05)
            assert counts["p_perm"][0] <= high_cells, (direction, counts["p_perm"])


def test_binomial_bounds_equal_scipy():
    # scipy.stats.binom.interval, the 99% central interval
    assert calibration.binomial_bounds(500, 0.05) == tuple(int(v) for v in stats.binom.interval(0.99, 500, 0.05))
    assert calibration.binomial_bounds(1000, 0.01) == tuple(int(v) for v in stats.binom.interval(0.99, 1000, 0.01))


def test_calibration_rows_count_and_bound_each_test(null_records):
    rng = np.random.default_rng(6)
    records = null_records["within"]
    counts = {"within": calibration.group_false_positives(records["within"], 1 / 3, 10, 100, (0.05, 0.01), rng)}
    rows = calibration.calibration_rows("shape", records, counts, (0.05, 0.01))
    assert {row["test"] for row in rows} == {"subject p", "group p_perm", "group p_t", "group p_wilcoxon", "group prevalence_p_global",
                                             "group p_fwe", "group prevalence_p_global_fwe"}
    for row in rows:
        assert set(row) == set(calibration.CALIBRATION_COLUMNS)
        assert row["rate"] == pytest.approx(row["n_rejections"] / row["n_tests"])
        assert row["within_bounds"] == (row["n_rejections"] <= row["bound_high"] * row["n_tests"] + 1e-9)


# -- the calibrate step (job) ----------------------------------------------------------------
def _write_subject_tables(folder, subject, n_runs=4, conditions=("seen_round", "seen_square", "seen_star", "heard_round",
                                                                   "heard_square", "heard_star")):
    import pandas as pd

    from foldwise.data.fileio import write_tsv

    paths = []
    for run in range(1, n_runs + 1):
        path = folder / "results" / "patterns" / f"sub-{subject}" / f"sub-{subject}_run-{run}_patterns.tsv"
        path.parent.mkdir(parents=True, exist_ok=True)
        write_tsv(path, pd.DataFrame({"volume": range(len(conditions)), "subject": subject, "session": "n/a", "run_id": f"run-{run}",
                                      "condition": list(conditions), "trial_index": range(len(conditions)),
                                      "onset_s": [10.0 * i for i in range(len(conditions))]}))
        paths.append(str(path))
    counts = folder / "results" / "masks" / f"sub-{subject}" / f"sub-{subject}_roi_counts.tsv"
    counts.parent.mkdir(parents=True, exist_ok=True)
    write_tsv(counts, pd.DataFrame({"subject": [subject] * 2, "roi": ["ember", "glow"], "n_voxels": [40, 25], "min_voxels": [10, 10]}))
    return paths, str(counts)


@pytest.mark.slow  # renders the figure twice (about 10 s on a busy machine)
def test_calibrate_job_runs_the_studys_design_on_noise_and_writes_table_figure_summary(tmp_path):
    import logging

    import pandas as pd

    from foldwise.jobs import calibrate as calibrate_job

    tables, counts = [], []
    for subject in ("01", "02", "03", "04"):
        subject_tables, subject_counts = _write_subject_tables(tmp_path, subject)
        tables += subject_tables
        counts.append(subject_counts)
    analysis = {"name": "shape_seen_heard", "kind": "cross", "rois": ["ember", "glow"], "voxel_counts": [10, "all"],
                "sets": {"seen": {"round": "seen_round", "square": "seen_square", "star": "seen_star"},
                         "heard": {"round": "heard_round", "square": "heard_square", "star": "heard_star"}},
                "classifier": "linear_svm", "selection": "signal", "demean_patterns": False, "svm_c": 1.0, "logistic_c": 1.0,
                "folds": {"scheme": "leave_one_run_out", "n_groups": 2}, "n_permutations": 30}
    outputs = {"table": str(tmp_path / "cal.tsv"), "figure": str(tmp_path / "cal.png"), "summary": str(tmp_path / "cal.txt")}
    params = {"analysis": analysis, "subjects": ["01", "02", "03", "04"], "seed": 7,
              "group": {"n_draws": 10000, "alpha": 0.05, "prevalence": True, "fwe_method": "standardised", "family": "per_direction"},
              "calibrate": {"n_studies": 6, "n_draws": 100, "classifier": "correlation_centroid"}}
    calibrate_job.run({"tables": tables, "roi_counts": counts}, outputs, params, logging.getLogger("test"))
    table = pd.read_csv(outputs["table"], sep="\t")
    assert list(table.columns) == list(calibration.CALIBRATION_COLUMNS)
    subject_rows = table[table["test"] == "subject p"]
    # per direction: 6 studies x 4 subjects x 2 ROIs x 2 counts subject-level tests
    assert set(subject_rows["n_tests"]) == {6 * 4 * 2 * 2} and len(subject_rows) == 5 * 2
    fwe = table[table["test"] == "group p_fwe (any in family)"]
    assert set(fwe["direction"]) == {"seen->heard", "heard->seen", "seen<->heard", "seen->seen", "heard->heard"}
    assert set(fwe["n_tests"]) == {6}
    assert (subject_rows["level"] < subject_rows["alpha"]).all()  # discrete accuracies: attainable level below alpha
    with open(outputs["summary"], encoding="utf-8") as handle:
        summary = handle.read()
    assert "this check used correlation_centroid" in summary and "research use only" in summary
    assert Path(outputs["figure"]).read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    first = {name: Path(path).read_bytes() for name, path in outputs.items() if name != "summary"}
    calibrate_job.run({"tables": tables, "roi_counts": counts}, outputs, params, logging.getLogger("test"))
    assert first == {name: Path(path).read_bytes() for name, path in outputs.items() if name != "summary"}  # deterministic


@pytest.mark.e2e
@pytest.mark.slow
def test_make_calibrate_runs_the_tiny_study_off_the_default_target(tmp_path):
    # The `calibration` target (make calibrate) on the tiny demo study: GLM and ROIs, no decoding of the real data;
    # the default target does not include it.
    import json

    import pandas as pd

    from workflow_support import TINY_STUDY, copy_repository, snakemake, write_study

    workdir = copy_repository(tmp_path / "repo")
    study = json.loads(json.dumps(TINY_STUDY))
    study["calibrate"] = {"n_studies": 20, "n_draws": 200}
    write_study(workdir, study)
    assert "calibrate" not in snakemake(workdir, "--dry-run").stdout.split("Job stats:")[-1].split("Reasons")[0]
    snakemake(workdir, "--", "calibration")  # the target after --, as the Makefile passes it
    assert not (workdir / "results" / "decoding").exists()
    for name in ("shape", "carry"):
        table = pd.read_csv(workdir / f"results/calibration/{name}_calibration.tsv", sep="\t")
        assert list(table.columns) == list(calibration.CALIBRATION_COLUMNS) and len(table)
        assert (workdir / f"results/calibration/{name}_calibration.png").is_file()
        assert "20 noise studies of 3 subjects x 3 ROIs" in (workdir / f"results/calibration/{name}_calibration.txt").read_text()
