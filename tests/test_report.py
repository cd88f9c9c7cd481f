"""Tests of the study report: foldwise.report.figures (pure parts) and foldwise.jobs.report (the page).

Every input is built here, in a temporary folder, following the data
data contract (foldwise.contract) (a small invented lanterns study; nothing is read from
results/). Outside references, named beside each check: the PNG
specification (file signature and IHDR chunk, W3C PNG 2nd edition), XML
parsing by the standard library (SVG root element), Python's html.parser,
nibabel's apply_affine (voxel-to-mm coordinates), pandas' crosstab (trial
counts), importlib.metadata (versions), docutils and Jinja2 (the captions as
Snakemake renders them) and Debian's chromium (the page in a real browser).
"""

import base64
import html as html_module
import doctest
import io
import json
import logging
import math
import re
import shutil
import struct
import os
import subprocess
import sys
import xml.etree.ElementTree as ElementTree
from html.parser import HTMLParser
from importlib import metadata
from pathlib import Path
from types import SimpleNamespace

import nibabel as nib
import numpy as np
import pandas as pd
import pytest

from foldwise.report import figures as report
from foldwise.config import validate
from foldwise.errors import InputError
from foldwise.data.fileio import save_nifti, write_bytes_atomic, write_json, write_tsv
from foldwise.glm.design_image import design_png
from foldwise.report.catalogue import embedded_files, publication_files
from foldwise.provenance.hashing import hash_object
from foldwise.jobs import glm as glm_job
from foldwise.jobs import report as report_job
from workflow_support import Named

REPO = Path(__file__).resolve().parents[1]
SUBJECTS = ["01", "02", "03"]
RUN_IDS = ["run-01", "run-02"]
ROI_NAMES = ["ember", "glow"]
CONDITIONS = ["heard_round", "heard_square", "heard_star", "seen_round", "seen_square", "seen_star"]
SHAPES = ["round", "square", "star"]
GRID = (10, 12, 8)
VOXEL_MM = 3.0
TR_S = 2.0
N_SCANS = 40
COUNTS = ["5", "20", "all"]
STUDY = validate({
    "study": {"name": "lantern-test"},
    "dataset": {"source": "demo"},
    "rois": [{"name": "ember", "labels": ["ember_L", "ember_R"]}, {"name": "glow", "labels": ["glow_L", "glow_R"]}],
    "analyses": [
        {"name": "shape", "kind": "within", "voxel_counts": [5, 20, "all"], "n_permutations": 20,
         "classes": {shape: [f"seen_{shape}"] for shape in SHAPES}},
        {"name": "carry", "kind": "cross", "voxel_counts": [5, 20, "all"], "n_permutations": 20,
         "sets": {"seen": {shape: f"seen_{shape}" for shape in SHAPES},
                  "heard": {shape: f"heard_{shape}" for shape in SHAPES}}},
    ],
    "group": {"n_draws": 100},
}, path="the test study")
CROSS_DIRECTIONS = ["seen->heard", "heard->seen", "seen<->heard", "seen->seen", "heard->heard"]
ALPHA = 0.05


# -- a synthetic study on disk ----------------------------------------------------------

def _affine(grid=GRID):
    affine = np.diag([VOXEL_MM] * 3 + [1.0])
    affine[:3, 3] = -VOXEL_MM * (np.asarray(grid) - 1) / 2
    return affine


def _subject_images(rng, grid=GRID, roi_names=ROI_NAMES):
    if tuple(grid) != GRID or list(roi_names) != ROI_NAMES:
        return _scaled_images(rng, grid, roi_names)
    i, j, k = np.indices(GRID)
    centre = (np.asarray(GRID) - 1) / 2
    brain = ((i - centre[0]) / 4.6) ** 2 + ((j - centre[1]) / 5.6) ** 2 + ((k - centre[2]) / 3.6) ** 2 <= 1
    mean = np.where(brain, 900 + 100 * rng.random(GRID), 40 * rng.random(GRID))
    ember = brain & (k == 4) & (np.abs(j - 6) <= 1) & ((np.abs(i - 2) <= 1) | (np.abs(i - 7) <= 1))
    ember &= rng.random(GRID) < 0.9
    glow = brain & (j >= 9) & (k >= 3) & (k <= 5) & (np.abs(i - 4.5) <= 2)
    return mean, brain, {"ember": ember, "glow": glow}


def _scaled_images(rng, grid, roi_names):
    """Another grid or other ROIs (benchmarks/bench_report.py): an ellipsoidal brain and one ball per ROI inside it."""
    i, j, k = np.indices(grid)
    centre, half = (np.asarray(grid) - 1) / 2, np.asarray(grid) * 0.43
    brain = ((i - centre[0]) / half[0]) ** 2 + ((j - centre[1]) / half[1]) ** 2 + ((k - centre[2]) / half[2]) ** 2 <= 1
    mean = np.where(brain, 900 + 100 * rng.random(grid), 40 * rng.random(grid))
    inside = np.argwhere(brain)
    rois = {}
    for name in roi_names:
        ball_centre = inside[rng.integers(len(inside))]
        radius = max(1.5, min(grid) * 0.1)
        rois[name] = brain & ((i - ball_centre[0]) ** 2 + (j - ball_centre[1]) ** 2 + (k - ball_centre[2]) ** 2 <= radius ** 2)
    return mean, brain, rois


def _design(rng, n_scans=N_SCANS):
    columns = {condition: np.convolve((rng.random(n_scans) < 0.08).astype(float), np.hanning(6), mode="same")
               for condition in CONDITIONS}
    columns["lowfreq_cos_01"] = np.cos(np.pi * (np.arange(n_scans) + 0.5) / n_scans)
    columns["intercept"] = np.ones(n_scans)
    return pd.DataFrame(columns)


def _events(rng, run_index, n_scans=N_SCANS):
    trial_types = [condition for condition in CONDITIONS for _ in range(3)]
    if run_index == 1:
        trial_types.append("seen_star")  # an uneven run: 3 to 4 seen_star trials per run
    onsets = np.sort(rng.uniform(4, (n_scans - 4) * TR_S, size=len(trial_types))).round(1)
    return pd.DataFrame({"onset": onsets, "duration": 2.0, "trial_type": rng.permutation(trial_types)})


def _directions(analysis):
    return CROSS_DIRECTIONS if analysis["kind"] == "cross" else ["within"]


def _summary(subject, analysis, roi_sizes, rois, rng, counts=COUNTS):
    rows = []
    for roi in rois:
        for direction in _directions(analysis):
            for count in counts:
                used = roi_sizes[roi] if count == "all" else min(int(count), roi_sizes[roi])
                effect = 0.25 if roi == "ember" else 0.0
                score = float(np.clip(1 / 3 + effect * (1 - 1 / (1 + used / 10)) + rng.normal(0, 0.04), 0, 1))
                rows.append({"subject": subject, "analysis": analysis["name"], "roi": roi, "direction": direction,
                             "n_voxels": count, "n_used": used, "n_folds": 2, "accuracy": score,
                             "balanced_accuracy": score, "chance": 1 / 3})
    return pd.DataFrame(rows)


def _confusion(analysis, rng, counts=COUNTS):
    rows = []
    for direction in _directions(analysis):
        for count in counts:
            for true_class in SHAPES:
                predicted = rng.multinomial(6, [0.5, 0.25, 0.25])
                order = [true_class] + [shape for shape in SHAPES if shape != true_class]
                rows += [{"direction": direction, "n_voxels": count, "true_class": true_class, "predicted_class": shape,
                          "count": int(n)} for shape, n in zip(order, predicted)]
    return pd.DataFrame(rows)


def _group(analysis, summaries, rois, counts=COUNTS):
    table = pd.concat(summaries, ignore_index=True)
    rows = []
    for roi in rois:
        for direction in _directions(analysis):
            for count in counts:
                scores = table[(table.roi == roi) & (table.direction == direction) & (table.n_voxels == count)]
                values = scores["balanced_accuracy"].to_numpy()
                mean, sem = values.mean(), values.std(ddof=1) / math.sqrt(len(values))
                p_fwe = 0.01 if (roi == "ember" and count != counts[0]) else 0.6
                if roi == "ember" and count == counts[0]:
                    p_fwe = ALPHA  # exactly alpha: not marked (the marker rule is p_fwe < alpha)
                rows.append({"analysis": analysis["name"], "roi": roi, "direction": direction, "n_voxels": count,
                             "n_subjects": len(values), "chance": 1 / 3, "mean": mean, "sem": sem,
                             "ci_low": mean - 4.3 * sem, "ci_high": mean + 4.3 * sem, "t": (mean - 1 / 3) / sem,
                             "p_t": 0.02, "p_wilcoxon": 0.125, "p_perm": 0.03, "p_fwe": p_fwe,
                             "prevalence_p_global": 0.04 if roi == "ember" else np.nan,
                             "prevalence_gamma0": 0.2 if roi == "ember" else np.nan,
                             "prevalence_p_majority": 0.3 if roi == "ember" else np.nan,
                             "effect_size": (mean - 1 / 3) / values.std(ddof=1),
                             "prevalence_p_global_fwe": 0.04 if roi == "ember" else np.nan,
                             "prevalence_gamma0_fwe": 0.1 if roi == "ember" else np.nan,
                             "prevalence_gamma0_max": 0.37,  # below 0.5: the page must say the majority test cannot succeed
                             "n_used": str(count) if count != "all" else "40-52",
                             "subject_p_min": 0.125 if roi == "glow" else 1 / 101,  # glow: above alpha, warned
                             "family": f"direction {direction}"})
    return pd.DataFrame(rows)


