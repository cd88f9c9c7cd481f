"""Narrow keys: changing one config key reruns exactly the steps that read it.

From the plan (no Snakemake): every leaf key of the validated demo config is
changed, one at a time, to another valid value; a step "reruns" when one of
its jobs appears, disappears, or changes its settings, inputs or outputs.
The steps that do must be exactly the readers this file declares for the key
(READERS, written by hand from what each job reads). A key of the demo config
without an entry fails the test, so a new key cannot skip the check.

End to end (marked e2e): a Snakemake dry run on the tiny study shows that an
analysis's voxel_counts and n_permutations schedule no searchlight job, and
that a comment edit in a module a step does not import reruns nothing.
"""

import copy
import re

import pytest

from foldwise import plan
from foldwise.config import load_study_config, validate
from foldwise.provenance.hashing import hash_object
from foldwise.study import build_study
from workflow_support import REPO, TINY_STUDY, copy_repository, scheduled_jobs, snakemake, write_study

DEMO_CONFIG = REPO / "config" / "config.yaml"

ROI_STEPS = {"roi_mask", "roi_counts", "decode", "decode_gather", "group", "report"}
DECODING = {"decode", "group", "report"}
SEARCHLIGHT = {"searchlight_block", "searchlight_merge", "searchlight_group"}
EVERY_STEP = {"demo_dataset", "brain_mask", "glm", "roi_mask", "roi_counts", "decode", "decode_gather", "group", "report"} | SEARCHLIGHT
# The report shows the whole config on its page, so it reads every key.

# key pattern (list items as [i]) -> steps that read it, for the demo study (analyses[1] is the one the searchlight maps)
READERS = {
    "study.name": {"report"},
    "study.seed": {"demo_dataset", "decode", "group", "searchlight_block", "searchlight_group", "report"},
    "study.results_dir": set(),  # every output moves (filled in below: every planned step)
    "study.store_dir": {"report"},  # scripts read the store from Snakemake's config, not params: it holds results, it shapes none
    "dataset.bids_root": {"demo_dataset", "brain_mask", "glm", "report"},
    "dataset.derivatives_root": {"report"},  # unused by a demo study (its files are all under bids_root)
    "dataset.space": {"report"},
    "dataset.res": {"report"},
    "dataset.condition_column": {"glm", "report"},
    "dataset.drop_initial_volumes": {"glm", "report"},
    "dataset.task": {"demo_dataset", "brain_mask", "glm", "report"},
    "dataset.subjects": EVERY_STEP,
    "dataset.exclude_subjects": EVERY_STEP,
    "dataset.atlas_image": {"demo_dataset", "roi_mask", "report"},
    "dataset.atlas_labels": {"demo_dataset", "roi_mask", "report"},
    "dataset.confounds": {"demo_dataset", "glm", "report"},
    "dataset.patterns.bold": {"demo_dataset", "brain_mask", "glm", "report"},
    "dataset.patterns.events": {"demo_dataset", "glm", "report"},
    "dataset.patterns.sidecar": {"demo_dataset", "glm", "report"},
    "dataset.patterns.confounds": {"demo_dataset", "glm", "report"},
    "dataset.patterns.brain_mask": {"demo_dataset", "brain_mask", "report"},
    "demo.n_subjects": EVERY_STEP,
    "demo.n_runs": {"demo_dataset", "brain_mask", "glm", "decode", "searchlight_block", "report"},
    "demo.grid_shape": {"demo_dataset", "report"},
    "demo.voxel_size_mm": {"demo_dataset", "report"},
    "demo.tr_s": {"demo_dataset", "report"},
    "demo.trials_per_condition_per_run": {"demo_dataset", "report"},
    "demo.signal_to_noise": {"demo_dataset", "report"},
    "glm.hrf_derivatives": {"glm", "report"},
    "glm.highpass_s": {"glm", "report"},
    "glm.serial_correlation": {"glm", "report"},
    "glm.pattern_mode": {"glm", "report"},
    "glm.statistic": {"glm", "report"},
    "glm.conditions": {"glm", "report"},
    "glm.hrf_steps_per_scan": {"glm", "report"},
    "brain_mask.mean_fraction": {"brain_mask", "report"},
    "brain_mask.summary_volumes": {"brain_mask", "report"},
    "rois[i].name": ROI_STEPS,
    "rois[i].labels": {"roi_mask", "report"},
    "rois[i].min_voxels": {"roi_mask", "report"},
    "analyses[0].name": {"decode", "decode_gather", "group", "report"},
    "analyses[1].name": {"decode", "decode_gather", "group", "report"} | SEARCHLIGHT,
    "analyses[0].kind": {"decode", "decode_gather", "group", "report"},
    "analyses[1].kind": {"decode", "decode_gather", "group", "report"} | SEARCHLIGHT,
    "analyses[0].classes.*": {"decode", "decode_gather", "group", "report"},
    "analyses[1].sets.*": {"decode", "decode_gather", "group", "report"} | SEARCHLIGHT,
    "analyses[i].n_permutations": DECODING,  # never a searchlight job: it has its own searchlight.n_permutations
    "analyses[i].voxel_counts": {"decode", "decode_gather", "group", "report"},  # never a searchlight job
    "analyses[i].rois": {"decode", "decode_gather", "group", "report"},
    "analyses[i].selection": DECODING,
    "analyses[i].classifier": DECODING,
    "analyses[i].svm_c": DECODING,  # the searchlight reads it only when its own classifier is linear_svm
    "analyses[i].logistic_c": DECODING,
    "analyses[i].demean_patterns": DECODING,
    "analyses[0].folds.scheme": DECODING,
    "analyses[0].folds.n_groups": DECODING,
    "analyses[1].folds.scheme": DECODING | {"searchlight_block"},
    "analyses[1].folds.n_groups": DECODING | {"searchlight_block"},
    "group.n_draws": {"group", "searchlight_group", "report"},
    "group.alpha": {"group", "searchlight_group", "report"},
    "group.prevalence": {"group", "report"},
    "group.fwe_method": {"group", "report"},
    "group.family": {"group", "report"},
    # the design self-check (make calibrate) is off the default target: no planned job reads its keys but the report
    "calibrate.n_studies": {"report"},
    "calibrate.n_draws": {"report"},
    "calibrate.classifier": {"report"},
    "searchlight.enabled": SEARCHLIGHT | {"report"},
    "searchlight.analyses": SEARCHLIGHT | {"report"},
    "searchlight.radius_mm": {"searchlight_block", "report"},
    "searchlight.n_blocks": {"searchlight_block", "searchlight_merge", "report"},
    "searchlight.n_permutations": SEARCHLIGHT | {"report"},
    "searchlight.tfce": {"searchlight_group", "report"},
    "searchlight.classifier": {"searchlight_block", "report"},
    "report.confusion_n_voxels": {"report"},
    "report.comparison_n_voxels": {"report"},
}
# Keys not perturbed here, each with where it is tested instead.
NOT_PERTURBED = {
    "dataset.source": "switches the data source itself (demo or a BIDS folder on disk): tests/test_workflow.py runs both",
    "analyses[i].task": "the demo simulates one task, so another task is refused; tests/test_datasets.py plans a two-task study "
                        "(decode reads it as pattern_tasks, the GLM runs of the task are scheduled)",
}

