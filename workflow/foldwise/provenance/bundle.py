"""The reviewer bundle: one archive that reproduces and proves every number.

``python -m foldwise.provenance.bundle make`` (``make bundle``) writes
``<results>/bundle/<study>-bundle.tar.gz`` (``<results>``: the config's
``study.results_dir``, ``results`` by default) with exactly: the repository's
tracked code and config, the study config (bundled with a warning if git
does not track it), the exact lock, the manifest, the files the manifest
lists, the provenance records of those files' jobs and a README for
reviewers. Outputs of an earlier study in the same checkout are not in the
manifest and stay out. Participant images stay out unless
``--include-images`` is given: NIfTI files, and the report figures drawn
over a participant's images (mean BOLD slices, residual variance,
searchlight maps); the report inside the bundle is then
``REVIEW/report.html``, the page with those figures replaced by a note.

``python -m foldwise.provenance.bundle verify`` (``make verify``), run in an
unpacked bundle with the dataset in place, first checks every bundled result
against the manifest and every provenance record against the manifest, the
bundled lock and its own memo key (an edited setting, version or code hash
breaks the key); then recomputes the study with the content memo switched
off, keeping the bundled evidence under ``REVIEW/bundled`` (never
overwritten, also by a second verify), and compares each output with the
manifest: ``match`` (byte-identical), ``match within tolerance`` (numbers
equal within rtol 1e-5 / atol 1e-7, as expected across platforms and BLAS
builds), or ``MISMATCH``; and each new provenance record's settings, code
hash, versions and inputs with the bundled one.
"""

import argparse
import gzip
import io
import json
import os
import re
import subprocess
import sys
import tarfile
from pathlib import Path

import numpy as np
import pandas as pd

from foldwise.config import load_study_config
from foldwise.contract import RESULTS, ResultPaths
from foldwise.results_folder import CLAIM_FILE
from foldwise.provenance.environment import read_lock, version_differences
from foldwise.provenance.hashing import hash_file
from foldwise.provenance.memo import memo_key

__all__ = ["bundle_members", "bundle_records", "make_bundle", "without_participant_figures", "compare_outputs",
           "check_records", "compare_records", "verify", "main", "NUMERIC_RTOL", "NUMERIC_ATOL"]

NUMERIC_RTOL = 1e-5
NUMERIC_ATOL = 1e-7
_IMAGE_SUFFIXES = (".nii", ".nii.gz")
# Report figures drawn over a participant's images (figure_catalogue kinds brainmask, roimasks, resvar, searchlight;
# sub-<subject>_masks: the per-subject masks figure of earlier versions).
_PARTICIPANT_FIGURE = re.compile(r"^(sub-[A-Za-z0-9]+_(masks|brainmask|resvar)|roi-[A-Za-z0-9][A-Za-z0-9_]*_masks"
                                 r"|[A-Za-z0-9][A-Za-z0-9_]*_searchlight)$")
_FIGURE_BLOCK = re.compile(r'<figure id="fig-(?P<stem>[^"]+)">.*?</figure>', re.S)
_EVIDENCE = "REVIEW/bundled"

REVIEWER_README = """# Reviewer bundle: {study}

This archive holds the complete foldwise pipeline of the study "{study}": its
code and config ({config}), the exact package lock (requirements/lock.txt),
the manifest of every output with its sha256 ({results}/manifest.tsv, copied to
REVIEW/manifest.tsv), the files the manifest lists, and the provenance record
of each job that made them ({results}/provenance). Nothing else: outputs of
other studies in the same checkout are left out.
{images}{warning}
To reproduce every number, on a machine with python3:

    make verify CONFIG={config}

It first checks the bundled results and provenance records against the
manifest, the lock and each record's own memo key, then recomputes the study
with the content memo off (the bundled files are kept under REVIEW/bundled
and never overwritten) and compares. It needs the dataset where {config}
expects it (the demo study simulates its own). It prints, for every output,
`match` (identical bytes), `match within tolerance` (numbers equal within
rtol {rtol:g}, atol {atol:g}: expected across platforms) or `MISMATCH`, and
exits non-zero on any mismatch or any provenance record that disagrees.
`make test` runs the test suite.

Research use only; not for clinical decisions.
"""