def build_study(root, seed=5, study=STUDY, subjects=SUBJECTS, run_ids=RUN_IDS, grid=GRID, n_scans=N_SCANS, counts=COUNTS):
    """Write a complete set of report inputs under ``root``; return (inputs, params, facts).

    The keywords other than ``study`` and ``subjects`` give other shapes
    (benchmarks/bench_report.py builds the benchmark study's shape with them).
    """
    root = Path(root)
    rois = [roi["name"] for roi in study["rois"]]
    rng = np.random.default_rng(seed)
    affine = _affine(grid)
    inputs = {key: [] for key in ("design_images", "events", "sidecars", "brain_masks", "means", "roi_masks", "roi_counts",
                                  "summaries", "confusions", "group_tables", "provenance", "glm_facts")}
    roi_sizes, summaries = {}, {analysis["name"]: [] for analysis in study["analyses"]}
    # The plan's record of every input (foldwise.plan.report_input_index): the report reads fields from it.
    index = {key: [] for key in ("design_images", "means", "brain_masks", "roi_masks", "resvar", "confusions", "glm_facts")}
    for subject in subjects:
        masks = root / "masks" / f"sub-{subject}"
        mean, brain, rois = _subject_images(rng, grid, [roi["name"] for roi in study["rois"]] if tuple(grid) != GRID else ROI_NAMES)
        save_nifti(masks / f"sub-{subject}_mean.nii.gz", mean, affine)
        save_nifti(masks / f"sub-{subject}_brainmask.nii.gz", brain, affine, dtype=np.uint8)
        inputs["means"].append(str(masks / f"sub-{subject}_mean.nii.gz"))
        inputs["brain_masks"].append(str(masks / f"sub-{subject}_brainmask.nii.gz"))
        index["means"].append({"path": inputs["means"][-1], "subject": subject})
        index["brain_masks"].append({"path": inputs["brain_masks"][-1], "subject": subject})
        for roi, mask in rois.items():
            save_nifti(masks / f"sub-{subject}_roi-{roi}_mask.nii.gz", mask, affine, dtype=np.uint8)
            inputs["roi_masks"].append(str(masks / f"sub-{subject}_roi-{roi}_mask.nii.gz"))
            index["roi_masks"].append({"path": inputs["roi_masks"][-1], "subject": subject, "roi": roi})
        roi_sizes[subject] = {roi: int(mask.sum()) for roi, mask in rois.items()}
        write_tsv(masks / f"sub-{subject}_roi_counts.tsv", pd.DataFrame({
            "subject": subject, "roi": list(rois), "n_voxels": [roi_sizes[subject][roi] for roi in rois],
            "min_voxels": 10, "below_minimum": False}))
        inputs["roi_counts"].append(str(masks / f"sub-{subject}_roi_counts.tsv"))
        patterns = root / "patterns" / f"sub-{subject}"
        # the GLM job's design image of the first run (foldwise.glm.design_image), which the report embeds
        design = _design(rng, n_scans)
        write_bytes_atomic(patterns / f"sub-{subject}_{run_ids[0]}_design.png", design_png(
            design.to_numpy(), list(enumerate(design.columns)), f"sub-{subject} {run_ids[0]}: per_condition design"))
        inputs["design_images"].append(str(patterns / f"sub-{subject}_{run_ids[0]}_design.png"))
        index["design_images"].append({"path": inputs["design_images"][-1], "subject": subject, "run_id": run_ids[0]})
        if subject == subjects[0]:
            resvar = np.where(brain, rng.gamma(4.0, 25.0, grid), 0.0)
            save_nifti(patterns / f"sub-{subject}_{run_ids[0]}_resvar.nii.gz", resvar, affine)
            inputs["resvar"] = str(patterns / f"sub-{subject}_{run_ids[0]}_resvar.nii.gz")
            index["resvar"] = [{"path": inputs["resvar"], "subject": subject, "run_id": run_ids[0]}]
        for run_index, run_id in enumerate(run_ids):
            func = root / "bids" / f"sub-{subject}" / "func"
            write_tsv(func / f"sub-{subject}_task-lanterns_{run_id}_events.tsv", _events(rng, run_index, n_scans))
            write_json(func / f"sub-{subject}_task-lanterns_{run_id}_bold.json", {"RepetitionTime": TR_S})
            inputs["events"].append(str(func / f"sub-{subject}_task-lanterns_{run_id}_events.tsv"))
            inputs["sidecars"].append(str(func / f"sub-{subject}_task-lanterns_{run_id}_bold.json"))
            # what the GLM job records per run (foldwise.jobs.glm.run_facts), varied per run so the table is checkable
            facts = glm_job.run_facts(subject, None, run_id, ["trans_x", "rot_z"] + [f"spike_{k:02d}" for k in range(run_index)],
                                      run_index + int(subject), int(subject) % 2, n_scans - run_index - int(subject))
            write_json(patterns / f"sub-{subject}_{run_id}_glm.json", facts)
            inputs["glm_facts"].append(str(patterns / f"sub-{subject}_{run_id}_glm.json"))
            index["glm_facts"].append({"path": inputs["glm_facts"][-1], "subject": subject, "run_id": run_id})
        for analysis in study["analyses"]:
            name = analysis["name"]
            frame = _summary(subject, analysis, roi_sizes[subject], rois, rng, counts)
            summaries[name].append(frame)
            write_tsv(root / "decoding" / name / f"sub-{subject}_summary.tsv", frame)
            inputs["summaries"].append(str(root / "decoding" / name / f"sub-{subject}_summary.tsv"))
            for roi in rois:
                path = root / "decoding" / name / f"sub-{subject}" / f"sub-{subject}_roi-{roi}_confusion.tsv"
                write_tsv(path, _confusion(analysis, rng, counts))
                inputs["confusions"].append(str(path))
                index["confusions"].append({"path": str(path), "subject": subject, "roi": roi, "analysis": name})
    for analysis in study["analyses"]:
        path = root / "group" / analysis["name"] / f"{analysis['name']}_group.tsv"
        write_tsv(path, _group(analysis, summaries[analysis["name"]], rois, counts))
        inputs["group_tables"].append(str(path))
    n_outputs = {"brain_mask": 3, "glm": 5, "group": 3}
    for step, n_jobs in (("brain_mask", 3), ("glm", 6), ("group", 2)):
        for job in range(n_jobs):
            path = root / "provenance" / step / f"job-{job}.json"
            write_json(path, {"step": step, "outputs": [{"name": f"o{k}", "path": f"x/{k}", "sha256": "0" * 64}
                                                        for k in range(n_outputs[step])],
                              "restored_from_memo": bool(job % 2), "wall_time_s": 1.5 + job})
            inputs["provenance"].append(str(path))
    write_json(root / "demo" / "ground_truth.json", {"rois": {
        "ember": {"decodes": {"shape_seen": True, "shape_heard": True, "modality": False}},
        "glow": {"decodes": {"shape_seen": True, "shape_heard": False, "modality": True}}}})
    inputs["ground_truth"] = str(root / "demo" / "ground_truth.json")
    params = {"study": study, "subjects": list(subjects), "runs": {subject: list(run_ids) for subject in subjects},
              "config_file": "config/config.yaml", "input_index": index}
    facts = {"roi_sizes": roi_sizes, "n_jobs": 11, "n_outputs": 3 * 3 + 6 * 5 + 2 * 3}
    return inputs, params, facts


def outputs_for(folder, study=STUDY, subjects=SUBJECTS):
    """The report job's outputs: the page and the PNGs it embeds."""
    figures_dir = str(Path(folder) / "figures")
    return {"html": str(Path(folder) / "index.html"),
            "previews": embedded_files(report.figure_catalogue(study, subjects, figures_dir))}


def publication_outputs_for(folder, study=STUDY, subjects=SUBJECTS):
    """The report_files job's outputs: PNG 300 dpi, SVG and PDF of every result figure."""
    return {"figures": publication_files(report.figure_catalogue(study, subjects, str(Path(folder) / "figures")))}


def _quiet_log():
    log = logging.getLogger("foldwise.test.report")
    log.addHandler(logging.NullHandler())
    log.propagate = False
    return log


@pytest.fixture(scope="module")
def built(tmp_path_factory):
    root = tmp_path_factory.mktemp("study")
    inputs, params, facts = build_study(root / "inputs")
    outputs = outputs_for(root / "report")
    report_job.run(inputs, outputs, params, _quiet_log())
    publication = publication_outputs_for(root / "report")
    report_job.run_publication_files(inputs, publication, params, _quiet_log())
    outputs = {**outputs, **publication}
    return {"root": root, "inputs": inputs, "params": params, "facts": facts, "outputs": outputs,
            "html": Path(outputs["html"]).read_text(encoding="utf-8")}


class _PageParser(HTMLParser):
    """Collects tags, attributes, section ids and the visible text of a page."""

    def __init__(self):
        super().__init__()
        self.elements, self.text, self.style = [], [], []
        self._in_style = False

    def handle_starttag(self, tag, attrs):
        self.elements.append((tag, dict(attrs)))
        self._in_style = tag == "style"

    def handle_endtag(self, tag):
        if tag == "style":
            self._in_style = False

    def handle_data(self, data):
        (self.style if self._in_style else self.text).append(data)


def _parse(page_html):
    parser = _PageParser()
    parser.feed(page_html)
    parser.close()
    return parser


def _text(page_html):
    return re.sub(r"\s+", " ", " ".join(_parse(page_html).text))


# -- the figure plan ------------------------------------------------------------------------

def test_figure_plan_lists_the_embedded_pngs_then_png_svg_and_pdf_of_every_result_figure():
    catalogue = report.figure_catalogue(STUDY, SUBJECTS)
    n_results = sum(2 * len(report.analysis_rois(STUDY, a)) + 1 for a in STUDY["analyses"])  # curve, confusion; comparison
    n_quality = 2 * len(SUBJECTS) + len(ROI_NAMES) + 1  # design and brain mask per subject, one per ROI, residual variance
    embedded, publication = embedded_files(catalogue), publication_files(catalogue)
    assert len(embedded) == n_results + n_quality == len(set(embedded)) and len(publication) == 3 * n_results
    assert report.figure_plan(STUDY, SUBJECTS) == embedded + publication == report.figure_plan(STUDY, list(SUBJECTS))
    assert all(path.startswith("results/report/figures/") for path in embedded + publication)
    assert [Path(path).suffix for path in publication[:6]] == [".png", ".svg", ".pdf"] * 2
    assert publication[:3] == ["results/report/figures/shape_roi-ember_curve.png", "results/report/figures/shape_roi-ember_curve.svg",
                               "results/report/figures/shape_roi-ember_curve.pdf"]
    assert embedded[0] == "results/report/figures/preview/shape_roi-ember_curve.png"
    assert embedded.index("results/report/figures/preview/carry_rois.png") < embedded.index("results/report/figures/sub-01_design.png")
    assert [path for path in embedded if "_masks" in path] == [f"results/report/figures/roi-{roi}_masks.png" for roi in ROI_NAMES]
    assert "results/report/figures/sub-01_resvar.png" in embedded and "results/report/figures/sub-02_resvar.png" not in embedded
    assert embedded[-1] == "results/report/figures/sub-01_resvar.png"  # quality checks come last
    assert not [path for path in publication if "design" in path or "mask" in path or "resvar" in path]  # one PNG each


def test_the_catalogue_imports_no_plotting_library():
    # Snakemake reads the catalogue at every start (dry runs included): matplotlib there costs 0.25 s each time.
    code = "import sys; import foldwise.plan, foldwise.report.catalogue; print('matplotlib' in sys.modules)"
    result = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True,
                            env={**os.environ, "PYTHONPATH": str(REPO / "workflow")})
    assert result.stdout.strip() == "False"