# Geometry analyses (analyses[2] of the demo) run their own steps (foldwise.geometry.wiring):
# geometry_patterns (and geometry_searchlight, on the whole brain) refit the GLM per subject, so they
# read the data and GLM keys (not glm.pattern_mode or glm.statistic: always betas per condition); the
# others read the analysis's own entry; none reads the decoding keys that the schema fills in for
# every analysis. The geometry searchlight is switched by geometry.searchlight and shares only
# searchlight.radius_mm with the decoding searchlight.
GEOMETRY_SEARCHLIGHT = {"geometry_searchlight", "geometry_searchlight_group"}
GEOMETRY = {"geometry_patterns", "geometry_subject", "geometry_group"} | GEOMETRY_SEARCHLIGHT
_GEOMETRY_ENTRY = {"geometry_subject", "geometry_group", "report"} | GEOMETRY_SEARCHLIGHT
for _key in ("dataset.subjects", "dataset.exclude_subjects", "demo.n_subjects"):
    READERS[_key] = READERS[_key] | GEOMETRY
READERS["rois[i].name"] = READERS["rois[i].name"] | (GEOMETRY - GEOMETRY_SEARCHLIGHT)
for _key in ("dataset.bids_root", "dataset.task", "dataset.confounds", "dataset.condition_column", "dataset.drop_initial_volumes",
             "dataset.patterns.bold", "dataset.patterns.events", "dataset.patterns.sidecar", "dataset.patterns.confounds", "demo.n_runs"):
    READERS[_key] = READERS[_key] | {"geometry_patterns", "geometry_searchlight"}
