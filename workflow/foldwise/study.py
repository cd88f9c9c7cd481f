"""The study model: one object built once from the validated config.

Every concept of a study -- its subjects and runs, its ROIs, its analyses
(classes, sets, directions, chance, ROI list), the searchlight's choice of
analyses -- is worked out here, once, and every check of meaning the schema
cannot express is done here, before any job runs. Rules, the plan
(:mod:`foldwise.plan`) and the tests read this model; no other module
decides again what "``rois: []``" means or which conditions an analysis
names.

Extending
---------
An analysis kind and an ROI kind each plug in at one place:
:func:`register_analysis_kind` and :func:`register_roi_kind` (the built-in
kinds below are registered the same way). docs/architecture.md walks
through both.
"""

import difflib
import os
from dataclasses import dataclass
from types import MappingProxyType
from typing import Callable

from foldwise import contract
from foldwise.data import check as dataset_check
from foldwise.data import demo
from foldwise.errors import InputError
from foldwise.geometry import wiring as geometry_wiring
from foldwise import plan as study_plan
from foldwise.plan import plan_study
from foldwise.results_folder import check_results_dir

__all__ = [
    "AnalysisKind",
    "RoiKind",
    "Analysis",
    "Roi",
    "Study",
    "ANALYSIS_KINDS",
    "ROI_KINDS",
    "register_analysis_kind",
    "register_roi_kind",
    "build_study",
    "check_meaning",
    "check_events",
    "STEP_SETTINGS",
    "cross_directions",
]

cross_directions = contract.cross_directions  # the order of every table and map (one definition)


# -- analysis kinds ------------------------------------------------------------
@dataclass(frozen=True)
class AnalysisKind:
    """What the model needs to know about one kind of analysis.

    Attributes
    ----------
    name : str
        The value of ``kind`` in the config (the schema's enum lists it too).
    outline : callable
        ``outline(entry) -> (class_names, set_names, directions)``; set_names
        is None when the kind has no sets.
    condition_keys : callable
        ``condition_keys(entry) -> [(key path below the entry, condition)]``:
        every condition the entry names, with where it is named (for messages).
    check : callable
        ``check(entry, where, path)``: raises InputError for what the schema
        cannot express (``where`` is ``analyses[i]``, ``path`` the config file).
    steps : tuple of str
        The per-ROI steps this kind runs (the plan schedules them per subject x ROI).
    searchlight : bool
        Whether ``searchlight.analyses`` may name an analysis of this kind.
    """

    name: str
    outline: Callable
    condition_keys: Callable
    check: Callable
    steps: tuple = ("decode", "decode_gather", "group")
    searchlight: bool = True


ANALYSIS_KINDS = {}


def register_analysis_kind(kind):
    """Plug in an analysis kind (see docs/architecture.md, "Adding an analysis kind")."""
    ANALYSIS_KINDS[kind.name] = kind
    return kind


def _duplicates(names):
    seen, repeated = set(), []
    for name in names:
        if name in seen and name not in repeated:
            repeated.append(name)
        seen.add(name)
    return repeated


def _within_outline(entry):
    return tuple(entry["classes"]), None, ("within",)


def _within_conditions(entry):
    return [(f"classes.{label}", condition) for label, members in entry["classes"].items() for condition in members]


def _within_check(entry, where, path):
    if "sets" in entry:
        raise InputError(path, f"{where}.sets", "a 'within' analysis takes 'classes', not 'sets'", "remove 'sets' or set kind: cross")
    conditions = [condition for members in entry["classes"].values() for condition in members]
    for repeated in _duplicates(conditions):
        raise InputError(path, f"{where}.classes", f"condition '{repeated}' belongs to two classes", "put each condition in one class only")


def _cross_outline(entry):
    set_names = tuple(entry["sets"])
    return tuple(entry["sets"][set_names[0]]), set_names, cross_directions(set_names)


