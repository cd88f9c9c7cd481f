"""The dataset reader: BIDS file names, BOLD images, sidecars, events, confounds.

BIDS (the Brain Imaging Data Structure, an open standard) names each file by
its entities (``sub``, ``ses``, ``task``, ``run``, and in derivatives
``space`` and ``res``). foldwise finds files through configurable templates
with the placeholders ``{subject}``, ``{session}``, ``{task}``, ``{run}``,
``{space}`` and ``{res}``; templates are filled by plain string concatenation
on those placeholders only and are never evaluated.

A study may keep its files in two trees: the raw dataset (events, sidecars)
under ``bids_root`` and a preprocessing pipeline's derivatives (BOLD,
confounds, brain masks) under ``derivatives_root``; see :data:`DERIVED_PATTERNS`.

Every reader checks its file and raises :class:`foldwise.errors.InputError`
naming the file, the field and the fix.

References
----------
Gorgolewski, K. J. et al. (2016). The brain imaging data structure, a format
for organizing and describing outputs of neuroimaging experiments.
Scientific Data 3, 160044. https://bids-specification.readthedocs.io
"""

import difflib
import json
import os
import re
import string
from pathlib import Path

import numpy as np
import pandas as pd

from foldwise.errors import InputError
from foldwise.data.fileio import float32_data, load_nifti, missing_file_error, read_tsv

__all__ = [
    "PLACEHOLDERS",
    "PATTERN_NAMES",
    "run_files",
    "discover_runs",
    "make_run_id",
    "load_bold",
    "require_4d",
    "read_tr_s",
    "read_events",
    "read_confounds",
    "select_confound_columns",
    "count_flagged_initial_volumes",
    "confound_table_columns",
    "matches_confound_selectors",
    "DERIVED_PATTERNS",
    "near_pattern_message",
]

PLACEHOLDERS = ("subject", "session", "task", "run", "space", "res")
PATTERN_NAMES = ("bold", "events", "sidecar", "confounds", "brain_mask")
#: Patterns read from ``derivatives_root`` when one is given (the rest from ``bids_root``).
DERIVED_PATTERNS = ("bold", "confounds", "brain_mask")
# Placeholders whose value is one label for the whole study (from the config), not found per file.
_FIXED_PLACEHOLDERS = ("task", "space", "res")
# Patterns that may be empty: no file of that kind exists for the dataset.
_OPTIONAL_PATTERNS = ("confounds", "brain_mask")
# A BIDS label: letters and digits only (BIDS specification, "Entities").
_LABEL_RE = re.compile(r"^[A-Za-z0-9]+$")
_LABEL_GROUP = "[A-Za-z0-9]+"
_CONFIG = "the study config"
# Header and sidecar TR may differ by float rounding only (1 ms).
_TR_TOLERANCE_S = 1e-3
_TIME_UNIT_TO_S = {"sec": 1.0, "msec": 1e-3, "usec": 1e-6}
_EVENT_COLUMNS = ("onset", "duration", "trial_type")


def _parse_template(name, template):
    """Split a template into literal text and placeholder names (whitelist only)."""
    if not isinstance(template, str):
        raise InputError(_CONFIG, f"dataset.patterns.{name}", f"the pattern must be text, got {template!r}",
                         "write the pattern as a quoted string")
    pieces = []
    try:
        parsed = list(string.Formatter().parse(template))
    except ValueError as error:
        raise InputError(_CONFIG, f"dataset.patterns.{name}", f"the pattern {template!r} is malformed ({error})",
                         "use only {subject} {session} {task} {run} {space} {res}; write a literal brace as {{ or }}") from None
    for literal, field, format_spec, conversion in parsed:
        if literal:
            pieces.append(("literal", literal))
        if field is None:
            continue
        if field not in PLACEHOLDERS or format_spec or conversion:
            shown = "{" + field + ("!" + conversion if conversion else "") + (":" + format_spec if format_spec else "") + "}"
            raise InputError(_CONFIG, f"dataset.patterns.{name}", f"the placeholder {shown} in {template!r} is not allowed",
                             "use only {subject} {session} {task} {run} {space} {res}, without format specs")
        pieces.append(("field", field))
    return pieces


def _check_label(entity, value):
    if not isinstance(value, str) or not _LABEL_RE.match(value):
        raise InputError(_CONFIG, entity, f"the label {value!r} is not a BIDS label (letters and digits only)",
                         f"give the {entity} label without its prefix, e.g. '01' rather than 'sub-01'")