def test_figure_catalogue_names_existing_captions():
    for entry in report.figure_catalogue(STUDY, SUBJECTS):
        assert (REPO / entry["caption"]).is_file(), entry["caption"]
    kinds = {entry["kind"]: entry["caption"] for entry in report.figure_catalogue(STUDY, SUBJECTS)}
    assert set(kinds) == {"design", "brainmask", "roimasks", "resvar", "curve", "confusion", "comparison"}


def test_analysis_with_its_own_roi_list_plans_only_those():
    study = dict(STUDY, analyses=[dict(STUDY["analyses"][0], rois=["glow"])])
    stems = [entry["stem"] for entry in report.figure_catalogue(study, ["01"])]
    assert stems[:3] == ["shape_roi-glow_curve", "shape_roi-glow_confusion", "shape_rois"]
    assert [s for s in stems if "ember" in s] == ["roi-ember_masks"]  # the quality checks show every ROI of the study


def test_module_examples_hold():
    # The docstring examples are part of the contract (run as doctests).
    from foldwise.report import catalogue, images, page, summary

    from foldwise.report import terminal

    for module, least in ((report, 20), (catalogue, 3), (images, 1), (page, 8), (summary, 3), (terminal, 2)):
        result = doctest.testmod(module, optionflags=doctest.NORMALIZE_WHITESPACE)
        assert result.attempted >= least and result.failed == 0, module.__name__


# -- pure parts --------------------------------------------------------------------------------

def test_all_is_drawn_last_at_the_roi_mean_size_or_beyond_the_largest_count():
    positions, labels = report.voxel_count_positions(["10", "25", "all"], 136.4)
    assert positions.tolist() == [10.0, 25.0, 136.4] and labels == ["10", "25", "all (136)"]
    positions, labels = report.voxel_count_positions(["all", "10", "200"], 136.4)
    assert positions.tolist() == [300.0, 10.0, 200.0] and labels[0] == "all (136)"  # 1.5 x the largest count
    with pytest.raises(InputError, match="neither a whole number"):
        report.voxel_count_positions(["ten"], 100.0)


def test_curve_data_sorts_by_position_marks_strictly_below_alpha_and_flags_capped_counts():
    group_rows = pd.DataFrame({"n_voxels": ["all", "5", "50"], "mean": [0.6, 0.4, 0.5], "ci_low": [0.5, 0.3, 0.4],
                               "ci_high": [0.7, 0.5, 0.6], "chance": [1 / 3] * 3, "p_fwe": [0.01, 0.05, np.nan]})
    subject_rows = pd.DataFrame({"subject": ["02", "01", "01", "01", "02", "02"],
                                 "n_voxels": ["5", "5", "50", "all", "50", "all"],
                                 "n_used": [5, 5, 40, 40, 50, 60], "balanced_accuracy": [0.41, 0.39, 0.5, 0.61, 0.52, 0.6]})
    data = report.curve_data(group_rows, subject_rows, roi_mean_voxels=30.0, alpha=0.05)
    assert data["counts"] == ["5", "50", "all"]  # 'all' last, although the ROIs hold 50 voxels on average
    assert data["x"].tolist() == [5.0, 50.0, 75.0] and np.all(np.diff(data["x"]) > 0)
    assert data["mean"].tolist() == [0.4, 0.5, 0.6]
    assert data["significant"].tolist() == [False, False, True]  # p = alpha is not marked; NaN is not marked
    assert data["capped"].tolist() == [False, True, False]  # subject 01's ROI held 40 < 50 voxels
    assert data["subjects"] == ["01", "02"] and data["dropped"] == []
    np.testing.assert_array_equal(data["scores"], [[0.39, 0.5, 0.61], [0.41, 0.52, 0.6]])


def test_curve_draws_a_count_larger_than_every_roi_once_as_all():
    # The case: 200 and 400 exceed every subject's ROI, so they repeat 'all' and are not drawn again.
    counts = ["10", "100", "200", "400", "all"]
    group_rows = pd.DataFrame({"n_voxels": counts, "mean": [0.4, 0.5, 0.55, 0.55, 0.55], "ci_low": [0.3] * 5,
                               "ci_high": [0.7] * 5, "chance": [0.5] * 5, "p_fwe": [0.5] * 5})
    sizes = {"01": 130, "02": 142}
    subject_rows = pd.DataFrame([{"subject": subject, "n_voxels": count,
                                  "n_used": size if count == "all" else min(int(count), size), "balanced_accuracy": 0.5}
                                 for subject, size in sizes.items() for count in counts])
    data = report.curve_data(group_rows, subject_rows, roi_mean_voxels=136.0, alpha=0.05)
    assert data["counts"] == ["10", "100", "all"] and data["dropped"] == ["200", "400"]
    assert np.all(np.diff(data["x"]) > 0) and data["labels"][-1] == "all (136)"
    figure = report.curve_figure([dict(data, label="within")], "test", 0.05)
    ticks = [label.get_text() for label in figure.axes[0].get_xticklabels()]
    assert ticks == ["10", "100", "all (136)"]  # 'all' once, last


def test_confusion_count_falls_back_to_the_nearest_on_the_log_scale():
    assert report.choose_confusion_count(100, ["10", "100", "all"], 300.0) == ("100", True)
    assert report.choose_confusion_count(100, ["10", "50", "400"], 300.0) == ("50", False)  # |log 0.5| < |log 4|
    assert report.choose_confusion_count(100, ["50", "200"], 300.0) == ("50", False)  # a tie goes to the smaller count
    assert report.choose_confusion_count("all", ["10", "200"], 180.0) == ("200", False)
    with pytest.raises(InputError, match="no voxel count"):
        report.choose_confusion_count(100, [], 10.0)


def test_confusion_matrix_rejects_an_unknown_class():
    rows = pd.DataFrame({"true_class": ["round"], "predicted_class": ["moon"], "count": [2]})
    with pytest.raises(InputError, match="'moon' is not among"):
        report.confusion_matrix(rows, SHAPES)


def test_trials_per_condition_agree_with_pandas_crosstab():
    rng = np.random.default_rng(3)
    runs = [_events(rng, index) for index in range(3)]
    summary = report.trials_per_condition(runs).set_index("condition")
    # Source: pandas.crosstab of run x trial_type (an independent count).
    stacked = pd.concat([run.assign(run=index) for index, run in enumerate(runs)])
    table = pd.crosstab(stacked["run"], stacked["trial_type"])
    assert summary["min_per_run"].to_dict() == table.min().to_dict()
    assert summary["max_per_run"].to_dict() == table.max().to_dict()
    assert summary.loc["seen_star", "max_per_run"] == 4 and summary.loc["seen_round", "max_per_run"] == 3


def test_grid_axes_match_nibabel_apply_affine():
    affine = np.array([[-2.0, 0, 0, 30], [0, 2.5, 0, -40], [0, 0, 3.0, -12], [0, 0, 0, 1]])
    shape = (5, 4, 3)
    coordinates, flips, names = report.grid_axes_mm(affine, shape)
    assert names == ("x", "y", "z") and flips == (True, False, False)
    for axis in range(3):
        index = np.zeros((shape[axis], 3))
        index[:, axis] = np.arange(shape[axis])
        # Source: nibabel.affines.apply_affine (voxel indices to world mm).
        world = nib.affines.apply_affine(affine, index)[:, axis]
        np.testing.assert_allclose(coordinates[axis], np.sort(world))
    rotated = affine.copy()
    rotated[:3, :3] = np.array([[0.8, -0.6, 0], [0.6, 0.8, 0], [0, 0, 1]]) @ rotated[:3, :3]
    coordinates, _, names = report.grid_axes_mm(rotated, shape)
    assert names[0] == "distance along grid axis 1"
    # Source: nibabel.affines.voxel_sizes (the spacing along each grid axis).
    for axis, size in enumerate(nib.affines.voxel_sizes(rotated)):
        np.testing.assert_allclose(coordinates[axis], size * np.arange(shape[axis]))


def test_best_slices_pick_the_fullest_planes():
    mask = np.zeros((6, 7, 5), dtype=bool)
    mask[4, 1:6, 2] = True
    mask[1, 3, 2] = True
    assert report.best_slices(mask) == (4, 3, 2)
    assert report.best_slices(np.zeros((6, 7, 5), dtype=bool)) == (3, 3, 2)


def test_manifest_summary_counts_jobs_and_outputs_only():
    records = [{"step": "glm", "outputs": [1, 2], "wall_time_s": 3.0, "restored_from_memo": True},
               {"step": "demo_dataset", "outputs": [1]}, {"step": "glm", "outputs": [1, 2]}]
    summary = report.manifest_summary(records)
    assert summary.to_dict("list") == {"step": ["glm", "demo_dataset"], "jobs": [2, 1], "output_files": [4, 1]}


def test_reproduce_commands_name_the_config_file():
    commands = dict((command, what) for what, command in report.reproduce_commands("studies/mine.yaml", "bids"))
    assert "make study CONFIG=studies/mine.yaml" in commands
    assert ".venv/bin/snakemake --profile config/profiles/local --cores 2 --config config_file=studies/mine.yaml" in commands
    assert "make demo" in dict((c, w) for w, c in report.reproduce_commands("config/config.yaml", "demo"))


def test_reproduce_commands_repeat_the_runs_overrides():
    dotted = [command for _, command in report.reproduce_commands("studies/mine.yaml", "bids", ["set=study.seed=3 glm.statistic=t"])]
    assert "make study CONFIG=studies/mine.yaml SET='study.seed=3 glm.statistic=t'" in dotted
    assert (".venv/bin/snakemake --profile config/profiles/local --cores 2 --config config_file=studies/mine.yaml "
            "'set=study.seed=3 glm.statistic=t'") in dotted
    # A mapping override has no make form: only the Snakemake command, which carries it
    mapping = [command for _, command in report.reproduce_commands("config/config.yaml", "demo", ["group={alpha: 0.01}"])]
    assert not any(command.startswith("make demo") for command in mapping)
    assert ".venv/bin/snakemake --profile config/profiles/local --cores 2 --config config_file=config/config.yaml 'group={alpha: 0.01}'" in mapping


def test_the_rule_code_hash_covers_the_report_modules():
    # The report rule's params carry step_code("report.py"): it must follow the job into foldwise.report.figures.
    from foldwise.provenance.hashing import module_closure

    closure = {path.relative_to(REPO).as_posix() for path in module_closure(REPO / "workflow" / "scripts" / "report.py")}
    assert {"workflow/foldwise/report/figures.py", "workflow/foldwise/jobs/report.py", "workflow/foldwise/data/fileio.py"} <= closure