_IMAGES_LEFT_OUT = """
Participant images are left out for privacy: NIfTI files, and the report
figures drawn over a participant's images (mean BOLD slices with the masks,
residual variance maps, searchlight maps). REVIEW/report.html is the report
with those figures replaced by a note; it shows the study settings, the
decoding curves, confusion matrices, group tables and design matrices.
`make verify` recomputes the full report ({results}/report/index.html) from
the dataset.
"""

_IMAGES_INCLUDED = """
Participant images are included (made with INCLUDE_IMAGES=1): the NIfTI files
the manifest lists and the full report ({results}/report/index.html) with the
figures drawn over participant images.
"""


def _tracked_files(root):
    """Files git tracks under ``root`` (the code and config), or None outside git."""
    try:
        listing = subprocess.run(["git", "ls-files", "-z"], cwd=root, check=True, capture_output=True).stdout
    except (OSError, subprocess.CalledProcessError):
        return None
    return sorted(name for name in listing.decode("utf-8").split("\0") if name and (root / name).is_file())


def _results_dir(root, config_path):
    """The study's results folder (``study.results_dir`` of its config; the default when the config is not there)."""
    if config_path is None or not (Path(root) / config_path).is_file():
        return RESULTS
    return load_study_config(Path(root) / config_path)["study"]["results_dir"]


def _participant_figure(path, results_dir=RESULTS):
    """True for a report figure file drawn over a participant's images."""
    if not path.startswith(ResultPaths(results_dir).template("report_figures_dir") + "/"):
        return False
    stem = path.rsplit("/", 1)[1].split(".", 1)[0]
    return bool(_PARTICIPANT_FIGURE.match(stem))


def bundle_records(root, manifest, results_dir=RESULTS):
    """The provenance records of this study's jobs: those whose every output the manifest lists with the same sha256.

    A record of an earlier study (another analysis, another ROI) names
    outputs the manifest does not list and is left out; the manifest job's
    own record is kept when its output is this manifest.
    """
    root, paths = Path(root), ResultPaths(results_dir)
    listed = dict(zip(manifest["path"], manifest["sha256"]))
    manifest_path = paths.template("manifest")
    manifest_digest = hash_file(root / manifest_path)
    records = []
    provenance = root / paths.folder("provenance")
    for path in sorted(provenance.rglob("*.json")) if provenance.is_dir() else []:
        relative = path.relative_to(root).as_posix()
        try:
            outputs = json.loads(path.read_text(encoding="utf-8"))["outputs"]
        except (OSError, ValueError, KeyError, TypeError):
            continue
        if not outputs:
            continue
        if relative == paths.provenance("manifest", "study"):
            if all(item["path"] == manifest_path and item["sha256"] == manifest_digest for item in outputs):
                records.append(relative)
        elif all(listed.get(item["path"]) == item["sha256"] for item in outputs):
            records.append(relative)
    return records


