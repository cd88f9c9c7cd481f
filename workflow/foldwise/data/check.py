"""The dataset check: what each subject has, and every configured condition it lacks, before any job.

``make check CONFIG=...`` prints one line per subject (sessions, tasks, runs,
trial types, TR, grid); the workflow runs the same check when it starts, so a
misspelt condition stops the run before any GLM is fitted rather than in the
decoding job.

Only headers are read: the events tables, the sidecars and the NIfTI header
of each BOLD file (nibabel reads the header without the data).
"""

import argparse
import difflib
import sys
from dataclasses import dataclass

import nibabel as nib
import numpy as np
import pandas as pd

from foldwise.data.bids import read_tr_s
from foldwise.data.fileio import read_tsv
from foldwise.errors import InputError

__all__ = ["RunSurvey", "analysis_tasks", "study_tasks", "required_conditions", "survey_runs", "missing_conditions", "subject_table", "check_dataset", "main"]

_CLOSE_CUTOFF = 0.6  # difflib similarity for a did-you-mean (common practice, no source)


@dataclass(frozen=True)
class RunSurvey:
    """What one run holds: entities, volumes, TR, grid and trial types."""

    subject: str
    session: object
    task: str
    run_id: str
    events: str
    n_volumes: int
    tr_s: float
    grid: tuple
    voxel_mm: tuple
    trial_types: tuple


def analysis_tasks(entry, main_task):
    """The task each part of an analysis takes its patterns from.

    Parameters
    ----------
    entry : dict
        A validated ``analyses`` entry (``task``, ``set_tasks``).
    main_task : str
        ``dataset.task``.

    Returns
    -------
    dict
        ``{set name: task}`` for a cross analysis, ``{None: task}`` for
        every other kind; ``task`` defaults to ``main_task``, a set's task
        to the analysis's.
    """
    task = entry.get("task") or main_task
    if entry["kind"] == "cross":
        set_tasks = entry.get("set_tasks") or {}
        return {set_name: set_tasks.get(set_name) or task for set_name in entry["sets"]}
    return {None: task}


def study_tasks(study):
    """Every task the study reads: ``dataset.task`` first, then the analyses' tasks, then the localizers' (each once).

    Returns
    -------
    dict
        task -> ``"patterns"`` (its runs get a GLM: the main task and any
        task an analysis decodes) or ``"localizer"`` (read by localizer ROIs only).
    """
    main_task = study["dataset"]["task"]
    tasks = {main_task: "patterns"}
    for entry in study["analyses"]:
        for task in analysis_tasks(entry, main_task).values():
            tasks[task] = "patterns"
    for roi in study["rois"]:
        if "localizer" in roi:
            tasks.setdefault(roi["localizer"]["task"], "localizer")
    return tasks


def required_conditions(study):
    """Every condition the config names, with where it is named and the task it must come from.

    Parameters
    ----------
    study : dict
        The validated study config.

    Returns
    -------
    list of tuple
        ``(condition, where, task)``: ``where`` is the config key path
        (``analyses[0].classes.round``); ``task`` the task whose events must
        hold it (``None``: any task of the study).
    """
    default_task = study["dataset"]["task"]
    required = []
    for index, analysis in enumerate(study["analyses"]):
        tasks = analysis_tasks(analysis, default_task)
        if analysis["kind"] == "within":
            for label, conditions in analysis["classes"].items():
                required += [(condition, f"analyses[{index}].classes.{label}", tasks[None]) for condition in conditions]
        elif analysis["kind"] != "cross":  # a registered kind names its own conditions (foldwise.study.register_analysis_kind)
            from foldwise.study import ANALYSIS_KINDS  # late: the study model imports this module

            required += [(condition, f"analyses[{index}].{key}", tasks[None])
                         for key, condition in ANALYSIS_KINDS[analysis["kind"]].condition_keys(analysis)]
        else:
            for set_name, members in analysis["sets"].items():
                required += [(condition, f"analyses[{index}].sets.{set_name}.{label}", tasks[set_name])
                             for label, condition in members.items()]
    required += [(condition, "glm.conditions", None) for condition in study["glm"].get("conditions", [])]
    for index, roi in enumerate(study["rois"]):
        localizer = roi.get("localizer")
        if localizer:
            required += [(condition, f"rois[{index}].localizer.contrast", localizer["task"]) for condition in localizer["contrast"]]
    return required