def test_captions_render_as_snakemake_renders_them():
    # Snakemake renders a caption with Jinja2 (given a `snakemake` object) and then docutils to HTML.
    import jinja2  # installed with Snakemake, which renders captions with it
    from docutils.core import publish_parts

    class _Job:
        config = STUDY
        params = {}
        wildcards = {}

    for name in sorted(set(report.CAPTIONS.values())):
        text = jinja2.Environment(undefined=jinja2.StrictUndefined).from_string(
            (REPO / name).read_text(encoding="utf-8")).render(snakemake=_Job())
        body = publish_parts(text, writer="html", settings_overrides={"halt_level": 2, "report_level": 5})["body"]
        assert len(re.sub(r"<[^>]+>", "", body).split()) >= 25, name
        assert "http" not in text


# -- the job: files -------------------------------------------------------------------------------

def test_job_writes_exactly_the_planned_figures_and_the_page(built):
    written = sorted(str(path) for path in (built["root"] / "report").rglob("*") if path.is_file())
    assert written == sorted(built["outputs"]["figures"] + built["outputs"]["previews"] + [built["outputs"]["html"]])


def test_the_page_shows_the_glm_design_image_itself(built):
    # The report embeds the picture the GLM job drew of each subject's first run, byte for byte, instead of a second drawing.
    for design in built["inputs"]["design_images"]:
        subject = Path(design).name.split("_")[0]
        shown = Path(built["outputs"]["html"]).parent / "figures" / f"{subject}_design.png"
        assert shown.read_bytes() == Path(design).read_bytes()


def _png_chunks(data):
    """(type, payload) of every chunk (Source: PNG specification, 5.3: length, type, data, CRC)."""
    chunks, offset = [], 8
    while offset < len(data):
        length = struct.unpack(">I", data[offset:offset + 4])[0]
        chunks.append((data[offset + 4:offset + 8], data[offset + 8:offset + 8 + length]))
        offset += 12 + length
    return chunks


def test_figures_are_valid_publication_png_svg_and_pdf(built):
    for path in built["outputs"]["figures"]:
        data = Path(path).read_bytes()
        if path.endswith(".png"):
            # Source: PNG specification, 5.2 (signature), 11.2.2 (IHDR: width, height as 4-byte big-endian),
            # 11.3.5.3 (pHYs: pixels per unit, unit 1 = metre) and 11.3.6.1 (tIME, which must be absent).
            assert data[:8] == b"\x89PNG\r\n\x1a\n" and data[12:16] == b"IHDR", path
            width, height = struct.unpack(">II", data[16:24])
            assert width >= 900 and height >= 750, (path, width, height)
            chunks = dict(_png_chunks(data))
            x_per_m, y_per_m, unit = struct.unpack(">IIB", chunks[b"pHYs"])
            assert unit == 1 and min(x_per_m, y_per_m) * 0.0254 >= 299.5, (path, x_per_m)  # >= 300 dpi
            assert b"tIME" not in chunks
        elif path.endswith(".svg"):
            root = ElementTree.fromstring(data)
            assert root.tag == "{http://www.w3.org/2000/svg}svg", path
            texts = [element for element in root.iter() if element.tag == "{http://www.w3.org/2000/svg}text"]
            assert len(texts) >= 5, path  # labels kept as text, not paths
            assert b"<dc:date>" not in data
        else:
            # Source: PDF 1.7 (ISO 32000-1), 7.5.2 (header) and 7.5.5 (trailer): the file starts with %PDF- and ends with %%EOF.
            assert data.startswith(b"%PDF-") and data.rstrip().endswith(b"%%EOF"), path
            assert b"/CreationDate" not in data and b"/FontFile2" in data, path  # no date; TrueType fonts (editable text)


def _png_dpi(data):
    """Pixels per inch from the pHYs chunk (PNG specification 11.3.5.3: pixels per metre, unit 1 = metre)."""
    x_per_m, _, unit = struct.unpack(">IIB", dict(_png_chunks(data))[b"pHYs"])
    assert unit == 1
    return x_per_m * 0.0254


def test_page_embeds_every_screen_preview_links_the_files_and_loads_nothing_else(built):
    parsed = _parse(built["html"])
    images = [attributes for tag, attributes in parsed.elements if tag == "img"]
    previews = built["outputs"]["previews"]
    results = [path for path in previews if "/preview/" in path]
    quality = [path for path in previews if "/preview/" not in path]
    assert len(images) == len(previews) == len(results) + len(quality) and len(results) == len(built["outputs"]["figures"]) // 3
    embedded = [base64.b64decode(image["src"].removeprefix("data:image/png;base64,"), validate=True) for image in images]
    assert sorted(embedded) == sorted(Path(path).read_bytes() for path in previews)  # each figure's own PNG
    for preview, png in zip(results, built["outputs"]["figures"][::3]):
        # the same figure at screen resolution: a third of the 300-dpi file's pixels per side (rounded)
        small, large = Path(preview).read_bytes(), Path(png).read_bytes()
        assert Path(preview).name == Path(png).name
        assert round(_png_dpi(small)) == 100 and round(_png_dpi(large)) == 300
        small_width, large_width = struct.unpack(">I", small[16:20])[0], struct.unpack(">I", large[16:20])[0]
        assert abs(small_width * 3 - large_width) <= 3, (preview, small_width, large_width)
    assert all(image["src"].startswith("data:image/png;base64,") and image.get("alt") for image in images)
    links = [attributes["href"] for tag, attributes in parsed.elements if tag == "a" and not attributes["href"].startswith("#")]
    # every publication file and every quality check's PNG is linked, relative to the page, and the link resolves to the file
    assert sorted(links) == sorted(Path(path).relative_to(Path(built["outputs"]["html"]).parent).as_posix()
                                   for path in built["outputs"]["figures"] + quality)
    assert all((Path(built["outputs"]["html"]).parent / link).is_file() for link in links)
    for tag, attributes in parsed.elements:
        assert tag not in ("script", "link", "iframe", "object", "embed", "base"), tag
        for name, value in attributes.items():
            if tag == "a" and name == "href" and value in links:
                continue  # a link to a file beside the page: followed only when clicked, never loaded
            if name in ("src", "href", "srcset", "poster", "data", "action", "background"):
                assert value.startswith("data:") or value.startswith("#"), (tag, name, value[:60])
            assert "http://" not in (value or "") and "https://" not in (value or ""), (tag, name)
    assert "url(" not in "".join(parsed.style) and "@import" not in "".join(parsed.style)
    assert "http://" not in built["html"] and "https://" not in built["html"]


def test_rerun_gives_byte_identical_files(tmp_path):
    # A smaller study (one ROI, the within analysis, two subjects) keeps the test fast; inputs are built once.
    study = dict(STUDY, rois=STUDY["rois"][:1], analyses=STUDY["analyses"][:1])
    inputs, params, _ = build_study(tmp_path / "inputs", study=study, subjects=SUBJECTS[:2])
    files = []
    for name in ("first", "second"):
        outputs, publication = (outputs_for(tmp_path / name, study, SUBJECTS[:2]),
                                publication_outputs_for(tmp_path / name, study, SUBJECTS[:2]))
        report_job.run(inputs, outputs, params, _quiet_log())
        report_job.run_publication_files(inputs, publication, params, _quiet_log())
        files.append(publication["figures"] + outputs["previews"] + [outputs["html"]])
    # curve, confusion, comparison (3 files each and a preview); design and brain mask of 2 subjects, one ROI, residual variance
    assert len(files[0]) == 3 * 3 + 3 + 2 * 2 + 1 + 1 + 1
    for one, other in zip(*files):
        assert Path(one).read_bytes() == Path(other).read_bytes(), Path(one).name


# -- the job: what the page says ---------------------------------------------------------------------

def test_page_has_the_sections_in_order(built):
    ids = [attributes["id"] for tag, attributes in _parse(built["html"]).elements if tag == "section"]
    assert ids == ["summary", "results", "quality-checks", "warnings", "cautions", "study", "provenance"]
    text = _text(built["html"])
    for heading in ("Design matrices", "Brain masks", "ROI placement in every subject", "ROI voxel counts", "GLM residual variance",
                    "Analysis shape", "Analysis carry", "ROIs compared (analysis carry)"):
        assert heading in text
    # The answer leads: the summary box comes before the first result figure and long before the quality checks.
    page_html = built["html"]
    assert page_html.index('class="answer"') < page_html.index("<figure") < page_html.index('id="fig-sub-01_design"')


def test_summary_box_states_what_survives_in_plain_words(built):
    section = built["html"].split('<section id="summary">', 1)[1].split("</section>", 1)[0]
    text = _plain(section)
    # ember survives at 20 and all voxels (p_fwe 0.01 < alpha), glow nowhere (p_fwe 0.6), in every direction.
    assert "ROI ember, within: above chance after family-wise correction at 2 of 3 voxel counts (20, all)" in text
    assert "ROI glow, within: no voxel count survives family-wise correction (smallest corrected p 0.6" in text
    assert "ROI ember, seen<->heard: above chance" in text and "prevalence lower bound 0.20 (family-wise corrected 0.10)" in text
    assert "Research use only" in text and "how many people" in text


def test_every_contents_link_resolves_to_one_anchor(built):
    parsed = _parse(built["html"])
    ids = [attributes["id"] for _, attributes in parsed.elements if "id" in attributes]
    assert len(ids) == len(set(ids))
    links = [attributes["href"] for tag, attributes in parsed.elements if tag == "a" and "href" in attributes]
    files = {Path(path).relative_to(Path(built["outputs"]["html"]).parent).as_posix()
             for path in built["outputs"]["figures"] + built["outputs"]["previews"]}
    anchors = [link for link in links if link not in files]  # the other links: the figures' files
    assert anchors and all(link.startswith("#") and link[1:] in ids for link in anchors)
    for target in ("analysis-shape", "analysis-carry-roi-glow", "analysis-carry-rois", "summary", "warnings"):
        assert f"#{target}" in links, target


def _plain(page_html):
    """Visible text with the space an inline tag leaves before punctuation removed."""
    return re.sub(r"\s+([,:;.])", r"\1", _text(page_html))