def _cross_conditions(entry):
    return [(f"sets.{set_name}.{label}", condition) for set_name, mapping in entry["sets"].items() for label, condition in mapping.items()]


def _cross_check(entry, where, path):
    if "classes" in entry:
        raise InputError(path, f"{where}.classes", "a 'cross' analysis takes 'sets', not 'classes'", "remove 'classes' or set kind: within")
    (name_a, set_a), (name_b, set_b) = entry["sets"].items()
    if sorted(set_a) != sorted(set_b):
        raise InputError(path, f"{where}.sets", f"the class labels of set '{name_a}' ({', '.join(sorted(set_a))}) and set '{name_b}' "
                         f"({', '.join(sorted(set_b))}) do not match", "map the same class labels in both sets")
    for set_name, mapping in entry["sets"].items():
        if not set_name.replace("_", "").isalnum():
            raise InputError(path, f"{where}.sets.{set_name}", "set names may hold letters, digits and underscores only", "rename the set")
        for repeated in _duplicates(mapping.values()):
            raise InputError(path, f"{where}.sets.{set_name}", f"condition '{repeated}' stands for two classes", "map each class to its own condition")
    used = [condition for mapping in entry["sets"].values() for condition in mapping.values()]
    for repeated in _duplicates(used):
        raise InputError(path, f"{where}.sets", f"condition '{repeated}' is used by both sets", "give each set its own conditions")


register_analysis_kind(AnalysisKind("within", _within_outline, _within_conditions, _within_check))
register_analysis_kind(AnalysisKind("cross", _cross_outline, _cross_conditions, _cross_check))
register_analysis_kind(AnalysisKind(geometry_wiring.KIND, geometry_wiring.outline, geometry_wiring.condition_keys, geometry_wiring.check,
                                    steps=geometry_wiring.STEPS, searchlight=False))


# -- ROI kinds -------------------------------------------------------------------
@dataclass(frozen=True)
class RoiKind:
    """What the model needs to know about one kind of ROI definition.

    Attributes
    ----------
    name : str
        The key that defines the kind in an ``rois`` entry (``labels``,
        ``image``, ``sphere``); the schema's ``oneOf`` lists it too.
    inputs : callable
        ``inputs(entry, config) -> {input name: path}``: the files the
        roi_mask job reads besides the brain mask.
    source : callable
        ``source(entry, config) -> str or None``: the file the ROI comes from
        (for the report and messages).
    check : callable
        ``check(entry, where, path, config)``: raises InputError for what the
        schema cannot express.
    step : str
        The step that builds the kind's masks (default ``roi_mask``). A kind
        that needs more than the mask builders (the localizer's own GLM)
        names a step of its own, registered with ``plan.register_steps``, so
        that the plain ``roi_mask`` step's code key does not cover its modules.
    """

    name: str
    inputs: Callable
    source: Callable
    check: Callable = lambda entry, where, path, config: None
    step: str = "roi_mask"


ROI_KINDS = {}


def register_roi_kind(kind):
    """Plug in an ROI kind (see docs/architecture.md, "Adding an ROI kind")."""
    ROI_KINDS[kind.name] = kind
    return kind


register_roi_kind(RoiKind(
    "labels",
    inputs=lambda entry, config: {"atlas": config["dataset"]["atlas_image"], "atlas_labels": config["dataset"]["atlas_labels"]},
    source=lambda entry, config: config["dataset"]["atlas_image"]))
register_roi_kind(RoiKind("image", inputs=lambda entry, config: {"image": entry["image"]}, source=lambda entry, config: entry["image"]))
register_roi_kind(RoiKind("sphere", inputs=lambda entry, config: {}, source=lambda entry, config: None))


def _localizer_constraint_inputs(entry, config):
    """The files a localizer ROI's anatomical constraint reads (its localizer runs are added per subject by the plan)."""
    within = entry["localizer"]["within"]
    if "labels" in within:
        return {"atlas": config["dataset"]["atlas_image"], "atlas_labels": config["dataset"]["atlas_labels"]}
    return {"image": within["image"]} if "image" in within else {}


