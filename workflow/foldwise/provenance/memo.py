"""The content memo and the provenance record of every job.

A job's memo key is sha256 over (step, code hash, canonical settings, the
content hash of every input). Outputs are kept in a content-addressed store;
a job whose key is already stored restores its outputs from there (a copy,
or a reflink where the file system shares blocks copy-on-write; never a hard
link, so a change to a store object cannot reach a result file) instead of
computing them, and says so in its log. A job Snakemake was told to force
(``--forcerun``, ``--forceall``) bypasses the memo and hashes its inputs
afresh. A touched-but-unchanged input or a reverted edit therefore costs almost
nothing (docs/architecture.md, invariant 4).

Store layout (``study.store_dir``, ``results/.store`` by default)::

    objects/ab/<key>/entry.json   what the entry holds: output names, sha256
    objects/ab/<key>/0, 1, ...    the output files, read-only
    hashes/<sha1 of path>.json    content hash of a file, by size, mtime, inode and ctime (no path kept)
    incoming/<key>.<host>.<pid>.* entries being written (renamed into objects/)

Every entry is written under ``incoming/`` and renamed into place as a whole,
so a reader never sees half an entry and two jobs that store the same key at
once cannot corrupt it (the second rename finds the first's entry and drops
its own copy). Restored files are checked against their sha256 first; a
damaged entry is discarded and the job recomputes.
"""

import contextlib
import errno
import hashlib
import json
import logging
import os
import platform
import resource
import shutil
import sys
import tempfile
import threading
import time
import types
from importlib import metadata
from pathlib import Path

from foldwise.errors import InputError
from foldwise.data.fileio import write_json
from foldwise.provenance.hashing import canonical_json, hash_file, hash_object

__all__ = ["MemoStore", "memo_key", "PartMemo", "part_memo", "job_parts", "EveryPartComputed", "run_job", "run_in_process", "JobFailed", "file_system_error", "package_versions", "relative_path", "display_path", "forced_jobs",
           "FORCED_JOBS_VARIABLE", "copy_file", "VERSIONED_PACKAGES"]

# The packages that shape the numbers: the memo keys on their versions and the report prints them (one list).
VERSIONED_PACKAGES = ("numpy", "scipy", "nibabel", "scikit-learn", "pandas", "PyYAML", "matplotlib", "snakemake", "isal", "foldwise")


def relative_path(path, root=None):
    """``path`` relative to ``root`` (default: the working directory), never absolute.

    Provenance records must not reveal a user's home or machine: a path
    outside the repository keeps only its file name, prefixed ``<outside>/``.
    """
    root = Path(root or os.getcwd()).resolve()
    absolute = Path(os.path.abspath(path))
    try:
        return absolute.relative_to(root).as_posix()
    except ValueError:
        return f"<outside>/{absolute.name}"


def display_path(path, root=None):
    """How results show a path: relative inside the working directory, else ``<outside>/<name>``; never absolute.

    For the report and every other text a study writes, so no result names a
    user's home folder or machine (the same reduction provenance records use).
    ``None`` and empty strings are returned unchanged.
    """
    if path is None or str(path) == "":
        return path
    return relative_path(path, root)


def _without_absolute_paths(value):
    """``value`` with every absolute-path string made relative as :func:`relative_path` does (for the record only)."""
    if isinstance(value, dict):
        return {key: _without_absolute_paths(item) for key, item in value.items()}
    if isinstance(value, list):
        return [_without_absolute_paths(item) for item in value]
    if isinstance(value, str) and os.path.isabs(value):
        return relative_path(value)
    return value


def _flatten(named):
    """[(name, index, path)] for a dict of name -> path or list of paths, in order."""
    items = []
    for name in sorted(named):
        value = named[name]
        paths = [value] if isinstance(value, (str, os.PathLike)) else list(value)
        for index, path in enumerate(paths):
            items.append((name, index, str(path)))
    return items


