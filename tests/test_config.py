"""The study config schema and its checks (config/schema.yaml, foldwise.config)."""

import copy

import pytest
import yaml

from foldwise.config import load_study_config, load_yaml, validate
from foldwise.errors import InputError

DEMO_CONFIG = "config/config.yaml"


@pytest.fixture
def demo():
    return load_yaml(DEMO_CONFIG)


def test_demo_config_validates_and_fills_nested_defaults(demo):
    study = validate(demo)
    assert study["glm"]["hrf_steps_per_scan"] == 16
    assert study["analyses"][0]["voxel_counts"] == [10, 25, 50, 100, 200, 400, "all"]
    assert study["analyses"][0]["folds"] == {"scheme": "leave_one_run_out", "n_groups": 2}
    assert study["rois"][0]["min_voxels"] == 10
    assert study["searchlight"]["tfce"] is False and study["searchlight"]["classifier"] == "correlation_centroid"
    assert "folds" not in demo["analyses"][0], "validation must not modify its argument"


def test_minimal_config_gets_every_default():
    minimal = {"dataset": {"source": "demo"}, "rois": [{"name": "a", "labels": ["x"]}],
               "analyses": [{"name": "b", "kind": "within", "classes": {"p": ["c1"], "q": ["c2"]}}]}
    study = validate(minimal)
    assert study["study"]["seed"] == 20261201
    assert study["group"] == {"n_draws": 10000, "alpha": 0.05, "prevalence": True, "fwe_method": "standardised", "family": "per_direction"}
    assert study["dataset"]["patterns"]["brain_mask"] == ""


@pytest.mark.parametrize("mutate, field, words", [
    (lambda c: c["glm"].update(highpass_seconds=100), "glm", "unknown key 'highpass_seconds' (did you mean 'highpass_s'?)"),
    (lambda c: c.update(colour="red"), "(top level)", "unknown key 'colour'"),
    (lambda c: c["glm"].update(highpass_s="long"), "glm.highpass_s", "expected number"),
    (lambda c: c["analyses"][1].update(classifier="forest"), "analyses[1].classifier", "'forest' is not one of"),
    (lambda c: c["analyses"][0].update(voxel_counts=[0, 10]), "analyses[0].voxel_counts[0]", "0 is not a voxel count"),
    (lambda c: c["analyses"][0].update(n_permutations=-1), "analyses[0].n_permutations", "out of range"),
    (lambda c: c["rois"][0].update(sphere={"center_mm": [0, 0, 0], "radius_mm": 6}), "rois[0]", "exactly one of"),
    (lambda c: c["analyses"][0].update(rois=["embr"]), "analyses[0].rois", "unknown ROI 'embr' (did you mean 'ember'?)"),
    (lambda c: c["analyses"][1]["sets"]["heard"].pop("star"), "analyses[1].sets", "do not match"),
    (lambda c: c["analyses"][0]["classes"].update(round=["seen_round"], square=["seen_round"]), "analyses[0].classes", "belongs to two classes"),
    (lambda c: c["rois"].append(dict(c["rois"][0])), "rois[].name", "used twice"),
    (lambda c: c["analyses"][0].update(voxel_counts=[50, 10, "all"]), "analyses[0].voxel_counts", "not increasing"),
    (lambda c: c["dataset"].update(source="folder"), "dataset.source", "'folder' is not one of"),
])
def test_bad_config_names_the_key_path(demo, mutate, field, words):
    bad = copy.deepcopy(demo)
    mutate(bad)
    with pytest.raises(InputError) as raised:
        validate(bad, path="study.yaml")
    message = str(raised.value)
    assert message.startswith("study.yaml: ")
    assert raised.value.field == field, message
    assert words in message
    assert "Fix:" in message


def test_malformed_yaml_names_the_line(tmp_path):
    path = tmp_path / "broken.yaml"
    path.write_text("study:\n  name: x\n   seed: 3\n")
    with pytest.raises(InputError, match=r"broken.yaml: line 3, column \d+: malformed YAML"):
        load_study_config(path)


def test_yaml_is_loaded_safely(tmp_path):
    path = tmp_path / "unsafe.yaml"
    path.write_text("dataset: !!python/object/apply:os.system ['echo owned']\n")
    with pytest.raises(InputError, match="malformed YAML"):
        load_yaml(path)


def test_schema_documents_a_default_for_every_optional_scalar():
    # Every optional leaf with a fixed type carries a default, so filled configs never miss a key.
    with open("config/schema.yaml", encoding="utf-8") as handle:
        schema = yaml.safe_load(handle)
    missing = []

    def walk(node, path):
        for name, sub in node.get("properties", {}).items():
            required = name in node.get("required", [])
            if sub.get("type") in ("string", "number", "integer", "boolean") and not required and "default" not in sub:
                missing.append(f"{path}.{name}")
            if sub.get("type") == "object":
                walk(sub, f"{path}.{name}")
            if sub.get("type") == "array" and isinstance(sub.get("items"), dict) and sub["items"].get("type") == "object":
                walk(sub["items"], f"{path}.{name}[]")

    walk(schema, "")
    # ROI and analysis definitions are alternatives (labels | image | sphere; classes | sets), not defaults.
    allowed = {".rois[].image", ".rois[].threshold", ".analyses[].geometry.models[].tsv",  # a geometry model: differ_in | tsv
               # a localizer ROI is sized by top_k or t_threshold (one of them, no default); its constraint is labels | image | sphere
               ".rois[].localizer.top_k", ".rois[].localizer.t_threshold", ".rois[].localizer.within.image",
               ".rois[].localizer.within.threshold"}
    assert sorted(set(missing) - allowed) == []