for _key in [key for key in READERS if key.startswith("glm.") and key not in ("glm.pattern_mode", "glm.statistic")]:
    READERS[_key] = READERS[_key] | {"geometry_patterns", "geometry_searchlight"}
for _key in ("study.seed", "group.n_draws", "group.alpha"):
    READERS[_key] = READERS[_key] | {"geometry_group", "geometry_searchlight_group"}
READERS["searchlight.radius_mm"] = READERS["searchlight.radius_mm"] | {"geometry_searchlight"}
READERS.update({
    "analyses[2].name": _GEOMETRY_ENTRY,
    "analyses[2].rois": {"geometry_patterns", "geometry_subject", "geometry_group", "report"},
    "analyses[2].geometry.conditions": GEOMETRY | {"report"},
    "analyses[i].geometry.models[i].name": _GEOMETRY_ENTRY,
    "analyses[i].geometry.models[i].differ_in": _GEOMETRY_ENTRY,
    "analyses[i].geometry.models[i].only_for.modality": _GEOMETRY_ENTRY,
    "analyses[2].geometry.distance": _GEOMETRY_ENTRY,
    "analyses[2].geometry.noise_normalisation": _GEOMETRY_ENTRY,
    "analyses[2].geometry.comparison": _GEOMETRY_ENTRY,
    "analyses[2].geometry.searchlight": GEOMETRY_SEARCHLIGHT | {"report"},
    "analyses[2].geometry.voxel_counts": {"geometry_subject", "geometry_group", "report"},  # the searchlight uses whole spheres
    **{f"analyses[2].geometry.features.{condition}.{feature}": _GEOMETRY_ENTRY
       for condition in ("seen_round", "seen_square", "seen_star", "heard_round", "heard_square", "heard_star")
       for feature in ("modality", "shape")},
    **{f"analyses[2].{key}": {"report"} for key in ("n_permutations", "voxel_counts", "selection", "classifier", "svm_c", "logistic_c",
                                                     "demean_patterns", "folds.scheme", "folds.n_groups")},
})
# Another results folder moves every output of every job (foldwise.contract.ResultPaths), and nothing else.
READERS["study.results_dir"] = EVERY_STEP | GEOMETRY
NOT_PERTURBED["analyses[2].kind"] = "a geometry entry has no classes or sets to turn into another kind: tests/test_geometry.py refuses the mix"

# Perturbed values that need more than "another value of the same type".
SPECIAL = {
    "study.name": "another-study",
    "study.store_dir": "elsewhere/.store",
    "dataset.subjects": ["01", "02", "03"],
    "dataset.exclude_subjects": ["05"],
    "dataset.condition_column": "stimulus",
    "dataset.patterns.brain_mask": "sub-{subject}/func/sub-{subject}_task-{task}_run-{run}_desc-brain_mask.nii.gz",
    "dataset.space": "template",
    "dataset.res": "2",
    "dataset.derivatives_root": "derivatives/prep",
    "glm.conditions": ["seen_round", "seen_square", "seen_star", "heard_round", "heard_square", "heard_star"],
    "rois[i].labels": ["ember_L"],
    "analyses[i].rois": ["ember", "glow"],
    "analyses[i].voxel_counts": [10, 50, "all"],
    "searchlight.analyses": ["shape", "shape_seen_heard"],
    "report.confusion_n_voxels": 50,
    "calibrate.classifier": "gaussian_nb",
}
SPECIAL.update({"analyses[i].geometry.voxel_counts": [25, "all"], "analyses[i].geometry.models[i].differ_in": ["shape", "modality"], "analyses[i].geometry.models[i].only_for.modality": ["heard"]})
_ENUMS = {  # another valid choice of each enum key
    "glm.hrf_derivatives": "temporal", "glm.serial_correlation": "ignore", "glm.pattern_mode": "lss", "glm.statistic": "beta",
    "analyses[i].selection": "f", "analyses[i].classifier": "logistic_l2", "analyses[i].folds.scheme": "run_groups",
    "searchlight.classifier": "gaussian_nb", "group.fwe_method": "min_p", "group.family": "all_directions",
    "analyses[i].geometry.distance": "euclidean_cv", "analyses[i].geometry.noise_normalisation": "univariate",
    "analyses[i].geometry.comparison": "spearman",
}