class MemoStore:
    """A content-addressed store of job outputs under one folder."""

    def __init__(self, root):
        self.root = Path(root)

    # -- input hashing, cached per file identity ----------------------------
    def content_hash(self, path, fresh=False):
        """sha256 of a file's content, cached by (size, mtime_ns, inode, ctime_ns).

        The inode and ctime make an edit that keeps the size and the mtime
        (``cp -p``, ``rsync -t``, unpacking an archive) a cache miss: a
        process can set a file's mtime but not its ctime. The cache file is
        named by a hash of the path and holds no path, so a shared store
        keeps no user's folders. ``fresh=True`` hashes the content whatever
        the cache says (a forced job).
        """
        stat = os.stat(path)
        cache_name = hashlib.sha1(os.path.abspath(path).encode("utf-8")).hexdigest()
        cache_path = self.root / "hashes" / cache_name[:2] / f"{cache_name}.json"
        stamp = [stat.st_size, stat.st_mtime_ns, stat.st_ino, stat.st_ctime_ns]
        if not fresh:
            with contextlib.suppress(OSError, ValueError, KeyError, TypeError):
                cached = json.loads(cache_path.read_text(encoding="utf-8"))
                if cached["stamp"] == stamp:
                    return cached["sha256"]
        digest = hash_file(path)
        with contextlib.suppress(OSError):
            write_json(cache_path, {"stamp": stamp, "sha256": digest})
        return digest

    # -- entries -----------------------------------------------------------
    def entry_dir(self, key):
        return self.root / "objects" / key[:2] / key

    def restore(self, key, outputs, log):
        """Restore ``outputs`` (name -> path(s)) from the entry ``key``.

        Returns True if every file was restored and matches its recorded
        sha256; False if there is no usable entry (a damaged one is removed).
        """
        entry = self.entry_dir(key)
        try:
            record = json.loads((entry / "entry.json").read_text(encoding="utf-8"))
        except (OSError, ValueError):
            return False
        items = _flatten(outputs)
        stored = record.get("files", [])
        if [(f["name"], f["index"]) for f in stored] != [(name, index) for name, index, _ in items]:
            return False
        for number, (file_record, (_, _, path)) in enumerate(zip(stored, items)):
            source = entry / str(number)
            if not source.is_file() or hash_file(source) != file_record["sha256"]:
                log.warning("memo entry %s is damaged (file %d); discarding it and recomputing", key[:12], number)
                shutil.rmtree(entry, ignore_errors=True)
                return False
        for number, (_, _, path) in enumerate(items):
            _restore_copy(entry / str(number), Path(path))
        return True

    def warnings(self, key):
        """The warnings the job of entry ``key`` logged when it was computed (an empty list if none or unreadable)."""
        try:
            record = json.loads((self.entry_dir(key) / "entry.json").read_text(encoding="utf-8"))
            return [str(message) for message in record.get("job", {}).get("warnings", [])]
        except (OSError, ValueError, AttributeError):
            return []

    def store(self, key, outputs, description):
        """Add the finished ``outputs`` as the entry ``key`` (atomically)."""
        final = self.entry_dir(key)
        if (final / "entry.json").is_file():
            return
        incoming = self.root / "incoming"
        incoming.mkdir(parents=True, exist_ok=True)
        # host and pid in the name: a later run removes it only if this process is gone (store.remove_leftovers)
        staging = Path(tempfile.mkdtemp(prefix=f"{key[:12]}.{_HOST}.{os.getpid()}.", dir=incoming))
        try:
            files = []
            for number, (name, index, path) in enumerate(_flatten(outputs)):
                target = staging / str(number)
                shutil.copyfile(path, target)
                os.chmod(target, 0o444)
                files.append({"name": name, "index": index, "sha256": hash_file(target), "size": target.stat().st_size})
            (staging / "entry.json").write_text(json.dumps({"key": key, "files": files, "job": description}, indent=1, sort_keys=True))
            final.parent.mkdir(parents=True, exist_ok=True)
            try:
                os.rename(staging, final)  # atomic; fails if another job stored the key first
            except OSError:
                if not (final / "entry.json").is_file():
                    raise
        finally:
            if staging.exists():
                shutil.rmtree(staging, ignore_errors=True)