def _localizer_check(entry, where, path, config):
    spec = entry["localizer"]
    if not any(weight != 0 for weight in spec["contrast"].values()):
        raise InputError(path, f"{where}.localizer.contrast", "every contrast weight is 0", "give non-zero weights, e.g. {lit: 1, dark: -1}")
    if spec["task"] == config["dataset"]["task"]:
        raise InputError(path, f"{where}.localizer.task", f"the localizer task is the main task ({spec['task']}): the ROI would be "
                                                          "defined from the data it is decoded from",
                         "name an independent localizer task (its own runs)")


register_roi_kind(RoiKind("localizer", inputs=_localizer_constraint_inputs,
                          source=lambda entry, config: entry["localizer"]["within"].get("image") or
                          (config["dataset"]["atlas_image"] if "labels" in entry["localizer"]["within"] else None),
                          check=_localizer_check, step="localizer_roi"))


# -- the model -----------------------------------------------------------------------
@dataclass(frozen=True)
class Roi:
    """One ROI: its kind, the file it comes from, threshold and minimum size."""

    name: str
    kind: str
    entry: MappingProxyType  # the validated config entry (defaults filled)
    source: str | None
    threshold: float | None
    min_voxels: int

    def inputs(self, config):
        """Files the mask's job reads besides the brain mask."""
        return ROI_KINDS[self.kind].inputs(self.entry, config)

    @property
    def step(self):
        """The step that builds this ROI's masks (``roi_mask``, or its kind's own step)."""
        return ROI_KINDS[self.kind].step


@dataclass(frozen=True)
class Analysis:
    """One analysis, with everything derived from its entry resolved once."""

    name: str
    kind: str
    entry: MappingProxyType  # the validated config entry (defaults filled)
    rois: tuple  # resolved: an empty list in the config means every ROI, in config order
    class_names: tuple
    set_names: tuple | None
    directions: tuple
    conditions: tuple  # every condition the analysis names, in entry order
    searchlight: bool  # listed in searchlight.analyses (and the searchlight is on)

    @property
    def chance(self):
        """Chance level of balanced accuracy: 1 / number of classes."""
        return 1.0 / len(self.class_names)

    @property
    def steps(self):
        return ANALYSIS_KINDS[self.kind].steps

    def method(self):
        """The entry without its ROI list: one ROI's job does not depend on the others."""
        return {key: value for key, value in _plain(self.entry).items() if key != "rois"}

    def outline(self):
        """The keys that say what is decoded: name, kind and classes or sets."""
        return {key: value for key, value in _plain(self.entry).items() if key in ("name", "kind", "classes", "sets")}


def _plain(value):
    """A frozen config value as plain dicts and lists (for params and JSON)."""
    if isinstance(value, (dict, MappingProxyType)):
        return {key: _plain(item) for key, item in value.items()}
    if isinstance(value, (list, tuple)):
        return [_plain(item) for item in value]
    return value


def _frozen(value):
    if isinstance(value, dict):
        return MappingProxyType({key: _frozen(item) for key, item in value.items()})
    if isinstance(value, list):
        return tuple(_frozen(item) for item in value)
    return value