def test_warnings_of_the_jobs_are_listed_with_their_job(built, tmp_path):
    log = tmp_path / "decode.log"
    log.write_text("INFO computed\nWARNING subject 01, ROI glow has 12 voxels: voxel count(s) 20 exceed it\n", encoding="utf-8")
    warnings = report_job._read_warnings([["decode", "analysis=shape subject=01 roi=glow", str(log)],
                                          ["glm", "subject=01", str(tmp_path / "never-written.log")]])
    assert warnings == [("decode analysis=shape subject=01 roi=glow",
                         "subject 01, ROI glow has 12 voxels: voxel count(s) 20 exceed it")]
    section_id, heading, inner, _ = report_job._warnings_section({"warnings": warnings})
    assert (section_id, heading) == ("warnings", "Warnings (1)")
    assert "decode analysis=shape subject=01 roi=glow: subject 01, ROI glow has 12 voxels" in _plain(inner)
    assert "No job of this run logged a warning." in _text(built["html"])
    assert "This run logged 0 warnings" in _text(built["html"])


def test_p_values_at_their_floor_print_their_resolution():
    from foldwise.report.page import format_p

    assert format_p(1 / 10001, n_draws=10000) == "< 0.0001 (10,000 draws)"
    assert format_p(1 / 101, n_draws=100) == "< 0.01 (100 draws)"
    assert format_p(2 / 101, n_draws=100) == "0.0198" and format_p(1 / 101) == "0.0099"


def test_study_facts_are_on_the_page(built):
    text = _text(built["html"])
    assert hash_object(STUDY) in text
    assert "3: 01, 02, 03" in text and "2 per subject (run-01, run-02)" in text
    assert "repetition time (s) 2" in text and "voxel size (mm) 3 x 3 x 3" in text
    assert "seen_star 3 to 4 6" in text and "seen_round 3 6" in text  # trials per run, runs with trials (3 x 2)
    for name in ("numpy", "scipy", "nibabel", "scikit-learn", "snakemake", "foldwise"):
        assert f"{name} {metadata.version(name)}" in text  # Source: importlib.metadata
    assert "byte-identical" in text and "results/provenance/" in text
    assert not re.search(r"\b20\d\d-\d\d-\d\d\b|\d\d:\d\d:\d\d", text)  # no date or clock time


def test_glm_facts_table_shows_what_the_glm_job_recorded_per_run(built):
    table = re.search(r"<table[^>]*id=\"glm-facts\".*?</table>", built["html"], flags=re.S).group(0)
    rows = [[html_module.unescape(re.sub(r"<[^>]+>", "", cell)) for cell in re.findall(r"<td[^>]*>(.*?)</td>", row)]
            for row in re.findall(r"<tr[^>]*>(.*?)</tr>", table, flags=re.S)]
    rows = [row for row in rows if row]
    expected = []
    for path in built["inputs"]["glm_facts"]:  # the files the GLM job wrote, read back independently
        facts = json.loads(Path(path).read_text())
        names = facts["confounds"]
        expected.append([f"sub-{facts['subject']}", facts["run_id"], f"{len(names)}: {', '.join(names)}",
                         str(facts["n_dropped_initial_volumes"]), str(facts["n_dropped_events_rows"])])
    assert rows == expected and len(rows) == len(SUBJECTS) * len(RUN_IDS)
    assert "Confounds and dropped data per run" in _text(built["html"])


def test_roi_counts_table_shows_every_subject_mean_and_minimum(built):
    text = _text(built["html"])
    sizes = built["facts"]["roi_sizes"]
    for subject in SUBJECTS:
        assert f"sub-{subject} {sizes[subject]['ember']} {sizes[subject]['glow']}" in text
    means = [np.mean([sizes[s][roi] for s in SUBJECTS]) for roi in ROI_NAMES]
    assert f"mean {means[0]:.1f} {means[1]:.1f}" in text and "minimum required 10 10" in text
    assert f"{means[0]:.1f} voxels" in text  # the curve caption says where 'all' sits


def test_results_show_group_tables_with_corrected_p_and_prevalence(built):
    parsed = _parse(built["html"])
    text = _text(built["html"])
    assert "p (t-test, uncorrected)" in text and "p_fwe (family-wise corrected)" in text
    assert "prevalence: lower bound" in text
    assert "Group statistics (one-sided: above chance), 3 subjects, chance 0.333." in text  # constant columns
    assert "< 0.01 (100 draws)" not in text  # the test table's p_fwe (0.01) is above the floor 1/101
    bold_rows = [attributes for tag, attributes in parsed.elements if tag == "tr" and attributes.get("class") == "survives"]
    # ember at 20 and all voxels (p_fwe 0.01) survive: 2 counts x (1 + 5 directions); p_fwe = alpha does not.
    assert len(bold_rows) == 2 * (1 + len(CROSS_DIRECTIONS))
    # One vocabulary: directions keep their table names; the plain reading is a legend and a tooltip.
    assert "seen->heard = train on seen, test on heard" in text and "seen<->heard = mean of seen->heard and heard->seen" in text
    assert "train seen, test heard" not in text
    assert "Demo ground truth for ROI glow" in text
    assert "Okabe & Ito" in text and "balanced accuracy (the mean of the per-class hit rates" in text


def test_group_tables_show_effect_size_family_corrected_prevalence_and_p_min_warning(built):
    headers = _group_headers(built["html"])
    for header in ("effect size", "prevalence: lower bound (FWE)", "voxels used", "p_fwe (family-wise corrected)"):
        assert header in headers, header
    text = _text(built["html"])
    assert "family of p_fwe: one family per direction" in text
    assert "Largest prevalence lower bound this design can reach: 0.37 (below 0.5: the majority test cannot succeed" in text
    # glow rows (subject_p_min 0.125 > alpha 0.05) are warned about, ember rows (1/101) are not
    analysis = STUDY["analyses"][0]
    n_glow_rows = len(_directions(analysis)) * len(COUNTS)
    assert f"Warning: in {n_glow_rows} of {2 * n_glow_rows} rows some subject's smallest attainable permutation p " \
           "(up to 0.125) exceeds alpha 0.05" in text
    assert "40-52" in text  # n_used of the 'all' rows, as the group job writes it
    results_start = text.index("Score: balanced accuracy (the mean")  # the results section's first words
    assert text.index("Corrected p (p_fwe < 0.05): one family per direction") < results_start  # in the summary box
    assert text.index("Largest prevalence lower bound this design can reach: 0.37") < results_start


def test_methods_say_what_the_family_is_and_how_to_run_the_design_self_check(built):
    text = _text(built["html"])
    assert "Family-wise correction (group.family = per_direction): the family is all ROIs and voxel counts of one " \
           "direction (one family per direction)" in text
    assert "make calibrate CONFIG=<your config>" in text and "results/calibration/<analysis>_calibration.tsv" in text
    assert "maximum statistic over all ROIs and voxel counts of one direction (one family per direction)" in text  # cautions


def test_family_text_names_each_configured_family():
    assert report_job.family_text(["direction within", "direction seen->heard"]).startswith("one family per direction")
    assert report_job.family_text(["all directions"]) == "one family: every ROI x voxel count x direction of the analysis"
    assert "Bonferroni over the analyses" in report_job.family_text(["all analyses"])


def test_confusion_count_fallback_is_stated(built):
    text = _text(built["html"])
    assert STUDY["report"]["confusion_n_voxels"] == 100
    assert "all voxels (the configured 100 is not among the counts tested)" in text


def test_provenance_counts_jobs_and_outputs_without_times(built):
    text = _text(built["html"])
    facts = built["facts"]
    assert f"all steps {facts['n_jobs']} {facts['n_outputs']}" in text
    assert "glm 6 30" in text and "make demo" in text and "make verify" in text
    assert "restored" not in text.lower() and "wall" not in text.lower()


def test_cautions_are_in_plain_words(built):
    section = built["html"].split('<section id="cautions">', 1)[1].split("</section>", 1)[0]
    text = _text(section)
    assert "Research use only" in text and "not for clinical" in text
    assert "says nothing about how many people show the effect" in text and "prevalence" in text
    assert "family-wise" in text and "maximum statistic" in text
    assert "inside the training folds" in text
    assert "simulated" in text  # the test study says dataset.source: demo


# -- the job: failures ------------------------------------------------------------------------------

def test_declared_figures_must_match_the_plan(built, tmp_path):
    outputs = outputs_for(tmp_path)
    outputs["previews"] = outputs["previews"][:-2] + outputs["previews"][-1:]
    with pytest.raises(InputError) as caught:
        report_job.run(built["inputs"], outputs, built["params"], _quiet_log())
    assert caught.value.field == "outputs.previews" and "embedded_files" in caught.value.fix
    publication = publication_outputs_for(tmp_path)
    publication["figures"] = publication["figures"][1:]
    with pytest.raises(InputError) as caught:
        report_job.run_publication_files(built["inputs"], publication, built["params"], _quiet_log())
    assert caught.value.field == "outputs.figures" and "publication_files" in caught.value.fix


def test_a_summary_without_a_column_names_file_and_column(built, tmp_path):
    broken = tmp_path / "sub-01_summary.tsv"
    pd.read_csv(built["inputs"]["summaries"][0], sep="\t", dtype=str).drop(columns="balanced_accuracy").to_csv(
        broken, sep="\t", index=False)
    inputs = dict(built["inputs"], summaries=[str(broken)] + built["inputs"]["summaries"][1:])
    with pytest.raises(InputError) as caught:
        report_job.run(inputs, outputs_for(tmp_path / "out"), built["params"], _quiet_log())
    assert caught.value.file == str(broken) and caught.value.field == "balanced_accuracy"


def test_a_missing_confusion_table_is_named(built, tmp_path):
    inputs = dict(built["inputs"], confusions=built["inputs"]["confusions"][1:])
    with pytest.raises(InputError, match="no confusion table of analysis shape, sub-01, ROI ember"):
        report_job.run(inputs, outputs_for(tmp_path), built["params"], _quiet_log())


def test_a_bad_repetition_time_is_named(built, tmp_path):
    sidecar = tmp_path / "bold.json"
    sidecar.write_text(json.dumps({"RepetitionTime": "two"}))
    inputs = dict(built["inputs"], sidecars=[str(sidecar)])
    with pytest.raises(InputError) as caught:
        report_job.run(inputs, outputs_for(tmp_path / "out"), built["params"], _quiet_log())
    assert caught.value.file == str(sidecar) and caught.value.field == "RepetitionTime"


# -- the page in a real browser (Debian's chromium) ---------------------------------------------------

_CHROMIUM_FLAGS = ("--headless", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
                   "--disable-background-networking", "--disable-component-update", "--disable-sync",
                   "--hide-scrollbars", "--enable-logging=stderr", "--v=1")
_REQUEST = re.compile(r"NotifyBeforeURLRequest: (\S+)")
_CONSOLE = re.compile(r":CONSOLE[^\]]*\] (.*)")


_CHROMIUM_MISSING = ("chromium is not installed: run `apt-get update && apt-get install -y chromium` "
                     "(CI's .ci/run installs it); the browser tests need it")