_HOST = platform.node().replace(".", "_") or "host"
_FICLONE = 0x40049409  # Linux ioctl: share the blocks of another file (btrfs, XFS, ...), copy-on-write


def copy_file(source, destination):
    """Copy ``source`` to ``destination`` as a reflink where the file system can, else byte by byte.

    Never a hard link: the result must not share an inode with a store object,
    or a change to one (bit rot on a shared store, a write as root) would
    silently change the other.
    """
    with open(source, "rb") as reader, open(destination, "wb") as writer:
        try:
            import fcntl
            fcntl.ioctl(writer.fileno(), _FICLONE, reader.fileno())
            return
        except (ImportError, OSError):
            pass
        shutil.copyfileobj(reader, writer, 1 << 20)


def _restore_copy(source, destination):
    """Put a copy of ``source`` at ``destination`` atomically (written beside it, then renamed)."""
    destination.parent.mkdir(parents=True, exist_ok=True)
    temporary = destination.with_name(f".{destination.name}.{os.getpid()}.restore")
    with contextlib.suppress(FileNotFoundError):
        os.unlink(temporary)
    copy_file(source, temporary)
    os.chmod(temporary, 0o644)
    os.replace(temporary, destination)


# The workflow's onstart hook writes the provenance paths of the jobs Snakemake
# forces into a file and names it in this variable (foldwise.provenance.runs).
FORCED_JOBS_VARIABLE = "FOLDWISE_FORCED_JOBS"


def forced_jobs():
    """The provenance-record paths of the jobs this run forces (a set; empty outside a forced run)."""
    listing = os.environ.get(FORCED_JOBS_VARIABLE)
    if not listing:
        return frozenset()
    try:
        return frozenset(line for line in Path(listing).read_text(encoding="utf-8").splitlines() if line)
    except OSError:
        return frozenset()


def memo_key(step, code, settings, input_hashes, output_names):
    """The memo key of a job: sha256 of its step, code, settings and input contents.

    ``input_hashes`` maps input name -> list of content hashes (order kept);
    ``output_names`` maps output name -> number of files, so a rule that
    gains an output does not restore an old, shorter entry.
    """
    return hash_object({"step": step, "code": code, "settings": settings, "inputs": input_hashes, "outputs": output_names})


_VERSIONS = {}  # read once per process: the modules a process has imported do not change while it runs


def package_versions():
    """Installed versions of the packages that shape the numbers (a new dict each call).

    Read once per process: importlib.metadata parses each package's METADATA
    (~0.013 s a call), and Snakemake's process asks ~20 times at start (every
    step's code key) and once per job it runs in a thread. A job in that
    process computes with the modules the process imported, so the versions
    read at its start are the ones that shape its numbers.
    """
    if not _VERSIONS:
        versions = {"python": platform.python_version()}
        for name in VERSIONED_PACKAGES:
            try:
                versions[name] = metadata.version(name)
            except metadata.PackageNotFoundError:
                versions[name] = None
        _VERSIONS.update(versions)
    return dict(_VERSIONS)


