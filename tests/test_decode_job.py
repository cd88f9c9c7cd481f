"""The decode job of one subject x analysis: every ROI from one read of the patterns, each ROI a part of the job's memo.

Checks: (1) one job over several ROIs writes, for each ROI, the very bytes a
job of that ROI alone writes (the union read, the shared rows, labels and
folds, and the per-ROI seeds change no number); (2) through the content memo
(foldwise.provenance.memo.run_job), a changed ROI mask recomputes that ROI
only, the other ROIs' files are restored, and when no ROI needs computing
the patterns are not read at all.
"""

import json
import logging
from pathlib import Path
from types import SimpleNamespace

import numpy as np
import pandas as pd
import pytest

from foldwise.data.fileio import save_nifti, write_tsv
from foldwise.jobs import decode as decode_job
from foldwise.provenance.memo import run_job

GRID = (6, 4, 3)
AFFINE = np.diag([3.0, 3.0, 3.0, 1.0])
SHAPES = ("round", "square", "star")
CONDITIONS = [f"{sense}_{shape}" for sense in ("seen", "heard") for shape in SHAPES]


def _subject(folder, n_runs=4, seed=3):
    """Per-run pattern images and tables of subject 01; voxels x < 2 carry a shape code."""
    rng = np.random.default_rng(seed)
    coded = np.zeros(GRID, dtype=bool)
    coded[:2] = True
    codes = {shape: rng.standard_normal(coded.sum()) for shape in SHAPES}
    images, tables = [], []
    for run in range(1, n_runs + 1):
        data = rng.standard_normal(GRID + (len(CONDITIONS),)).astype(np.float32)
        for volume, condition in enumerate(CONDITIONS):
            data[coded, volume] += 1.2 * codes[condition.split("_")[1]]
        images.append(str(folder / f"sub-01_run-{run:02d}_patterns.nii.gz"))
        tables.append(str(folder / f"sub-01_run-{run:02d}_patterns.tsv"))
        save_nifti(images[-1], data, AFFINE)
        write_tsv(tables[-1], pd.DataFrame({"volume": range(len(CONDITIONS)), "subject": "01", "session": np.nan, "run_id": f"run-{run:02d}",
                                            "condition": CONDITIONS, "trial_index": np.nan, "onset_s": np.nan}))
    return images, tables


def _regions():
    """Three overlapping ROIs (the union read must give each its own columns, in its own C order)."""
    ember, glow, hush = (np.zeros(GRID, dtype=bool) for _ in range(3))
    ember[:2] = True
    glow[1:4, :2] = True
    hush[3:, 1:] = True
    return {"ember": ember, "glow": glow, "hush": hush}


def _mask(folder, name, region):
    path = folder / f"sub-01_roi-{name}_mask.nii.gz"
    save_nifti(path, region.astype(np.uint8), AFFINE, dtype=np.uint8)
    return str(path)


def _outputs(folder, rois):
    folder.mkdir(parents=True, exist_ok=True)
    suffixes = {"scores": "scores.tsv", "null": "null.tsv.gz", "rankings": "rankings.tsv.gz", "confusion": "confusion.tsv"}
    return {name: [str(folder / f"sub-01_roi-{roi}_{suffix}") for roi in rois] for name, suffix in suffixes.items()}


def _analysis(kind):
    entry = {"name": kind, "kind": kind, "selection": "none" if kind == "within" else "f", "voxel_counts": [3, 8, "all"],
             "classifier": "correlation_centroid", "svm_c": 1.0, "logistic_c": 1.0, "demean_patterns": False,
             "folds": {"scheme": "leave_one_run_out", "n_groups": 2}, "n_permutations": 15}
    if kind == "within":
        entry["classes"] = {shape: [f"seen_{shape}"] for shape in SHAPES}
    else:
        entry["sets"] = {"seen": {shape: f"seen_{shape}" for shape in SHAPES}, "heard": {shape: f"heard_{shape}" for shape in SHAPES}}
    return entry


