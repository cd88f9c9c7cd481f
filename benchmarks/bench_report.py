"""Benchmark of the report job at the shape of benchmarks/bench_study.py: from empty, one-ROI change, no figure change.

Scenario (invented, the lanterns study, the shape of bench_study.py): 8
subjects x 7 runs (180 scans each), a 64 x 64 x 38 grid, 9 ROIs, a within and
a cross analysis with voxel counts 10 ... 400 and all. The report's inputs
are written first (not timed) by the synthetic study of tests/test_report.py
at that shape; then the report job runs as the workflow runs it (through
``foldwise.provenance.memo.run_in_process``: memo key, per-figure part memo,
outputs stored, provenance record) with a memo store of its own:

1. from empty (no results, empty store);
2. after a one-ROI change: ROI ``ember``'s masks, confusion tables and
   decoding scores change for every subject (its rows of the summaries and of
   the group tables too); the figures whose data did not change are restored;
3. after a change that no figure shows (a job log gains a warning): the
   page is assembled again from restored figures -- what page assembly costs;
4. the result figures' publication files (PNG 300 dpi, SVG, PDF: the
   ``report_files`` job, run only when asked), from empty -- not part of the
   report's cost, printed for reference.

CPU is this process's (``time.process_time``) around each run; each run's
figures drawn and restored come from the job's provenance record. Before
each run the store's hash of every input file is made (not timed), as the
workflow leaves it: each upstream job hashes its outputs into the store when
it finishes (``foldwise.provenance.memo``), so the report finds them hashed.

Run: ``OPENBLAS_NUM_THREADS=1 .venv/bin/python benchmarks/bench_report.py`` (``--small`` for a quick look).
"""

import argparse
import importlib.util
import json
import os
import shutil
import sys
import tempfile
import time
import types
from pathlib import Path

import numpy as np
import pandas as pd

REPO = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(REPO / "workflow"))
sys.path.insert(1, str(REPO / "tests"))  # tests/test_report.py's synthetic study and workflow_support

from foldwise.config import validate  # noqa: E402
from foldwise.data.fileio import save_nifti, write_tsv  # noqa: E402
from foldwise.jobs import report as report_job  # noqa: E402
from foldwise.provenance.memo import MemoStore, run_in_process  # noqa: E402
from foldwise.report.catalogue import embedded_files, figure_catalogue, publication_files  # noqa: E402
from workflow_support import Named  # noqa: E402 (what Snakemake hands a run: block)

TARGET_FROM_EMPTY_CPU_S = 5.0
TARGET_PAGE_CPU_S = 2.0
SHAPES = {"full": {"n_subjects": 8, "n_runs": 7, "grid": (64, 64, 38), "n_scans": 180},
          "small": {"n_subjects": 3, "n_runs": 3, "grid": (32, 32, 20), "n_scans": 90}}
# bench_study.py's nine ROIs: three pairs and each side alone.
ROI_NAMES = ["ember", "glow", "hush"] + [f"{name}{side}" for name in ("ember", "glow", "hush") for side in ("L", "R")]
COUNTS = ["10", "25", "50", "100", "200", "400", "all"]
SHAPE_CLASSES = ("round", "square", "star")


def _test_module():
    """tests/test_report.py, whose synthetic study writes every input of the report job."""
    spec = importlib.util.spec_from_file_location("foldwise_report_test_study", REPO / "tests" / "test_report.py")
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    return module


def study_config():
    return validate({
        "study": {"name": "lantern-report-bench"},
        "dataset": {"source": "demo"},
        "rois": [{"name": name, "labels": [f"{name}_L"]} for name in ROI_NAMES],
        "analyses": [
            {"name": "shape", "kind": "within", "voxel_counts": [int(c) if c != "all" else c for c in COUNTS],
             "classes": {shape: [f"seen_{shape}"] for shape in SHAPE_CLASSES}},
            {"name": "shape_seen_heard", "kind": "cross", "voxel_counts": [int(c) if c != "all" else c for c in COUNTS],
             "sets": {"seen": {shape: f"seen_{shape}" for shape in SHAPE_CLASSES},
                      "heard": {shape: f"heard_{shape}" for shape in SHAPE_CLASSES}}},
        ],
        "group": {"n_draws": 10000},
    }, path="the report benchmark")


def run_report(inputs, outputs, params, folder, store, step="report", job=report_job.run):
    """(CPU s, wall s, provenance record) of one report job through the memo, as the workflow runs it."""
    output = Named(outputs, provenance=str(folder / "provenance" / f"{step}.json"))
    log_path = folder / "logs" / f"{step}.log"
    log_path.parent.mkdir(parents=True, exist_ok=True)
    params_named = types.SimpleNamespace(settings=params, code="bench")
    started_cpu, started_wall = time.process_time(), time.perf_counter()
    run_in_process(step, job, Named(inputs), output, params_named, Named(), [str(log_path)],
                   {"study": {"store_dir": str(store)}})
    cpu_s, wall_s = time.process_time() - started_cpu, time.perf_counter() - started_wall
    return cpu_s, wall_s, json.loads(Path(output.provenance).read_text(encoding="utf-8"))


def warm_hashes(inputs, store):
    """Hash every input into the store, as the upstream jobs do when they finish (not part of the report's cost)."""
    memo_store = MemoStore(store)
    for paths in inputs.values():
        for path in [paths] if isinstance(paths, str) else paths:
            memo_store.content_hash(path)


