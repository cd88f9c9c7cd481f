"""The study model (foldwise.study), the plan (foldwise.plan) and the data contract (foldwise.contract).

Sources: the direction order of cross decoding and the chance level are the
package's own definitions (foldwise.decoding.curves.cross_directions,
foldwise.searchlight.engine.analysis_outline); these tests check that the
model agrees with them, so there is one answer per question. The plan is
checked against the job list the workflow had before the model
(107 Snakemake jobs for the demo: 105 planned + manifest + all; measured on
commit 2b945cc with `snakemake -n`).
"""

import copy
import re
from pathlib import Path

import numpy as np
import pytest

from foldwise import contract, plan
from foldwise.config import load_study_config, validate
from foldwise.decoding.curves import cross_directions
from foldwise.errors import InputError
from foldwise.searchlight.engine import analysis_outline
from foldwise.study import ANALYSIS_KINDS, ROI_KINDS, AnalysisKind, build_study, register_analysis_kind
from workflow_support import REPO

CONFIG = "config/study.yaml"
LANTERNS = {
    "study": {"name": "lanterns", "seed": 3},
    "dataset": {"source": "demo"},
    "demo": {"n_subjects": 3, "n_runs": 2},
    "rois": [{"name": "ember", "labels": ["ember_L", "ember_R"]}, {"name": "glow", "labels": ["glow_L", "glow_R"]},
             {"name": "hush", "sphere": {"center_mm": [10.0, 10.0, 10.0], "radius_mm": 6.0}}],
    "analyses": [
        {"name": "shape", "kind": "within", "classes": {"round": ["seen_round"], "square": ["seen_square"], "star": ["seen_star"]},
         "rois": ["glow"]},
        {"name": "carry", "kind": "cross", "sets": {"seen": {"round": "seen_round", "square": "seen_square"},
                                                    "heard": {"round": "heard_round", "square": "heard_square"}}},
    ],
    "searchlight": {"enabled": True, "analyses": ["carry"], "n_blocks": 3},
}


def _model(study=LANTERNS):
    return build_study(validate(copy.deepcopy(study), path=CONFIG), path=CONFIG)


def _error(study):
    with pytest.raises(InputError) as caught:
        _model(study)
    return str(caught.value)


def test_analyses_are_resolved_once():
    model = _model()
    shape, carry = model.analyses["shape"], model.analyses["carry"]
    assert shape.rois == ("glow",)
    assert carry.rois == ("ember", "glow", "hush")  # rois: [] means every ROI, in config order
    assert shape.class_names == ("round", "square", "star") and shape.set_names is None and shape.directions == ("within",)
    assert carry.class_names == ("round", "square") and carry.set_names == ("seen", "heard")
    assert carry.directions == tuple(cross_directions(["seen", "heard"]))  # the decoding module's order
    for analysis in (shape, carry):
        outline = analysis_outline(analysis.method())  # the searchlight's reading of the same entry
        assert tuple(outline["directions"]) == analysis.directions and outline["chance"] == pytest.approx(analysis.chance)
    assert shape.chance == pytest.approx(1 / 3) and carry.chance == pytest.approx(1 / 2)
    assert carry.conditions == ("seen_round", "seen_square", "heard_round", "heard_square")
    assert (shape.searchlight, carry.searchlight) == (False, True)


def test_rois_are_resolved_once():
    model = _model()
    assert [roi.kind for roi in model.rois.values()] == ["labels", "labels", "sphere"]
    assert model.rois["ember"].inputs(model.config) == {"atlas": model.config["dataset"]["atlas_image"],
                                                        "atlas_labels": model.config["dataset"]["atlas_labels"]}
    assert model.rois["hush"].inputs(model.config) == {} and model.rois["hush"].min_voxels == 10
    assert set(ROI_KINDS) >= {"labels", "image", "sphere"}


def test_subjects_runs_sessions_and_tasks():
    model = _model()
    assert model.subjects == ("01", "02", "03")
    assert [run["run_id"] for run in model.runs_of("02")] == ["run-01", "run-02"]
    assert model.sessions == () and model.tasks == ("lanterns",)
    assert model.searchlight_blocks == (0, 1, 2)