@pytest.mark.parametrize("kind", ["within", "cross"])
def test_one_job_of_three_rois_writes_the_bytes_of_three_single_roi_jobs(tmp_path, kind):
    # Reference: the job run once per ROI (the earlier job granularity, one mask read alone); "none" draws per-ROI voxel orders.
    images, tables = _subject(tmp_path)
    regions = _regions()
    masks = {roi: _mask(tmp_path, roi, region) for roi, region in regions.items()}
    params = {"analysis": _analysis(kind), "subject": "01", "seed": 11}
    together = _outputs(tmp_path / "together", list(regions))
    decode_job.run({"patterns": images, "tables": tables, "masks": list(masks.values())}, together, {**params, "rois": list(regions)},
                   logging.getLogger("test"))
    for index, roi in enumerate(regions):
        alone = _outputs(tmp_path / f"alone_{roi}", [roi])
        decode_job.run({"patterns": images, "tables": tables, "masks": [masks[roi]]}, alone, {**params, "rois": [roi]},
                       logging.getLogger("test"))
        for name in alone:
            assert Path(together[name][index]).read_bytes() == Path(alone[name][0]).read_bytes(), (roi, name)


# -- through the content memo: one ROI's change recomputes that ROI only ----------------------
class _Named(dict):
    """Stands in for Snakemake's Namedlist: items() plus attribute access."""

    def __getattr__(self, name):
        return self[name]


def _snakemake_job(tmp_path, images, tables, masks, rois):
    outputs = _outputs(tmp_path / "results", rois)
    return SimpleNamespace(
        input=_Named(patterns=images, tables=tables, masks=[masks[roi] for roi in rois]),
        output=_Named(**outputs, provenance=str(tmp_path / "provenance" / "within_sub-01.json")),
        params=_Named(settings={"analysis": _analysis("within"), "subject": "01", "rois": list(rois), "seed": 11}, code="code-v1"),
        log=[str(tmp_path / "logs" / "within_sub-01.log")], wildcards=_Named(analysis="within", subject="01"),
        config={"study": {"store_dir": str(tmp_path / "store")}})


def _run(smk, monkeypatch):
    """Run the job through run_job as Snakemake would (outputs removed first); return its record and how often it read patterns."""
    for paths in smk.output.values():
        for path in [paths] if isinstance(paths, str) else paths:
            Path(path).unlink(missing_ok=True)
    reads = []
    reader = decode_job.read_subject_patterns
    monkeypatch.setattr(decode_job, "read_subject_patterns", lambda *args, **kwargs: reads.append(1) or reader(*args, **kwargs))
    run_job(smk, "decode", decode_job.run)
    return json.loads(Path(smk.output.provenance).read_text()), len(reads)


