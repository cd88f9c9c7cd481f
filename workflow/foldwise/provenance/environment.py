"""The installed packages against the lock, checked at the start of every run.

The numbers a study reports depend on the versions of the packages that do the
arithmetic (numpy, scipy, pandas, scikit-learn, nibabel, ...).
``requirements/lock.txt`` pins them and ``make env`` installs exactly that.
If the environment drifted (a ``pip install -U`` in the venv, another venv on
the path), results would silently mix versions: some jobs restored or kept
from the old versions, others recomputed with the new ones. So a run stops
before any job, naming the package, both versions and the fix. A user who
means to run with other versions opts in with ``FOLDWISE_PACKAGE_CHANGE=rerun``
(``make demo PACKAGE_CHANGE=rerun``): the versions are part of every job's
code key (:func:`versioned_code`), so every job reruns, and no study mixes
versions.
"""

import os
import re
import sys
from pathlib import Path

from foldwise.errors import InputError
from foldwise.provenance.hashing import hash_object
from foldwise.provenance.memo import package_versions

__all__ = ["CHANGE_VARIABLE", "read_lock", "version_differences", "check_environment", "versioned_code"]

CHANGE_VARIABLE = "FOLDWISE_PACKAGE_CHANGE"
_PIN = re.compile(r"^\s*([A-Za-z0-9][A-Za-z0-9._-]*)\s*==\s*([^\s;#]+)")


def _normalised(name):
    """A distribution name in its normal form (PEP 503: lower case, runs of -_. as one -)."""
    return re.sub(r"[-_.]+", "-", name).lower()


def read_lock(path):
    """The pins of a lock file: normalised package name -> version (``name==version`` lines only)."""
    pins = {}
    for line in Path(path).read_text(encoding="utf-8").splitlines():
        match = _PIN.match(line)
        if match:
            pins[_normalised(match.group(1))] = match.group(2)
    return pins


def version_differences(pins, installed):
    """[(package, locked version, installed version)] for the packages that shape the numbers and are pinned.

    ``installed`` maps package name -> version (None if not installed), as
    :func:`foldwise.provenance.memo.package_versions` returns it; packages the
    lock does not pin (python, foldwise itself) are not compared.
    """
    differences = []
    for name, version in sorted(installed.items()):
        locked = pins.get(_normalised(name))
        if locked is not None and version != locked:
            differences.append((name, locked, version))
    return differences


def check_environment(lock_path, installed=None, environ=None):
    """Stop the run if a package that shapes the numbers differs from the lock.

    Parameters
    ----------
    lock_path : str or os.PathLike
        ``requirements/lock.txt``.
    installed : dict, optional
        Package -> installed version (default: what this Python imports).
    environ : mapping, optional
        The environment (default ``os.environ``); ``FOLDWISE_PACKAGE_CHANGE=rerun``
        lets the run go on (every job's code key holds the versions, so all rerun).

    Returns
    -------
    list of tuple
        The differences that were let through (empty when the environment matches).

    Raises
    ------
    InputError
        Naming the first differing package, the locked and the installed
        version, and the fix (``make env``, or the opt-in).
    """
    environ = os.environ if environ is None else environ
    lock_path = Path(lock_path)
    if not lock_path.is_file():
        raise InputError(lock_path, "file", "the package lock does not exist, so the environment cannot be checked",
                         "restore requirements/lock.txt from the repository (git checkout requirements/lock.txt)")
    differences = version_differences(read_lock(lock_path), package_versions() if installed is None else installed)
    if differences and environ.get(CHANGE_VARIABLE, "") != "rerun":
        listed = "; ".join(f"{name} {locked} locked, {version or 'not installed'} installed" for name, locked, version in differences)
        raise InputError(lock_path, differences[0][0],
                         f"the environment differs from the lock ({listed}); results would mix versions",
                         f"run `make env` to install the locked versions, or set {CHANGE_VARIABLE}=rerun "
                         "(make ... PACKAGE_CHANGE=rerun) to recompute every job with the installed ones")
    for name, locked, version in differences:
        print(f"foldwise: {name} {version} installed, {locked} locked; {CHANGE_VARIABLE}=rerun: every job reruns with it",
              file=sys.stderr)
    return differences


def versioned_code(code):
    """A job's code key with the package versions in it, so a version change reruns the job (Snakemake's params trigger)."""
    return hash_object({"code": code, "versions": package_versions()})