def _grid(path):
    image = nib.load(str(path))
    shape = tuple(int(size) for size in image.shape[:3])
    voxel_mm = tuple(round(float(size), 3) for size in image.header.get_zooms()[:3])
    return image, shape, voxel_mm, int(image.shape[3]) if len(image.shape) > 3 else 1


def survey_runs(runs, condition_column="trial_type", main_task=""):
    """Read the headers of every run.

    Parameters
    ----------
    runs : sequence of dict
        Run records with ``subject``, ``session``, ``run_id``, ``bold``,
        ``events``, ``sidecar`` and optionally ``task``.
    condition_column : str
        The events column naming conditions.
    main_task : str
        The task of runs without a ``task`` entry (the study's main task).

    Returns
    -------
    list of RunSurvey

    Raises
    ------
    InputError
        For a missing or unreadable file, a sidecar without a TR, or an
        events table without the condition column.
    """
    surveys = []
    for run in runs:
        try:
            image, shape, voxel_mm, n_volumes = _grid(run["bold"])
        except FileNotFoundError:
            raise InputError(run["bold"], "file", "the BOLD file does not exist", "check dataset.patterns.bold") from None
        except Exception as error:  # nibabel raises several types for a damaged header
            raise InputError(run["bold"], "header", f"not a readable NIfTI image ({type(error).__name__})",
                             "replace the file with the pipeline's output") from None
        tr_s = read_tr_s(run["sidecar"], image.header, run["bold"])
        frame = read_tsv(run["events"], required_columns=("onset", "duration", condition_column), what="events file",
                         text_columns=(condition_column,))
        labels = frame[condition_column].dropna().astype(str).str.strip()
        surveys.append(RunSurvey(subject=run["subject"], session=run.get("session"), task=run.get("task", main_task), run_id=run["run_id"],
                                 events=str(run["events"]), n_volumes=n_volumes, tr_s=tr_s, grid=shape, voxel_mm=voxel_mm,
                                 trial_types=tuple(sorted(set(labels) - {"", "n/a"}))))
    return surveys


def missing_conditions(surveys, required):
    """Every (subject, condition) pair where a configured condition occurs in none of the subject's runs of its task.

    Parameters
    ----------
    surveys : sequence of RunSurvey
    required : sequence of tuple
        ``(condition, where, task)`` from :func:`required_conditions`.

    Returns
    -------
    list of dict
        ``subject``, ``condition``, ``where``, ``task``, ``did_you_mean``
        (the subject's one closest trial type by ``difflib`` similarity,
        maybe empty), ``events`` (the subject's first events file of that task).
    """
    by_subject = {}
    for survey in surveys:
        by_subject.setdefault(survey.subject, []).append(survey)
    first_use = {}
    for condition, where, task in required:  # a condition named twice (two analyses) is reported once, where first named
        first_use.setdefault((condition, task), where)
    problems = []
    for subject, own in by_subject.items():
        for (condition, task), where in first_use.items():
            of_task = [survey for survey in own if survey.task == task] if task else own
            if not of_task:
                problems.append({"subject": subject, "condition": condition, "where": where, "task": task, "did_you_mean": [],
                                 "events": own[0].events, "no_runs": True})
                continue
            present = sorted({label for survey in of_task for label in survey.trial_types})
            if condition in present:
                continue
            # The one closest trial type the subject has: a misspelt config name (seen_rond) gets the
            # existing name (seen_round), even when another config entry names that one too.
            close = difflib.get_close_matches(condition, present, n=1, cutoff=_CLOSE_CUTOFF)
            problems.append({"subject": subject, "condition": condition, "where": where, "task": task, "did_you_mean": close,
                             "events": of_task[0].events})
    return problems


def subject_table(surveys):
    """One row per subject: sessions, tasks, runs, trial types, TRs, grids (the printed overview)."""
    rows = []
    by_subject = {}
    for survey in surveys:
        by_subject.setdefault(survey.subject, []).append(survey)
    for subject, own in by_subject.items():
        sessions = sorted({str(survey.session) for survey in own if survey.session is not None})
        rows.append({
            "subject": subject,
            "sessions": ",".join(sessions) or "-",
            "tasks": ",".join(sorted({survey.task for survey in own if survey.task})) or "-",
            "n_runs": len(own),
            "n_volumes": ",".join(str(value) for value in sorted({survey.n_volumes for survey in own})),
            "tr_s": ",".join(f"{value:g}" for value in sorted({survey.tr_s for survey in own})),
            "grid": ";".join(sorted({"x".join(map(str, survey.grid)) + "@" + "x".join(f"{v:g}" for v in survey.voxel_mm)
                                     for survey in own})),
            "trial_types": ",".join(sorted({label for survey in own for label in survey.trial_types})),
        })
    return pd.DataFrame(rows, columns=["subject", "sessions", "tasks", "n_runs", "n_volumes", "tr_s", "grid", "trial_types"])


