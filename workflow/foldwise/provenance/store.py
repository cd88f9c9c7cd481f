"""Keeping the content memo's store honest and small: ``make store-check`` and ``make store-clean``.

``python -m foldwise.provenance.store check [--store DIR]`` reads every entry
and compares each stored file with the sha256 its ``entry.json`` lists; a
damaged entry (bit rot, a write as root, a truncated copy) is named, and the
command exits 1. Runs never use a damaged entry (a restore checks the hashes
first and recomputes instead), but a shared store is best checked on its own.

``python -m foldwise.provenance.store clean [--store DIR] [--manifest FILE ...]``
drops the entries no manifest reaches: an entry is kept when every file it
holds is listed, by sha256, in one of the given manifests (default: the
manifest in the results folder of ``--config``, ``study.results_dir``; a store
shared by several studies needs all their manifests). Damaged entries, staging folders of killed runs and the input-hash
cache (rebuilt on the next run) are dropped too. Entries younger than
``--min-age-s`` (default one hour) are kept, so a run that is storing
results right now loses nothing.
"""

import argparse
import json
import shutil
import sys
import time
from pathlib import Path

import pandas as pd

from foldwise.errors import InputError
from foldwise.provenance.hashing import hash_file

__all__ = ["entries", "check_entry", "check_store", "reachable_digests", "clean_store", "main"]

DEFAULT_MIN_AGE_S = 3600


def entries(store_dir):
    """The entry folders of a store (``objects/ab/<key>``), sorted."""
    objects = Path(store_dir) / "objects"
    if not objects.is_dir():
        return []
    return sorted(entry for prefix in objects.iterdir() if prefix.is_dir() for entry in prefix.iterdir() if entry.is_dir())


def check_entry(entry):
    """None for a sound entry, else what is wrong with it (str)."""
    try:
        record = json.loads((entry / "entry.json").read_text(encoding="utf-8"))
        files = record["files"]
    except (OSError, ValueError, KeyError, TypeError):
        return "entry.json is missing or unreadable"
    if record.get("key") != entry.name:
        return f"entry.json names the key {str(record.get('key'))[:12]}..., not the folder's"
    for number, listed in enumerate(files):
        stored = entry / str(number)
        if not stored.is_file():
            return f"file {number} is missing"
        if hash_file(stored) != listed.get("sha256"):
            return f"file {number} differs from its sha256 (changed after it was stored)"
    return None


def check_store(store_dir):
    """[(entry folder, problem)] for every damaged entry of the store."""
    damaged = []
    for entry in entries(store_dir):
        problem = check_entry(entry)
        if problem is not None:
            damaged.append((entry, problem))
    return damaged


def reachable_digests(manifest_paths):
    """The sha256 of every file the given manifests list (a set); each manifest must exist."""
    digests = set()
    for path in manifest_paths:
        path = Path(path)
        if not path.is_file():
            raise InputError(path, "file", "the manifest does not exist, so what it reaches is unknown",
                             "run the study first, or name every manifest that uses this store (MANIFESTS='results_a/manifest.tsv ...')")
        table = pd.read_csv(path, sep="\t", dtype=str, keep_default_na=False)
        if "sha256" not in table.columns:
            raise InputError(path, "sha256", "the manifest has no sha256 column", "give a manifest.tsv that foldwise wrote (in a study's results folder)")
        digests.update(table["sha256"])
        digests.add(hash_file(path))  # the manifest job's own entry
    return digests


def _size(path):
    return sum(item.stat().st_size for item in path.rglob("*") if item.is_file()) if path.is_dir() else 0


def clean_store(store_dir, manifest_paths, min_age_s=DEFAULT_MIN_AGE_S, now_s=None):
    """Drop the entries no manifest reaches, damaged entries, staging leftovers and the hash cache.

    Returns
    -------
    dict
        ``kept``, ``dropped`` (entry counts) and ``freed_bytes``.
    """
    now_s = time.time() if now_s is None else now_s
    store_dir = Path(store_dir)
    digests = reachable_digests(manifest_paths)
    kept = dropped = freed = 0
    for entry in entries(store_dir):
        try:
            young = now_s - entry.stat().st_mtime < min_age_s
            files = json.loads((entry / "entry.json").read_text(encoding="utf-8"))["files"]
            reached = all(item["sha256"] in digests for item in files)
        except (OSError, ValueError, KeyError, TypeError):
            young, reached = False, False
        if young or (reached and check_entry(entry) is None):
            kept += 1
            continue
        freed += _size(entry)
        shutil.rmtree(entry, ignore_errors=True)
        dropped += 1
    for folder in (store_dir / "incoming", store_dir / "hashes"):
        if folder.is_dir():
            for item in folder.iterdir():
                if now_s - item.lstat().st_mtime >= min_age_s:
                    freed += _size(item) if item.is_dir() else item.lstat().st_size
                    shutil.rmtree(item, ignore_errors=True) if item.is_dir() else item.unlink(missing_ok=True)
    return {"kept": kept, "dropped": dropped, "freed_bytes": freed}


def _default_store(config_path):
    from foldwise.config import load_study_config

    return load_study_config(config_path)["study"]["store_dir"]


def _default_manifest(config_path):
    """The manifest of the config's own results folder (study.results_dir)."""
    from foldwise.config import load_study_config
    from foldwise.contract import ResultPaths

    return ResultPaths(load_study_config(config_path)["study"]["results_dir"]).template("manifest")


def main(argv=None):
    parser = argparse.ArgumentParser(prog="python -m foldwise.provenance.store", description=__doc__.splitlines()[0])
    commands = parser.add_subparsers(dest="command", required=True)
    for name, text in (("check", "compare every stored file with its sha256"), ("clean", "drop entries no manifest reaches")):
        command = commands.add_parser(name, help=text)
        command.add_argument("--store", help="the store folder (default: study.store_dir of --config)")
        command.add_argument("--config", default="config/config.yaml", help="the study config (default: config/config.yaml)")
    cleaning = commands.choices["clean"]
    cleaning.add_argument("--manifest", action="append", help="a manifest whose files are kept (repeat for a shared store; "
                                                              "default: the manifest in --config's results folder)")
    cleaning.add_argument("--min-age-s", type=float, default=DEFAULT_MIN_AGE_S, help="keep entries younger than this (seconds)")
    arguments = parser.parse_args(argv)
    try:
        store_dir = Path(arguments.store or _default_store(arguments.config))
        if not store_dir.is_dir():
            print(f"foldwise: the store {store_dir} does not exist (nothing to do)")
            return 0
        if arguments.command == "check":
            found = entries(store_dir)
            damaged = check_store(store_dir)
            for entry, problem in damaged:
                print(f"  DAMAGED: {entry.relative_to(store_dir).as_posix()}: {problem}")
            print(f"foldwise store-check: {len(found)} entries, {len(damaged)} damaged")
            if damaged:
                print("Fix: make store-clean drops damaged entries (runs never restore them: they recompute instead)")
            return 1 if damaged else 0
        summary = clean_store(store_dir, arguments.manifest or [_default_manifest(arguments.config)], min_age_s=arguments.min_age_s)
        print(f"foldwise store-clean: kept {summary['kept']} entries, dropped {summary['dropped']}, "
              f"freed {summary['freed_bytes'] / 1e6:.1f} MB")
        return 0
    except InputError as error:
        print(f"foldwise: {error}", file=sys.stderr)
        return 1


if __name__ == "__main__":
    sys.exit(main())
