"""Benchmark of the group stage: the pure computation, the job with its TSV I/O, and the job as the workflow runs it.

Two shapes (invented, the lanterns study), both with 1,000 subject-level
permutations per cell and 10,000 group draws, prevalence on:

- ``--shape stage`` (default): 30 subjects x 6 ROIs x 7 voxel counts x 2
  cross-decoding directions (84 cells);
- ``--shape study``: the cross analysis of ``benchmarks/bench_study.py``'s full
  shape, 8 subjects x 9 ROIs x 7 voxel counts x 5 directions (315 cells).

Input files are written first (not timed) in the decoding stage's format; then
each timed step runs ``--repeats`` times and the table shows the median and
the fastest. The last rows run the job through the content memo
(``foldwise.provenance.memo.run_job``, as Snakemake's script does) from an
empty store, then after a one-ROI change (one ROI's nulls and summary rows
change for every subject), and print the in-job CPU of each (the provenance
record's ``cpu_time_s``) and the sha256 of every output, so that two commits
can be compared byte for byte.

Run: ``OPENBLAS_NUM_THREADS=1 .venv/bin/python benchmarks/bench_group.py [--shape study]``
"""

import argparse
import hashlib
import json
import logging
import os
import platform
import statistics
import tempfile
import time
from pathlib import Path
from types import SimpleNamespace

import numpy as np
import pandas as pd

from foldwise.stats import group
from foldwise.data.fileio import write_tsv
from foldwise.provenance.hashing import seed_from
from foldwise.provenance.memo import run_job
from foldwise.jobs import group as group_job

ANALYSIS = "shape_seen_heard"
COUNTS = ["10", "25", "50", "100", "200", "400", "all"]
CHANCE = 1 / 3
SHAPES = {
    "stage": {"subjects": 30, "rois": ["ember", "glow", "hush", "wick", "flare", "soot"],
              "directions": ["seen->heard", "heard->seen"]},
    "study": {"subjects": 8, "rois": ["ember", "glow", "hush", "emberL", "emberR", "glowL", "glowR", "hushL", "hushR"],
              "directions": ["seen->heard", "heard->seen", "seen<->heard", "seen->seen", "heard->heard"]},
}


def _write_inputs(folder, n_subjects, rois, directions, n_permutations, seed, changed_roi=None):
    """Summaries and nulls of every subject; ``changed_roi``: that ROI's values are drawn again (a one-ROI change)."""
    summaries, nulls = [], []
    cells = [(roi, direction, count) for roi in rois for direction in directions for count in COUNTS]
    for index in range(n_subjects):
        subject = f"{index + 1:02d}"
        rng = np.random.default_rng([seed, index])
        observed = CHANCE + 0.03 * np.array([roi == "ember" for roi, _, _ in cells]) + rng.normal(0, 0.04, len(cells))
        null_values = {roi: CHANCE + rng.normal(0, 0.04, (len(directions) * len(COUNTS), n_permutations)) for roi in rois}
        if changed_roi is not None:
            again = np.random.default_rng([seed, index, 1])
            where = np.array([roi == changed_roi for roi, _, _ in cells])
            observed[where] = CHANCE + again.normal(0, 0.04, where.sum())
            null_values[changed_roi] = CHANCE + again.normal(0, 0.04, null_values[changed_roi].shape)
        # ROI sizes as in bench_study.py's atlas: one-sided ROIs about half the two-sided ones; "400" reaches the
        # size of the small ones in every subject (that count is then reported once, as "all")
        size = {roi: (700 if len(roi) <= 5 else 350) + 3 * index for roi in rois}
        n_used = [size[roi] if count == "all" else min(int(count), size[roi]) for roi, _, count in cells]
        write_tsv(folder / f"sub-{subject}_summary.tsv", pd.DataFrame({
            "subject": subject, "analysis": ANALYSIS, "roi": [c[0] for c in cells], "direction": [c[1] for c in cells],
            "n_voxels": [c[2] for c in cells], "n_used": n_used, "n_folds": 4, "accuracy": observed,
            "balanced_accuracy": observed, "chance": CHANCE}))
        summaries.append(str(folder / f"sub-{subject}_summary.tsv"))
        for roi in rois:
            roi_cells = [cell for cell in cells if cell[0] == roi]
            values = null_values[roi]
            path = folder / f"sub-{subject}_roi-{roi}_null.tsv.gz"
            write_tsv(path, pd.DataFrame({
                "subject": subject, "analysis": ANALYSIS, "roi": roi,
                "direction": np.repeat([c[1] for c in roi_cells], n_permutations),
                "n_voxels": np.repeat([c[2] for c in roi_cells], n_permutations),
                "permutation": np.tile(np.arange(1, n_permutations + 1), len(roi_cells)),
                "balanced_accuracy": values.ravel(), "accuracy": values.ravel()}))
            nulls.append(str(path))
    return summaries, nulls, cells


def _time(function, repeats):
    seconds = []
    for _ in range(repeats):
        started = time.perf_counter()
        function()
        seconds.append(time.perf_counter() - started)
    return statistics.median(seconds), min(seconds)


class _Named(dict):
    """Stands in for Snakemake's Namedlist: items() plus attribute access."""

    def __getattr__(self, name):
        return self[name]