class PartMemo:
    """The memo of the parts of one job: a part whose own inputs did not change is restored, not recomputed.

    A job that computes several independent parts (a run's GLM, an ROI's
    decoding, a figure) is rerun by Snakemake as a whole when any of its
    inputs changes; the parts whose *identity* (their settings and the
    content hashes of their own input files) is unchanged are restored from
    the store instead. A part's key is sha256 over the step, the step's code
    and package versions, the part's label and its identity, so a code or
    package change recomputes every part, as it does every job.

    Obtain the running job's instance with :func:`part_memo`::

        parts = part_memo()
        identity = {"settings": roi_settings, "mask": parts.file_hash(mask_path)}
        if not parts.restore("roi-ember", identity, {"summary": path}):
            ...  # compute and write path
            parts.store("roi-ember", identity, {"summary": path})
    """

    stores = True  # EveryPartComputed, outside a job, does not

    def __init__(self, store, step, code, log, use_memo=True, forced=False):
        self._store = store
        self._step = step
        self._code = code
        self._log = log
        self._use_memo = use_memo
        self._forced = forced
        self._pending = {}  # part label -> warning collector attached at the missed restore
        self.records = []

    def file_hash(self, path):
        """sha256 of a file's content (cached by file identity; hashed afresh in a forced job)."""
        return self._store.content_hash(path, fresh=self._forced)

    def _key(self, part, identity):
        return hash_object({"step": self._step, "code": self._code, "part": part, "identity": identity})

    def restore(self, part, identity, outputs):
        """Restore the part's ``outputs`` (name -> path or paths); False if it must be computed.

        Restored files are checked against their stored sha256 and the
        warnings logged when the part was computed are logged again. After a
        False, the warnings the job logs until :meth:`store` belong to this part.
        """
        key = self._key(part, identity)
        restored = self._use_memo and not self._forced and self._store.restore(key, outputs, self._log)
        if restored:
            for message in self._store.warnings(key):
                self._log.warning("%s", message)
            self.records.append({"part": part, "key": key, "restored": True})
        else:
            collector = _WarningCollector()
            self._log.addHandler(collector)
            self._pending[part] = collector
        return restored

    def store(self, part, identity, outputs):
        """Store the part's finished ``outputs`` (a no-op with the memo off)."""
        key = self._key(part, identity)
        collector = self._pending.pop(part, None)
        if collector is not None:
            self._log.removeHandler(collector)
        if self._use_memo:
            self._store.store(key, outputs, {"step": self._step, "part": part,
                                             "warnings": collector.messages if collector is not None else []})
        self.records.append({"part": part, "key": key, "restored": False})

    def close(self):
        for collector in self._pending.values():
            self._log.removeHandler(collector)
        self._pending.clear()


_CURRENT_PARTS = threading.local()  # the running job's PartMemo: per thread, as jobs run in threads of Snakemake's process


def part_memo():
    """The :class:`PartMemo` of the job running in this thread (inside :func:`run_job` or :func:`run_in_process`)."""
    parts = getattr(_CURRENT_PARTS, "memo", None)
    if parts is None:
        raise RuntimeError("part_memo() is available only inside a job run by run_job or run_in_process")
    return parts


class EveryPartComputed:
    """Stands in for :class:`PartMemo` when a job's ``run`` is called outside :func:`run_job` (a test, a benchmark):
    nothing is restored or stored, every part is computed."""

    stores = False

    @staticmethod
    def file_hash(path):
        return None

    @staticmethod
    def restore(part, identity, outputs):
        return False

    @staticmethod
    def store(part, identity, outputs):
        return None


def job_parts():
    """:func:`part_memo` inside a job run by :func:`run_job` or :func:`run_in_process`, else :class:`EveryPartComputed`."""
    return getattr(_CURRENT_PARTS, "memo", None) or EveryPartComputed()


class _WarningCollector(logging.Handler):
    """Keeps the text of every warning a job logs, for its memo entry."""

    def __init__(self):
        super().__init__(level=logging.WARNING)
        self.messages = []

    def emit(self, record):
        self.messages.append(record.getMessage())


def _logger_name():
    # One logger per job: a job process runs one job, the Snakemake process
    # several at once in threads (run_in_process).
    return f"foldwise.job.{os.getpid()}.{threading.get_ident()}"


