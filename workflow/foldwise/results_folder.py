"""Checks of ``study.results_dir``, the study's results folder, before any job.

Every output path comes from :class:`foldwise.contract.ResultPaths` under
this folder, so two studies in one checkout with different results folders
never share an output, a provenance record, a log or a run guard. What this
module refuses, and why:

* **an absolute path, or one that leaves the working folder (``..``)**:
  provenance records, the manifest and the reviewer bundle name every output
  by its path relative to the checkout; an absolute folder would tie them to
  one machine and keep its files out of a bundle. A folder on another disk is
  reached through a symbolic link inside the checkout.
* **a path not in plain form** (``./results``, ``results/``, ``a//b``, spaces,
  braces): Snakemake compares output paths as text and reads ``{...}`` as a
  wildcard.
* **the checkout itself or one of its code folders** (``workflow``,
  ``config``, ``tests``, ...): outputs would mix with the files the bundle
  ships and ``make clean`` could not remove them alone.
* **the memo store, or a folder inside it**: ``make store-clean`` removes what
  no manifest reaches (the store may sit inside the results folder, as by
  default, not the other way round).
* **a folder inside the dataset** (``dataset.bids_root``,
  ``dataset.derivatives_root``): outputs would become part of the data
  (unless the checkout itself lives inside the dataset, e.g. in its ``code/``
  folder: that layout is the user's choice).
* **a demo study whose simulated files lie outside its results folder**: the
  demo writes ``dataset.bids_root`` and the atlas; a second study writing the
  same files would make the first one's jobs out of date.
* **a folder this user cannot write** (:func:`check_results_writable`, on disk).

Two configs that name the same folder cannot be told apart from one config
alone: each real run writes which config file it ran (:func:`claim_results_dir`,
``<results>/.foldwise/config-file.txt``), and a run with another config file
that still exists gets a warning (:func:`shared_results_warning`), not a
refusal: renaming a config, or running a second study on purpose after the
first (the bundle keeps only the manifest's files), stays possible.
"""

import os
import posixpath
import re

from foldwise.data.fileio import check_output_folder
from foldwise.errors import InputError

__all__ = ["CODE_FOLDERS", "CLAIM_FILE", "check_results_dir", "check_results_writable", "claim_results_dir", "shared_results_warning"]

# Top-level folders of the checkout that hold code, configs or the environment, never outputs.
CODE_FOLDERS = ("workflow", "config", "tests", "docs", "benchmarks", "requirements", ".snakemake", ".git", ".venv")
_PLAIN = re.compile(r"[A-Za-z0-9_.-]+(/[A-Za-z0-9_.-]+)*")
_FIELD = "study.results_dir"
CLAIM_FILE = ".foldwise/config-file.txt"  # inside the results folder: the config file of the last real run


def _inside(path, folder):
    """True when ``path`` is ``folder`` or lies below it (both absolute and normalised)."""
    return path == folder or path.startswith(folder.rstrip(os.sep) + os.sep)


def _absolute(path):
    return os.path.normpath(os.path.abspath(path))