def make_run_id(session, run, task=None):
    """The run identifier: BIDS entities other than sub joined by ``_`` (task only for a study's other tasks).

    Parameters
    ----------
    session : str or None
        Session label without ``ses-`` (``None`` if the dataset has no sessions).
    run : str
        Run label without ``run-``.
    task : str or None
        ``None`` for the study's main task (``dataset.task``), whose run ids
        carry no task part; the task label for the runs of any other task.

    Returns
    -------
    str
        ``"run-<run>"``, ``"ses-<session>_run-<run>"``, or with
        ``task-<task>_`` before ``run-`` (BIDS entity order).

    Example
    -------
    >>> make_run_id("2", "01"), make_run_id("2", "01", task="beacon")
    ('ses-2_run-01', 'ses-2_task-beacon_run-01')
    """
    task_part = "" if task is None else f"task-{task}_"
    return f"{task_part}run-{run}" if session is None else f"ses-{session}_{task_part}run-{run}"


def run_files(bids_root, patterns, task, subject, session, run, derivatives_root=None, space=None, res=None):
    """The paths of one run's files, built from the ``dataset.patterns`` templates.

    Parameters
    ----------
    bids_root : str or os.PathLike
        The dataset's root folder.
    patterns : dict
        Name -> template relative to ``bids_root`` (or ``derivatives_root``)
        for ``bold``, ``events``, ``sidecar``, ``confounds``, ``brain_mask``
        (placeholders ``{subject}`` ``{session}`` ``{task}`` ``{run}``
        ``{space}`` ``{res}``).
    task, subject, run : str
        BIDS labels without their prefixes.
    session : str or None
        Session label, or ``None`` when the dataset has no sessions.
    derivatives_root : str or os.PathLike or None
        The pipeline's derivatives folder: the :data:`DERIVED_PATTERNS`
        (``bold``, ``confounds``, ``brain_mask``) are relative to it. ``None``
        or empty: every pattern is relative to ``bids_root``.
    space, res : str or None
        The ``space`` and ``res`` labels of the derivatives, used where a
        pattern has ``{space}`` or ``{res}``.

    Returns
    -------
    dict
        Name -> str path; ``confounds`` and ``brain_mask`` are ``None`` when
        their template is empty.

    Notes
    -----
    Templates are filled by concatenating their literal text with the
    whitelisted labels; nothing in a template is evaluated.

    Example
    -------
    >>> run_files("bids", {"bold": "sub-{subject}/func/sub-{subject}_task-{task}_run-{run}_bold.nii.gz",
    ...                    "events": "e.tsv", "sidecar": "s.json", "confounds": "", "brain_mask": ""},
    ...           "lanterns", "01", None, "02")["bold"]
    'bids/sub-01/func/sub-01_task-lanterns_run-02_bold.nii.gz'
    """
    if not isinstance(patterns, dict):
        raise InputError(_CONFIG, "dataset.patterns", f"expected a mapping of templates, got {patterns!r}",
                         "give dataset.patterns as a mapping name -> template")
    for entity, value in (("task", task), ("subject", subject), ("run", run)):
        _check_label(entity, value)
    for entity, value in (("session", session), ("space", space), ("res", res)):
        if value not in (None, ""):
            _check_label(entity, value)
    values = {"subject": subject, "session": session, "task": task, "run": run, "space": space or None, "res": res or None}
    paths = {}
    for name in PATTERN_NAMES:
        template = patterns.get(name, "")
        if template in ("", None):
            if name in _OPTIONAL_PATTERNS:
                paths[name] = None
                continue
            raise InputError(_CONFIG, f"dataset.patterns.{name}", "the pattern is empty",
                             f"give a template for the {name} files, e.g. with {{subject}} and {{run}}")
        text = []
        for kind, piece in _parse_template(name, template):
            if kind == "literal":
                text.append(piece)
            elif values[piece] is None:
                if piece == "session":
                    raise InputError(_CONFIG, f"dataset.patterns.{name}", f"the pattern {template!r} uses {{session}} but the run has no session",
                                     "remove {session} from the pattern or give the session label")
                raise InputError(_CONFIG, f"dataset.{piece}", f"the pattern dataset.patterns.{name} uses {{{piece}}} but dataset.{piece} is empty",
                                 f"set dataset.{piece} to the {piece} label of the files (e.g. the part after '{piece}-'), "
                                 f"or remove {{{piece}}} from the pattern")
            else:
                text.append(values[piece])
        root = derivatives_root if (derivatives_root and name in DERIVED_PATTERNS) else bids_root
        paths[name] = os.path.join(str(root), "".join(text))
    return paths