def change_one_roi(inputs, roi, seed):
    """ROI ``roi`` changes for every subject: its masks, confusions, summary rows and group rows (as a relabelled ROI would)."""
    rng = np.random.default_rng(seed)
    import nibabel as nib

    for path in inputs["roi_masks"]:
        if f"_roi-{roi}_" in Path(path).name:
            image = nib.load(path)
            mask = np.asarray(image.dataobj) > 0
            mask[: mask.shape[0] // 2] = False  # one side only
            save_nifti(path, mask, image.affine, dtype=np.uint8)
    for path in inputs["confusions"]:
        if f"_roi-{roi}_" in Path(path).name:
            table = pd.read_csv(path, sep="\t", dtype={"n_voxels": str})
            table["count"] = rng.permutation(table["count"].to_numpy())
            write_tsv(path, table)
    for key, column in (("summaries", "balanced_accuracy"), ("group_tables", "mean")):
        for path in inputs[key]:
            table = pd.read_csv(path, sep="\t", dtype={"n_voxels": str, "subject": str, "n_used": str}, keep_default_na=False,
                                na_values=[""])
            rows = table["roi"] == roi
            table.loc[rows, column] = table.loc[rows, column] * 0.9 + 0.03
            write_tsv(path, table)


def main():
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--small", action="store_true", help="3 subjects x 3 runs on a 32 x 32 x 20 grid")
    parser.add_argument("--keep", help="write into this folder and keep it")
    arguments = parser.parse_args()
    shape = SHAPES["small" if arguments.small else "full"]
    folder = Path(arguments.keep or tempfile.mkdtemp(prefix="foldwise-bench-report-"))
    try:
        study = study_config()
        subjects = [f"{index + 1:02d}" for index in range(shape["n_subjects"])]
        run_ids = [f"run-{index + 1:02d}" for index in range(shape["n_runs"])]
        module = _test_module()
        inputs, params, _ = module.build_study(folder / "inputs", study=study, subjects=subjects, run_ids=run_ids,
                                               grid=shape["grid"], n_scans=shape["n_scans"], counts=COUNTS)
        inputs["provenance"] = []  # the workflow passes planned job counts, not records
        params["planned_jobs"] = {"glm": [6] * (len(subjects) * len(run_ids)), "decode": [4] * (len(subjects) * 9 * 2)}
        report_dir = folder / "results" / "report"
        catalogue = figure_catalogue(study, subjects, str(report_dir / "figures"))
        outputs = {"html": str(report_dir / "index.html"), "previews": embedded_files(catalogue)}
        store = folder / "store"
        n_results = sum(1 for entry in catalogue if entry["publication"])
        print(f"bench_report: {len(subjects)} subjects x {len(run_ids)} runs, grid {shape['grid']}, {len(ROI_NAMES)} ROIs, "
              f"2 analyses: {len(catalogue)} figures on the page ({n_results} result figures, "
              f"{len(catalogue) - n_results} quality checks)")
        rows, drawn_parts = [], {}
        for label, prepare in (("from empty", None),
                               ("one-ROI change (ember)", lambda: change_one_roi(inputs, "ember", 7)),
                               ("no figure data changed", lambda: params.__setitem__("overrides", ["a.b=1"]))):
            if prepare is not None:
                prepare()
            warm_hashes(inputs, store)
            cpu_s, wall_s, record = run_report(inputs, outputs, params, folder / "results", store)
            parts = record.get("parts", [])
            drawn_parts[label] = [part["part"].removeprefix("figure-") for part in parts
                                  if not part["restored"] and part["part"].startswith("figure-")]
            drawn = len(drawn_parts[label])
            restored = sum(1 for part in parts if part["restored"] and part["part"].startswith("figure-"))
            rows.append((label, cpu_s, wall_s, drawn, restored))
        publication = {"figures": publication_files(catalogue)}
        warm_hashes(inputs, folder / "store-files")
        cpu_s, wall_s, record = run_report(inputs, publication, params, folder / "results", folder / "store-files",
                                           step="report_files", job=report_job.run_publication_files)
        files_row = ("publication files (on request)", cpu_s, wall_s,
                     sum(1 for part in record.get("parts", []) if not part["restored"]), 0)
        page_bytes = Path(outputs["html"]).stat().st_size
        print(f"{'report job':28s} {'CPU s':>7s} {'wall s':>7s} {'figures drawn':>14s} {'restored':>9s}")
        for label, cpu_s, wall_s, drawn, restored in rows + [files_row]:
            print(f"{label:28s} {cpu_s:7.2f} {wall_s:7.2f} {drawn:14d} {restored:9d}")
        changed = drawn_parts["one-ROI change (ember)"]
        showing = {entry["stem"] for entry in catalogue if entry["roi"] == "ember" or entry["kind"] == "comparison"}
        print(f"one-ROI change drew: {', '.join(changed)}")
        print(f"one-ROI change draws only figures that show ROI ember: {'yes' if set(changed) <= showing else 'NO'}")
        print(f"page: {page_bytes / 1e6:.2f} MB")
        print(f"from empty: {rows[0][1]:.2f} s CPU, target <= {TARGET_FROM_EMPTY_CPU_S:g}: "
              f"{'met' if rows[0][1] <= TARGET_FROM_EMPTY_CPU_S else 'NOT met'}")
        print(f"page assembly (no figure drawn): {rows[2][1]:.2f} s CPU, target <= {TARGET_PAGE_CPU_S:g}: "
              f"{'met' if rows[2][1] <= TARGET_PAGE_CPU_S else 'NOT met'}")
    finally:
        if not arguments.keep:
            shutil.rmtree(folder, ignore_errors=True)


if __name__ == "__main__":
    os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")
    main()