@dataclass(frozen=True)
class Study(study_plan.RunLookup):
    """The whole study, built once by :func:`build_study`.

    Attributes
    ----------
    config : dict
        The validated config (defaults filled). Read-only by convention.
    config_file : str
        Named in messages and in the report.
    subjects : tuple of str
        After ``dataset.subjects`` and ``dataset.exclude_subjects``.
    runs : tuple of dict
        Every run: ``subject``, ``session``, ``run``, ``run_id`` and its files.
    rois : dict
        ROI name -> :class:`Roi`, in config order.
    analyses : dict
        Analysis name -> :class:`Analysis`, in config order.
    searchlight_analyses : tuple of str
        The analyses mapped by the searchlight (empty when it is off).
    searchlight_blocks : tuple of int
    """

    config: dict
    config_file: str
    subjects: tuple
    runs: tuple
    rois: dict
    analyses: dict
    searchlight_analyses: tuple
    searchlight_blocks: tuple
    localizer_runs: tuple = ()  # runs of tasks read by localizer ROIs only (no GLM job of their own)
    overrides: tuple = ()  # the --config entries merged into the config (foldwise.config.apply_overrides), as typed

    @property
    def sessions(self):
        """Session labels in use (empty when the dataset has none)."""
        return tuple(sorted({run["session"] for run in self.runs if run["session"]}))

    @property
    def tasks(self):
        """Every task the study reads, the main task (``dataset.task``) first."""
        return tuple(dataset_check.study_tasks(self.config))

    def task_runs(self, subject, task):
        """One subject's runs of one task (the main task's runs carry no ``task`` entry)."""
        main = self.config["dataset"]["task"]
        return [run for run in self.runs + self.localizer_runs if run["subject"] == subject and run.get("task", main) == task]

    def pattern_tasks(self, name):
        """The run-id task of each part of an analysis (None: the main task), or None when it reads the main task only."""
        main = self.config["dataset"]["task"]
        tasks = dataset_check.analysis_tasks(_plain(self.analyses[name].entry), main)
        if set(tasks.values()) == {main}:
            return None
        return {("within" if part is None else part): (None if task == main else task) for part, task in tasks.items()}

    @property
    def seed(self):
        return self.config["study"]["seed"]

    @property
    def is_demo(self):
        return self.config["dataset"]["source"] == "demo"

    @property
    def results_dir(self):
        """The study's results folder (``study.results_dir``; checked by :func:`foldwise.results_folder.check_results_dir`)."""
        return self.config["study"].get("results_dir", contract.RESULTS)

    @property
    def paths(self):
        """Every output path of this study, under its results folder (:class:`foldwise.contract.ResultPaths`)."""
        return contract.ResultPaths(self.results_dir)

    # -- the exact settings each step reads (a rule's params.settings) -------------
    def searchlight_method(self, step):
        """The searchlight section's keys one searchlight step reads (never the switch or the analysis list)."""
        section = self.config["searchlight"]
        keys = {"searchlight_block": ("radius_mm", "classifier", "n_blocks", "n_permutations"),
                "searchlight_merge": ("n_blocks", "n_permutations"),
                "searchlight_group": ("n_permutations", "tfce")}[step]
        return {key: section[key] for key in keys}

    def searchlight_analysis(self, name, step):
        """The part of an analysis a searchlight step reads: what is decoded, plus the folds and the SVM's C for the blocks."""
        analysis = self.analyses[name]
        view = analysis.outline()
        if step == "searchlight_block":
            view["folds"] = _plain(analysis.entry["folds"])
            if self.config["searchlight"]["classifier"] == "linear_svm":
                view["svm_c"] = analysis.entry["svm_c"]
        return view

    def settings(self, step, wildcards):
        """``params.settings`` of one job: exactly the config subset the step reads.

        Parameters
        ----------
        step : str
            The rule name.
        wildcards : mapping
            The job's wildcards (``subject``, ``run_id``, ``roi``, ``analysis``, ``block``).
        """
        return STEP_SETTINGS[step](self, wildcards)


def _demo_settings(study, wildcards):
    dataset = study.config["dataset"]
    return {"demo": study.config["demo"], "seed": study.seed, "task": dataset["task"], "bids_root": dataset["bids_root"],
            "patterns": dataset["patterns"], "confounds": dataset["confounds"]}


def _localizer_settings(study):
    """What a localizer ROI's own GLM reads: the GLM's design keys and the dataset's nuisance keys."""
    glm, dataset = study.config["glm"], study.config["dataset"]
    return {"glm": {key: glm[key] for key in ("hrf_derivatives", "highpass_s", "hrf_steps_per_scan")}, "confounds": dataset["confounds"],
            "drop_initial_volumes": dataset["drop_initial_volumes"], "condition_column": dataset["condition_column"]}


