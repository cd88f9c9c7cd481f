"""What every run does first and last, called from the workflow's onstart and onsuccess hooks.

First (:func:`start_run`, under Snakemake's lock of the working directory):

* remove temporary files an earlier, killed run left behind: ``*.part``
  files of the atomic writers and ``.*.restore`` files of the memo in the
  results folder, and staging folders under the store's ``incoming/`` whose
  process is gone (same host) or that are older than a day (another host);
* write down which jobs Snakemake forces (``--forcerun``, ``--forceall``,
  ``--force``), so those jobs bypass the content memo
  (:func:`foldwise.provenance.memo.forced_jobs`).

Last (:func:`finish_run`): every output of every provenance record of the
study is compared with the sha256 its record lists; any difference stops the
run with a message naming the file, its record and the fix.
"""

import contextlib
import json
import os
import platform
import shutil
import time
from pathlib import Path

from foldwise.errors import InputError
from foldwise.provenance.memo import FORCED_JOBS_VARIABLE, MemoStore

__all__ = ["remove_leftovers", "forced_records", "start_run", "output_differences", "finish_run", "LEFTOVER_AGE_S"]

LEFTOVER_AGE_S = 24 * 3600  # a staging folder of another host is removed only after a day: it may still be written
_HOST = platform.node().replace(".", "_") or "host"


def _process_alive(pid):
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:  # alive, another user's
        return True
    return True


def _is_temporary(name):
    return name.endswith(".part") or (name.startswith(".") and name.endswith(".restore"))


def remove_leftovers(results_dir, store_dir, now_s=None):
    """Remove the temporary files and staging folders an interrupted run left behind.

    Parameters
    ----------
    results_dir : str or os.PathLike
        The results folder (locked by Snakemake for this run).
    store_dir : str or os.PathLike
        The content memo's store; it may be shared by several studies.
    now_s : float, optional
        The current time (for tests).

    Returns
    -------
    list of str
        The removed paths.
    """
    now_s = time.time() if now_s is None else now_s
    removed = []
    results_dir, store_dir = Path(results_dir), Path(store_dir)
    store_resolved = store_dir.resolve() if store_dir.exists() else None
    if results_dir.is_dir():
        for folder, folders, files in os.walk(results_dir):
            if store_resolved is not None and Path(folder).resolve() == store_resolved:
                folders[:] = []  # the store is handled below
                continue
            for name in files:
                if _is_temporary(name):
                    path = os.path.join(folder, name)
                    with contextlib.suppress(FileNotFoundError):
                        os.unlink(path)
                        removed.append(path)
    incoming = store_dir / "incoming"
    if incoming.is_dir():
        for staging in incoming.iterdir():
            parts = staging.name.split(".")
            ours = len(parts) >= 4 and parts[1] == _HOST and parts[2].isdigit()
            try:
                age_s = now_s - staging.lstat().st_mtime
            except FileNotFoundError:
                continue
            if (ours and not _process_alive(int(parts[2]))) or age_s > LEFTOVER_AGE_S:
                shutil.rmtree(staging, ignore_errors=True) if staging.is_dir() else staging.unlink(missing_ok=True)
                removed.append(str(staging))
    return removed


def forced_records(dag, results_dir="results"):
    """The provenance-record paths of the jobs Snakemake forces in this run (records under ``results_dir``).

    ``dag`` is Snakemake's DAG (``workflow.dag``) after planning: a job is
    forced when its reason says so, which covers ``--forcerun RULE``,
    ``--forcerun FILE``, ``--forceall`` and ``--force`` alike.
    """
    return sorted(str(path) for job in dag.needrun_jobs() if dag.reason(job).forced
                  for path in job.output if str(path).startswith(f"{results_dir}/provenance/"))


def start_run(dag, results_dir, store_dir):
    """Clean up after an interrupted run and name the forced jobs for the memo (the onstart hook)."""
    removed = remove_leftovers(results_dir, store_dir)
    if removed:
        print(f"foldwise: removed {len(removed)} temporary file(s) or folder(s) left by an interrupted run")
    forced = forced_records(dag, results_dir)
    listing = Path(results_dir) / ".foldwise" / "forced-jobs.txt"
    if forced:
        listing.parent.mkdir(parents=True, exist_ok=True)
        listing.write_text("".join(f"{path}\n" for path in forced), encoding="utf-8")
        os.environ[FORCED_JOBS_VARIABLE] = str(listing.resolve())  # inherited by this run's jobs only
    else:
        os.environ.pop(FORCED_JOBS_VARIABLE, None)
        listing.unlink(missing_ok=True)
    return removed, forced


def output_differences(record_paths, store_dir):
    """[(output path, record path, problem)] for every output that differs from its provenance record.

    Records that do not exist (jobs not run yet) and outputs that are gone
    (Snakemake makes them again) are skipped; an unreadable record is a
    difference. File hashes come from the store's cache, keyed by size,
    mtime, inode and ctime, so an unchanged file is not read again.
    """
    store = MemoStore(store_dir)
    differences = []
    for record_path in record_paths:
        if not os.path.isfile(record_path):
            continue
        try:
            with open(record_path, encoding="utf-8") as handle:
                outputs = json.load(handle)["outputs"]
        except (OSError, ValueError, KeyError, TypeError):
            differences.append((record_path, record_path, "the provenance record is unreadable"))
            continue
        for output in outputs:
            path = output["path"]
            if not os.path.isfile(path):
                continue
            if store.content_hash(path) != output["sha256"]:
                differences.append((path, record_path, "its content differs from the sha256 its provenance record lists"))
    return differences


def finish_run(record_paths, store_dir):
    """Stop with an InputError if any output differs from its provenance record (the onsuccess hook)."""
    differences = output_differences(record_paths, store_dir)
    if differences:
        path, record, problem = differences[0]
        more = f" ({len(differences) - 1} more: {', '.join(p for p, _, _ in differences[1:4])}{' ...' if len(differences) > 4 else ''})" \
            if len(differences) > 1 else ""
        raise InputError(path, "sha256", f"{problem} ({record}); it was changed after its job wrote it{more}",
                         "delete the file and rerun (its job makes it again), or rerun its job with --forcerun <rule>")
    return differences
