"""The reviewer bundle: one archive that reproduces and proves every number.

``python -m foldwise.provenance.bundle make`` (``make bundle``) writes
``results/bundle/<study>-bundle.tar.gz`` with the repository's tracked code
and config, the exact lock, the manifest, every provenance record, the group
tables, the report and a README for reviewers. Participant images (NIfTI
files) are left out unless ``--include-images`` is given.

``python -m foldwise.provenance.bundle verify`` (``make verify``), run in an unpacked
bundle with the dataset in place, first checks every bundled result against
the manifest, then recomputes the study with the content memo switched off
and compares each output with the manifest: ``match`` (byte-identical),
``match within tolerance`` (numbers equal within rtol 1e-5 / atol 1e-7, as
expected across platforms and BLAS builds), or ``MISMATCH``.
"""

import argparse
import gzip
import io
import os
import subprocess
import sys
import tarfile
from pathlib import Path

import numpy as np
import pandas as pd

from foldwise.config import load_study_config
from foldwise.provenance.hashing import hash_file

__all__ = ["bundle_members", "make_bundle", "compare_outputs", "verify", "main", "NUMERIC_RTOL", "NUMERIC_ATOL"]

NUMERIC_RTOL = 1e-5
NUMERIC_ATOL = 1e-7
_RESULT_FOLDERS = ("results/provenance", "results/group", "results/report")
_IMAGE_SUFFIXES = (".nii", ".nii.gz")

REVIEWER_README = """# Reviewer bundle: {study}

This archive holds the complete foldwise pipeline of the study "{study}": its
code and config, the exact package lock (requirements/lock.txt), the manifest
of every output with its sha256 (results/manifest.tsv, copied to
REVIEW/manifest.tsv), one provenance record per job (results/provenance), the
group tables (results/group) and the report (results/report/index.html).
{images}
To reproduce every number, on a machine with python3:

    make verify      # checks the bundled results, then recomputes the study and compares

`make verify` needs the dataset where config/config.yaml expects it (the demo
study simulates its own). It prints, for every output, `match` (identical
bytes), `match within tolerance` (numbers equal within rtol {rtol:g}, atol
{atol:g}: expected across platforms) or `MISMATCH`, and exits non-zero on any
mismatch. `make test` runs the test suite.

Research use only; not for clinical decisions.
"""


def _tracked_files(root):
    """Files git tracks under ``root`` (the code and config), or None outside git."""
    try:
        listing = subprocess.run(["git", "ls-files", "-z"], cwd=root, check=True, capture_output=True).stdout
    except (OSError, subprocess.CalledProcessError):
        return None
    return sorted(name for name in listing.decode("utf-8").split("\0") if name and (root / name).is_file())


def bundle_members(root, include_images=False):
    """The relative paths a bundle holds (sorted, no duplicates)."""
    root = Path(root)
    tracked = _tracked_files(root)
    if tracked is None:  # an unpacked bundle: everything but results and environments
        tracked = sorted(p.relative_to(root).as_posix() for p in root.rglob("*")
                         if p.is_file() and not p.relative_to(root).as_posix().startswith(("results/", ".venv/", ".snakemake/", "REVIEW/")))
    members = set(tracked)
    members.add("results/manifest.tsv")
    for folder in _RESULT_FOLDERS:
        members.update(p.relative_to(root).as_posix() for p in (root / folder).rglob("*") if p.is_file())
    # Images only from config/ (e.g. an ROI mask that is part of the study's definition): a dataset kept
    # inside the repository is participant data, and an unpacked bundle has no git to tell them apart.
    members = {m for m in members if not m.endswith(".part") and (not m.endswith(_IMAGE_SUFFIXES) or m.startswith("config/"))}
    if include_images:
        manifest = pd.read_csv(root / "results/manifest.tsv", sep="\t")
        members.update(path for path in manifest["path"] if path.endswith(_IMAGE_SUFFIXES))
    return sorted(members)


def _add_bytes(archive, name, data):
    info = tarfile.TarInfo(name)
    info.size = len(data)
    info.mtime = 0
    info.mode = 0o644
    archive.addfile(info, io.BytesIO(data))


def make_bundle(root=".", include_images=False, config_path="config/config.yaml"):
    """Write the reviewer bundle and return its path."""
    root = Path(root).resolve()
    if not (root / "results/manifest.tsv").is_file():
        raise SystemExit("foldwise: results/manifest.tsv does not exist: run the study first (make demo)")
    study = load_study_config(root / config_path)["study"]["name"]
    prefix = f"{study}-bundle"
    target = root / "results" / "bundle" / f"{prefix}.tar.gz"
    target.parent.mkdir(parents=True, exist_ok=True)
    images = ("Participant images (NIfTI) are included." if include_images else
              "Participant images (NIfTI) are left out for privacy; `make verify` recomputes them from the dataset.")
    readme = REVIEWER_README.format(study=study, images=images, rtol=NUMERIC_RTOL, atol=NUMERIC_ATOL)
    temporary = target.with_suffix(".part")
    with open(temporary, "wb") as raw, gzip.GzipFile(fileobj=raw, mode="wb", mtime=0, filename="") as zipped:
        with tarfile.open(fileobj=zipped, mode="w", format=tarfile.PAX_FORMAT) as archive:
            for member in bundle_members(root, include_images):
                _add_bytes(archive, f"{prefix}/{member}", (root / member).read_bytes())
            _add_bytes(archive, f"{prefix}/REVIEW/README.md", readme.encode("utf-8"))
            _add_bytes(archive, f"{prefix}/REVIEW/manifest.tsv", (root / "results/manifest.tsv").read_bytes())
    os.replace(temporary, target)
    return target


def _numeric_table(path):
    frame = pd.read_csv(path, sep="\t", na_values=["n/a"], keep_default_na=False)
    return frame