@pytest.mark.parametrize("mapped", [False, True], ids=["decoding only", "also the searchlight"])
def test_a_misspelt_condition_is_refused_before_any_job_with_one_message(mapped):
    """The issue's case: `round: [seen_round, seen_rond]` used to pass the searchlight without a word."""
    study = copy.deepcopy(LANTERNS)
    study["analyses"][0]["classes"]["round"] = ["seen_round", "seen_rond"]
    study["searchlight"]["analyses"] = ["shape", "carry"] if mapped else ["carry"]
    message = _error(study)
    assert "analyses[0].classes.round" in message and "'seen_rond'" in message and "did you mean 'seen_round'" in message
    assert message.startswith("results/demo/bids/sub-01/func/sub-01_task-lanterns_run-01_events.tsv: ")


def test_the_same_message_whether_the_searchlight_maps_the_analysis_or_not():
    messages = set()
    for names in (["carry"], ["shape", "carry"]):
        study = copy.deepcopy(LANTERNS)
        study["analyses"][0]["classes"]["round"] = ["seen_round", "seen_rond"]
        study["searchlight"]["analyses"] = names
        messages.add(_error(study))
    assert len(messages) == 1


def test_a_misspelt_cross_condition_is_refused():
    study = copy.deepcopy(LANTERNS)
    study["analyses"][1]["sets"]["heard"]["square"] = "heard_sqare"
    message = _error(study)
    assert "analyses[1].sets.heard.square" in message and "did you mean 'heard_square'" in message


def test_classes_of_a_cross_analysis_must_match():
    study = copy.deepcopy(LANTERNS)
    study["analyses"][1]["sets"]["heard"] = {"round": "heard_round", "star": "heard_star"}
    with pytest.raises(InputError, match=r"analyses\[1\]\.sets: the class labels of set 'seen' \(round, square\) and set 'heard'"):
        validate(study, path=CONFIG)


def test_a_condition_used_by_both_sets_is_refused():
    study = copy.deepcopy(LANTERNS)
    study["analyses"][1]["sets"]["heard"] = {"round": "seen_round", "square": "heard_square"}
    with pytest.raises(InputError, match=r"analyses\[1\]\.sets: condition 'seen_round' is used by both sets"):
        validate(study, path=CONFIG)


def test_an_unknown_searchlight_analysis_gets_a_did_you_mean():
    study = copy.deepcopy(LANTERNS)
    study["searchlight"]["analyses"] = ["cary"]
    with pytest.raises(InputError, match=r"searchlight\.analyses: unknown analysis 'cary' \(did you mean 'carry'\?\)"):
        validate(study, path=CONFIG)


def test_an_analysis_kind_plugs_in_at_one_place(monkeypatch):
    """A toy kind: registered once, it is validated, resolved, condition-checked and planned."""
    monkeypatch.setitem(ANALYSIS_KINDS, "pairs", None)  # restored after the test
    register_analysis_kind(AnalysisKind(
        "pairs", outline=lambda entry: (tuple(entry["classes"]), None, ("within",)),
        condition_keys=lambda entry: [(f"classes.{label}", c) for label, members in entry["classes"].items() for c in members],
        check=lambda entry, where, path: None, steps=("decode",), searchlight=False))
    config = validate(copy.deepcopy(LANTERNS), path=CONFIG)
    config["analyses"][0]["kind"] = "pairs"  # past the schema's enum, as a kind's own schema entry would allow
    model = build_study(config, path=CONFIG)
    assert model.analyses["shape"].kind == "pairs"
    steps = {step for step, wildcards in plan.planned_jobs(model) if wildcards.get("analysis") == "shape"}
    assert steps == {"decode"}
    config["analyses"][0]["classes"]["round"] = ["seen_rund"]
    with pytest.raises(InputError, match=r"analyses\[0\]\.classes\.round: .*did you mean 'seen_round'"):
        build_study(config, path=CONFIG)