def _chromium():
    """The chromium executable, or None."""
    return shutil.which("chromium") or ("/usr/bin/chromium" if Path("/usr/bin/chromium").is_file() else None)


def _runs_or_fail(browser_runs):
    """A missing browser fails the test (not an error, not a skip) with the fix in the message."""
    if browser_runs is None:
        pytest.fail(_CHROMIUM_MISSING, pytrace=False)
    return browser_runs


def _open_in_chromium(page_path, folder, window=(1280, 2400)):
    """Load a page headless; return (console messages, requested URLs, screenshot path)."""
    folder.mkdir(parents=True, exist_ok=True)
    screenshot = folder / "screenshot.png"
    command = [_chromium(), *_CHROMIUM_FLAGS, f"--user-data-dir={folder / 'profile'}",
               f"--window-size={window[0]},{window[1]}", f"--screenshot={screenshot}", Path(page_path).resolve().as_uri()]
    finished = subprocess.run(command, capture_output=True, text=True, timeout=120, check=False)
    assert finished.returncode == 0, finished.stderr[-2000:]
    log = finished.stderr
    return _CONSOLE.findall(log), _REQUEST.findall(log), screenshot


def _hosts(urls):
    return {re.sub(r"^[a-z]+://([^/?#]*).*$", r"\1", url) for url in urls}


@pytest.fixture(scope="module")
def browser_runs(built, tmp_path_factory):
    if _chromium() is None:
        return None
    folder = tmp_path_factory.mktemp("browser")
    blank = folder / "blank.html"
    blank.write_text("<!DOCTYPE html><html lang=\"en\"><head><meta charset=\"utf-8\"><title>blank</title></head>"
                     "<body><p>blank</p></body></html>\n", encoding="utf-8")
    faulty = folder / "faulty.html"
    faulty.write_text("<!DOCTYPE html><html lang=\"en\"><head><meta charset=\"utf-8\"><title>faulty</title></head><body>"
                      "<img src=\"http://lantern-test.invalid/round.png\" alt=\"x\">"
                      "<script>console.error('deliberate lantern error');</script></body></html>\n", encoding="utf-8")
    return {"blank": _open_in_chromium(blank, folder / "blank", (400, 300)),
            "faulty": _open_in_chromium(faulty, folder / "faulty", (400, 300)),
            "report": _open_in_chromium(built["outputs"]["html"], folder / "report")}


@pytest.mark.browser
def test_browser_checks_catch_console_errors_and_network_loads(browser_runs):
    # The negative control: the same checks must see a console error and a network load.
    browser_runs = _runs_or_fail(browser_runs)
    console, requests, _ = browser_runs["faulty"]
    assert any("deliberate lantern error" in message for message in console)
    assert "lantern-test.invalid" in _hosts(requests) - _hosts(browser_runs["blank"][1])


@pytest.mark.browser
def test_report_opens_in_chromium_without_console_messages_or_network_loads(browser_runs):
    browser_runs = _runs_or_fail(browser_runs)
    console, requests, _ = browser_runs["report"]
    assert console == []
    # The browser's own background requests (also made for a blank page) are not the page's.
    assert _hosts(requests) - _hosts(browser_runs["blank"][1]) == set()
    assert not [url for url in requests if "lantern" in url or url.startswith("file:")]


@pytest.mark.browser
def test_report_screenshot_is_not_blank(browser_runs):
    from matplotlib.image import imread

    browser_runs = _runs_or_fail(browser_runs)

    pixels = imread(browser_runs["report"][2])[..., :3]
    assert pixels.shape[0] >= 2000 and pixels.shape[1] >= 1200
    grey = pixels.mean(axis=2)
    assert grey.std() > 0.1  # text, tables and figures, not a blank page
    assert (grey < 0.5).mean() > 0.01 and (grey > 0.9).mean() > 0.3
    blank = imread(browser_runs["blank"][2])[..., :3].mean(axis=2)
    assert grey.std() > 3 * blank.std()


# -- the page printed to PDF by chromium, read back with poppler's pdftotext ---------------------------

_PDFTOTEXT_MISSING = ("pdftotext is not installed: run `apt-get install -y poppler-utils` (CI's .ci/run installs it); "
                      "the print test reads the PDF's text with it")


def _words(text):
    """Lower-case words without hyphens (pdftotext joins a word hyphenated at a line end)."""
    return re.sub(r"[-\s]+", " ", text.replace("-\n", "")).lower().split()


@pytest.fixture(scope="module")
def printed(built, tmp_path_factory):
    if _chromium() is None or shutil.which("pdftotext") is None:
        return None
    folder = tmp_path_factory.mktemp("printed")
    pdf = folder / "report.pdf"
    command = [_chromium(), *_CHROMIUM_FLAGS, f"--user-data-dir={folder / 'profile'}", "--no-pdf-header-footer",
               f"--print-to-pdf={pdf}", Path(built["outputs"]["html"]).resolve().as_uri()]
    finished = subprocess.run(command, capture_output=True, text=True, timeout=180, check=False)
    assert finished.returncode == 0 and pdf.is_file(), finished.stderr[-2000:]
    dom = subprocess.run([_chromium(), *_CHROMIUM_FLAGS, f"--user-data-dir={folder / 'profile-dom'}", "--dump-dom",
                          Path(built["outputs"]["html"]).resolve().as_uri()], capture_output=True, text=True, timeout=180,
                         check=False)
    assert dom.returncode == 0, dom.stderr[-2000:]
    text = subprocess.run(["pdftotext", str(pdf), "-"], capture_output=True, text=True, check=True).stdout
    return {"pdf": pdf, "text": text, "dom": dom.stdout}


def _printed_or_fail(printed):
    if printed is None:
        pytest.fail(_CHROMIUM_MISSING if _chromium() is None else _PDFTOTEXT_MISSING, pytrace=False)
    return printed


def _group_headers(page_html):
    tables = re.findall(r"<table class=\"compact\".*?</table>", page_html, flags=re.S)
    group = [table for table in tables if "Group statistics" in table]
    assert group, "no group table on the page"
    return [html_module.unescape(re.sub(r"<[^>]+>", "", cell)) for cell in re.findall(r"<th[^>]*>(.*?)</th>", group[0])]


@pytest.mark.browser
def test_printed_pdf_holds_every_group_table_column(built, printed):
    printed = _printed_or_fail(printed)
    headers = _group_headers(built["html"])
    assert "p_fwe (family-wise corrected)" in headers and "prevalence: p (majority)" in headers
    words = _words(printed["text"])
    for header in headers:
        for word in _words(header):
            assert word in words, (header, word)  # a column cut at the page edge loses its header
    assert "p_fwe" in words and "survives" in words
    # Every cell of a surviving row too: the last column's values (prevalence p, majority) are printed.
    assert _words(printed["text"]).count("0.3") >= 2


@pytest.mark.browser
def test_printed_pdf_leads_with_the_answer(printed):
    printed = _printed_or_fail(printed)
    text = " ".join(_words(printed["text"]))
    answer = text.index(" ".join(_words("ROI ember, within: above chance after")))
    first_quality_figure = text.index(" ".join(_words("the design as the GLM job drew it")))
    assert answer < first_quality_figure


@pytest.mark.browser
def test_every_contents_anchor_resolves_in_the_browser(printed):
    printed = _printed_or_fail(printed)
    parsed = _parse(printed["dom"])
    ids = {attributes["id"] for _, attributes in parsed.elements if "id" in attributes}
    links = [attributes["href"] for tag, attributes in parsed.elements if tag == "a" and "href" in attributes]
    anchors = [link for link in links if not link.startswith("figures/")]  # the others link the figures' files
    assert len(anchors) >= 15 and all(link[1:] in ids for link in anchors)


# -- searchlight maps: clusters and the figure ---------------------------------------------------------

def _flood_clusters(mask):
    """Connected components (26-neighbourhood) by a plain breadth-first search: the brute-force reference."""
    labels, count = np.zeros(mask.shape, dtype=int), 0
    for start in zip(*np.nonzero(mask)):
        if labels[start]:
            continue
        count += 1
        labels[start], queue = count, [start]
        while queue:
            i, j, k = queue.pop()
            for di in (-1, 0, 1):
                for dj in (-1, 0, 1):
                    for dk in (-1, 0, 1):
                        near = (i + di, j + dj, k + dk)
                        if all(0 <= near[a] < mask.shape[a] for a in range(3)) and mask[near] and not labels[near]:
                            labels[near] = count
                            queue.append(near)
    return labels, count


def test_searchlight_clusters_match_a_brute_force_search_and_give_peaks_in_mm():
    rng = np.random.default_rng(11)
    shape = (9, 8, 7)
    p_fwe = np.where(rng.random(shape) < 0.12, 0.01, 0.5)[..., None]
    margin = rng.normal(0.1, 0.05, shape)[..., None]
    affine = np.array([[-2.0, 0, 0, 40], [0, 2.0, 0, -30], [0, 0, 2.5, -10], [0, 0, 0, 1]])
    table = report.searchlight_clusters(margin, p_fwe, ["within"], affine, 0.05)
    labels, count = _flood_clusters(p_fwe[..., 0] < 0.05)
    sizes = sorted(np.bincount(labels.ravel())[1:].tolist(), reverse=True)
    assert len(table) == count and table["n_voxels_cluster"].tolist() == sizes
    assert np.allclose(table["volume_mm3"], np.array(sizes) * 10.0)  # |det| = 2 x 2 x 2.5 mm
    largest = table.iloc[0]
    members = [tuple(index) for index in np.argwhere(labels == np.bincount(labels.ravel())[1:].argmax() + 1)]
    peak = max(members, key=lambda index: margin[index + (0,)])
    # Source: nibabel.affines.apply_affine (voxel index to world mm).
    assert np.allclose([largest.peak_x_mm, largest.peak_y_mm, largest.peak_z_mm], nib.affines.apply_affine(affine, peak))
    assert largest.peak_margin == pytest.approx(margin[peak + (0,)]) and largest.peak_p_fwe == 0.01