def bundle_members(root, include_images=False, config_path=None):
    """The relative paths a bundle holds (sorted, no duplicates).

    Code and config that git tracks (or, outside git, everything but results
    and environments), the study config, the manifest, the existing files
    it lists, and the provenance records of their jobs. Images and report
    figures drawn over participant images only with ``include_images``; the
    report page itself only then (else the bundle carries REVIEW/report.html).
    """
    root = Path(root)
    results_dir = _results_dir(root, config_path)
    paths = ResultPaths(results_dir)
    outputs = (f"{RESULTS}/", f"{results_dir}/")  # the study's results and the default folder (the default store lives there)
    tracked = _tracked_files(root)
    if tracked is None:  # an unpacked bundle: everything but results and environments
        # ... and other studies' results folders (each real run leaves CLAIM_FILE in its own)
        outputs += tuple(f"{claim.parent.parent.relative_to(root).as_posix()}/" for claim in root.rglob(CLAIM_FILE))
        tracked = sorted(p.relative_to(root).as_posix() for p in root.rglob("*")
                         if p.is_file() and not p.relative_to(root).as_posix().startswith((*outputs, ".venv/", ".snakemake/", "REVIEW/")))
    # Images only from config/ (e.g. an ROI mask that is part of the study's definition): a dataset kept
    # inside the repository is participant data, and an unpacked bundle has no git to tell them apart.
    members = {m for m in tracked if not m.startswith(outputs) and (not m.endswith(_IMAGE_SUFFIXES) or m.startswith("config/"))}
    if config_path is not None and (root / config_path).is_file():
        members.add(Path(config_path).as_posix())
    manifest = pd.read_csv(root / paths.template("manifest"), sep="\t", dtype=str, keep_default_na=False)
    members.add(paths.template("manifest"))
    for path in manifest["path"]:
        if not (root / path).is_file() or path.endswith(".part"):
            continue
        participant = path.endswith(_IMAGE_SUFFIXES) or _participant_figure(path, results_dir) or path == paths.template("report_html")
        if include_images or not participant:
            members.add(path)
    members.update(bundle_records(root, manifest, results_dir))
    return sorted(members)


def without_participant_figures(page):
    """The report page with every figure drawn over participant images replaced by a note (str in, str out)."""
    def replace(match):
        if not _PARTICIPANT_FIGURE.match(match.group("stem")):
            return match.group(0)
        return (f'<figure id="fig-{match.group("stem")}"><figcaption>Left out of the reviewer bundle: this figure is drawn '
                "over a participant's images. `make verify` recomputes it from the dataset; a bundle made with "
                "INCLUDE_IMAGES=1 holds it.</figcaption></figure>")
    return _FIGURE_BLOCK.sub(replace, page)


def _add_bytes(archive, name, data):
    info = tarfile.TarInfo(name)
    info.size = len(data)
    info.mtime = 0
    info.mode = 0o644
    archive.addfile(info, io.BytesIO(data))


def make_bundle(root=".", include_images=False, config_path="config/config.yaml"):
    """Write the reviewer bundle and return its path."""
    root = Path(root).resolve()
    if not (root / config_path).is_file():
        raise SystemExit(f"foldwise: the study config {config_path} does not exist: pass the one the study ran with (make bundle CONFIG=...)")
    config_path = Path(os.path.relpath(root / config_path, root)).as_posix()
    settings = load_study_config(root / config_path)["study"]
    study, paths = settings["name"], ResultPaths(settings["results_dir"])
    manifest_path = paths.template("manifest")
    if not (root / manifest_path).is_file():
        raise SystemExit(f"foldwise: {manifest_path} does not exist: run the study first (make study CONFIG={config_path})")
    prefix = f"{study}-bundle"
    target = root / paths.folder("bundle", f"{prefix}.tar.gz")
    target.parent.mkdir(parents=True, exist_ok=True)
    tracked = _tracked_files(root)
    warning = ""
    if tracked is not None and config_path not in tracked:
        warning = (f"\nWarning: the study config {config_path} was not committed to git when this bundle was made; "
                   "it is bundled as it was on disk.\n")
        print(f"foldwise: warning: {config_path} is not tracked by git; it is bundled as it is on disk. "
              f"Commit it (git add {config_path}) so the study's definition is in its history.", file=sys.stderr)
    images = _IMAGES_INCLUDED if include_images else _IMAGES_LEFT_OUT
    readme = REVIEWER_README.format(study=study, config=config_path, images=images.format(results=paths.root), warning=warning,
                                    rtol=NUMERIC_RTOL, atol=NUMERIC_ATOL, results=paths.root)
    about = json.dumps({"study": study, "config": config_path, "include_images": bool(include_images)}, indent=1, sort_keys=True) + "\n"
    temporary = target.with_suffix(".part")
    with open(temporary, "wb") as raw, gzip.GzipFile(fileobj=raw, mode="wb", mtime=0, filename="") as zipped:
        with tarfile.open(fileobj=zipped, mode="w", format=tarfile.PAX_FORMAT) as archive:
            for member in bundle_members(root, include_images, config_path):
                _add_bytes(archive, f"{prefix}/{member}", (root / member).read_bytes())
            _add_bytes(archive, f"{prefix}/REVIEW/README.md", readme.encode("utf-8"))
            _add_bytes(archive, f"{prefix}/REVIEW/manifest.tsv", (root / manifest_path).read_bytes())
            _add_bytes(archive, f"{prefix}/REVIEW/study.json", about.encode("utf-8"))
            report_page = root / paths.template("report_html")
            if not include_images and report_page.is_file():
                page = without_participant_figures(report_page.read_text(encoding="utf-8"))
                _add_bytes(archive, f"{prefix}/REVIEW/report.html", page.encode("utf-8"))
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