def _bold_regex(template, fixed, loose=False):
    """A regex with named groups for subject/session/run matching the bold template.

    ``fixed`` maps ``task``/``space``/``res`` to their configured labels;
    ``loose`` lets those take any label too (named groups), to find files
    that differ from the configured ones only there.
    """
    pieces = _parse_template("bold", template)
    fields = {piece for kind, piece in pieces if kind == "field"}
    for needed in ("subject", "run"):
        if needed not in fields:
            raise InputError(_CONFIG, "dataset.patterns.bold", f"the pattern {template!r} has no {{{needed}}} placeholder",
                             f"add {{{needed}}} so each file names its {needed}")
    parts, seen = [], set()
    for kind, piece in pieces:
        if kind == "literal":
            parts.append(re.escape(piece))
        elif piece in _FIXED_PLACEHOLDERS and not loose:
            if not fixed.get(piece):
                raise InputError(_CONFIG, f"dataset.{piece}", f"the pattern dataset.patterns.bold uses {{{piece}}} but dataset.{piece} is empty",
                                 f"set dataset.{piece} to the {piece} label of the BOLD files, or remove {{{piece}}} from the pattern")
            parts.append(re.escape(fixed[piece]))
        elif piece in seen:
            parts.append(f"(?P={piece})")  # a repeated placeholder must repeat the same label
        else:
            seen.add(piece)
            parts.append(f"(?P<{piece}>{_LABEL_GROUP})")
    return re.compile("".join(parts)), "session" in fields


def _subject_folder_regex(template):
    """Regex for the first path component when it holds only ``{subject}``, else None."""
    first = template.split("/", 1)[0]
    pieces = _parse_template("bold", first)
    if "/" not in template or [p for k, p in pieces if k == "field"] != ["subject"]:
        return None
    return re.compile("".join(re.escape(p) if k == "literal" else f"(?P<subject>{_LABEL_GROUP})" for k, p in pieces))


def _natural_key(label):
    """Sort numeric labels by value (run 2 before run 10), others as text."""
    if label is None:
        return (0, 0, "")
    return (1, int(label), label) if label.isdigit() else (2, 0, label)


_ENTITY_RE = re.compile(r"(?:^|[_/])([a-z]+)-([A-Za-z0-9]+)")
_MAX_SHOWN = 4


def _entities(relative):
    """``{key: value}`` of the BIDS entities in a relative file name (last value wins)."""
    return dict(_ENTITY_RE.findall(relative))


def _example_name(template, fixed, candidates):
    """The template filled with the configured labels and a found subject, for string similarity."""
    subject = next((_entities(name).get("sub") for name in candidates if "sub" in _entities(name)), "01")
    values = {"subject": subject, "session": "1", "run": "1", **{key: value or "" for key, value in fixed.items()}}
    text = []
    for kind, piece in _parse_template("bold", template):
        text.append(piece if kind == "literal" else values.get(piece, ""))
    return "".join(text)


def near_pattern_message(template, fixed, candidates):
    """Describe the files found near a BOLD pattern that matched nothing.

    Parameters
    ----------
    template : str
        The ``dataset.patterns.bold`` template.
    fixed : dict
        ``task``, ``space``, ``res``: the configured labels.
    candidates : sequence of str
        Relative paths of the files found at the template's folder depth.

    Returns
    -------
    str
        Empty when nothing is near; otherwise which ``task``/``space``/``res``
        labels the files near the pattern carry (when they differ from the
        configured ones only there), which entities the files have that the
        pattern lacks, and the closest file name (``difflib`` similarity).
    """
    if not candidates:
        return ""
    notes = []
    loose, _ = _bold_regex(template, fixed, loose=True)
    differing = {}
    for name in candidates:
        found = loose.fullmatch(name)
        if found is None:
            continue
        for key, value in found.groupdict().items():
            if key in _FIXED_PLACEHOLDERS and value != fixed.get(key):
                differing.setdefault(key, {}).setdefault(value, 0)
                differing[key][value] += 1
    for key, counts in differing.items():
        shown = ", ".join(f"{key}-{value} ({count} file{'s' if count > 1 else ''})" for value, count in sorted(counts.items())[:_MAX_SHOWN])
        notes.append(f"the files that fit the pattern have {shown} where the config asks {key}-{fixed.get(key)}")
    if not differing:
        example = _example_name(template, fixed, candidates)
        wanted = set(_entities(example))
        extra = {}
        for name in candidates:
            for key, value in _entities(name).items():
                if key not in wanted and key in ("space", "res", "desc", "ses", "task", "echo", "acq", "dir"):
                    extra.setdefault(key, set()).add(value)
        for key, values in sorted(extra.items()):
            shown = ", ".join(f"{key}-{value}" for value in sorted(values)[:_MAX_SHOWN])
            notes.append(f"the files here carry {shown}, which the pattern does not name"
                         + (f" (add _{key}-{{{key}}} and set dataset.{key})" if key in ("space", "res") else ""))
        close = difflib.get_close_matches(example, list(candidates), n=1, cutoff=0.5)
        if close:
            notes.append(f"closest file: {close[0]}")
    return "; ".join(notes)


