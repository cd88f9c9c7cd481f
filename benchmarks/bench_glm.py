"""Benchmark of the GLM stage: the whole job of one run against a plain nibabel load.

Scenario (invented, the lanterns study): one run of 200 volumes (TR 2 s) on a
64 x 64 x 40 grid with an ellipsoid brain mask of >= 60,000 voxels, 4
conditions x 15 trials (60 trials, 2 s each), 6 confounds, AR(1) noise around
a baseline of 1000; outside the brain, low-level noise (|N(0, 20)|), as in
unmasked preprocessed outputs (``--zero-background`` writes zeros there
instead). The run is written as .nii.gz into a temporary folder
(not timed). Then, in one process and interleaved, each timed step runs
``--repeats`` times:

* ``nibabel load``: ``nibabel.load(path).get_fdata()`` of the BOLD file, the
  reference every ratio divides by;
* ``foldwise load``: ``foldwise.data.bids.load_bold`` (the fast gzip decoder);
* one whole run per GLM mode (``foldwise.jobs.glm.run_one``: load, mask, fit,
  write all five outputs), statistic t;
* ``fit only``: ``foldwise.glm.estimate.estimate_patterns`` of each mode on data
  already loaded and masked (the science alone, for the breakdown).

Peak memory of each job is measured twice: tracemalloc's peak (NumPy arrays
and Python buffers register with it; BLAS work space does not) in this
process, and the growth of the resident-set high-water mark of a
fresh child process running the job once (VmHWM from /proc, Linux), over
that child's mark after its imports. Both are shown as a ratio to the run's 4D data in float32.

Run: ``OPENBLAS_NUM_THREADS=1 .venv/bin/python benchmarks/bench_glm.py``
"""

import argparse
import json
import logging
import os
import platform
import statistics
import subprocess
import sys
import tempfile
import time
import tracemalloc
from pathlib import Path
from types import SimpleNamespace

import nibabel as nib
import numpy as np
import pandas as pd

from foldwise.data.bids import load_bold, read_confounds, read_events
from foldwise.data.fileio import save_nifti, write_json, write_tsv
from foldwise.glm.estimate import estimate_patterns
from foldwise.provenance.hashing import seed_from
from foldwise.contract import TEMPLATES
from foldwise.jobs import glm as glm_job
from foldwise.plan import STEPS

GRID_SHAPE = (64, 64, 40)
N_SCANS = 200
TR_S = 2.0
CONDITIONS = ["seen_round", "seen_square", "seen_star", "heard_round"]
TRIALS_PER_CONDITION = 15
CONFOUNDS = ["trans_x", "trans_y", "trans_z", "rot_x", "rot_y", "rot_z"]
MODES = {
    "per-condition OLS": {"pattern_mode": "per_condition", "serial_correlation": "ignore"},
    "per-condition AR(1)": {"pattern_mode": "per_condition", "serial_correlation": "ar1_whiten"},
    "LSA AR(1), 60 trials": {"pattern_mode": "lsa", "serial_correlation": "ar1_whiten"},
    "LSS OLS, 60 trials": {"pattern_mode": "lss", "serial_correlation": "ignore"},
    "LSS AR(1), 60 trials": {"pattern_mode": "lss", "serial_correlation": "ar1_whiten"},
}
TARGETS = {"per-condition OLS": 0.8, "per-condition AR(1)": 1.0, "LSS OLS, 60 trials": 1.0, "LSS AR(1), 60 trials": 1.0}
_LOG = logging.getLogger("bench_glm")


def _brain_mask(shape):
    """An ellipsoid filling most of the grid (about 66,000 of 163,840 voxels)."""
    axes = [np.linspace(-1.0, 1.0, n) for n in shape]
    x, y, z = np.meshgrid(*axes, indexing="ij")
    return (x / 0.92) ** 2 + (y / 0.92) ** 2 + (z / 0.95) ** 2 <= 1.0