def _glm_settings(study, wildcards):
    # One job fits every run of the subject; each run's part of the job is keyed on these settings with "runs" narrowed to
    # that run (jobs/glm.py), so a run added or removed recomputes no other run.
    return {"glm": study.config["glm"], "confounds": study.config["dataset"]["confounds"], "subject": wildcards["subject"],
            "runs": [{"session": run["session"], "run_id": run["run_id"]} for run in study.runs_of(wildcards["subject"])],
            "drop_initial_volumes": study.config["dataset"]["drop_initial_volumes"], "condition_column": study.config["dataset"]["condition_column"]}


def _decode_gather_settings(study, wildcards):
    analysis = study.analyses[wildcards["analysis"]]
    return {"analysis": {**analysis.outline(), "voxel_counts": _plain(analysis.entry["voxel_counts"])}, "subject": wildcards["subject"]}


def _group_settings(study, wildcards):
    analysis = study.analyses[wildcards["analysis"]]
    settings = {"group": study.config["group"], "analysis": {**_plain(analysis.entry), "rois": list(analysis.rois)},
                "subjects": list(study.subjects), "seed": study.seed}
    if study.config["group"].get("family") == "all_analyses":  # the Bonferroni factor over analyses
        settings["n_analyses"] = sum("group" in entry.steps for entry in study.analyses.values())
    return settings


def _calibrate_settings(study, wildcards):
    settings = _group_settings(study, wildcards)
    settings["calibrate"] = study.config["calibrate"]
    if study.pattern_tasks(wildcards["analysis"]):  # as decode: the task of each part, only when not the main task
        settings["pattern_tasks"] = study.pattern_tasks(wildcards["analysis"])
    return settings


STEP_SETTINGS = {
    "demo_dataset": _demo_settings,
    "brain_mask": lambda study, w: {"brain_mask": study.config["brain_mask"], "subject": w["subject"]},
    "glm": _glm_settings,
    "roi_mask": lambda study, w: {"roi": _plain(study.rois[w["roi"]].entry), "subject": w["subject"]},
    "roi_counts": lambda study, w: {"subject": w["subject"]},
    # One job decodes every ROI of the analysis; each ROI's part of the job is keyed on these settings without "rois" (jobs/decode.py).
    "decode": lambda study, w: {"analysis": study.analyses[w["analysis"]].method(), "subject": w["subject"],
                                "rois": list(study.analyses[w["analysis"]].rois), "seed": study.seed,
                                **({"pattern_tasks": study.pattern_tasks(w["analysis"])} if study.pattern_tasks(w["analysis"]) else {})},
    "decode_gather": _decode_gather_settings,
    "group": _group_settings,
    "calibrate": _calibrate_settings,
    "searchlight_block": lambda study, w: {"searchlight": study.searchlight_method("searchlight_block"),
                                           "analysis": study.searchlight_analysis(w["analysis"], "searchlight_block"),
                                           "subject": w["subject"], "block": int(w["block"]), "seed": study.seed},
    "searchlight_merge": lambda study, w: {"searchlight": study.searchlight_method("searchlight_merge"),
                                           "analysis": study.searchlight_analysis(w["analysis"], "searchlight_merge"),
                                           "subject": w["subject"]},
    "searchlight_group": lambda study, w: {"searchlight": study.searchlight_method("searchlight_group"),
                                           "analysis": study.searchlight_analysis(w["analysis"], "searchlight_group"),
                                           "subjects": list(study.subjects), "seed": study.seed,
                                           # the maps read the draws and the level; the ROI table's options are not theirs
                                           "group": {key: study.config["group"][key] for key in ("n_draws", "alpha")}},
    "manifest": lambda study, w: {},
}