def _record_key(record):
    """The memo key a provenance record's own fields give (as run_job computes it)."""
    input_hashes = {name: [] for name in record.get("empty_inputs", [])}
    for item in record["inputs"]:
        input_hashes.setdefault(item["name"], []).append(item["sha256"])
    output_counts = {}
    for item in record["outputs"]:
        output_counts[item["name"]] = output_counts.get(item["name"], 0) + 1
    return memo_key(record["step"], {"code": record["code_hash"], "versions": record["versions"]}, record["settings"],
                    input_hashes, output_counts)


def check_records(root, record_paths, manifest, lock_file, results_dir=RESULTS):
    """[(record, problem)] for bundled provenance records that disagree with the manifest, the lock or their own key.

    A record lists its outputs' sha256 (they must be the manifest's), the
    package versions (they must be the lock's) and the memo key, a hash of
    its step, code hash, versions, settings and input hashes: editing any of
    these without recomputing the key is caught here, before any recompute.
    """
    root = Path(root)
    listed = dict(zip(manifest["path"], manifest["sha256"]))
    pins = read_lock(lock_file) if Path(lock_file).is_file() else None
    problems = []
    for relative in record_paths:
        try:
            record = json.loads((root / relative).read_text(encoding="utf-8"))
            outputs = record["outputs"]
        except (OSError, ValueError, KeyError, TypeError):
            problems.append((relative, "unreadable or not a provenance record"))
            continue
        if relative != ResultPaths(results_dir).provenance("manifest", "study"):
            for item in outputs:
                if listed.get(item.get("path")) != item.get("sha256"):
                    problems.append((relative, f"lists {item.get('path')} with another sha256 than the manifest"))
        for item in record.get("inputs", []):
            if item.get("path") in listed and listed[item["path"]] != item.get("sha256"):
                problems.append((relative, f"used {item['path']} with another sha256 than the manifest lists"))
        if pins is None:
            problems.append((relative, "no lock (requirements/lock.txt) to compare its versions with"))
        else:
            for name, locked, version in version_differences(pins, record.get("versions") or {}):
                problems.append((relative, f"claims {name} {version}, the bundled lock pins {locked}"))
        try:
            if not record.get("settings_reduced") and _record_key(record) != record.get("key"):
                problems.append((relative, "its settings, code hash, versions or inputs do not give its memo key (edited after the run)"))
        except (KeyError, TypeError, ValueError):
            problems.append((relative, "lacks the fields of its memo key"))
    return problems


_COMPARED_FIELDS = ("step", "wildcards", "settings", "code_hash")


