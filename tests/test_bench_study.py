"""The whole-study benchmark's bookkeeping (benchmarks/bench_study.py): which rule a process was, per-rule sums, GLM / read."""

import importlib.util
import os

import pytest

_PATH = os.path.join(os.path.dirname(os.path.dirname(os.path.abspath(__file__))), "benchmarks", "bench_study.py")
_SPEC = importlib.util.spec_from_file_location("bench_study", _PATH)
bench_study = importlib.util.module_from_spec(_SPEC)
_SPEC.loader.exec_module(bench_study)


def test_script_rule_names_the_rule_of_snakemake_s_temporary_script():
    assert bench_study.script_rule("/w/.snakemake/scripts/tmpa1b2c3.glm.py") == "glm"
    assert bench_study.script_rule("/w/.snakemake/scripts/tmpzz.decode_gather.py") == "decode_gather"
    assert bench_study.script_rule("/venv/bin/snakemake") == "snakemake"
    assert bench_study.script_rule("-c") == "other (-c)"


def _record(rule, cpu_s, wall_s, bolds=(), subject="01"):
    return {"_rule": rule, "cpu_time_s": cpu_s, "wall_time_s": wall_s, "wildcards": {"subject": subject},
            "inputs": [{"name": "bold", "path": path, "sha256": "-"} for path in bolds] + [{"name": "mask", "path": "m", "sha256": "-"}]}


def test_glm_ratio_sums_the_reads_of_every_run_a_job_reads():
    reads_s = {"/d/sub-01_run-1_bold.nii.gz": 0.5, "/d/sub-01_run-2_bold.nii.gz": 0.25, "/d/sub-02_run-1_bold.nii.gz": 1.0}
    per_subject = _record("glm", 1.5, 2.0, ["results/x/sub-01_run-1_bold.nii.gz", "results/x/sub-01_run-2_bold.nii.gz"])
    per_run = _record("glm", 0.5, 0.7, ["sub-02_run-1_bold.nii.gz"], subject="02")
    other = _record("decode", 9.0, 9.0)
    reads, ratios = bench_study.glm_read_ratios([per_subject, per_run, other], reads_s)
    assert reads == [pytest.approx(0.75), pytest.approx(1.0)]
    assert ratios == [pytest.approx(2.0), pytest.approx(0.5)]


def test_rule_table_adds_process_cpu_to_the_rule_of_each_process():
    records = [_record("glm", 1.0, 1.5), _record("glm", 2.0, 2.5), _record("roi_mask", 0.1, 0.2)]
    processes = [{"argv0": "tmp1.glm.py", "cpu_s": 1.75}, {"argv0": "tmp2.glm.py", "cpu_s": 2.75},
                 {"argv0": "/venv/bin/snakemake", "cpu_s": 10.0}]
    table = bench_study.rule_table(records, processes)
    assert table["glm"]["jobs"] == 2 and table["glm"]["procs"] == 2
    assert table["glm"]["in_cpu_s"] == pytest.approx(3.0) and table["glm"]["proc_cpu_s"] == pytest.approx(4.5)
    assert table["roi_mask"]["procs"] == 0  # ran inside Snakemake's process
    assert table["snakemake"]["proc_cpu_s"] == pytest.approx(10.0) and table["snakemake"]["jobs"] == 0


def test_report_lines_name_the_parts_drawn(capsys):
    record = dict(_record("report", 4.0, 5.0), parts=[{"part": "a", "key": "k", "restored": False},
                                                      {"part": "b", "key": "k", "restored": True}])
    table = {"report": {"proc_cpu_s": 5.5, "procs": 1}}
    bench_study.report_lines(table, [record], [dict(record, cpu_time_s=1.0, wall_time_s=1.5)])
    printed = capsys.readouterr().out
    assert "report from empty: in-job CPU 4.0 s" in printed and "1 of 2 parts computed" in printed
    assert "target <= 5: NOT met (process CPU)" in printed  # a process of its own: 5.5 s of process CPU count
    assert "report after the one-ROI change: in-job CPU 1.0 s, wall 1.5 s" in printed and "target <= 2: met" in printed
    bench_study.report_lines({"report": {"proc_cpu_s": 0.0, "procs": 0}}, [record], [])
    printed = capsys.readouterr().out
    assert "in Snakemake's process" in printed and "target <= 5: met (in-job CPU)" in printed  # in a thread: its 4.0 s count