# The geometry analysis kind's own steps (foldwise.geometry.wiring), plugged in at one place.
study_plan.register_steps({step: study_plan.Step(identity, outputs) for step, (identity, outputs) in geometry_wiring.STEP_OUTPUTS.items()},
                          geometry_wiring.JOB_INPUTS, geometry_wiring.STEP_SETTINGS, geometry_wiring.planned_jobs)


# The localizer ROI kind's own step: its GLM on the localizer runs stays out of the roi_mask step's code key.
def _localizer_roi_inputs(study, wildcards):
    """The roi_mask inputs of the ROI (brain mask, constraint files) and the subject's localizer runs; nothing of the decoded task."""
    roi = study.rois[wildcards["roi"]]
    runs = study.task_runs(wildcards["subject"], roi.entry["localizer"]["task"])
    inputs = study_plan.roi_mask_inputs(study, wildcards)
    inputs.update({name: [run[name] for run in runs] for name in ("bold", "events", "sidecar")})
    dataset = study.config["dataset"]
    if dataset["confounds"] or isinstance(dataset["drop_initial_volumes"], dict):
        inputs["confounds"] = [run["confounds"] for run in runs]
    return inputs


study_plan.register_steps(
    {"localizer_roi": study_plan.Step("sub-{subject}_roi-{roi}", study_plan.named_outputs(mask="roi_mask", info="roi_info"))},
    {"localizer_roi": _localizer_roi_inputs},
    {"localizer_roi": lambda study, w: {"roi": _plain(study.rois[w["roi"]].entry), "subject": w["subject"], **_localizer_settings(study)}},
    lambda study: study_plan.roi_jobs(study, "localizer_roi"))


# -- building the model (every check of meaning, once) ------------------------------
def _demo_surveys(config, runs):
    """What each demo run will hold (its files are written by the first job, after planning)."""
    settings = config["demo"]
    return [dataset_check.RunSurvey(subject=run["subject"], session=run["session"], task=config["dataset"]["task"], run_id=run["run_id"],
                                    events=run["events"], n_volumes=0, tr_s=float(settings["tr_s"]), grid=tuple(settings["grid_shape"]),
                                    voxel_mm=(float(settings["voxel_size_mm"]),) * 3, trial_types=tuple(sorted(demo.CONDITIONS)))
            for run in runs]


def check_events(config, runs, path):
    """Every condition the config names is in the events of every subject (did-you-mean on a miss), before any job.

    One check for every step: decoding and the searchlight take their
    analyses from this model, so a misspelt condition stops the workflow here
    with one message. The survey itself is :func:`foldwise.data.check.check_dataset`
    (also behind ``make check``); the demo's runs are described by the simulator.
    """
    surveys = _demo_surveys(config, runs) if config["dataset"]["source"] == "demo" else None
    dataset_check.check_dataset(config, runs, path, surveys=surveys)