def check_dataset(study, runs, config_path="the study config", surveys=None):
    """Survey the runs and stop on any configured condition a subject lacks.

    Parameters
    ----------
    study : dict
        The validated study config.
    runs : sequence of dict
        The planned runs (see :func:`survey_runs`).
    config_path : str
        Named in messages.
    surveys : sequence of RunSurvey, optional
        Already known (the demo's, before its files exist); read from the runs when None.

    Returns
    -------
    pandas.DataFrame
        :func:`subject_table` of the runs.

    Raises
    ------
    InputError
        Naming the events file of the first subject that lacks a condition,
        the config key that names it, every other (subject, condition) pair
        lacking, and the closest trial types found (did you mean).
    """
    surveys = survey_runs(runs, study["dataset"].get("condition_column", "trial_type"), study["dataset"]["task"]) if surveys is None \
        else list(surveys)
    problems = missing_conditions(surveys, required_conditions(study))
    if problems:
        first = problems[0]
        parts = []
        for problem in problems[:6]:
            hint = f" (did you mean {' or '.join(repr(name) for name in problem['did_you_mean'])}?)" if problem["did_you_mean"] else ""
            task = f" of task {problem['task']!r}" if problem["task"] else ""
            if problem.get("no_runs"):
                parts.append(f"subject {problem['subject']} has no run of task {problem['task']!r} (needed for {problem['condition']!r})")
            else:
                parts.append(f"subject {problem['subject']} has no event {problem['condition']!r}{task}{hint}")
        more = f"; and {len(problems) - 6} more" if len(problems) > 6 else ""
        raise InputError(first["events"], first["where"], "; ".join(parts) + more,
                         f"correct the condition name in {config_path} or in the subject's events files "
                         "(or leave the subject out with dataset.exclude_subjects)")
    modelled = set(study["glm"].get("conditions") or [])
    if modelled:  # the GLM of a run none of whose trial types is listed would stop at job time
        decoded = {task for task, role in study_tasks(study).items() if role == "patterns"}
        for survey in surveys:
            if survey.task in decoded and not modelled & set(survey.trial_types):
                raise InputError(survey.events, "glm.conditions", f"none of the listed conditions ({', '.join(sorted(modelled))}) occurs "
                                                                  f"in this run of task {survey.task!r} (its trial types: "
                                                                  f"{', '.join(survey.trial_types[:8])})",
                                 "list the conditions of every decoded task in glm.conditions, or leave it empty (every trial type)")
    grids = {}
    for survey in surveys:
        grids.setdefault(survey.subject, set()).add((survey.grid, survey.voxel_mm))
    for subject, found in grids.items():
        if len(found) > 1:
            raise InputError(next(survey.events for survey in surveys if survey.subject == subject).replace("events.tsv", "*"),
                             "grid", f"subject {subject}'s BOLD runs lie on {len(found)} different grids "
                                     f"({'; '.join(str(grid) for grid, _ in sorted(found))})",
                             "resample all runs of a subject to one grid (or point dataset.space at one space)")
    return subject_table(surveys)


def main(argv=None):
    """``python -m foldwise.data.check --config PATH``: print the overview, exit 1 on a problem."""
    parser = argparse.ArgumentParser(description="Check a study's dataset against its config before any job.")
    parser.add_argument("--config", default="config/config.yaml")
    arguments = parser.parse_args(argv)
    from foldwise.config import load_yaml, validate
    from foldwise.plan import plan_study

    try:
        study = validate(load_yaml(arguments.config), path=arguments.config)
        if study["dataset"]["source"] == "demo":
            print("dataset.source is demo: the dataset is simulated by the workflow; nothing to check before it exists")
            return 0
        planned = plan_study(study, path=arguments.config)
        runs = planned.runs + planned.localizer_runs
        table = check_dataset(study, runs, arguments.config)
    except InputError as error:
        print(f"foldwise: {error}", file=sys.stderr)
        return 1
    with pd.option_context("display.max_colwidth", 80, "display.width", 200):
        print(table.to_string(index=False))
    print(f"{len(table)} subject(s), {len(runs)} run(s): every configured condition found")
    return 0


if __name__ == "__main__":
    sys.exit(main())