def check_results_dir(config, path="the study config"):
    """Refuse a results folder two studies, the data, the store or the code could collide in (config only, no disk).

    Parameters
    ----------
    config : dict
        The validated config (``study.results_dir`` filled with its default ``results``).
    path : str
        The config file, named in every message.

    Raises
    ------
    InputError
        Naming the config file, the key and the fix (the cases are listed in
        the module's docstring and in docs/bad-input-table.md).
    """
    study, dataset = config["study"], config["dataset"]
    results_dir = study.get("results_dir", "results")
    if os.path.isabs(results_dir) or results_dir.startswith("~"):
        raise InputError(path, _FIELD, f"'{results_dir}' is an absolute path; outputs are named by their path inside the checkout "
                         "(provenance, manifest, bundle)", "give a folder relative to the checkout (e.g. results_b); "
                         "for another disk, make that folder a symbolic link to it")
    if not _PLAIN.fullmatch(results_dir) or posixpath.normpath(results_dir) != results_dir:
        plain = posixpath.normpath(results_dir.strip())
        hint = f" (e.g. '{plain}')" if _PLAIN.fullmatch(plain) and plain not in (".", "..") and not plain.startswith("../") else ""
        raise InputError(path, _FIELD, f"'{results_dir}' is not a plain relative folder name",
                         f"write it with letters, digits, '_', '-', '.' and '/' only, without './', '..', '//' or a trailing '/'{hint}")
    first = results_dir.split("/")[0]
    if first == ".." or first == ".":
        raise InputError(path, _FIELD, f"'{results_dir}' leaves the checkout", "give a folder inside the checkout (e.g. results_b)")
    if first in CODE_FOLDERS:
        raise InputError(path, _FIELD, f"'{results_dir}' is inside the checkout's {first}/ folder, which holds code or configs, not outputs",
                         "give a folder of its own at the top of the checkout (e.g. results_b)")
    results = _absolute(results_dir)
    store = _absolute(study["store_dir"])
    if _inside(results, store):
        raise InputError(path, _FIELD, f"'{results_dir}' is {'the memo store' if results == store else 'inside the memo store'} "
                         f"(study.store_dir '{study['store_dir']}'), whose clean-up removes what no manifest reaches",
                         "give the results and the store different folders (the store may sit inside the results folder, "
                         "as by default: results/.store)")
    for key in ("bids_root", "derivatives_root"):
        # A checkout kept inside the dataset (e.g. in its code/ folder) is the user's layout: its results folder is fine.
        if dataset.get(key) and _inside(results, _absolute(dataset[key])) and not _inside(_absolute(os.curdir), _absolute(dataset[key])):
            raise InputError(path, _FIELD, f"'{results_dir}' is inside the dataset (dataset.{key} '{dataset[key]}'): "
                             "outputs would be written into the data", "give a results folder outside the dataset (e.g. results_b)")
    if dataset["source"] == "demo":
        for key in ("bids_root", "atlas_image", "atlas_labels"):
            if not _inside(_absolute(dataset[key]), results) or _absolute(dataset[key]) == results:
                raise InputError(path, f"dataset.{key}", f"the demo writes '{dataset[key]}', which is outside its results folder "
                                 f"'{results_dir}' (study.results_dir), so another study could overwrite it",
                                 f"put the demo's files inside the results folder: dataset.bids_root: {results_dir}/demo/bids, "
                                 f"dataset.atlas_image: {results_dir}/demo/atlas/atlas.nii.gz, "
                                 f"dataset.atlas_labels: {results_dir}/demo/atlas/atlas_labels.tsv")


def check_results_writable(config, path="the study config"):
    """Refuse a results folder this user cannot create or write (on disk, before any job).

    Raises
    ------
    InputError
        Naming the config file, ``study.results_dir``, the folder that is in
        the way and the fix.
    """
    results_dir = config["study"].get("results_dir", "results")
    try:
        check_output_folder(results_dir, _FIELD)
    except InputError as error:
        raise InputError(path, _FIELD, f"the results folder '{results_dir}' cannot be written ({error.file}: {error.problem})",
                         f"{error.fix[:1].lower()}{error.fix[1:]}, or set study.results_dir to a folder this user can write") from None


def _config_name(config_file):
    return os.path.relpath(os.path.abspath(config_file)).replace(os.sep, "/")


def claim_results_dir(results_dir, config_file):
    """Write down which config file runs into ``results_dir`` (the onstart hook of a real run, never a dry run)."""
    claim = os.path.join(results_dir, CLAIM_FILE)
    os.makedirs(os.path.dirname(claim), exist_ok=True)
    with open(claim, "w", encoding="utf-8") as handle:
        handle.write(_config_name(config_file) + "\n")


def shared_results_warning(results_dir, config_file):
    """A warning (str) when ``results_dir`` was last run by another config file that still exists, else None.

    >>> shared_results_warning("no_such_folder", "config/study_b.yaml") is None
    True
    """
    try:
        with open(os.path.join(results_dir, CLAIM_FILE), encoding="utf-8") as handle:
            previous = handle.read().strip()
    except OSError:
        return None
    if not previous or previous == _config_name(config_file) or not os.path.isfile(previous):
        return None
    return (f"{_config_name(config_file)}: {_FIELD}: the results folder '{results_dir}' was last run by {previous}; this run "
            f"replaces that study's outputs there (and switching back reruns them). Fix: give each study config its own "
            f"study.results_dir (e.g. results_{os.path.splitext(os.path.basename(config_file))[0]})")


def main(argv=None):
    """Print the study's results folder (``make clean`` removes it): ``python -m foldwise.results_folder --config FILE``."""
    import argparse

    from foldwise.config import load_study_config

    parser = argparse.ArgumentParser(prog="python -m foldwise.results_folder", description=main.__doc__.splitlines()[0])
    parser.add_argument("--config", default="config/config.yaml", help="the study config (default: config/config.yaml)")
    arguments = parser.parse_args(argv)
    config = load_study_config(arguments.config)
    check_results_dir(config, arguments.config)  # never a code folder or the checkout: the folder is safe to remove
    print(config["study"]["results_dir"])


if __name__ == "__main__":
    main()