def _through_memo(folder, inputs, outputs, params):
    """Run the job as Snakemake's script does (outputs removed first); its provenance record."""
    for path in outputs.values():
        Path(path).unlink(missing_ok=True)
    provenance = folder / "provenance" / "group.json"
    smk = SimpleNamespace(input=_Named(inputs), output=_Named(**outputs, provenance=str(provenance)),
                          params=_Named(settings=params, code="bench"), log=[str(folder / "logs" / "group.log")],
                          wildcards=_Named(analysis=ANALYSIS), config={"study": {"store_dir": str(folder / "store")}})
    run_job(smk, "group", group_job.run)
    return json.loads(provenance.read_text())


def _digests(outputs):
    return {name: hashlib.sha256(Path(path).read_bytes()).hexdigest()[:16] for name, path in sorted(outputs.items())}


def main():
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--shape", choices=sorted(SHAPES), default="stage")
    parser.add_argument("--subjects", type=int, help="override the shape's number of subjects")
    parser.add_argument("--permutations", type=int, default=1000)
    parser.add_argument("--draws", type=int, default=10000)
    parser.add_argument("--repeats", type=int, default=3)
    args = parser.parse_args()
    shape = SHAPES[args.shape]
    rois, directions = shape["rois"], shape["directions"]
    n_subjects = args.subjects or shape["subjects"]
    seed = 20261201
    subjects = [f"{index + 1:02d}" for index in range(n_subjects)]
    params = {"group": {"n_draws": args.draws, "alpha": 0.05, "prevalence": True},
              "analysis": {"name": ANALYSIS, "kind": "cross", "sets": {"seen": {}, "heard": {}}, "rois": rois,
                           "voxel_counts": [int(c) if c != "all" else c for c in COUNTS]},
              "subjects": subjects, "seed": seed}
    log = logging.getLogger("bench_group")
    logging.disable(logging.WARNING)  # the job's notes (counts beyond an ROI's size) would fill the screen
    os.environ.pop("FOLDWISE_MEMO", None)
    with tempfile.TemporaryDirectory() as temporary:
        folder = Path(temporary)
        (folder / "in").mkdir()
        summaries, nulls, cells = _write_inputs(folder / "in", n_subjects, rois, directions, args.permutations, seed)
        outputs = {"table": str(folder / "out" / "group.tsv"), "null": str(folder / "out" / "group_null.tsv.gz"),
                   "summary": str(folder / "out" / "summary.txt")}
        inputs = {"summaries": summaries, "nulls": nulls}

        # The pieces the job strings together, to show where the time goes.
        frames = group_job._read_summaries(summaries, ANALYSIS, subjects)
        cells = group_job._ordered_cells(*frames[0], params["analysis"])
        scores, chance = group_job._subject_scores(frames, cells, subjects)
        subject_nulls, _ = group_job._subject_nulls(nulls, ANALYSIS, cells, subjects)
        families = np.array([directions.index(cell[1]) for cell in cells])

        def compute():
            return group.group_statistics(scores, chance, subject_nulls, families,
                                          np.random.default_rng(seed_from(seed, "group", ANALYSIS)), args.draws, 0.05)

        _, null_mean = compute()
        writer = getattr(group_job, "_write_null_table", None)  # the job's writer (an older tree: pandas)

        def write_null():
            if writer is None:
                write_tsv(folder / "n.tsv.gz", group_job._null_table(cells, null_mean))
            else:
                writer(folder / "n.tsv.gz", cells, null_mean)

        rows = [
            ("read + check nulls (I/O)", _time(lambda: group_job._subject_nulls(nulls, ANALYSIS, cells, subjects), args.repeats)),
            ("pure computation (group_statistics)", _time(compute, args.repeats)),
            (f"write group null TSV.gz, all {len(cells)} cells", _time(write_null, args.repeats)),
            ("whole job run() incl. TSV I/O", _time(lambda: group_job.run(inputs, outputs, params, log), args.repeats)),
        ]
        digests_run = _digests(outputs)
        empty = _through_memo(folder, inputs, outputs, params)
        digests_memo = _digests(outputs)
        _write_inputs(folder / "in", n_subjects, rois, directions, args.permutations, seed, changed_roi=rois[0])
        changed = _through_memo(folder, inputs, outputs, params)
        digests_changed = _digests(outputs)
    print(f"group stage ({args.shape}): {n_subjects} subjects x {len(rois)} ROIs x {len(COUNTS)} counts x "
          f"{len(directions)} directions = {len(cells)} cells; {args.permutations} permutations; {args.draws} draws; prevalence on")
    print(f"python {platform.python_version()}, numpy {np.__version__}, {os.cpu_count()} CPUs visible, "
          f"OPENBLAS_NUM_THREADS={os.environ.get('OPENBLAS_NUM_THREADS', 'unset')}, repeats {args.repeats}")
    print(f"{'step':<40} {'median s':>9} {'fastest s':>10}")
    for name, (median, fastest) in rows:
        print(f"{name:<40} {median:>9.3f} {fastest:>10.3f}")
    for label, record in (("through the memo, empty store", empty), (f"after a one-ROI change ({rois[0]})", changed)):
        parts = record.get("parts", [])
        print(f"{label:<40} in-job CPU {record['cpu_time_s']:.3f} s, wall {record['wall_time_s']:.3f} s; "
              f"parts computed {sum(not part['restored'] for part in parts)} of {len(parts)}")
    assert digests_run == digests_memo, (digests_run, digests_memo)
    print("sha256 (first 16 hex) of the outputs:", json.dumps(digests_memo))
    print("after the one-ROI change:            ", json.dumps(digests_changed))


if __name__ == "__main__":
    main()