def _leaves(node, path=()):
    """(path, value) of every leaf of a config; lists of mappings are walked item by item."""
    if isinstance(node, dict):
        for key, value in node.items():
            yield from _leaves(value, path + (key,))
    elif isinstance(node, list) and node and all(isinstance(item, dict) for item in node):
        for index, item in enumerate(node):
            yield from _leaves(item, path + (index,))
    else:
        yield path, node


def _text(path):
    return "".join(f"[{part}]" if isinstance(part, int) else (f".{part}" if index else part) for index, part in enumerate(path))


def _pattern(path):
    """The READERS key of a leaf path: most specific first (analyses[1].folds.scheme, then analyses[i]..., then classes.*)."""
    text = _text(path)
    candidates = [text, re.sub(r"\[\d+\]", "[i]", text)]
    candidates += [re.sub(r"^(analyses\[\d+\]\.(classes|sets))\..*$", r"\1.*", text)]
    for candidate in candidates:
        if candidate in READERS or candidate in NOT_PERTURBED:
            return candidate
    return None


def _perturbed_value(path, value):
    key = re.sub(r"\[\d+\]", "[i]", _text(path))
    if key in SPECIAL:
        return copy.deepcopy(SPECIAL[key])
    if key in _ENUMS:
        return _ENUMS[key]
    if isinstance(value, bool):
        return not value
    if isinstance(value, int):
        return value + 1
    if isinstance(value, float):
        return value * 1.5
    if isinstance(value, list) and value and all(isinstance(item, int) for item in value):
        return [item + 2 for item in value]
    if isinstance(value, list):
        return value[:-1]
    if isinstance(value, str):
        return value.replace(".", "x.", 1) if "." in value else value + "x"
    raise AssertionError(f"no perturbation for {_text(path)} = {value!r}")


def _set(config, path, value):
    node = config
    for part in path[:-1]:
        node = node[part]
    node[path[-1]] = value


def _perturb(raw, path, value):
    """A copy of the validated config with one key changed (and what must follow it: a renamed name's references)."""
    config = copy.deepcopy(raw)
    text = _text(path)
    if re.fullmatch(r"analyses\[\d+\]\.name", text):
        old = config["analyses"][path[1]]["name"]
        config["analyses"][path[1]]["name"] = old + "x"
        config["searchlight"]["analyses"] = [name + "x" if name == old else name for name in config["searchlight"]["analyses"]]
    elif text == "study.results_dir":  # a demo keeps its simulated files inside its results folder (foldwise.results_folder)
        _set(config, path, value)
        for key in ("bids_root", "atlas_image", "atlas_labels"):
            config["dataset"][key] = value + config["dataset"][key][len(raw["study"]["results_dir"]):]
    elif re.fullmatch(r"rois\[\d+\]\.name", text):
        _set(config, path, value)
    elif re.fullmatch(r"analyses\[\d+\]\.kind", text):
        entry = config["analyses"][path[1]]
        if entry["kind"] == "within":  # the same shapes, now as a cross analysis
            entry.pop("classes")
            entry["kind"], entry["sets"] = "cross", {"seen": {"round": "seen_round", "square": "seen_square", "star": "seen_star"},
                                                     "heard": {"round": "heard_round", "square": "heard_square", "star": "heard_star"}}
        else:
            sets = entry.pop("sets")
            entry["kind"], entry["classes"] = "within", {label: [condition] for label, condition in next(iter(sets.values())).items()}
    elif re.fullmatch(r"analyses\[\d+\]\.sets\.\w+\.\w+", text):  # swap two classes' conditions within the set
        mapping = config["analyses"][path[1]]["sets"][path[3]]
        other = next(label for label in mapping if label != path[4])
        mapping[path[4]], mapping[other] = mapping[other], mapping[path[4]]
    elif re.fullmatch(r"analyses\[\d+\]\.classes\.\w+", text):
        classes = config["analyses"][path[1]]["classes"]
        classes[path[3]] = classes[path[3]] + ["heard_" + classes[path[3]][0].split("_", 1)[1]]
    else:
        _set(config, path, value)
    return config


def _plan_fingerprint(config):
    """step -> {job identity: hash of (settings, inputs, outputs)} for every planned job (the manifest's records aside)."""
    study = build_study(validate(config, path="config/config.yaml"), path="config/config.yaml")
    jobs = {}
    for step, wildcards in plan.planned_jobs(study):
        key = hash_object({"settings": plan.job_settings(study, step, wildcards), "inputs": plan.job_inputs(study, step, wildcards),
                           "outputs": plan.job_outputs(study, step, wildcards)})
        jobs.setdefault(step, {})[tuple(sorted(wildcards.items()))] = key
    return jobs