def test_searchlight_figure_uses_the_same_slices_for_every_direction_and_marks_the_sides():
    rng = np.random.default_rng(12)
    shape = (10, 12, 8)
    brain = np.zeros(shape, dtype=bool)
    brain[1:9, 1:11, 1:7] = True
    margin = rng.normal(0.0, 0.05, shape + (2,))
    p_fwe = np.ones(shape + (2,))
    p_fwe[2:4, 3:5, 2:4, 0] = 0.01  # only the first direction has significant voxels
    figure = report.searchlight_figure(margin, p_fwe, ["seen->heard", "heard->seen"], rng.random(shape), brain,
                                       _affine(), 0.05, "maps")
    titles = [axes.get_title() for axes in figure.axes if axes.get_title()]
    first = [title.split(": ", 1)[1] for title in titles if title.startswith("seen->heard")]
    second = [title.split(": ", 1)[1] for title in titles if title.startswith("heard->seen")]
    assert first == second and len(first) == 3  # the same planes in both rows
    texts = [text.get_text() for axes in figure.axes for text in axes.texts]
    assert texts.count("L") == texts.count("R") == 4  # coronal and axial panels of both rows
    overlays = {axes.get_title(): np.ma.masked_invalid(axes.get_images()[1].get_array()) for axes in figure.axes
                if axes.get_title() and len(axes.get_images()) == 2}
    # Thresholded: the second direction has no voxel below alpha, so its overlay is empty; the first shows some.
    assert all(np.ma.count(array) == 0 for title, array in overlays.items() if title.startswith("heard->seen"))
    assert sum(np.ma.count(array) for title, array in overlays.items() if title.startswith("seen->heard")) > 0


def test_group_confusion_is_the_mean_of_scikit_learns_row_normalised_matrices():
    from sklearn.metrics import confusion_matrix as sklearn_confusion

    rng = np.random.default_rng(13)
    counts, references = [], []
    for _ in range(4):
        true = rng.integers(0, 3, 40)
        predicted = np.where(rng.random(40) < 0.6, true, rng.integers(0, 3, 40))
        counts.append(sklearn_confusion(true, predicted, labels=[0, 1, 2]))
        # Source: scikit-learn's confusion_matrix(normalize="true"): each true class's row divided by its total.
        references.append(sklearn_confusion(true, predicted, labels=[0, 1, 2], normalize="true"))
    shares = report.group_confusion(counts)
    np.testing.assert_allclose(shares, np.mean(references, axis=0))
    np.testing.assert_allclose(shares.sum(axis=1), 1.0)
    # A class one subject never tested is averaged over the subjects that did.
    counts[0][2] = 0
    np.testing.assert_allclose(report.group_confusion(counts)[2], np.mean([r[2] for r in references[1:]], axis=0))


def test_an_input_the_plan_does_not_list_is_named(built, tmp_path):
    # Fields come from the plan's records (foldwise.plan.report_input_index), never from parsing file names.
    stray = tmp_path / "sub-01_roi-ember_confusion.tsv"
    shutil.copyfile(built["inputs"]["confusions"][0], stray)
    inputs = dict(built["inputs"], confusions=[str(stray)] + built["inputs"]["confusions"][1:])
    with pytest.raises(InputError) as caught:
        report_job.run(inputs, outputs_for(tmp_path / "out"), built["params"], _quiet_log())
    assert caught.value.file == str(stray) and "not among the report's planned inputs" in caught.value.problem
    params = {key: value for key, value in built["params"].items() if key != "input_index"}
    with pytest.raises(InputError, match="report_input_index"):
        report_job.run(built["inputs"], outputs_for(tmp_path / "out2"), params, _quiet_log())


def _through_memo(inputs, outputs, params, folder, store):
    """Run the report job as the workflow does (memo key, part memo, provenance record); return the record."""
    from foldwise.provenance.memo import run_in_process

    output = Named(outputs, provenance=str(folder / "provenance.json"))
    run_in_process("report", report_job.run, Named(inputs), output, SimpleNamespace(settings=params, code="test"),
                   Named(), [str(folder / "report.log")], {"study": {"store_dir": str(store)}})
    return json.loads(Path(output.provenance).read_text(encoding="utf-8"))


def _first_report_through_memo(tmp_path):
    """One analysis, two subjects: (inputs, outputs, params, provenance record) of the report drawn from empty."""
    study = dict(STUDY, analyses=STUDY["analyses"][:1])
    subjects = SUBJECTS[:2]
    inputs, params, _ = build_study(tmp_path / "inputs", study=study, subjects=subjects)
    outputs = outputs_for(tmp_path / "report", study, subjects)
    return inputs, outputs, params, _through_memo(inputs, outputs, params, tmp_path, tmp_path / "store")


def test_a_changed_roi_redraws_only_the_figures_that_show_it(tmp_path, monkeypatch):
    monkeypatch.delenv("FOLDWISE_MEMO", raising=False)
    inputs, outputs, params, first = _first_report_through_memo(tmp_path)
    assert first["parts"] and not any(part["restored"] for part in first["parts"])  # from empty: every figure drawn
    drawn_bytes = {path: Path(path).read_bytes() for path in outputs["previews"]}
    # glow's confusion counts change for one subject: only the glow confusion figure shows them
    path = next(path for path in inputs["confusions"] if "sub-01_roi-glow_" in path)
    table = pd.read_csv(path, sep="\t", dtype={"n_voxels": str})
    table["count"] = table["count"][::-1].to_numpy()
    write_tsv(path, table)
    second = _through_memo(inputs, outputs, params, tmp_path, tmp_path / "store")
    drawn = sorted(part["part"] for part in second["parts"] if not part["restored"])
    assert drawn == ["figure-shape_roi-glow_confusion"]
    assert len(second["parts"]) == len(first["parts"])
    for name, data in drawn_bytes.items():  # restored files are the drawn ones, byte for byte
        if "glow_confusion" not in name:
            assert Path(name).read_bytes() == data, name
    # the same inputs with the memo off: every figure drawn again, the same bytes
    monkeypatch.setenv("FOLDWISE_MEMO", "off")
    params = dict(params, overrides=["a.b=1"])  # another job key, so the whole job is not restored
    third = _through_memo(inputs, outputs, params, tmp_path, tmp_path / "store")
    assert not any(part["restored"] for part in third["parts"]) and len(third["parts"]) == len(first["parts"])


