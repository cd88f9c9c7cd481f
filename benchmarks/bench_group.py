"""Benchmark of the group stage: pure computation and the whole job with TSV I/O.

Scenario (invented, the lanterns study): 30 subjects x 6 ROIs x 7 voxel
counts x 2 cross-decoding directions (84 cells), 1,000 subject-level
permutations per cell, 10,000 group draws, prevalence on. Input files are
written first (not timed) in the decoding stage's format; then each timed
step runs ``--repeats`` times and the table shows the median and the fastest.

Run: ``OPENBLAS_NUM_THREADS=1 .venv/bin/python benchmarks/bench_group.py``
"""

import argparse
import logging
import os
import platform
import statistics
import tempfile
import time
from pathlib import Path

import numpy as np
import pandas as pd

from foldwise.stats import group
from foldwise.data.fileio import write_tsv
from foldwise.provenance.hashing import seed_from
from foldwise.jobs import group as group_job

ANALYSIS = "shape_seen_heard"
ROIS = ["ember", "glow", "hush", "wick", "flare", "soot"]
COUNTS = ["10", "25", "50", "100", "200", "400", "all"]
DIRECTIONS = ["seen->heard", "heard->seen"]
CHANCE = 1 / 3


def _write_inputs(folder, n_subjects, n_permutations, rng):
    summaries, nulls = [], []
    cells = [(roi, direction, count) for roi in ROIS for direction in DIRECTIONS for count in COUNTS]
    for index in range(n_subjects):
        subject = f"{index + 1:02d}"
        observed = CHANCE + 0.03 * np.array([roi == "ember" for roi, _, _ in cells]) + rng.normal(0, 0.04, len(cells))
        write_tsv(folder / f"sub-{subject}_summary.tsv", pd.DataFrame({
            "subject": subject, "analysis": ANALYSIS, "roi": [c[0] for c in cells], "direction": [c[1] for c in cells],
            "n_voxels": [c[2] for c in cells], "n_used": 100, "n_folds": 4, "accuracy": observed,
            "balanced_accuracy": observed, "chance": CHANCE}))
        summaries.append(str(folder / f"sub-{subject}_summary.tsv"))
        for roi in ROIS:
            roi_cells = [cell for cell in cells if cell[0] == roi]
            values = CHANCE + rng.normal(0, 0.04, (len(roi_cells), n_permutations))
            path = folder / f"sub-{subject}_roi-{roi}_null.tsv.gz"
            write_tsv(path, pd.DataFrame({
                "subject": subject, "analysis": ANALYSIS, "roi": roi,
                "direction": np.repeat([c[1] for c in roi_cells], n_permutations),
                "n_voxels": np.repeat([c[2] for c in roi_cells], n_permutations),
                "permutation": np.tile(np.arange(1, n_permutations + 1), len(roi_cells)),
                "balanced_accuracy": values.ravel(), "accuracy": values.ravel()}))
            nulls.append(str(path))
    return summaries, nulls


def _time(function, repeats):
    seconds = []
    for _ in range(repeats):
        started = time.perf_counter()
        function()
        seconds.append(time.perf_counter() - started)
    return statistics.median(seconds), min(seconds)


def main():
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--subjects", type=int, default=30)
    parser.add_argument("--permutations", type=int, default=1000)
    parser.add_argument("--draws", type=int, default=10000)
    parser.add_argument("--repeats", type=int, default=3)
    args = parser.parse_args()
    rng = np.random.default_rng(20261201)
    subjects = [f"{index + 1:02d}" for index in range(args.subjects)]
    params = {"group": {"n_draws": args.draws, "alpha": 0.05, "prevalence": True},
              "analysis": {"name": ANALYSIS, "kind": "cross", "sets": {"seen": {}, "heard": {}}, "rois": ROIS,
                           "voxel_counts": [int(c) if c != "all" else c for c in COUNTS]},
              "subjects": subjects, "seed": 20261201}
    log = logging.getLogger("bench_group")
    with tempfile.TemporaryDirectory() as temporary:
        folder = Path(temporary)
        summaries, nulls = _write_inputs(folder, args.subjects, args.permutations, rng)
        outputs = {"table": str(folder / "out" / "group.tsv"), "null": str(folder / "out" / "group_null.tsv.gz"),
                   "summary": str(folder / "out" / "summary.txt")}
        inputs = {"summaries": summaries, "nulls": nulls}

        # The pieces the job strings together, to show where the time goes.
        frames = group_job._read_summaries(summaries, ANALYSIS, subjects)
        cells = group_job._ordered_cells(*frames[0], params["analysis"])
        scores, chance = group_job._subject_scores(frames, cells, subjects)
        subject_nulls = group_job._subject_nulls(nulls, ANALYSIS, cells, subjects)
        families = np.array([DIRECTIONS.index(cell[1]) for cell in cells])

        def compute():
            return group.group_statistics(scores, chance, subject_nulls, families,
                                          np.random.default_rng(seed_from(20261201, "group", ANALYSIS)),
                                          args.draws, 0.05)

        _, null_mean = compute()
        rows = [
            ("read + check nulls (I/O)", _time(lambda: group_job._subject_nulls(nulls, ANALYSIS, cells, subjects), args.repeats)),
            ("pure computation (group_statistics)", _time(compute, args.repeats)),
            ("write group null TSV.gz (I/O)", _time(lambda: write_tsv(folder / "n.tsv.gz", group_job._null_table(cells, null_mean)),
                                                    args.repeats)),
            ("whole job run() incl. TSV I/O", _time(lambda: group_job.run(inputs, outputs, params, log), args.repeats)),
        ]
    print(f"group stage: {args.subjects} subjects x {len(ROIS)} ROIs x {len(COUNTS)} counts x {len(DIRECTIONS)} directions "
          f"= {len(cells)} cells; {args.permutations} permutations; {args.draws} draws; prevalence on")
    print(f"python {platform.python_version()}, numpy {np.__version__}, {os.cpu_count()} CPUs visible, "
          f"OPENBLAS_NUM_THREADS={os.environ.get('OPENBLAS_NUM_THREADS', 'unset')}, repeats {args.repeats}")
    print(f"{'step':<40} {'median s':>9} {'fastest s':>10}")
    for name, (median, fastest) in rows:
        print(f"{name:<40} {median:>9.3f} {fastest:>10.3f}")


if __name__ == "__main__":
    main()