def discover_runs(bids_root, patterns, task, subjects=(), derivatives_root=None, space=None, res=None, main_task=True):
    """Find every run of a task in a dataset by matching the bold template.

    Parameters
    ----------
    bids_root : str or os.PathLike
        The dataset's root folder.
    patterns : dict
        The ``dataset.patterns`` templates (see :func:`run_files`).
    task : str
        The BIDS task label.
    subjects : sequence of str, optional
        Subject labels to keep; empty means every subject found.
    derivatives_root : str or os.PathLike or None
        Where the BOLD files are when they are a pipeline's derivatives
        (see :func:`run_files`); ``None`` or empty: ``bids_root``.
    space, res : str or None
        The ``space`` and ``res`` labels for ``{space}`` and ``{res}``.
    main_task : bool
        False for a study's other tasks: their runs carry ``task`` and a
        run id with the task part (:func:`make_run_id`).

    Returns
    -------
    list of dict
        One dict per run with ``subject``, ``session`` (``None`` without
        sessions), ``run``, ``run_id`` and the paths of :func:`run_files`,
        sorted by (subject, session, run), numeric labels by value.

    Raises
    ------
    InputError
        If ``bids_root`` (or ``derivatives_root``) is missing, no run is found
        (the message then lists what was found near the pattern, see
        :func:`near_pattern_message`), a listed subject is absent or has no
        run of the task, or two files name the same run (e.g. ``run-1`` and
        ``run-01``).

    Notes
    -----
    The bold template becomes a regular expression whose named groups take
    BIDS labels (letters and digits); ``{task}`` is fixed to ``task``. The
    walk only descends as deep as the template has folders. With
    ``subjects`` empty, a subject folder without runs of this task is
    skipped (it may hold other tasks).
    """
    raw_root = Path(bids_root)
    if not raw_root.is_dir():
        raise InputError(raw_root, "dataset.bids_root", "the dataset folder does not exist",
                         "correct dataset.bids_root or create the dataset there")
    root = Path(derivatives_root) if derivatives_root else raw_root
    if not root.is_dir():
        raise InputError(root, "dataset.derivatives_root", "the derivatives folder does not exist",
                         "correct dataset.derivatives_root (the preprocessing pipeline's output folder)")
    _check_label("task", task)
    fixed = {"task": task, "space": space or None, "res": res or None}
    subjects = [str(subject) for subject in subjects]
    for subject in subjects:
        _check_label("subject", subject)
    template = patterns.get("bold", "") if isinstance(patterns, dict) else None
    if not template:
        raise InputError(_CONFIG, "dataset.patterns.bold", "the pattern is empty", "give a template for the BOLD files")
    regex, has_session = _bold_regex(template, fixed)
    depth = template.count("/")

    matches, candidates = {}, []
    for folder, dirnames, filenames in os.walk(root, followlinks=True):  # depth-limited, so link loops end
        relative_folder = os.path.relpath(folder, root)
        level = 0 if relative_folder == "." else relative_folder.count(os.sep) + 1
        if level >= depth:
            dirnames[:] = []  # files deeper than the template cannot match
        dirnames.sort()
        if level != depth:
            continue
        for filename in sorted(filenames):
            relative = filename if level == 0 else Path(relative_folder, filename).as_posix()
            found = regex.fullmatch(relative)
            if found is None:
                candidates.append(relative)
                continue
            labels = found.groupdict()
            session = labels.get("session") if has_session else None
            # "run-1" and "run-01" are the same run: numeric run labels compare by value.
            run_key = int(labels["run"]) if labels["run"].isdigit() else labels["run"]
            key = (labels["subject"], session, run_key)
            if key in matches:
                session_text = "" if session is None else f", session {session}"
                raise InputError(root / relative, "dataset.patterns.bold",
                                 f"two files for subject {labels['subject']}{session_text}, run {labels['run']}: "
                                 f"{matches[key][0]} and {relative}",
                                 "remove or rename the duplicate so each run has one BOLD file")
            matches[key] = (relative, labels["subject"], session, labels["run"])

    found_subjects = sorted({entry[1] for entry in matches.values()}, key=_natural_key)
    folder_regex = _subject_folder_regex(template)
    subject_folders = set()
    if folder_regex is not None:
        for entry in root.iterdir():
            folder_match = folder_regex.fullmatch(entry.name) if entry.is_dir() else None
            if folder_match is not None:
                subject_folders.add(folder_match.group("subject"))
    if not matches and not subjects:
        near = near_pattern_message(template, fixed, candidates)
        raise InputError(root / template, "dataset.patterns.bold",
                         f"no BOLD file of task {task!r} matches the pattern" + (f" ({near})" if near else ""),
                         "check dataset.bids_root, dataset.derivatives_root, dataset.task, dataset.space, dataset.res "
                         "and dataset.patterns.bold")
    for subject in subjects:
        if subject in found_subjects:
            continue
        if subject in subject_folders:
            own = [name for name in candidates if name.startswith(template.split("/", 1)[0].replace("{subject}", subject) + "/")]
            near = near_pattern_message(template, fixed, own)
            raise InputError(root / template.replace("{subject}", subject).replace("{task}", task), "dataset.subjects",
                             f"subject {subject} has no run of task {task!r}" + (f" ({near})" if near else ""),
                             f"add its BOLD runs or remove {subject} from dataset.subjects")
        raise InputError(root, "dataset.subjects",
                         f"subject {subject} is not in the dataset (found: {', '.join(found_subjects) or 'none'})",
                         "correct dataset.subjects or add the subject's files")

    keep = set(subjects) if subjects else set(found_subjects)
    runs = []
    for relative, subject, session, run in matches.values():
        if subject not in keep:
            continue
        entry = {"subject": subject, "session": session, "run": run, "run_id": make_run_id(session, run, None if main_task else task)}
        if not main_task:
            entry["task"] = task
        entry.update(run_files(raw_root, patterns, task, subject, session, run, derivatives_root=derivatives_root, space=space, res=res))
        for name, value in entry.items():  # an annexed file without content is a broken link: say so before any job
            if isinstance(value, (str, os.PathLike)) and os.path.islink(value) and not os.path.exists(value):
                raise missing_file_error(value, f"{name} file")
        runs.append(entry)
    runs.sort(key=lambda entry: (_natural_key(entry["subject"]), _natural_key(entry["session"]), _natural_key(entry["run"])))
    return runs