def _job_logger(log_path, capture_warnings=True):
    logger = logging.getLogger(_logger_name())
    logger.setLevel(logging.INFO)
    logger.propagate = False
    formatter = logging.Formatter("%(levelname)s %(message)s")
    if log_path:
        Path(log_path).parent.mkdir(parents=True, exist_ok=True)
        file_handler = logging.FileHandler(log_path, mode="w", encoding="utf-8")
        file_handler.setFormatter(formatter)
        logger.addHandler(file_handler)
    stream_handler = logging.StreamHandler(sys.stderr)
    stream_handler.setLevel(logging.WARNING)
    stream_handler.setFormatter(logging.Formatter("foldwise %(levelname)s: %(message)s"))
    logger.addHandler(stream_handler)
    if capture_warnings:  # process-wide: only in a job's own process, never in Snakemake's
        logging.captureWarnings(True)
        logging.getLogger("py.warnings").handlers = logger.handlers
    return logger


def _named(namedlist, exclude=()):
    """Snakemake's named input/output items as a plain dict of str or list of str."""
    result = {}
    for name, value in namedlist.items():
        if name in exclude:
            continue
        result[name] = str(value) if isinstance(value, (str, os.PathLike)) else [str(v) for v in value]
    return result


# File-system errors a user can fix (permissions, a full disk, a file where a
# folder belongs): stated as one message instead of a traceback.
_FILE_SYSTEM_FIXES = {
    errno.EACCES: ("permissions", "permission denied",
                   "make the folders of study.results_dir and study.store_dir writable for this user (or remove results left by another user), then rerun"),
    errno.EPERM: ("permissions", "operation not permitted",
                  "make the folders of study.results_dir and study.store_dir writable for this user (or remove results left by another user), then rerun"),
    errno.EROFS: ("permissions", "the file system is read-only",
                  "put the folders of study.results_dir and study.store_dir on a writable file system, then rerun"),
    errno.ENOSPC: ("disk space", "no space left on the device", "free disk space (or move study.store_dir), then rerun"),
    errno.EDQUOT: ("disk space", "the disk quota is exceeded", "free disk space (or move study.store_dir), then rerun"),
    errno.ENOTDIR: ("folder", "a file stands where a folder is needed", "move or remove that file, then rerun"),
    errno.EEXIST: ("folder", "a file stands where a folder is needed", "move or remove that file, then rerun"),
}


def file_system_error(error, step):
    """The InputError a user sees for a fixable file-system ``OSError``, or None for any other error.

    Parameters
    ----------
    error : OSError
        Raised while a job read its inputs or wrote its outputs, log, store
        entry or provenance record.
    step : str
        The step's name, for the message.

    Returns
    -------
    InputError or None

    Example
    -------
    >>> file_system_error(OSError(errno.EIO, "Input/output error"), "glm") is None
    True
    >>> stated = file_system_error(PermissionError(errno.EACCES, "Permission denied", "/"), "glm")
    >>> stated.file, stated.field, stated.problem
    ('/', 'permissions', 'step glm could not write or read this path (permission denied)')
    """
    if error.errno not in _FILE_SYSTEM_FIXES:
        return None
    field, problem, fix = _FILE_SYSTEM_FIXES[error.errno]
    return InputError(_shown_path(error.filename), field, f"step {step} could not write or read this path ({problem})", fix)


def _shown_path(path):
    """The nearest existing path (a temporary file never created is named by its folder), relative inside the working directory."""
    if path is None:
        return None
    path = os.fsdecode(path)
    while path and not os.path.lexists(path):
        parent = os.path.dirname(path)
        path = "" if parent == path else parent
    path = path or "."
    relative = os.path.relpath(os.path.abspath(path))
    return path if relative.startswith(os.pardir) else relative


def run_job(smk, step, job, end_process=False):
    """Run one Snakemake job through the memo, and write its provenance record.

    A fixable file-system error (see :func:`file_system_error`) stops the job
    like an InputError: one ``foldwise:`` message on stderr, exit status 1.

    Parameters
    ----------
    smk : snakemake.script.Snakemake
        The object Snakemake hands a script. Its params must hold
        ``settings`` (the exact config subset the step reads) and ``code``
        (the hash of the code the step runs); its outputs must include
        ``provenance``; ``log[0]`` is the job's log file.
    step : str
        The step's name (a rule name).
    job : callable
        ``job(inputs, outputs, settings, log)``: the job function.
    end_process : bool
        For a job script (its own process): once the outputs, the record and
        the log are written and closed, end the process at once with status
        0 instead of returning. Python's teardown at exit (freeing every
        module: 0.1 s of CPU after a decoding job's imports, about 0.45 s
        once matplotlib's pyplot is loaded, measured with ``/usr/bin/time``)
        is work no job needs. Only on success: a failure exits as before.
        Never pass it where the caller's process must go on (tests, threads).
    """
    _run_stated(smk, step, job, in_process=False)
    if end_process:
        _end_process()