def check_meaning(config, path="the study config"):
    """Every check of meaning that needs the config only (no dataset): names, references, kinds, counts.

    :func:`foldwise.config.validate` calls it after the schema, so a config
    that validates is one this model can be built from.
    """
    check_results_dir(config, path)  # the results folder first: the other messages may name paths under it
    roi_names = [entry["name"] for entry in config["rois"]]
    for repeated in _duplicates(roi_names):
        raise InputError(path, "rois[].name", f"the ROI name '{repeated}' is used twice", "give each ROI a unique name")
    for index, entry in enumerate(config["rois"]):
        kinds = [name for name in ROI_KINDS if name in entry]
        if len(kinds) != 1:
            raise InputError(path, f"rois[{index}]", f"an ROI needs exactly one of {', '.join(repr(k) for k in ROI_KINDS)}, "
                             f"found {', '.join(kinds) or 'none'}", "keep one definition")
        ROI_KINDS[kinds[0]].check(entry, f"rois[{index}]", path, config)
    names = [entry["name"] for entry in config["analyses"]]
    for repeated in _duplicates(names):
        raise InputError(path, "analyses[].name", f"the analysis name '{repeated}' is used twice", "give each analysis a unique name")
    for index, entry in enumerate(config["analyses"]):
        where = f"analyses[{index}]"
        if entry["kind"] not in ANALYSIS_KINDS:
            raise InputError(path, f"{where}.kind", f"unknown kind '{entry['kind']}'", f"use one of {', '.join(ANALYSIS_KINDS)}")
        for roi in entry["rois"]:
            if roi not in roi_names:
                close = difflib.get_close_matches(roi, roi_names, n=1)
                hint = f" (did you mean '{close[0]}'?)" if close else ""
                raise InputError(path, f"{where}.rois", f"unknown ROI '{roi}'{hint}", f"use one of {', '.join(roi_names)} or define it under rois")
        ANALYSIS_KINDS[entry["kind"]].check(entry, where, path)
        counts = [count for count in entry["voxel_counts"] if count != "all"]
        if counts != sorted(counts):
            raise InputError(path, f"{where}.voxel_counts", f"counts {counts} are not increasing", "list the counts from small to large ('all' last)")
    excluded = set(config["dataset"]["exclude_subjects"])
    chosen = config["dataset"]["subjects"]
    if chosen and not set(chosen) - excluded:
        raise InputError(path, "dataset.exclude_subjects", "every listed subject is excluded", "exclude fewer subjects")
    searchlight = config["searchlight"]
    kinds = {entry["name"]: entry["kind"] for entry in config["analyses"]}
    for name in searchlight["analyses"]:
        if name not in kinds:
            close = difflib.get_close_matches(name, names, n=1)
            hint = f" (did you mean '{close[0]}'?)" if close else ""
            raise InputError(path, "searchlight.analyses", f"unknown analysis '{name}'{hint}", f"use one of {', '.join(names)}")
        if not ANALYSIS_KINDS[kinds[name]].searchlight:
            mapped = ", ".join(kind.name for kind in ANALYSIS_KINDS.values() if kind.searchlight)
            raise InputError(path, "searchlight.analyses", f"analysis '{name}' is of kind '{kinds[name]}', which the searchlight does not map",
                             f"list analyses of a kind the searchlight maps ({mapped})")


def _build_rois(config):
    rois = {}
    for entry in config["rois"]:
        kind = ROI_KINDS[next(name for name in ROI_KINDS if name in entry)]
        rois[entry["name"]] = Roi(name=entry["name"], kind=kind.name, entry=_frozen(entry), source=kind.source(entry, config),
                                  threshold=entry.get("threshold"), min_voxels=int(entry["min_voxels"]))
    return rois


def _build_analyses(config, roi_names, searchlight_names):
    analyses = {}
    for entry in config["analyses"]:
        kind = ANALYSIS_KINDS[entry["kind"]]
        class_names, set_names, directions = kind.outline(entry)
        analyses[entry["name"]] = Analysis(
            name=entry["name"], kind=kind.name, entry=_frozen(entry), rois=tuple(entry["rois"]) or tuple(roi_names),
            class_names=tuple(class_names), set_names=None if set_names is None else tuple(set_names), directions=tuple(directions),
            conditions=tuple(dict.fromkeys(condition for _, condition in kind.condition_keys(entry))),
            searchlight=entry["name"] in searchlight_names)
    return analyses