def require_4d(image, path):
    """Refuse a BOLD image that is not a 4D time series (``path`` names it in the message)."""
    if len(image.shape) != 4:
        raise InputError(path, "dim", f"expected a 4D BOLD time series, got an image of shape {tuple(image.shape)}",
                         "point dataset.patterns.bold at the 4D preprocessed BOLD series, not a 3D volume")


def load_bold(path):
    """Load a 4D BOLD image as float32 with its scaling applied.

    Parameters
    ----------
    path : str or os.PathLike
        A NIfTI-1 or NIfTI-2 file (``.nii`` or ``.nii.gz``).

    Returns
    -------
    data : ndarray of float32, shape (x, y, z, t)
        Voxel values after ``scl_slope``/``scl_inter`` (nibabel's ``get_fdata``).
    affine : ndarray of float64, shape (4, 4)
        Voxel-to-world transform.
    header : nibabel header
        The image header (TR in ``pixdim[4]``).

    Raises
    ------
    InputError
        If the file is missing, truncated, not NIfTI, or not 4D.
    """
    image = load_nifti(path, what="BOLD image", float32=False)
    require_4d(image, path)
    data = float32_data(image)  # get_fdata's values, several times faster for integer files
    return data, np.asarray(image.affine, dtype=np.float64), image.header


def _header_tr_s(header):
    """Header TR in seconds, or None when the header does not set it."""
    if header is None:
        return None
    zooms = header.get_zooms()
    if len(zooms) < 4:
        return None
    value = float(zooms[3])
    time_unit = header.get_xyzt_units()[1]
    # A TR of 0, or the value 1 with unknown units (the writers' default pixdim),
    # means "not set": the sidecar is then the only source and is trusted.
    if value == 0.0 or (time_unit == "unknown" and value == 1.0):
        return None
    if time_unit in _TIME_UNIT_TO_S:
        return value * _TIME_UNIT_TO_S[time_unit]
    if time_unit == "unknown":
        return value  # unitless TRs are seconds in practice (common practice, no source)
    return None  # hz, ppm, rads: pixdim[4] is not a time step here


_MAX_TR_S = 100.0  # a RepetitionTime above this is read as milliseconds given by mistake


