"""The cluster test's reading of Slurm's finished-job record (jobcomp/filetxt)."""

import slurm_job_record

COMPLETED_LINE = ("JobId=7 UserId=root(0) GroupId=root(0) Name=run-1 JobState=COMPLETED Partition=test TimeLimit=10 "
                  "StartTime=2026-01-05T10:00:00 EndTime=2026-01-05T10:00:12 NodeList=localhost ExitCode=0:0\n")


def write_record(tmp_path, lines):
    path = tmp_path / "jobs_completed.txt"
    path.write_text("".join(lines), encoding="utf-8")
    return str(path)


def test_parse_job_line_reads_key_value_pairs():
    job = slurm_job_record.parse_job_line(COMPLETED_LINE)
    assert job["JobId"] == "7"
    assert job["JobState"] == "COMPLETED"
    assert slurm_job_record.job_duration_s(job) == 12.0


def test_all_completed_and_counted_passes(tmp_path):
    passed, message = slurm_job_record.check_record(write_record(tmp_path, [COMPLETED_LINE] * 3), 3)
    assert passed, message
    assert "3 COMPLETED jobs" in message and "median 12 s" in message


def test_a_failed_job_fails_the_check(tmp_path):
    failed = COMPLETED_LINE.replace("JobState=COMPLETED", "JobState=FAILED")
    passed, message = slurm_job_record.check_record(write_record(tmp_path, [COMPLETED_LINE, failed]), 2)
    assert not passed
    assert "FAILED" in message


def test_fewer_jobs_than_submitted_fails_the_check(tmp_path):
    passed, message = slurm_job_record.check_record(write_record(tmp_path, [COMPLETED_LINE] * 2), 3)
    assert not passed
    assert "recorded 2" in message and "submitted 3" in message


def test_missing_record_is_reported_by_main(tmp_path, capsys):
    status = slurm_job_record.main(["slurm_job_record.py", str(tmp_path / "absent.txt"), "1"])
    assert status == 1
    assert "no Slurm job record" in capsys.readouterr().err