def _end_process():
    """End a job process whose files are all written and closed, skipping the interpreter's teardown (status 0).

    Snakemake sees the job as finished from the exit status and the outputs,
    both in place; what would be lost is only buffered text, so the logging
    handlers and the standard streams are flushed first.
    """
    logging.shutdown()  # flushes and closes every handler still open (the job's own are closed already)
    for stream in (sys.stdout, sys.stderr):
        with contextlib.suppress(Exception):  # a stream closed by the job
            stream.flush()
    os._exit(0)


class JobFailed(Exception):
    """A job run inside the Snakemake process stopped on bad input; its ``foldwise:`` line is printed already."""


_ONE_BLAS_THREAD = []


def run_in_process(step, job, input, output, params, wildcards, log, config):  # noqa: A002 (Snakemake's names)
    """Run one job inside the Snakemake process (a rule's ``run:`` block), through the memo.

    For steps whose own work takes a fraction of a second (an ROI mask, a
    counts table, the manifest): a job process of their own would spend
    more CPU starting Python and importing numpy, pandas and nibabel, which
    Snakemake's process has imported already. Snakemake runs ``run:`` jobs
    in threads of its own process when ``force-use-threads`` is set (the
    local profile); on a cluster each still runs in its own Snakemake
    process on a node, as every job does there.

    The job is the same as through :func:`run_job` (memo, provenance record,
    log) except that bad input raises :class:`JobFailed` after printing the
    one ``foldwise:`` line, instead of ending a process, and Python warnings
    are not rerouted into the job's log (that setting is process-wide).

    Parameters
    ----------
    step : str
        The step's name (a rule name).
    job : callable
        ``job(inputs, outputs, settings, log)``.
    input, output, params, wildcards, log, config
        The objects Snakemake names so inside a ``run:`` block.
    """
    if not _ONE_BLAS_THREAD:  # one BLAS thread, as in a job process: the same bits whatever --cores
        from threadpoolctl import threadpool_limits

        threadpool_limits(limits=1, user_api="blas")
        _ONE_BLAS_THREAD.append(True)
    smk = types.SimpleNamespace(input=input, output=output, params=params, wildcards=wildcards, log=log, config=config)
    _run_stated(smk, step, job, in_process=True)


def _stop(stated, in_process):
    print(f"foldwise: {stated}", file=sys.stderr)
    if in_process:
        raise JobFailed(f"foldwise: {stated}")
    sys.exit(1)


def _run_stated(smk, step, job, in_process):
    try:
        _run_job(smk, step, job, in_process)
    except OSError as error:
        stated = file_system_error(error, step)
        if stated is None:
            raise
        log = logging.getLogger(_logger_name())
        log.error("%s", stated)
        _close(log)
        _stop(stated, in_process)