def read_tr_s(sidecar_path, header, bold_path):
    """The repetition time in seconds, from the sidecar, checked against the header.

    Parameters
    ----------
    sidecar_path : str or os.PathLike
        The BOLD run's JSON sidecar.
    header : nibabel header or None
        The BOLD image header (``pixdim[4]``, ``xyzt_units``).
    bold_path : str or os.PathLike
        The BOLD file, named in error messages.

    Returns
    -------
    float
        ``RepetitionTime`` from the sidecar, in seconds.

    Raises
    ------
    InputError
        If the sidecar or its ``RepetitionTime`` is missing or not a positive
        number, or the header's TR disagrees by more than 1 ms.

    Notes
    -----
    BIDS makes ``RepetitionTime`` (seconds) in the sidecar authoritative. The
    header TR is converted by its ``xyzt_units`` (ms, us); a header TR of 0,
    or 1 with unknown units, counts as unset and only the sidecar is used.
    """
    sidecar_path = Path(sidecar_path)
    if not sidecar_path.is_file():
        raise InputError(sidecar_path, "file", f"the JSON sidecar of {bold_path} does not exist",
                         "write a sidecar with RepetitionTime (seconds) or correct dataset.patterns.sidecar")
    try:
        sidecar = json.loads(sidecar_path.read_text(encoding="utf-8"))
    except (json.JSONDecodeError, UnicodeDecodeError) as error:
        raise InputError(sidecar_path, "content", f"the sidecar is not valid JSON ({error})", "save it as UTF-8 JSON") from None
    if not isinstance(sidecar, dict) or "RepetitionTime" not in sidecar:
        raise InputError(sidecar_path, "RepetitionTime", "the sidecar has no RepetitionTime",
                         "add \"RepetitionTime\": <seconds> to the sidecar")
    value = sidecar["RepetitionTime"]
    if isinstance(value, bool) or not isinstance(value, (int, float)) or not np.isfinite(value) or value <= 0:
        raise InputError(sidecar_path, "RepetitionTime", f"expected a positive number of seconds, got {value!r}",
                         "give RepetitionTime in seconds, e.g. 2.0")
    if value > _MAX_TR_S:  # no fMRI run has a TR of minutes: this is milliseconds (common practice, no source)
        raise InputError(sidecar_path, "RepetitionTime", f"{value!r} looks like milliseconds (BIDS gives RepetitionTime in seconds)",
                         f"write it in seconds: {value / 1000:g}")
    tr_s = float(value)
    header_tr_s = _header_tr_s(header)
    if header_tr_s is not None and abs(header_tr_s - tr_s) > _TR_TOLERANCE_S:
        raise InputError(sidecar_path, "RepetitionTime",
                         f"the sidecar says {tr_s:g} s but the header of {bold_path} (pixdim[4]) says {header_tr_s:g} s"
                         + (" (the header's value looks like milliseconds with xyzt_units in seconds)" if header_tr_s > _MAX_TR_S else ""),
                         "correct whichever is wrong (RepetitionTime in the sidecar or pixdim[4]/xyzt_units in the image)")
    return tr_s


def _read_text_columns(path, required, what):
    """Read a TSV with every cell as text (checked by read_tsv first)."""
    header = read_tsv(path, required_columns=required, what=what).columns
    # The same reading as read_tsv's (index_col=False, dtype per column), only with every column as text.
    return pd.read_csv(path, sep="\t", dtype={column: str for column in header}, na_values=["n/a"], keep_default_na=False,
                       index_col=False)


def _numeric_column(frame, column, path):
    """A float64 column (missing -> NaN); a cell that is not a finite number is an error."""
    text = frame[column]
    numbers = pd.to_numeric(text.str.strip(), errors="coerce").to_numpy(dtype=np.float64, copy=True)
    bad = np.flatnonzero(text.notna().to_numpy() & ~np.isfinite(numbers))
    if bad.size:
        row = int(bad[0])
        raise InputError(path, column, f"row {row + 1} (line {row + 2}) holds {text.iloc[row]!r}, not a finite number",
                         f"write {column} as a number (n/a for a missing value)")
    return numbers


