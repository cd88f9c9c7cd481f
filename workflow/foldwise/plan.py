"""The study plan: which subjects and runs exist, decided before any job runs.

For the demo the runs follow from the demo settings (the dataset does not
exist yet when Snakemake builds its DAG); for a BIDS dataset they are found on
disk with the configured file-name templates.
"""

from dataclasses import dataclass

from foldwise.data import bids
from foldwise.data import demo
from foldwise.errors import InputError

__all__ = ["StudyPlan", "plan_study"]


@dataclass(frozen=True)
class StudyPlan:
    """Subjects (after exclusion) and their runs, each a dict of entities and paths."""

    subjects: tuple
    runs: tuple

    def runs_of(self, subject):
        return [run for run in self.runs if run["subject"] == subject]

    def run(self, subject, run_id):
        for run in self.runs:
            if run["subject"] == subject and run["run_id"] == run_id:
                return run
        raise KeyError(f"no run {run_id} for subject {subject}")


def plan_study(study, path="the study config"):
    """Build the StudyPlan of a validated study config (``path`` names it in messages)."""
    dataset = study["dataset"]
    if dataset["source"] == "demo":
        runs = []
        for subject, session, run in demo.planned_runs(study["demo"]):
            files = bids.run_files(dataset["bids_root"], dataset["patterns"], dataset["task"], subject, session, run)
            runs.append({"subject": subject, "session": session, "run": run, "run_id": bids.make_run_id(session, run), **files})
        if dataset["subjects"]:
            known = sorted({run["subject"] for run in runs})
            absent = [subject for subject in dataset["subjects"] if subject not in known]
            if absent:
                raise InputError(path, "dataset.subjects", f"subject(s) {', '.join(absent)} are not in the demo (it has {', '.join(known)})",
                                 "list demo subjects only, or raise demo.n_subjects")
    else:
        runs = bids.discover_runs(dataset["bids_root"], dataset["patterns"], dataset["task"], dataset["subjects"])
    chosen = set(dataset["subjects"]) if dataset["subjects"] else {run["subject"] for run in runs}
    chosen -= set(dataset["exclude_subjects"])
    runs = [run for run in runs if run["subject"] in chosen]
    if not runs:
        raise InputError(dataset["bids_root"], "dataset.subjects", "no subject with a run is left to analyse",
                         "check dataset.subjects, dataset.exclude_subjects and dataset.patterns.bold")
    subjects = tuple(sorted(chosen))
    return StudyPlan(subjects=subjects, runs=tuple(runs))