def build_study(config, path="the study config", overrides=()):
    """Build the :class:`Study` of a validated config, before any job.

    The config-only checks ran in :func:`check_meaning` (called by
    :func:`foldwise.config.validate`); this adds those that need the dataset:
    subjects and runs (:func:`foldwise.plan.plan_study`) and the conditions
    each analysis names, which must be in the events of every subject.

    Parameters
    ----------
    config : dict
        The output of :func:`foldwise.config.validate` (defaults filled).
    path : str
        The config file, named in every message.
    overrides : sequence of str
        The ``--config`` entries already merged into ``config``, kept for the report.

    Raises
    ------
    InputError
        Naming the config file, the key path and the fix: no subject left, a
        run's files missing, a condition absent from a subject's events, ...
    """
    plan = plan_study(config, path=path)
    searchlight = config["searchlight"]
    searchlight_names = tuple(searchlight["analyses"]) if searchlight["enabled"] else ()
    rois = _build_rois(config)
    analyses = _build_analyses(config, list(rois), searchlight_names)
    check_events(config, plan.runs + plan.localizer_runs, path)
    _check_task_pairing(config, plan, path, searchlight_names)
    _check_subject_images(config, plan.subjects, path)
    return Study(config=config, config_file=str(path), subjects=plan.subjects, runs=plan.runs, rois=rois, analyses=analyses,
                 searchlight_analyses=searchlight_names, searchlight_blocks=tuple(range(searchlight["n_blocks"])),
                 localizer_runs=plan.localizer_runs, overrides=tuple(str(entry) for entry in overrides))


def _check_subject_images(config, subjects, path):
    """An ROI image with {subject} in its path exists for every subject (else one message naming the first missing file)."""
    for index, roi in enumerate(config["rois"]):
        image = roi.get("image") or roi.get("localizer", {}).get("within", {}).get("image")
        if not image or "{subject}" not in image:
            continue
        missing = [subject for subject in subjects if not os.path.isfile(image.replace("{subject}", subject))]
        if missing:
            key = f"rois[{index}].image" if "image" in roi else f"rois[{index}].localizer.within.image"
            raise InputError(image.replace("{subject}", missing[0]), key,
                             f"no ROI image for subject(s) {', '.join(missing[:8])}{' ...' if len(missing) > 8 else ''} "
                             f"({len(subjects) - len(missing)} of {len(subjects)} subjects have one)",
                             "write each subject's ROI image where the path says ({subject} is the label without sub-), "
                             "or exclude the subject with dataset.exclude_subjects")


def _check_task_pairing(config, plan, path, searchlight_names):
    """A cross analysis over two tasks needs, in every subject, a run of each task per fold unit (refused otherwise, before any job)."""
    from foldwise.decoding.folds import pair_runs_across_tasks  # the same pairing the decode job uses

    main = config["dataset"]["task"]
    localizer_tasks = {roi["name"]: roi["localizer"]["task"] for roi in config["rois"] if "localizer" in roi}
    for index, entry in enumerate(config["analyses"]):
        tasks = dataset_check.analysis_tasks(entry, main)
        for roi in entry["rois"] or [roi["name"] for roi in config["rois"]]:
            if localizer_tasks.get(roi) in tasks.values():
                raise InputError(path, f"analyses[{index}].rois", f"analysis '{entry['name']}' decodes task {localizer_tasks[roi]}'s "
                                                                  f"patterns inside ROI {roi}, which was defined from that task's runs "
                                                                  "(circular: the selection saw the decoded data)",
                                 f"leave {roi} out of this analysis's rois, or define {roi} from another task")
        if set(tasks.values()) == {main}:
            continue
        if entry["name"] in searchlight_names:
            raise InputError(path, "searchlight.analyses", f"analysis '{entry['name']}' reads task(s) other than {main}; the searchlight "
                                                           f"maps {main} only", "leave it out of searchlight.analyses")
        if entry["kind"] != "cross" or len(set(tasks.values())) < 2:
            continue
        (set_a, task_a), (set_b, task_b) = tasks.items()
        for subject in plan.subjects:
            labels, sets = [], []
            for number, task in enumerate((task_a, task_b)):
                runs = [run["run_id"] for run in plan.runs if run["subject"] == subject and run.get("task", main) == task]
                labels += runs
                sets += [number] * len(runs)
            try:
                pair_runs_across_tasks(labels, sets, (set_a, set_b), entry["folds"]["scheme"])
            except InputError as error:
                raise InputError(path, f"analyses[{index}].set_tasks", f"subject {subject}: {error.problem}", error.fix) from None