def read_events(path, n_scans, tr_s, condition_column="trial_type"):
    """Read and check a BIDS events file.

    Parameters
    ----------
    path : str or os.PathLike
        The events TSV (``onset``, ``duration``, ``trial_type``; others ignored).
    n_scans : int
        Number of volumes in the run.
    tr_s : float
        Repetition time in seconds.
    condition_column : str
        The column that names each event's condition (``dataset.condition_column``);
        its values are returned as ``trial_type``.

    Returns
    -------
    pandas.DataFrame
        Columns ``onset`` (float64, s), ``duration`` (float64, s),
        ``trial_type`` (str), in file order. ``attrs["n_unlabelled"]`` counts
        the rows dropped for a missing ``trial_type``.

    Raises
    ------
    InputError
        For a missing or empty file, a missing column, a missing or
        non-numeric onset or duration value, a negative duration, an onset at
        or after the end of the scan (``n_scans * tr_s``), or no labelled event.

    Notes
    -----
    ``n/a`` (BIDS's missing value) is read as follows: in ``trial_type`` (or
    an empty cell) the row belongs to no condition and is dropped; in
    ``duration`` it means an unknown duration and the event is modelled as an
    impulse (0 s); in ``onset`` it is an error, since the event cannot be
    placed. Negative onsets (events before the first kept volume) are allowed.
    """
    if isinstance(n_scans, bool) or not isinstance(n_scans, (int, np.integer)) or n_scans < 1:
        raise InputError(path, "n_scans", f"expected a positive number of volumes, got {n_scans!r}", "pass the BOLD run's volume count")
    if not np.isfinite(tr_s) or tr_s <= 0:
        raise InputError(path, "tr_s", f"expected a positive TR in seconds, got {tr_s!r}", "pass the run's RepetitionTime")
    frame = _read_text_columns(path, ("onset", "duration", condition_column), "events file")
    if len(frame) == 0:
        raise InputError(path, "rows", "the events file has a header but no events", "add one row per event")
    missing_onset = np.flatnonzero(frame["onset"].isna().to_numpy())
    if missing_onset.size:
        row = int(missing_onset[0])
        raise InputError(path, "onset", f"row {row + 1} (line {row + 2}) has no onset (n/a)", "give every event an onset in seconds")
    onset = _numeric_column(frame, "onset", path)
    duration = np.nan_to_num(_numeric_column(frame, "duration", path), nan=0.0)  # n/a: impulse
    negative = np.flatnonzero(duration < 0)
    if negative.size:
        row = int(negative[0])
        raise InputError(path, "duration", f"row {row + 1} (line {row + 2}) has a negative duration {duration[row]:g} s",
                         "give durations of 0 s or more")
    scan_end_s = n_scans * float(tr_s)
    late = np.flatnonzero(onset >= scan_end_s)
    if late.size:
        row = int(late[0])
        raise InputError(path, "onset", f"row {row + 1} (line {row + 2}) starts at {onset[row]:g} s, at or after the end of the scan "
                                        f"({n_scans} volumes x {tr_s:g} s = {scan_end_s:g} s)",
                         "check the onsets are in seconds from the first volume and that events and BOLD belong to the same run")
    trial_type = frame[condition_column].fillna("").str.strip()
    labelled = (trial_type != "").to_numpy()
    if not labelled.any():
        raise InputError(path, condition_column, f"no event has a {condition_column} (all n/a or empty)",
                         "label each event with its condition, or name the column that does in dataset.condition_column")
    events = pd.DataFrame({"onset": onset[labelled], "duration": duration[labelled],
                           "trial_type": trial_type[labelled].to_numpy(dtype=object)})
    events.attrs["n_unlabelled"] = int((~labelled).sum())
    return events


def read_confounds(path, columns, n_scans):
    """Read chosen confound columns as a (T x C) float64 matrix.

    Parameters
    ----------
    path : str or os.PathLike or None
        The confounds TSV; not read when ``columns`` is empty.
    columns : sequence of str
        Column names, in the order wanted.
    n_scans : int
        Number of volumes in the run (rows expected).

    Returns
    -------
    ndarray of float64, shape (n_scans, len(columns))

    Raises
    ------
    InputError
        For a missing file, an absent column (close names are suggested), a
        wrong row count, or a missing or non-numeric value after a column's
        first value.

    Notes
    -----
    Derivative and difference confounds have no value at the first volume(s);
    those leading ``n/a`` are set to 0 (common practice, no source). Any other
    missing value is an error because it cannot be filled without guessing.
    """
    columns = list(columns)
    if isinstance(n_scans, bool) or not isinstance(n_scans, (int, np.integer)) or n_scans < 1:
        raise InputError(path, "n_scans", f"expected a positive number of volumes, got {n_scans!r}", "pass the BOLD run's volume count")
    if not columns:
        return np.zeros((int(n_scans), 0), dtype=np.float64)
    if path is None:
        raise InputError(None, "dataset.patterns.confounds", f"confounds {columns} are requested but the pattern is empty",
                         "set dataset.patterns.confounds or empty dataset.confounds")
    frame = _read_text_columns(path, (), "confounds table")
    available = [str(column) for column in frame.columns]
    for column in columns:
        if column not in available:
            close = difflib.get_close_matches(column, available, n=5, cutoff=0.5)
            hint = f"close names: {', '.join(close)}" if close else f"{len(available)} columns, none close"
            raise InputError(path, column, f"the confound column is absent ({hint})",
                             "correct dataset.confounds to name columns of the confounds table")
    if len(frame) != n_scans:
        raise InputError(path, "rows", f"the table has {len(frame)} rows but the BOLD run has {n_scans} volumes",
                         "use the confounds table of this run (one row per volume)")
    matrix = np.empty((int(n_scans), len(columns)), dtype=np.float64)
    for index, column in enumerate(columns):
        values = _numeric_column(frame, column, path)
        missing = np.isnan(values)
        if missing.all():
            raise InputError(path, column, "every row is n/a", "drop the column from dataset.confounds")
        n_leading = int(np.argmin(missing))  # index of the first value
        gaps = np.flatnonzero(missing[n_leading:])
        if gaps.size:
            row = n_leading + int(gaps[0])
            raise InputError(path, column, f"row {row + 1} (line {row + 2}) is n/a after the column's first value",
                             "fill the gap in the confounds table or drop the column from dataset.confounds")
        values[:n_leading] = 0.0  # leading n/a of derivative columns
        matrix[:, index] = values
    return matrix


