"""Check Slurm's record of finished jobs (jobcomp/filetxt) against a run.

    python slurm_job_record.py <jobs_completed.txt> <expected number of jobs>

Every line of the file is one finished job as ``Key=Value`` pairs. The check
passes when exactly the expected number of jobs finished and all of them
COMPLETED; it prints the count and the jobs' durations in seconds (from
Slurm's own StartTime/EndTime, whole seconds).
"""

import statistics
import sys
from datetime import datetime


def parse_job_line(line):
    """One jobcomp/filetxt line as a dict; values never contain spaces except Name=."""
    fields = {}
    for token in line.split():
        key, separator, value = token.partition("=")
        if separator:
            fields[key] = value
    return fields


def job_duration_s(job):
    started = datetime.fromisoformat(job["StartTime"])
    ended = datetime.fromisoformat(job["EndTime"])
    return (ended - started).total_seconds()


def check_record(path, expected_jobs):
    with open(path, encoding="utf-8") as handle:
        jobs = [parse_job_line(line) for line in handle if line.strip()]
    states = sorted({job.get("JobState", "?") for job in jobs})
    if len(jobs) != expected_jobs or states != ["COMPLETED"]:
        return False, f"Slurm recorded {len(jobs)} finished jobs in states {states}; the run submitted {expected_jobs}, all should be COMPLETED"
    durations_s = [job_duration_s(job) for job in jobs]
    summary = (f"Slurm recorded {len(jobs)} COMPLETED jobs; job duration (Slurm start to end): "
               f"median {statistics.median(durations_s):.0f} s, max {max(durations_s):.0f} s, "
               f"sum {sum(durations_s):.0f} s")
    return True, summary


def main(argv):
    if len(argv) != 3:
        print(__doc__, file=sys.stderr)
        return 2
    try:
        passed, message = check_record(argv[1], int(argv[2]))
    except FileNotFoundError:
        passed, message = False, f"no Slurm job record at {argv[1]} (is JobCompType=jobcomp/filetxt in slurm.conf?)"
    print(message, file=sys.stdout if passed else sys.stderr)
    return 0 if passed else 1


if __name__ == "__main__":
    sys.exit(main(sys.argv))