def write_run(folder, rng, zero_background=False):
    """Write the invented run (BOLD, events, sidecar, confounds, mask) and return the job inputs."""
    mask = _brain_mask(GRID_SHAPE)
    n_voxels = int(mask.sum())
    n_trials = TRIALS_PER_CONDITION * len(CONDITIONS)
    onsets = 6.0 + np.arange(n_trials) * (N_SCANS * TR_S - 30.0) / n_trials + rng.uniform(0.0, 1.0, n_trials)
    kinds = np.repeat(CONDITIONS, TRIALS_PER_CONDITION)[rng.permutation(n_trials)]
    events = pd.DataFrame({"onset": np.round(onsets, 2), "duration": 2.0, "trial_type": kinds})
    confounds = pd.DataFrame(np.cumsum(rng.normal(0.0, 0.02, (N_SCANS, len(CONFOUNDS))), axis=0), columns=CONFOUNDS)

    data = np.zeros(GRID_SHAPE + (N_SCANS,), dtype=np.float32)
    innovations = rng.standard_normal((N_SCANS, n_voxels), dtype=np.float32)
    rho = rng.uniform(0.1, 0.5, n_voxels).astype(np.float32)
    noise = np.empty_like(innovations)
    noise[0] = innovations[0]
    for scan in range(1, N_SCANS):  # AR(1) noise, vectorised over voxels
        noise[scan] = rho * noise[scan - 1] + innovations[scan]
    signal = np.zeros((N_SCANS, n_voxels), dtype=np.float32)
    for kind_index, kind in enumerate(CONDITIONS):  # a crude response: 3 scans after each onset
        for onset in events.loc[events["trial_type"] == kind, "onset"]:
            scan = int(onset // TR_S) + 2
            signal[scan:scan + 3] += rng.normal(0.5, 0.2, n_voxels).astype(np.float32) * (kind_index + 1) / 4
    data[mask] = (1000.0 + 5.0 * noise + signal).T
    if not zero_background:  # unmasked preprocessed BOLD: low-level noise outside the brain
        outside = ~mask
        data[outside] = np.abs(rng.normal(0.0, 20.0, (int(outside.sum()), N_SCANS))).astype(np.float32)
    header = nib.Nifti1Header()
    header.set_data_shape(data.shape)
    header.set_zooms((3.0, 3.0, 3.0, TR_S))
    header.set_xyzt_units("mm", "sec")
    affine = np.diag([3.0, 3.0, 3.0, 1.0])
    save_nifti(folder / "bold.nii.gz", data, affine, header=header)
    save_nifti(folder / "mask.nii.gz", mask.astype(np.uint8), affine, dtype=np.uint8)
    write_tsv(folder / "events.tsv", events)
    write_tsv(folder / "confounds.tsv", confounds)
    write_json(folder / "bold.json", {"RepetitionTime": TR_S})
    inputs = {name: str(folder / file) for name, file in (("bold", "bold.nii.gz"), ("events", "events.tsv"),
                                                         ("sidecar", "bold.json"), ("mask", "mask.nii.gz"),
                                                         ("confounds", "confounds.tsv"))}
    return inputs, n_voxels, data.nbytes


def _params(mode):
    glm = {"hrf_derivatives": "none", "highpass_s": 128.0, "statistic": "t", "conditions": CONDITIONS, "hrf_steps_per_scan": 16,
           **MODES[mode]}
    return {"glm": glm, "confounds": CONFOUNDS, "subject": "01", "session": None, "run_id": "run-01", "seed": 20261201}


def _outputs(folder):
    """The GLM job's outputs of one run, named as the workflow names them (the plan's list: none can go missing)."""
    templates = SimpleNamespace(paths=SimpleNamespace(template=lambda name: TEMPLATES[name]))
    return {key: str(folder / os.path.basename(template).format(subject="01", run_id="run-01"))
            for key, template in STEPS["glm"].outputs(templates).items()}


def _fit_inputs(inputs):
    """The masked data, events and confounds, as the job passes them to estimate_patterns."""
    bold, _, _ = load_bold(inputs["bold"])
    mask = np.asarray(nib.load(inputs["mask"]).dataobj) > 0
    bold_2d = np.ascontiguousarray(bold[mask].T)
    events = read_events(inputs["events"], N_SCANS, TR_S)
    confounds = read_confounds(inputs["confounds"], CONFOUNDS, N_SCANS)
    return bold_2d, events, confounds


def _run_job(inputs, folder, mode):
    glm_job.run_one(inputs, _outputs(folder / mode.replace(" ", "_").replace(",", "").replace("(", "").replace(")", "")),
                _params(mode), _LOG)


def _peak_rss_kb():
    """This process's resident-set high-water mark (VmHWM, kB; Linux).

    Not ru_maxrss: Linux keeps that across fork and exec, so a child started
    from this large process would inherit the parent's mark.
    """
    for line in Path("/proc/self/status").read_text().splitlines():
        if line.startswith("VmHWM:"):
            return int(line.split()[1])
    raise RuntimeError("no VmHWM in /proc/self/status (the RSS measurement needs Linux)")


def _child(inputs_json, folder, mode):
    """Run one job in this fresh process; print the RSS high-water mark before and after (kB)."""
    inputs = json.loads(inputs_json)
    before = _peak_rss_kb()
    _run_job(inputs, Path(folder), mode)
    after = _peak_rss_kb()
    print(json.dumps({"before_kb": before, "after_kb": after}))


def _rss_growth_bytes(inputs, folder, mode):
    command = [sys.executable, __file__, "--child", mode, "--inputs", json.dumps(inputs), "--folder", str(folder)]
    result = subprocess.run(command, check=True, capture_output=True, text=True, env=os.environ.copy())
    marks = json.loads(result.stdout.strip().splitlines()[-1])
    return (marks["after_kb"] - marks["before_kb"]) * 1024


def _traced_peak_bytes(step):
    tracemalloc.start()
    tracemalloc.reset_peak()
    step()
    _, peak = tracemalloc.get_traced_memory()
    tracemalloc.stop()
    return peak


def main():
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--repeats", type=int, default=5)
    parser.add_argument("--zero-background", action="store_true",
                        help="zeros outside the brain (a masked file: compresses and decompresses faster)")
    parser.add_argument("--child")
    parser.add_argument("--inputs")
    parser.add_argument("--folder")
    arguments = parser.parse_args()
    if arguments.child:
        _child(arguments.inputs, arguments.folder, arguments.child)
        return
    rng = np.random.default_rng(seed_from(20261201, "bench_glm"))
    with tempfile.TemporaryDirectory(prefix="bench_glm_") as temporary:
        folder = Path(temporary)
        inputs, n_voxels, data_bytes = write_run(folder, rng, arguments.zero_background)
        bold_2d, events, confounds = _fit_inputs(inputs)
        steps = {"nibabel load": lambda: nib.load(inputs["bold"]).get_fdata(),
                 "foldwise load": lambda: load_bold(inputs["bold"])}
        steps.update({mode: (lambda mode=mode: _run_job(inputs, folder, mode)) for mode in MODES})
        steps.update({f"  fit only: {mode}": (lambda mode=mode: estimate_patterns(bold_2d, events, TR_S, _params(mode)["glm"],
                                                                                  confounds, CONFOUNDS))
                      for mode in MODES})
        for step in steps.values():  # warm-up: imports, page cache, first figure
            step()
        times = {name: [] for name in steps}
        cpu_times = {name: [] for name in steps}
        for _ in range(arguments.repeats):
            for name, step in steps.items():  # interleaved, so drift hits every step alike
                start, cpu_start = time.perf_counter(), time.process_time()
                step()
                times[name].append(time.perf_counter() - start)
                cpu_times[name].append(time.process_time() - cpu_start)
        traced = {name: _traced_peak_bytes(steps[name]) for name in steps if not name.startswith("  fit only")}
        rss = {mode: _rss_growth_bytes(inputs, folder, mode) for mode in MODES}

        reference = statistics.median(times["nibabel load"])
        cpu_reference = statistics.median(cpu_times["nibabel load"])
        print(f"GLM job benchmark: {n_voxels} brain voxels x {N_SCANS} volumes, grid {GRID_SHAPE}, "
              f"{len(CONDITIONS)} conditions x {TRIALS_PER_CONDITION} trials, {len(CONFOUNDS)} confounds, "
              f"{'zeros' if arguments.zero_background else 'noise'} outside the brain")
        print(f"file {Path(inputs['bold']).stat().st_size / 1e6:.0f} MB gzip; 4D float32 data {data_bytes / 1e6:.0f} MB; "
              f"OPENBLAS_NUM_THREADS={os.environ.get('OPENBLAS_NUM_THREADS', 'unset')}; {platform.processor() or platform.machine()}; "
              f"median of {arguments.repeats}")
        print()
        header = (f"{'step':<34}{'median s':>9}{'min s':>8}{'ratio':>7}{'min ratio':>10}{'cpu ratio':>10}{'target':>8}"
                  f"{'traced peak':>13}{'RSS growth':>12}")
        print(header)
        print("-" * len(header))
        for name in steps:
            median = statistics.median(times[name])
            target = f"<={TARGETS[name]:.1f}" if name in TARGETS else ""
            traced_text = f"{traced[name] / data_bytes:.2f}x" if name in traced else ""
            rss_text = f"{rss[name] / data_bytes:.2f}x" if name in rss else ""
            cpu_ratio = statistics.median(cpu_times[name]) / cpu_reference
            min_ratio = min(times[name]) / min(times["nibabel load"])
            print(f"{name:<34}{median:>9.3f}{min(times[name]):>8.3f}{median / reference:>7.2f}{min_ratio:>10.2f}"
                  f"{cpu_ratio:>10.2f}{target:>8}{traced_text:>13}{rss_text:>12}")
        print()
        print("ratio = median wall time / median wall time of nibabel.load(path).get_fdata() in the same process; min ratio: the")
        print("same with the fastest repeats (the least disturbed by other processes); cpu ratio: with process CPU time (excludes")
        print("waiting for the disk);")
        print("memory = peak / the run's 4D data in float32 (tracemalloc peak in this process; RSS high-water growth of a "
              "fresh child running the job once).")


if __name__ == "__main__":
    main()