def _changed_steps(before, after):
    return {step for step in set(before) | set(after) if before.get(step) != after.get(step)}


@pytest.fixture(scope="module")
def demo():
    raw = load_study_config(DEMO_CONFIG)
    return raw, _plan_fingerprint(raw)


def _cases():
    raw = load_study_config(DEMO_CONFIG)
    return [path for path, _ in _leaves(raw)]


def test_every_key_of_the_demo_config_has_declared_readers():
    """A new key must say which steps read it (or where else it is tested)."""
    missing = [_text(path) for path in _cases() if _pattern(path) is None]
    assert not missing, f"add these keys to READERS in tests/test_narrow_keys.py: {missing}"


@pytest.mark.parametrize("path", _cases(), ids=_text)
def test_changing_a_key_reruns_exactly_its_readers(demo, path):
    raw, before = demo
    pattern = _pattern(path)
    if pattern is None or pattern in NOT_PERTURBED:
        pytest.skip(NOT_PERTURBED.get(pattern, "no readers declared (see the test above)"))
    node = raw
    for part in path:
        node = node[part]
    perturbed = _perturb(raw, path, _perturbed_value(path, node))
    assert perturbed != raw, f"{_text(path)}: the perturbation leaves the config as it was; give it another value in SPECIAL or _ENUMS"
    changed = _changed_steps(before, _plan_fingerprint(perturbed))
    assert changed == READERS[pattern], (f"{_text(path)}: reruns {sorted(changed)}; declared readers {sorted(READERS[pattern])} "
                                         f"(extra: {sorted(changed - READERS[pattern])}, missing: {sorted(READERS[pattern] - changed)})")


def test_an_unchanged_config_reruns_nothing(demo):
    raw, before = demo
    assert _changed_steps(before, _plan_fingerprint(copy.deepcopy(raw))) == set()


def test_searchlight_settings_hold_no_decoding_only_keys(demo):
    """The searchlight takes its analysis from the model, without voxel counts, permutations or the ROI classifier."""
    raw, _ = demo
    study = build_study(raw, path="config/config.yaml")
    for step in SEARCHLIGHT:
        wildcards = {"analysis": "shape_seen_heard", "subject": "01", "block": "0"}
        settings = plan.job_settings(study, step, wildcards)
        assert not {"voxel_counts", "n_permutations", "classifier", "selection", "rois", "logistic_c"} & set(settings["analysis"])


# -- end to end: Snakemake's own view of the same keys -----------------------------------------
def _searchlight_tiny_study():
    study = copy.deepcopy(TINY_STUDY)
    study["searchlight"] = {"enabled": True, "analyses": ["carry"], "n_blocks": 2, "n_permutations": 5}
    study["analyses"] = [entry for entry in study["analyses"] if entry["name"] == "carry"]
    study["rois"] = study["rois"][:1]
    return study


@pytest.mark.e2e
@pytest.mark.slow
def test_dry_run_schedules_no_searchlight_job_for_decoding_keys_or_foreign_comments(tmp_path):
    workdir = copy_repository(tmp_path / "repo")
    study = _searchlight_tiny_study()
    write_study(workdir, study)
    snakemake(workdir)  # the whole tiny study, once
    steps = lambda: {rule for rule, _ in scheduled_jobs(workdir)}  # noqa: E731
    assert steps() == set(), "a finished run should schedule nothing"

    for key, value in (("voxel_counts", [10, "all"]), ("n_permutations", 7)):
        changed = copy.deepcopy(study)
        changed["analyses"][0][key] = value
        write_study(workdir, changed)
        scheduled = steps()
        assert "decode" in scheduled, f"changing {key} should rerun decoding: {sorted(scheduled)}"
        assert not SEARCHLIGHT & scheduled, f"changing an analysis's {key} schedules searchlight jobs: {sorted(scheduled)}"
    write_study(workdir, study)
    assert steps() == set()

    # A comment in a module no searchlight step imports (the ROI group statistics' job): only its own step reruns.
    group_job = workdir / "workflow" / "foldwise" / "jobs" / "group.py"
    group_job.write_text(group_job.read_text(encoding="utf-8") + "\n# a comment\n", encoding="utf-8")
    scheduled = steps()
    assert "group" in scheduled and not SEARCHLIGHT & scheduled, sorted(scheduled)
    assert scheduled <= {"group", "report", "manifest", "all"}, sorted(scheduled)