def test_the_demo_plan_has_the_jobs_of_the_workflow_before_the_model():
    model = build_study(load_study_config(REPO / "config" / "config.yaml"), path="config/config.yaml")
    jobs = plan.planned_jobs(model)
    counts = {}
    for step, _ in jobs:
        counts[step] = counts.get(step, 0) + 1
    # measured on commit 2b945cc: snakemake -n lists these (plus manifest and all); kinds added since add their own steps;
    # decode: one job per subject x analysis since (it decodes every ROI of the analysis); glm: one job per subject since (every run)
    expected = {"demo_dataset": 1, "brain_mask": 5, "glm": 5, "roi_mask": 15, "roi_counts": 5, "decode": 10, "decode_gather": 10,
                "group": 2, "searchlight_block": 10, "searchlight_merge": 5, "searchlight_group": 1, "report": 1}
    assert {step: counts.get(step) for step in expected} == expected
    outputs = plan.all_job_outputs(model)
    assert len(outputs) == len(set(outputs))
    assert all(path.startswith("results/") for path in outputs)
    # one file per ROI of the analysis, in the analysis's ROI order (the demo's shape analysis decodes every ROI)
    rois = list(model.analyses["shape"].rois)
    assert rois == ["ember", "glow", "hush"]
    assert plan.job_outputs(model, "decode", {"analysis": "shape", "subject": "01"}) == {
        "scores": [f"results/decoding/shape/sub-01/sub-01_roi-{roi}_scores.tsv" for roi in rois],
        "null": [f"results/decoding/shape/sub-01/sub-01_roi-{roi}_null.tsv.gz" for roi in rois],
        "rankings": [f"results/decoding/shape/sub-01/sub-01_roi-{roi}_rankings.tsv.gz" for roi in rois],
        "confusion": [f"results/decoding/shape/sub-01/sub-01_roi-{roi}_confusion.tsv" for roi in rois],
        "provenance": "results/provenance/decode/shape_sub-01.json"}
    assert plan.job_inputs(model, "decode", {"analysis": "shape", "subject": "01"})["masks"] == [
        f"results/masks/sub-01/sub-01_roi-{roi}_mask.nii.gz" for roi in rois]
    # one file per run of the subject, in its run order; the inputs in the same order
    run_ids = [run["run_id"] for run in model.runs_of("01")]
    assert run_ids == ["run-01", "run-02", "run-03", "run-04"]
    glm_outputs = plan.job_outputs(model, "glm", {"subject": "01"})
    assert glm_outputs["patterns"] == [f"results/patterns/sub-01/sub-01_{run_id}_patterns.nii.gz" for run_id in run_ids]
    assert glm_outputs["provenance"] == "results/provenance/glm/sub-01.json"
    assert [len(paths) for name, paths in glm_outputs.items() if name != "provenance"] == [4] * 6
    glm_inputs = plan.job_inputs(model, "glm", {"subject": "01"})
    assert [Path(path).name for path in glm_inputs["events"]] == [f"sub-01_task-lanterns_{run_id}_events.tsv" for run_id in run_ids]


def test_every_input_of_a_job_is_a_planned_output_or_a_dataset_file():
    model = _model()
    produced = set(plan.all_job_outputs(model))
    for step, wildcards in plan.planned_jobs(model):
        for value in plan.job_inputs(model, step, wildcards).values():
            for path in value if isinstance(value, list) else [value]:
                assert path in produced, f"{step} {wildcards}: input {path} is made by no planned job"


def test_every_step_output_is_a_contract_template():
    model = _model()
    templates = set(contract.TEMPLATES.values())
    for step in ("brain_mask", "glm", "roi_mask", "roi_counts", "decode", "decode_gather", "group", "searchlight_block",
                 "searchlight_merge", "searchlight_group", "manifest"):
        for name, template in plan.step_outputs(model, step).items():
            assert name == "provenance" or template in templates, (step, name, template)


def test_report_input_index_names_the_fields_of_each_file():
    model = _model()
    index = plan.report_input_index(model)
    assert index["roi_masks"][0] == {"path": "results/masks/sub-01/sub-01_roi-ember_mask.nii.gz", "subject": "01", "roi": "ember"}
    assert [record["roi"] for record in index["confusions"] if record["analysis"] == "shape"] == ["glow"] * 3
    flat = plan.job_inputs(model, "report", {})
    assert flat["confusions"] == [record["path"] for record in index["confusions"]]