def _arrays_close(a, b):
    return a.shape == b.shape and bool(np.allclose(a, b, rtol=NUMERIC_RTOL, atol=NUMERIC_ATOL, equal_nan=True))


def _within_tolerance(reference_path, new_path):
    """True if two files differ only in numbers within tolerance (TSV or NIfTI)."""
    name = str(new_path)
    try:
        if name.endswith((".tsv", ".tsv.gz")):
            old, new = _numeric_table(reference_path), _numeric_table(new_path)
            if list(old.columns) != list(new.columns) or old.shape != new.shape:
                return False
            for column in old.columns:
                if pd.api.types.is_numeric_dtype(old[column]) and pd.api.types.is_numeric_dtype(new[column]):
                    if not _arrays_close(old[column].to_numpy(float), new[column].to_numpy(float)):
                        return False
                elif not old[column].astype(str).equals(new[column].astype(str)):
                    return False
            return True
        if name.endswith(_IMAGE_SUFFIXES):
            import nibabel as nib
            old, new = nib.load(reference_path), nib.load(new_path)
            return _arrays_close(old.affine, new.affine) and _arrays_close(np.asarray(old.dataobj, float), np.asarray(new.dataobj, float))
    except (OSError, ValueError, pd.errors.ParserError):
        return False
    return False


def compare_outputs(reference_manifest, root=".", reference_root=None):
    """Compare the files of ``root`` with a manifest: a DataFrame path, status.

    ``reference_root`` holds the bundled copies for the tolerance comparison
    (files whose bytes differ are compared numerically if a copy exists).
    """
    root = Path(root)
    rows = []
    for path, digest in zip(reference_manifest["path"], reference_manifest["sha256"]):
        current = root / path
        if not current.is_file():
            status = "MISSING"
        elif hash_file(current) == digest:
            status = "match"
        elif reference_root is not None and (Path(reference_root) / path).is_file() and _within_tolerance(Path(reference_root) / path, current):
            status = "match within tolerance"
        else:
            status = "MISMATCH"
        rows.append({"path": path, "status": status})
    return pd.DataFrame(rows, columns=["path", "status"])


def verify(root=".", cores=2, recompute=True, config_path="config/config.yaml"):
    """Check the bundled results, then (optionally) recompute and compare. Returns an exit code."""
    root = Path(root).resolve()
    reference_path = root / "REVIEW/manifest.tsv"
    if not reference_path.is_file():
        reference_path = root / "results/manifest.tsv"
    if not reference_path.is_file():
        print("foldwise verify: no manifest found (REVIEW/manifest.tsv or results/manifest.tsv); run it inside an unpacked bundle")
        return 2
    reference = pd.read_csv(reference_path, sep="\t")
    bundled = reference[[(root / path).is_file() for path in reference["path"]]]
    print(f"Step 1: {len(bundled)} bundled results checked against the manifest")
    failures = 0
    for row in compare_outputs(bundled, root).itertuples():
        if row.status != "match":
            print(f"  {row.status}: {row.path}  (the bundled file differs from the manifest)")
            failures += 1
    if failures:
        print(f"foldwise verify: {failures} bundled file(s) do not match the manifest")
        return 1
    if not recompute:
        print("Step 1 passed: every bundled result matches the manifest.")
        return 0
    kept = root / "REVIEW" / "bundled"
    for path in bundled["path"]:
        destination = kept / path
        destination.parent.mkdir(parents=True, exist_ok=True)
        os.replace(root / path, destination)  # recompute from scratch; keep the bundled copy for comparison
    print("Step 2: recomputing the study with the content memo off")
    environment = dict(os.environ, FOLDWISE_MEMO="off")
    command = [sys.executable, "-m", "snakemake", "--profile", "config/profiles/local", "--cores", str(cores), "--forceall",
               "--config", f"config_file={config_path}"]
    completed = subprocess.run(command, cwd=root, env=environment)
    if completed.returncode != 0:
        print("foldwise verify: the recomputation failed (see above)")
        return completed.returncode
    result = compare_outputs(reference, root, reference_root=kept)
    for row in result.itertuples():
        print(f"  {row.status}: {row.path}")
    counts = result["status"].value_counts().to_dict()
    print("Summary: " + ", ".join(f"{count} {status}" for status, count in sorted(counts.items())))
    bad = int(sum(count for status, count in counts.items() if status in ("MISMATCH", "MISSING")))
    if bad:
        print(f"foldwise verify: {bad} output(s) do not reproduce")
    else:
        print("foldwise verify: every output reproduces")
    return 1 if bad else 0


def main(argv=None):
    parser = argparse.ArgumentParser(prog="python -m foldwise.provenance.bundle", description=__doc__.splitlines()[0])
    commands = parser.add_subparsers(dest="command", required=True)
    making = commands.add_parser("make", help="write the reviewer bundle")
    making.add_argument("--include-images", action="store_true", help="also bundle participant images (NIfTI)")
    making.add_argument("--config", default="config/config.yaml", help="the study config (default: config/config.yaml)")
    checking = commands.add_parser("verify", help="check and recompute an unpacked bundle")
    checking.add_argument("--cores", type=int, default=2)
    checking.add_argument("--check-only", action="store_true", help="only check the bundled files against the manifest")
    checking.add_argument("--config", default="config/config.yaml", help="the study config (default: config/config.yaml)")
    arguments = parser.parse_args(argv)
    if arguments.command == "make":
        print(f"foldwise: wrote {make_bundle(include_images=arguments.include_images, config_path=arguments.config)}")
        return 0
    return verify(cores=arguments.cores, recompute=not arguments.check_only, config_path=arguments.config)


if __name__ == "__main__":
    sys.exit(main())