def _selector_text(selector):
    if isinstance(selector, dict):
        return f"first {selector.get('first')} of {selector.get('prefix')}*"
    return str(selector)


def _numeric_suffix_key(name, prefix):
    rest = name[len(prefix):]
    digits = re.match(r"\d+", rest)
    return (0, int(digits.group()), rest) if digits else (1, 0, rest)


def select_confound_columns(available, selectors, path=None):
    """The confound columns a list of selectors picks from a table's header.

    Parameters
    ----------
    available : sequence of str
        The confounds table's column names, in file order.
    selectors : sequence of str or dict
        Each one of: a column name (``"trans_x"``); a prefix ending in ``*``
        (``"spike_*"``: every column whose name starts with the prefix, in
        file order, possibly none: a run without flagged volumes has no such
        column); ``{"prefix": p, "first": k}`` (the first ``k`` columns
        starting with ``p``, ordered by the number after the prefix: e.g.
        the first k noise components).
    path : str or os.PathLike or None
        The table, named in messages.

    Returns
    -------
    list of str
        The chosen names, in selector order, each once.

    Raises
    ------
    InputError
        For an absent named column (close names are suggested) or fewer than
        ``k`` columns with a prefix.

    Examples
    --------
    >>> select_confound_columns(["a", "c_2", "c_10", "c_1", "s_7"], ["a", "s_*", {"prefix": "c_", "first": 2}])
    ['a', 's_7', 'c_1', 'c_2']
    """
    available = [str(column) for column in available]
    chosen = []
    for selector in selectors:
        if isinstance(selector, dict):
            prefix, first = str(selector["prefix"]), int(selector["first"])
            members = sorted((column for column in available if column.startswith(prefix)),
                             key=lambda column: _numeric_suffix_key(column, prefix))
            if len(members) < first:
                raise InputError(path, "dataset.confounds", f"{_selector_text(selector)} asks for {first} columns "
                                                            f"but the table has {len(members)} starting with {prefix!r}",
                                 "lower 'first' or correct the prefix")
            picked = members[:first]
        elif selector.endswith("*"):
            prefix = selector[:-1]
            picked = [column for column in available if column.startswith(prefix)]
        else:
            if selector not in available:
                close = difflib.get_close_matches(selector, available, n=5, cutoff=0.5)
                hint = f"close names: {', '.join(close)}" if close else f"{len(available)} columns, none close"
                raise InputError(path, selector, f"the confound column is absent ({hint})",
                                 "correct dataset.confounds to name columns of the confounds table")
            picked = [selector]
        chosen += [column for column in picked if column not in chosen]
    return chosen


def matches_confound_selectors(name, selectors):
    """Whether a design column is one of the confounds ``selectors`` pick (see :func:`select_confound_columns`).

    A design holds only the columns the selectors chose for its run, so a
    column counts when it equals a name selector or starts with a
    ``prefix*`` or ``{prefix, first}`` selector's prefix.

    Examples
    --------
    >>> [matches_confound_selectors(n, ["trans_x", "spike_*", {"prefix": "comp_", "first": 2}]) for n in ("trans_x", "spike_3", "comp_1", "seen")]
    [True, True, True, False]
    """
    for selector in selectors:
        if isinstance(selector, dict):
            if name.startswith(str(selector["prefix"])):
                return True
        elif selector.endswith("*"):
            if name.startswith(selector[:-1]):
                return True
        elif name == selector:
            return True
    return False


def confound_table_columns(path):
    """The column names of a confounds table (header only, checked by ``read_tsv``)."""
    return [str(column) for column in read_tsv(path, required_columns=(), what="confounds table").columns]


def count_flagged_initial_volumes(flags):
    """How many volumes at the start of a run are flagged as not yet at steady state.

    Parameters
    ----------
    flags : array_like, shape (n_scans, n_flag_columns)
        The pipeline's flag columns (one column per flagged volume, 1 at that
        volume, 0 elsewhere; any non-zero value counts as a flag).

    Returns
    -------
    int
        The length of the run of flagged volumes that starts at volume 0
        (0 if the first volume is not flagged or there is no flag column).

    Notes
    -----
    Only the leading flagged volumes are dropped: a flagged volume after an
    unflagged one is not an initial transient and stays in the data (its own
    flag column, if selected as a confound, models it).

    Examples
    --------
    >>> count_flagged_initial_volumes([[1, 0], [0, 1], [0, 0], [0, 0]])
    2
    """
    values = np.asarray(flags, dtype=np.float64)
    if values.ndim == 1:
        values = values[:, None]
    if values.shape[1] == 0:
        return 0
    flagged = np.any(np.nan_to_num(values) != 0, axis=1)
    return int(flagged.size if flagged.all() else np.argmin(flagged))