def test_no_module_climbs_out_of_the_package_or_cites_a_page_the_repository_lacks():
    package = REPO / "workflow" / "foldwise"
    for path in package.rglob("*.py"):
        text = path.read_text(encoding="utf-8")
        assert not re.search(r"parents\[\d\]\s*/\s*[\"']config", text), f"{path} reads a file outside the package"
        for page in re.findall(r"[\w./-]+\.md\b", text):
            if page.startswith("/REVIEW/"):  # a page the bundle writes, not one of the repository
                continue
            assert (REPO / page).is_file(), f"{path} cites {page}, which is not in the repository"


def test_every_job_writes_the_contract_columns():
    """One definition per table: the jobs take their columns from foldwise.contract (the same objects, not copies)."""
    from foldwise.jobs import decode, decode_gather, glm, group, searchlight_group

    assert glm.TABLE_COLUMNS is contract.PATTERN_TABLE_COLUMNS and decode.TABLE_COLUMNS is contract.PATTERN_TABLE_COLUMNS
    assert decode.SCORE_COLUMNS is contract.SCORE_COLUMNS and decode_gather.SCORE_COLUMNS is contract.SCORE_COLUMNS
    assert decode.NULL_COLUMNS is contract.NULL_COLUMNS and decode.CONFUSION_COLUMNS is contract.CONFUSION_COLUMNS
    assert decode_gather.SUMMARY_COLUMNS is contract.SUMMARY_COLUMNS
    assert group.TABLE_COLUMNS == list(contract.GROUP_COLUMNS) and group.NULL_COLUMNS == list(contract.GROUP_NULL_COLUMNS)
    assert searchlight_group.TABLE_COLUMNS is contract.SEARCHLIGHT_GROUP_COLUMNS


def test_one_grid_tolerance_and_one_brain_mask_reader():
    from foldwise.data import patterns
    from foldwise.jobs import brain_mask, glm, searchlight_block, searchlight_group, searchlight_merge

    for module in (brain_mask, glm, searchlight_group, patterns):
        assert module.GRID_TOLERANCE_MM is contract.GRID_TOLERANCE_MM
    for module in (searchlight_merge, searchlight_group):
        assert module.load_brain_mask is contract.read_brain_mask
    assert searchlight_block.read_brain_mask is contract.read_brain_mask
    assert not re.search(r"TOLERANCE_MM\s*=\s*[0-9]", "".join(path.read_text(encoding="utf-8")
                                                             for path in (REPO / "workflow" / "foldwise" / "jobs").glob("*.py")))


@pytest.mark.parametrize("counts", [[], [0], ["some"], [10, 10], [True], [50, 10, "all"]],
                         ids=["none", "zero", "text", "repeated", "boolean", "out of order"])
def test_voxel_counts_are_checked_once_before_any_job(counts):
    """The schema and the study model are the one check of voxel_counts (the decode job trusts them)."""
    study = copy.deepcopy(LANTERNS)
    study["analyses"][0]["voxel_counts"] = counts
    with pytest.raises(InputError) as excinfo:
        validate(study, path=CONFIG)
    assert excinfo.value.field.startswith("analyses[0].voxel_counts") and excinfo.value.file == CONFIG


def test_a_voxel_count_and_its_table_cell_convert_one_way_and_back():
    """Every job writes n_voxels through contract.count_label; the text matches what str() wrote before (bytes unchanged)."""
    for count in (1, 10, 400, np.int64(25), "all"):
        assert contract.count_label(count) == str(count)
        assert contract.parse_count(contract.count_label(count)) == count
    assert contract.parse_count(" 50 ") == 50 and contract.parse_count(50) == 50
    sources = "".join(path.read_text(encoding="utf-8") for path in (REPO / "workflow" / "foldwise").rglob("*.py"))
    assert not re.search(r"str\(count\) for count in", sources), "a voxel count turned into its cell without contract.count_label"
    assert not re.search(r"key=int\b|int\(count\)\s*[<>]|<\s*int\(count\)", sources), "a voxel count parsed without contract.parse_count"