def test_a_changed_roi_mask_recomputes_that_roi_only(tmp_path, monkeypatch):
    monkeypatch.chdir(tmp_path)
    monkeypatch.delenv("FOLDWISE_MEMO", raising=False)
    images, tables = _subject(tmp_path)
    regions = _regions()
    masks = {roi: _mask(tmp_path, roi, region) for roi, region in regions.items()}
    smk = _snakemake_job(tmp_path, images, tables, masks, list(regions))
    first, reads = _run(smk, monkeypatch)
    assert [(part["part"], part["restored"]) for part in first["parts"]] == [("roi-ember", False), ("roi-glow", False), ("roi-hush", False)]
    assert reads == 1  # one read of the subject's patterns for the three ROIs
    computed = {path: Path(path).read_bytes() for paths in smk.output.values() if isinstance(paths, list) for path in paths}
    # glow loses a voxel: Snakemake reruns the job; ember and hush come from the store, glow alone is decoded again
    changed = regions["glow"].copy()
    changed[3, 1, 2] = False
    save_nifti(masks["glow"], changed.astype(np.uint8), AFFINE, dtype=np.uint8)
    second, reads = _run(smk, monkeypatch)
    assert [(part["part"], part["restored"]) for part in second["parts"]] == [("roi-ember", True), ("roi-glow", False), ("roi-hush", True)]
    assert reads == 1
    assert [part["key"] for part in second["parts"]][::2] == [part["key"] for part in first["parts"]][::2]
    for path, content in computed.items():
        assert (Path(path).read_bytes() == content) == ("roi-glow" not in path), path
    # the restored files are the ones a fresh computation writes (memo off: everything recomputed)
    monkeypatch.setenv("FOLDWISE_MEMO", "off")
    restored = {path: Path(path).read_bytes() for path in computed}
    third, reads = _run(smk, monkeypatch)
    assert reads == 1 and not any(part["restored"] for part in third["parts"])
    assert {path: Path(path).read_bytes() for path in computed} == restored
    # hush leaves the analysis: the job reruns (its ROI list changed), and with every part known it reads no pattern at all
    monkeypatch.delenv("FOLDWISE_MEMO")
    fewer = _snakemake_job(tmp_path, images, tables, masks, ["ember", "glow"])
    fourth, reads = _run(fewer, monkeypatch)
    assert reads == 0 and [(part["part"], part["restored"]) for part in fourth["parts"]] == [("roi-ember", True), ("roi-glow", True)]


def test_a_roi_part_key_holds_its_own_identity_only(tmp_path, monkeypatch):
    # The part of an ROI does not depend on the list of the other ROIs: the same ROI in a job of other ROIs has the same key.
    monkeypatch.chdir(tmp_path)
    monkeypatch.delenv("FOLDWISE_MEMO", raising=False)
    images, tables = _subject(tmp_path)
    regions = _regions()
    masks = {roi: _mask(tmp_path, roi, region) for roi, region in regions.items()}
    both, _ = _run(_snakemake_job(tmp_path, images, tables, masks, ["ember", "hush"]), monkeypatch)
    alone, reads = _run(_snakemake_job(tmp_path, images, tables, masks, ["hush"]), monkeypatch)
    assert reads == 0 and alone["parts"] == [{"part": "roi-hush", "key": both["parts"][1]["key"], "restored": True}]


# -- the plan: one job per subject x analysis, a rule per distinct ROI list ------------------------
def test_analyses_with_another_roi_list_get_a_rule_of_their_own():
    import copy

    from foldwise import plan
    from foldwise.config import validate
    from foldwise.study import build_study
    from workflow_support import TINY_STUDY

    config = copy.deepcopy(TINY_STUDY)
    config["analyses"][1]["rois"] = ["glow", "ember"]  # carry: two ROIs, in its own order
    model = build_study(validate(config, path="config/study.yaml"), path="config/study.yaml")
    assert plan.roi_list_rules(model, "decode") == [(("shape",), ("ember", "glow", "hush")), (("carry",), ("glow", "ember"))]
    assert [wildcards for step, wildcards in plan.planned_jobs(model) if step == "decode"] == [
        {"analysis": name, "subject": subject} for name in ("shape", "carry") for subject in ("01", "02", "03")]
    wildcards = {"analysis": "carry", "subject": "02"}
    outputs, inputs = plan.job_outputs(model, "decode", wildcards), plan.job_inputs(model, "decode", wildcards)
    assert outputs["scores"] == [f"results/decoding/carry/sub-02/sub-02_roi-{roi}_scores.tsv" for roi in ("glow", "ember")]
    assert outputs["provenance"] == "results/provenance/decode/carry_sub-02.json"
    assert inputs["masks"] == [f"results/masks/sub-02/sub-02_roi-{roi}_mask.nii.gz" for roi in ("glow", "ember")]
    settings = plan.job_settings(model, "decode", wildcards)
    assert settings["rois"] == ["glow", "ember"] and "rois" not in settings["analysis"]  # the part of each ROI drops the list