def test_a_changed_roi_mask_redraws_only_that_rois_figure(tmp_path, monkeypatch):
    # A quality-check figure shows one subject or one ROI: a new mask of ROI ember (every subject) redraws the
    # figure of ember's placement and nothing else -- not the subjects' brain masks, not glow's figure.
    monkeypatch.delenv("FOLDWISE_MEMO", raising=False)
    inputs, outputs, params, first = _first_report_through_memo(tmp_path)
    before = {path: Path(path).read_bytes() for path in outputs["previews"]}
    for path in inputs["roi_masks"]:
        if "_roi-ember_" in Path(path).name:
            image = nib.load(path)
            mask = np.asarray(image.dataobj) > 0
            mask[: mask.shape[0] // 2] = False  # one side only
            save_nifti(path, mask, image.affine, dtype=np.uint8)
    second = _through_memo(inputs, outputs, params, tmp_path, tmp_path / "store")
    drawn = sorted(part["part"] for part in second["parts"] if not part["restored"])
    assert drawn == ["figure-roi-ember_masks"] and len(second["parts"]) == len(first["parts"])
    changed = sorted(Path(path).name for path, data in before.items() if Path(path).read_bytes() != data)
    assert changed == ["roi-ember_masks.png"]


def test_roi_overlay_looks_like_one_image_per_roi_drawn_one_over_the_other():
    # Reference: matplotlib's Agg renderer drawing each ROI's fill as its own image (what the masks figure did
    # before the fills were composited), against the one composited image; 8-bit rendering, so within 2/255.
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.colors import to_rgba
    from matplotlib.figure import Figure

    rng = np.random.default_rng(3)
    masks = [rng.random((6, 7)) < 0.5 for _ in range(3)]
    colours = [to_rgba(report.OKABE_ITO[name], 0.55) for name in ("orange", "sky blue", "bluish green")]

    def rendered(images):
        figure = Figure(figsize=(0.7, 0.6), dpi=10)
        axes = figure.add_axes((0, 0, 1, 1))
        axes.set_axis_off()
        canvas = FigureCanvasAgg(figure)
        underlay = np.full((6, 7, 4), 0.5)
        underlay[..., 3] = 1.0
        axes.imshow(underlay, interpolation="nearest")  # an opaque grey underlay
        for image in images:
            axes.imshow(image, interpolation="nearest")
        canvas.draw()
        return np.asarray(canvas.buffer_rgba(), dtype=float)

    separate = []
    for mask, colour in zip(masks, colours):
        image = np.zeros((6, 7, 4))
        image[mask] = colour
        separate.append(image)
    one = rendered([report.roi_overlay(masks, colours)])
    assert np.abs(one - rendered(separate)).max() <= 2


def test_the_preview_is_the_picture_savefig_draws_at_the_same_dpi(tmp_path):
    # save_preview draws once on an Agg canvas instead of savefig's layout dry run plus drawing:
    # reference, matplotlib's own savefig at the preview dpi, decoded; both reduced to the same 256 colours.
    from PIL import Image

    from foldwise.report import drawing

    rows = pd.DataFrame({"n_voxels": ["5", "20", "all"], "mean": [0.4, 0.5, 0.6], "ci_low": [0.3, 0.4, 0.5],
                         "ci_high": [0.5, 0.6, 0.7], "chance": [1 / 3] * 3, "p_fwe": [0.5, 0.01, 0.02]})
    subjects = pd.DataFrame({"subject": ["01", "01", "01", "02", "02", "02"], "n_voxels": ["5", "20", "all"] * 2,
                             "n_used": [5, 20, 30, 5, 20, 28], "balanced_accuracy": [0.4, 0.5, 0.6, 0.45, 0.55, 0.5]})
    panel = dict(report.curve_data(rows, subjects, 29.0, ALPHA), label="within")
    drawing.save_preview(report.curve_figure([panel], "curve", ALPHA), str(tmp_path / "preview.png"))
    buffer = io.BytesIO()
    report.curve_figure([panel], "curve", ALPHA).savefig(buffer, format="png", dpi=drawing.PREVIEW_DPI)
    reference = drawing._palette_png(buffer.getvalue())
    with Image.open(tmp_path / "preview.png") as ours, Image.open(io.BytesIO(reference)) as theirs:
        assert ours.size == theirs.size
        assert np.array_equal(np.asarray(ours.convert("RGB")), np.asarray(theirs.convert("RGB")))


def test_the_preview_canvas_keeps_text_but_draws_the_pixels_of_a_plain_agg_canvas():
    # The preview canvas reuses text layouts and glyph bitmaps (a glyph at the same fraction of a pixel, moved by whole
    # pixels). Reference: matplotlib's own FigureCanvasAgg, the raw RGBA buffer compared bit for bit (no colour
    # reduction that could hide a difference): plain, rotated, non-antialiased, two-line and mathtext texts, each drawn
    # with a cold cache, then with a warm one, and figures whose texts move by fractions of a pixel in between.
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    from foldwise.report import drawing

    def texts(shift):
        figure = Figure(figsize=(5.3, 3.1), dpi=drawing.PREVIEW_DPI)
        axes = figure.add_subplot()
        axes.plot([0, 1, 2], [0.3, 0.5 + shift, 0.4], label="A<->B")
        axes.set_xlabel("n_voxels")
        axes.set_ylabel("balanced accuracy")
        axes.set_title(f"analysis shape, ROI ember {shift:g}")
        axes.text(0.5 + shift, 0.45, "seen->heard", rotation=33, fontsize=7)
        axes.text(0.2 + shift / 3, 0.35, "hush ffi", antialiased=False, fontsize=11)
        axes.text(1.2 + shift / 7, 0.42, "$p_{fwe} < 0.05$", fontsize=9)
        axes.text(1.5, 0.32 + shift / 5, "glow\n40 voxels", fontsize=8)  # two lines: the font's line gap counts
        axes.legend(loc="lower right")
        return figure

    drawing.clear_text_cache()
    canvas_class = drawing._preview_canvas_class()
    for shift in (0.0, 0.0137, 0.0, 0.2):
        plain = texts(shift)
        FigureCanvasAgg(plain).draw()
        reference = np.asarray(plain.canvas.buffer_rgba()).copy()
        cached = texts(shift)
        canvas = canvas_class(cached)
        for _ in range(2):
            canvas.draw()
            assert np.array_equal(np.asarray(canvas.buffer_rgba()), reference)
    assert all(drawing._TEXT_CACHE.values())  # layouts, glyphs and line metrics were kept and used
    drawing.clear_text_cache()
    assert not any(drawing._TEXT_CACHE.values())


def _layout_problems(figure):
    """Texts outside the figure, and a legend or tick labels over another panel (Agg's own measure of every text)."""
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.text import Text

    canvas = FigureCanvasAgg(figure)
    canvas.draw()
    renderer = canvas.get_renderer()
    box = figure.bbox
    problems = []
    for text in figure.findobj(Text):
        if not text.get_visible() or not text.get_text().strip():
            continue
        extent = text.get_window_extent(renderer)
        if extent.x0 < box.x0 - 1 or extent.y0 < box.y0 - 1 or extent.x1 > box.x1 + 1 or extent.y1 > box.y1 + 1:
            problems.append(f"outside: {text.get_text()!r}")
    panels = [axes for axes in figure.axes if axes.get_label() != "<colorbar>"]
    for legend in figure.legends:
        for axes in panels:
            if legend.get_window_extent(renderer).overlaps(axes.get_tightbbox(renderer)):
                problems.append("legend over a panel")
    for left, right in zip(panels, panels[1:]):  # tick labels of one panel over its neighbour's frame
        if left.get_tightbbox(renderer).x1 > right.get_window_extent(renderer).x0 + 1:
            problems.append("panels overlap")
        if right.get_tightbbox(renderer).x0 < left.get_window_extent(renderer).x1 - 1:
            problems.append("panels overlap")
    return problems


@pytest.mark.parametrize("n_directions", [1, 5])
def test_result_figures_keep_every_label_inside_and_apart(n_directions):
    # Fixed layouts (no layout engine) computed from the labels: checked on crowded cases with Agg's own text extents.
    rng = np.random.default_rng(1)
    counts = ["10", "25", "50", "100", "200", "400", "1000", "all"]
    rows = pd.DataFrame({"n_voxels": counts, "mean": rng.uniform(0.3, 0.9, 8), "ci_low": 0.2, "ci_high": 0.95,
                         "chance": 1 / 3, "p_fwe": 0.01})
    subjects = pd.DataFrame({"subject": np.repeat(["01", "02"], 8), "n_voxels": counts * 2, "n_used": 10,
                             "balanced_accuracy": rng.uniform(0, 1, 16)})
    subjects["n_used"] = [int(c) if c != "all" else 12345 for c in counts] * 2
    panel = dict(report.curve_data(rows, subjects, 12345.0, ALPHA), label="a_long_set_name<->another_long_set_name")
    assert _layout_problems(report.curve_figure([panel] * n_directions, "analysis shape_seen_heard, ROI ember", ALPHA)) == []
    classes = ["round", "square", "star", "a_much_longer_class_name"]
    shares = {f"d{k}": group_confusion_matrix(rng, len(classes)) for k in range(n_directions)}
    figure = report.confusion_figure(shares, list(shares), classes, "analysis shape, ROI ember: 100 voxels", 12)
    assert _layout_problems(figure) == []
    rois = ["ember", "glow", "hush", "emberL", "emberR", "glowL", "glowR", "hushL", "hushR"][: 2 + 3 * (n_directions > 1)]
    comparison = [{"direction": f"d{k}", "rois": rois, "scores": [rng.uniform(0, 1, 8) for _ in rois],
                   "mean": np.full(len(rois), 0.5), "ci_low": np.full(len(rois), 0.4), "ci_high": np.full(len(rois), 0.6),
                   "chance": np.full(len(rois), 1 / 3), "p_fwe": np.full(len(rois), 0.01),
                   "shown_counts": ["100"] + ["all"] * (len(rois) - 1)} for k in range(n_directions)]  # labels "ROI x (all)"
    assert _layout_problems(report.comparison_figure(comparison, "analysis shape: ROIs at 100 voxels", ALPHA)) == []


def test_comparison_shows_an_roi_smaller_than_the_count_with_all_its_voxels():
    # The decoding step reports counts an ROI cannot reach once, as 'all': a one-sided ROI of 80 voxels has no row
    # at 100. The comparison at 100 voxels shows it at 'all' (what 100 selects there) instead of stopping the report.
    group = pd.DataFrame({"roi": ["big", "big", "small"], "direction": "within", "n_voxels": ["100", "all", "all"],
                          "mean": [0.6, 0.7, 0.55], "ci_low": 0.5, "ci_high": 0.8, "chance": 0.5, "p_fwe": 0.01})
    subjects = pd.DataFrame({"subject": ["01", "02"] * 3, "roi": ["big", "big", "big", "big", "small", "small"],
                             "direction": "within", "n_voxels": ["100", "100", "all", "all", "all", "all"],
                             "balanced_accuracy": [0.61, 0.62, 0.71, 0.72, 0.51, 0.52]})
    panel, = report.comparison_data(subjects, group, ["big", "small"], ["within"], "100")
    assert panel["shown_counts"] == ["100", "all"]
    assert panel["mean"].tolist() == [0.6, 0.55]
    assert [scores.tolist() for scores in panel["scores"]] == [[0.61, 0.62], [0.51, 0.52]]
    figure = report.comparison_figure([panel], "analysis shape: ROIs at 100 voxels", ALPHA)
    figure.canvas.draw()
    assert [label.get_text() for label in figure.axes[0].get_xticklabels()] == ["ROI big", "ROI small (all)"]
    with pytest.raises(InputError, match="no group row for ROI gone"):
        report.comparison_data(subjects, group, ["big", "gone"], ["within"], "100")


def group_confusion_matrix(rng, n_classes):
    counts = rng.integers(0, 10, (n_classes, n_classes))
    return report.group_confusion([counts])


def test_the_page_says_how_to_get_the_publication_files(built):
    # The default run writes previews only; the page names the target that writes PNG 300 dpi, SVG and PDF.
    text = _text(built["html"])
    assert "--cores 2 paper_figures" in text and "PNG at 300 dpi, SVG with text kept as text, PDF" in text
    assert text.count("written on request by the paper_figures target") == len(built["outputs"]["figures"]) // 3


def test_a_preview_drawn_on_a_reused_figure_is_the_preview_of_a_new_figure(tmp_path):
    # The report draws every ROI's curves (and confusions) of an analysis on one figure, replacing its artists' data,
    # ticks, limits and layout: drawn A, then B, then A again on that figure, A must give the bytes of A drawn on a new
    # figure. B differs from A in every replaced part (data, 'all' position and label, dropped counts, stars, capped
    # points, NaN band cells, y range; a NaN share and other colours in the confusion cells).
    from foldwise.report import drawing

    def curve_panels(shift, roi_voxels, n_used_small):
        counts = ["5", "20", "50", "all"]
        rows = pd.DataFrame({"n_voxels": counts, "mean": [0.4 + shift, 0.5, 0.62, 0.6 - shift],
                             "ci_low": [0.3, np.nan if shift else 0.4, 0.5, 0.5], "ci_high": [0.5, 0.6, 0.7, 0.7 + shift],
                             "chance": [1 / 3] * 4, "p_fwe": [0.5, 0.01, 0.2 if shift else 0.02, 0.02]})
        subjects = pd.DataFrame({"subject": np.repeat(["01", "02"], 4), "n_voxels": counts * 2,
                                 "n_used": [5, 20, n_used_small, n_used_small] * 2,
                                 "balanced_accuracy": [0.4, 0.5 + shift, 0.6, 0.55, 0.45, 0.55, 0.5, 0.6 - shift]})
        return [dict(report.curve_data(rows, subjects, roi_voxels, ALPHA), label=label) for label in ("a->a", "a->b")]

    classes = ["round", "square", "star"]
    shares_a = {"a->a": np.array([[0.7, 0.2, 0.1], [0.1, 0.8, 0.1], [0.3, 0.3, 0.4]]), "a->b": np.full((3, 3), 1 / 3)}
    shares_b = {"a->a": np.array([[0.2, 0.7, 0.1], [np.nan] * 3, [0.1, 0.1, 0.8]]), "a->b": np.eye(3)}
    figures = {
        "curve": (lambda pool, which: report.curve_figure(curve_panels(0.0, 64.0, 50) if which == "A"
                                                          else curve_panels(0.15, 23.0, 23), f"ROI {which}", ALPHA,
                                                          pool=pool)),
        "confusion": (lambda pool, which: report.confusion_figure(shares_a if which == "A" else shares_b, ["a->a", "a->b"],
                                                                  classes, f"ROI {which}", 2, pool=pool)),
    }
    for kind, draw in figures.items():
        pool = {}
        reused = []
        for which in ("A", "B", "A"):
            drawing.save_preview(draw(pool, which), str(tmp_path / f"{kind}-{which}.png"))
            reused.append((tmp_path / f"{kind}-{which}.png").read_bytes())
        assert len(pool) == 1  # one figure drawn three times
        drawing.save_preview(draw(None, "A"), str(tmp_path / f"{kind}-fresh.png"))
        drawing.save_preview(draw(None, "B"), str(tmp_path / f"{kind}-fresh-B.png"))
        assert reused[2] == (tmp_path / f"{kind}-fresh.png").read_bytes()
        assert reused[1] == (tmp_path / f"{kind}-fresh-B.png").read_bytes()
        assert reused[0] != reused[1]