def test_the_roi_mask_steps_code_key_leaves_the_glm_out():
    """A GLM code edit reruns no plain ROI mask: the localizer ROI (which fits a GLM) has a step of its own."""
    from foldwise.provenance.hashing import module_closure

    scripts = REPO / "workflow" / "scripts"
    package = REPO / "workflow" / "foldwise"

    def closure(script):
        return {path.resolve().relative_to(package.resolve()).as_posix() for path in module_closure(str(scripts / script))
                if package.resolve() in path.resolve().parents}

    roi_mask = closure("roi_mask.py")
    assert "jobs/roi_mask.py" in roi_mask and "masks/build.py" in roi_mask  # the closure is followed at all
    assert not {path for path in roi_mask if path.startswith("glm/") or path in ("jobs/glm.py", "jobs/localizer_roi.py",
                                                                                "masks/localizer.py", "data/bids.py")}
    localizer = closure("localizer_roi.py")
    assert {"jobs/localizer_roi.py", "jobs/roi_mask.py", "glm/design.py", "masks/localizer.py"} <= localizer


def test_a_localizer_roi_is_planned_by_its_own_step():
    """The ROI kind names its step and the plan follows it (a real two-task study: tests/test_datasets.py)."""
    assert ROI_KINDS["localizer"].step == "localizer_roi" and ROI_KINDS["labels"].step == "roi_mask"
    fake = type("FakeStudy", (), {"subjects": ("01", "02"), "rois": {name: type("R", (), {"step": ROI_KINDS[kind].step})()
                                                                     for name, kind in (("ember", "labels"), ("beam", "localizer"))}})()
    assert plan.roi_jobs(fake, "roi_mask") == [("roi_mask", {"subject": s, "roi": "ember"}) for s in ("01", "02")]
    assert plan.roi_jobs(fake, "localizer_roi") == [("localizer_roi", {"subject": s, "roi": "beam"}) for s in ("01", "02")]
    assert re.fullmatch(plan.roi_wildcard(fake, "roi_mask"), "ember") and not re.fullmatch(plan.roi_wildcard(fake, "roi_mask"), "beam")
    assert re.fullmatch(plan.roi_wildcard(fake, "localizer_roi"), "beam")
    assert re.fullmatch(plan.roi_wildcard(type("NoLocalizer", (), {"rois": {}})(), "localizer_roi"), "beam") is None


def test_one_reader_of_a_subjects_pattern_set():
    """Decode, the searchlight and the design self-check read patterns through foldwise.data.patterns only."""
    from foldwise.data import patterns
    from foldwise.jobs import calibrate, decode, searchlight_block

    assert decode.read_pattern_set is patterns.read_pattern_set and searchlight_block.read_pattern_set is patterns.read_pattern_set
    assert calibrate.read_pattern_tables is patterns.read_pattern_tables
    jobs = {path.name: path.read_text(encoding="utf-8") for path in (REPO / "workflow" / "foldwise" / "jobs").glob("*.py")}
    own_readers = sorted(name for name, text in jobs.items() if re.search(r"what=\"pattern (table|image)\"", text))
    assert own_readers == [], f"jobs reading pattern files by themselves: {own_readers}"


def test_the_searchlight_refuses_a_kind_it_cannot_map(monkeypatch):
    from foldwise.study import check_meaning

    monkeypatch.setitem(ANALYSIS_KINDS, "pairs", AnalysisKind("pairs", outline=lambda entry: ((), None, ()), condition_keys=lambda entry: [],
                                                              check=lambda entry, where, path: None, searchlight=False))
    config = validate(copy.deepcopy(LANTERNS), path=CONFIG)
    config["analyses"][1]["kind"] = "pairs"
    with pytest.raises(InputError, match=r"searchlight\.analyses: analysis 'carry' is of kind 'pairs', which the searchlight does not map"):
        check_meaning(config, CONFIG)