def compare_records(reference_root, root, record_paths, results_dir=RESULTS):
    """[(record, problem)] where a recomputed provenance record differs from the bundled one (settings, code, versions, inputs)."""
    problems = []
    for relative in record_paths:
        try:
            bundled = json.loads((Path(reference_root) / relative).read_text(encoding="utf-8"))
            fresh = json.loads((Path(root) / relative).read_text(encoding="utf-8"))
        except (OSError, ValueError):
            problems.append((relative, "the recomputation wrote no such record"))
            continue
        for field in _COMPARED_FIELDS:
            if bundled.get(field) != fresh.get(field):
                problems.append((relative, f"{field} differs from the bundled record"))
        locked = lambda record: {k: v for k, v in (record.get("versions") or {}).items() if k != "python"}  # noqa: E731
        if locked(bundled) != locked(fresh):  # the Python patch version is not pinned and may differ
            problems.append((relative, "versions differ from the bundled record"))
        # Provenance records as inputs (the manifest job's) carry run times: their bytes differ from run to run.
        digests = lambda record: [(item.get("name"), item.get("sha256")) for item in record.get("inputs", [])  # noqa: E731
                                  if not str(item.get("path", "")).startswith(f"{results_dir}/provenance/")]
        if digests(bundled) != digests(fresh):
            problems.append((relative, "its input hashes differ from the bundled record"))
    return problems


def _study_of_bundle(root):
    about = Path(root) / "REVIEW/study.json"
    try:
        return json.loads(about.read_text(encoding="utf-8"))
    except (OSError, ValueError):
        return None


def verify(root=".", cores=2, recompute=True, config_path="config/config.yaml"):
    """Check the bundled results and records, then (optionally) recompute and compare. Returns an exit code."""
    root = Path(root).resolve()
    about = _study_of_bundle(root)
    if about is not None and Path(config_path).as_posix() != about.get("config"):
        print(f"foldwise verify: this bundle was made from the study config {about.get('config')}, not {config_path}; "
              f"run: make verify CONFIG={about.get('config')}")
        return 2
    results_dir = _results_dir(root, config_path)
    paths = ResultPaths(results_dir)
    reference_path = root / "REVIEW/manifest.tsv"
    if not reference_path.is_file():
        reference_path = root / paths.template("manifest")
    if not reference_path.is_file():
        print(f"foldwise verify: no manifest found (REVIEW/manifest.tsv or {paths.template('manifest')}); run it inside an unpacked bundle")
        return 2
    reference = pd.read_csv(reference_path, sep="\t", dtype=str, keep_default_na=False)
    kept = root / _EVIDENCE
    # The bundled evidence: under REVIEW/bundled once a verify has moved it there (a later verify reads it from there).
    evidence_root = kept if kept.is_dir() else root
    bundled = reference[[(evidence_root / path).is_file() for path in reference["path"]]]
    provenance = evidence_root / paths.folder("provenance")
    records = sorted(p.relative_to(evidence_root).as_posix() for p in provenance.rglob("*.json")) if provenance.is_dir() else []
    print(f"Step 1: {len(bundled)} bundled results checked against the manifest, {len(records)} provenance records "
          "against the manifest, the lock and their memo keys")
    failures = 0
    for row in compare_outputs(bundled, evidence_root).itertuples():
        if row.status != "match":
            print(f"  {row.status}: {row.path}  (the bundled file differs from the manifest)")
            failures += 1
    for record, problem in check_records(evidence_root, records, reference, root / "requirements/lock.txt", results_dir):
        print(f"  RECORD: {record}: {problem}")
        failures += 1
    if failures:
        print(f"foldwise verify: {failures} problem(s) with the bundled evidence; nothing was recomputed")
        return 1
    if not recompute:
        print("Step 1 passed: every bundled result and provenance record agrees with the manifest.")
        return 0
    if evidence_root == root:
        for path in list(bundled["path"]) + records:
            destination = kept / path
            destination.parent.mkdir(parents=True, exist_ok=True)
            os.replace(root / path, destination)  # recompute from scratch; keep the bundled copy, never overwritten
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
    record_problems = compare_records(kept, root, records, results_dir)
    for record, problem in record_problems:
        print(f"  RECORD: {record}: {problem}")
    counts = result["status"].value_counts().to_dict()
    print("Summary: " + ", ".join(f"{count} {status}" for status, count in sorted(counts.items()))
          + f"; {len(records) - len({record for record, _ in record_problems})} of {len(records)} provenance records agree")
    bad = int(sum(count for status, count in counts.items() if status in ("MISMATCH", "MISSING"))) + len(record_problems)
    if bad:
        print(f"foldwise verify: {bad} output(s) or record(s) do not reproduce")
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