def _run_job(smk, step, job, in_process=False):
    started = time.perf_counter()
    # The job's own CPU, without start-up and imports: this process's, or this thread's inside Snakemake's process.
    cpu_clock = time.thread_time if in_process else time.process_time
    cpu_started = cpu_clock()
    log = _job_logger(smk.log[0] if len(smk.log) else None, capture_warnings=not in_process)
    inputs = _named(smk.input)
    outputs = _named(smk.output, exclude=("provenance",))
    # Plain JSON values in the configured order (sets and classes keep their order);
    # the memo key uses the canonical, key-sorted form.
    settings = json.loads(json.dumps(dict(smk.params.settings)))
    canonical_json(settings)  # refuses values that have no canonical form (NaN) before any work
    code = smk.params.code
    store = MemoStore(smk.config["study"]["store_dir"])
    # A job Snakemake forces (--forcerun, --forceall) recomputes: no restore, no cached input hash.
    forced = os.path.normpath(str(smk.output.provenance)) in {os.path.normpath(path) for path in forced_jobs()}
    try:
        input_hashes = {name: [store.content_hash(path, fresh=forced) for path in ([paths] if isinstance(paths, str) else paths)]
                        for name, paths in sorted(inputs.items())}
        output_counts = {name: (1 if isinstance(paths, str) else len(paths)) for name, paths in outputs.items()}
        # The packages that shape the numbers are part of the code: an upgrade recomputes.
        versions = package_versions()  # read once per job: importlib.metadata parses every package's METADATA (~0.05 s)
        key = memo_key(step, {"code": code, "versions": versions}, settings, input_hashes, output_counts)
        # FOLDWISE_MEMO=off (set by `make verify`) recomputes everything for real.
        use_memo = os.environ.get("FOLDWISE_MEMO", "on") != "off"
        restored = use_memo and not forced and store.restore(key, outputs, log)
        if forced:
            log.info("forced by Snakemake (--forcerun/--forceall): the memo is bypassed and the inputs hashed afresh")
        if restored:
            log.info("restored from the content memo (key %s); nothing recomputed", key)
            for message in store.warnings(key):  # the computing run's warnings, so the log (and the report) still show them
                log.warning("%s", message)
        else:
            collected = _WarningCollector()
            log.addHandler(collected)
            parts = PartMemo(store, step, {"code": code, "versions": versions}, log, use_memo=use_memo, forced=forced)
            _CURRENT_PARTS.memo = parts
            try:
                job(inputs, outputs, settings, log)
            finally:
                _CURRENT_PARTS.memo = None
                parts.close()
                log.removeHandler(collected)
            missing = [path for _, _, path in _flatten(outputs) if not os.path.isfile(path)]
            if missing:
                raise RuntimeError(f"step {step} did not write {', '.join(missing)}")
            if use_memo:
                store.store(key, outputs, {"step": step, "wildcards": dict(smk.wildcards.items()),
                                           "warnings": collected.messages})
            log.info("computed (key %s)%s", key, " and stored in the content memo" if use_memo else "; memo off")
    except InputError as error:
        log.error("%s", error)
        _close(log)
        _stop(error, in_process)
    wall_time_s = time.perf_counter() - started
    record = {
        "step": step,
        "wildcards": dict(smk.wildcards.items()),
        "key": key,
        "restored_from_memo": restored,
        "code_hash": code,
        "settings": _without_absolute_paths(settings),
        # True when paths were reduced for privacy: the key then cannot be recomputed from the record (make verify)
        "settings_reduced": _without_absolute_paths(settings) != settings,
        "inputs": [{"name": name, "path": relative_path(path), "sha256": digest}
                   for name, paths in sorted(inputs.items())
                   for path, digest in zip([paths] if isinstance(paths, str) else paths, input_hashes[name])],
        "outputs": [{"name": name, "path": relative_path(path), "sha256": store.content_hash(path)}
                    for name, _, path in _flatten(outputs)],
        "empty_inputs": sorted(name for name, paths in inputs.items() if not isinstance(paths, str) and not paths),  # for the key check
        "versions": versions,
        # Parts of the job restored or computed (PartMemo); empty when the whole job was restored or has no parts.
        "parts": [] if restored else parts.records,
        "platform": {"system": platform.system(), "machine": platform.machine()},
        "wall_time_s": round(wall_time_s, 3),
        "cpu_time_s": round(cpu_clock() - cpu_started, 3),
        "peak_memory_mb": round(resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0, 1),
    }
    write_json(smk.output.provenance, record)
    _close(log)


def _close(log):
    for handler in list(log.handlers):
        handler.close()
        log.removeHandler(handler)
