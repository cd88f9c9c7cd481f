"""Job: group statistics of one analysis over every subject (file I/O at the edges).

Reads each subject's decoding summary and per-ROI permutation nulls, checks
that all subjects share the same cells and permutations, runs
``foldwise.stats.group.group_statistics`` and writes the group table, the group-mean
null and a short plain-text summary.
"""

import hashlib
import io
import tempfile
import zlib
from pathlib import Path

import numpy as np
import pandas as pd

# Absolute imports on purpose: foldwise.provenance.hashing.module_closure (the rule's code
# hash) follows ``from .x`` and ``from foldwise.x`` but not ``from ..x``.
from foldwise import contract
from foldwise.stats import group as group_stats
from foldwise.errors import InputError
from foldwise.data.fileio import FLOAT_FORMAT, gunzip_bytes, gzip_bytes, save_npy, write_bytes_atomic, write_text_atomic, write_tsv
from foldwise.provenance.memo import job_parts
from foldwise.provenance.hashing import seed_from
from foldwise.report.page import format_p  # one way to print a p-value: at its floor, with its resolution

__all__ = ["run", "SUMMARY_COLUMNS", "SUBJECT_NULL_COLUMNS", "TABLE_COLUMNS", "NULL_COLUMNS"]

SUMMARY_COLUMNS = ("subject", "analysis", "roi", "direction", "n_voxels", "n_used", "n_folds",
                   "accuracy", "balanced_accuracy", "chance")
SUBJECT_NULL_COLUMNS = ("subject", "analysis", "roi", "direction", "n_voxels", "permutation",
                        "balanced_accuracy", "accuracy")
TABLE_COLUMNS = list(contract.GROUP_COLUMNS)  # the written columns: defined once, in the data contract
FAMILIES = ("per_direction", "all_directions", "all_analyses")
NULL_COLUMNS = list(contract.GROUP_NULL_COLUMNS)

_KEY_COLUMNS = ("subject", "analysis", "roi", "direction", "n_voxels")
_CHANCE_TOLERANCE = 1e-6  # chance levels travel as 7-digit text
_RERUN_FIX = "rerun the decoding stage for every subject with the current config (snakemake reruns it when asked)"
_LIST_LIMIT = 6


def _short_list(items):
    items = [str(item) for item in items]
    shown = ", ".join(items[:_LIST_LIMIT])
    return shown + (f" and {len(items) - _LIST_LIMIT} more" if len(items) > _LIST_LIMIT else "")


def _subject_label(value):
    return str(value).removeprefix("sub-")


def _read_table(path, required, what):
    """Read a TSV (or .tsv.gz) with the key columns as strings; InputError on any problem."""
    path = Path(path)
    if not path.is_file():
        raise InputError(path, "file", f"the {what} does not exist", _RERUN_FIX)
    data = path.read_bytes()
    try:
        if path.name.endswith(".gz"):
            data = gunzip_bytes(data)
        # Key columns as text: subject "01" must not become 1, n_voxels mixes counts and "all".
        frame = pd.read_csv(io.BytesIO(data), sep="\t", dtype={column: str for column in _KEY_COLUMNS},
                            na_values=["n/a"], keep_default_na=False)
    except pd.errors.EmptyDataError:
        raise InputError(path, "header", f"the {what} is empty", _RERUN_FIX) from None
    except (pd.errors.ParserError, UnicodeDecodeError, OSError, EOFError) as error:
        raise InputError(path, "format", f"the {what} is not a readable TSV ({type(error).__name__}: {error})",
                         _RERUN_FIX) from None
    missing = [column for column in required if column not in frame.columns]
    if missing:
        raise InputError(path, ", ".join(missing),
                         f"required column(s) missing from the {what} (found: {', '.join(map(str, frame.columns))})",
                         _RERUN_FIX)
    for column in _KEY_COLUMNS:
        if frame[column].isna().any():
            row = int(np.flatnonzero(frame[column].isna().to_numpy())[0])
            raise InputError(path, column, f"empty or n/a value in data row {row + 1}", _RERUN_FIX)
    return frame


def _single_value(frame, column, path):
    values = frame[column].drop_duplicates().tolist()
    if len(values) != 1:
        raise InputError(path, column, f"expected one {column} per file, found {_short_list(values) or 'none'}",
                         "pass one file per subject (and per ROI for nulls)")
    return values[0]


def _scores_column(frame, column, path, low=0.0, high=1.0):
    values = pd.to_numeric(frame[column], errors="coerce").to_numpy(dtype=np.float64)
    bad = ~np.isfinite(values) | (values < low) | (values > high)
    if bad.any():
        row = int(np.flatnonzero(bad)[0])
        raise InputError(path, column, f"value {frame[column].iloc[row]!r} in data row {row + 1} is not a number "
                         f"in [{low}, {high}]", _RERUN_FIX)
    return values


def _check_params(params):
    for key in ("group", "analysis", "subjects", "seed"):
        if key not in params:
            raise InputError(None, f"params.{key}", "missing from the job's params", "pass it from the group rule")
    settings = params["group"]
    n_draws = settings.get("n_draws")
    if isinstance(n_draws, bool) or not isinstance(n_draws, int) or n_draws < 1:
        raise InputError(None, "group.n_draws", f"must be a positive integer, got {n_draws!r}", "set group.n_draws, e.g. 10000")
    alpha = settings.get("alpha")
    if isinstance(alpha, bool) or not isinstance(alpha, (int, float)) or not 0 < alpha < 1:
        raise InputError(None, "group.alpha", f"must be a number in (0, 1), got {alpha!r}", "set group.alpha, e.g. 0.05")
    if not isinstance(settings.get("prevalence"), bool):
        raise InputError(None, "group.prevalence", f"must be true or false, got {settings.get('prevalence')!r}",
                         "set group.prevalence")
    if settings.get("fwe_method", "standardised") not in group_stats.FWE_METHODS:
        raise InputError(None, "group.fwe_method", f"unknown method {settings.get('fwe_method')!r}",
                         f"use one of {', '.join(group_stats.FWE_METHODS)}")
    if settings.get("family", "per_direction") not in FAMILIES:
        raise InputError(None, "group.family", f"unknown family {settings.get('family')!r}", f"use one of {', '.join(FAMILIES)}")
    name = params["analysis"].get("name") if isinstance(params["analysis"], dict) else None
    if not isinstance(name, str) or not name:
        raise InputError(None, "analysis.name", f"missing or not a string: {name!r}", "pass the analysis entry of the config")
    subjects = params["subjects"]
    if not isinstance(subjects, list) or not subjects or len(set(map(str, subjects))) != len(subjects):
        raise InputError(None, "params.subjects", f"expected a non-empty list of distinct subject ids, got {subjects!r}",
                         "pass the study's subjects")
    return n_draws, float(alpha), settings["prevalence"], name, [_subject_label(s) for s in subjects]


def _direction_order(analysis):
    """Directions in configured order: within, or A->B, B->A, A<->B, A->A, B->B."""
    if analysis.get("kind") == "cross" and isinstance(analysis.get("sets"), dict) and len(analysis["sets"]) == 2:
        first, second = list(analysis["sets"])
        return [f"{first}->{second}", f"{second}->{first}", f"{first}<->{second}", f"{first}->{first}",
                f"{second}->{second}"]
    return ["within"]


def _read_summaries(paths, name, expected):
    """Per subject: the summary frame and its path, in the order of ``expected``."""
    by_subject = {}
    for path in paths:
        frame = _read_table(path, SUMMARY_COLUMNS, "decoding summary")
        subject = _subject_label(_single_value(frame, "subject", path))
        analysis = _single_value(frame, "analysis", path)
        if analysis != name:
            raise InputError(path, "analysis", f"the summary is of analysis {analysis!r}, this job groups {name!r}",
                             "pass this analysis's summaries only")
        if subject in by_subject:
            raise InputError(path, "subject", f"subject {subject} also has the summary {by_subject[subject][1]}",
                             "pass one summary per subject")
        by_subject[subject] = (frame, path)
    missing = [subject for subject in expected if subject not in by_subject]
    if missing:
        raise InputError(None, "subject", f"analysis {name!r} has no results for subject(s) {_short_list(missing)}",
                         "run the decoding stage for them, or leave them out with dataset.exclude_subjects in the config")
    extra = [subject for subject in by_subject if subject not in expected]
    if extra:
        raise InputError(by_subject[extra[0]][1], "subject",
                         f"summaries of subject(s) {_short_list(extra)} that the study does not list",
                         "pass only the study's subjects' summaries, or add them to dataset.subjects")
    return [by_subject[subject] for subject in expected]


def _cell_keys(frame):
    return list(zip(frame["roi"].tolist(), frame["direction"].tolist(), frame["n_voxels"].tolist()))


def _ordered_cells(reference_frame, reference_path, analysis):
    """The reference subject's cells, sorted by configured ROI, direction and count order."""
    keys = _cell_keys(reference_frame)
    duplicated = [key for index, key in enumerate(keys) if key in keys[:index]]
    if duplicated:
        raise InputError(reference_path, "roi, direction, n_voxels", f"duplicate rows for cell(s) {_short_list(duplicated)}",
                         _RERUN_FIX)
    directions = _direction_order(analysis)
    unknown = sorted({key[1] for key in keys} - set(directions))
    if unknown:
        raise InputError(reference_path, "direction", f"direction(s) {_short_list(unknown)} do not belong to analysis "
                         f"{analysis['name']!r} (expected {_short_list(directions)})", _RERUN_FIX)
    rois = list(analysis.get("rois") or []) or list(dict.fromkeys(key[0] for key in keys))
    stray = sorted({key[0] for key in keys} - set(rois))
    if stray:
        raise InputError(reference_path, "roi", f"ROI(s) {_short_list(stray)} are not among the analysis's ROIs "
                         f"({_short_list(rois)})", _RERUN_FIX)
    counts = [contract.count_label(count) for count in analysis.get("voxel_counts") or []] or list(dict.fromkeys(key[2] for key in keys))
    stray = sorted({key[2] for key in keys} - set(counts))
    if stray:
        raise InputError(reference_path, "n_voxels", f"voxel count(s) {_short_list(stray)} are not in the analysis's "
                         f"voxel_counts ({_short_list(counts)})", _RERUN_FIX)
    rank = {"roi": {v: i for i, v in enumerate(rois)}, "direction": {v: i for i, v in enumerate(directions)},
            "count": {v: i for i, v in enumerate(counts)}}
    return sorted(keys, key=lambda key: (rank["roi"][key[0]], rank["direction"][key[1]], rank["count"][key[2]]))


def _describe_difference(reference_cells, cells):
    reference, own = set(reference_cells), set(cells)
    parts = []
    sweeps = {}
    for roi, direction, count in reference ^ own:
        sweeps.setdefault((roi, direction), []).append(count)
    shared_pairs = {key[:2] for key in own} & {key[:2] for key in reference}
    changed = sorted(pair for pair in sweeps if pair in shared_pairs)
    if changed:
        parts.append("a different voxel-count sweep for " + _short_list("/".join(pair) for pair in changed))
    lacking = sorted(key for key in reference - own if key[:2] not in shared_pairs)
    extra = sorted(key for key in own - reference if key[:2] not in shared_pairs)
    if lacking:
        parts.append("lacks " + _short_list("/".join(key) for key in lacking))
    if extra:
        parts.append("has extra " + _short_list("/".join(key) for key in extra))
    if len(cells) != len(own):
        parts.append("has duplicate cells")
    return "; ".join(parts)


def _subject_scores(subject_frames, cells, subjects):
    """(n_subjects, n_cells) balanced accuracies and the shared chance level per cell."""
    position = {key: index for index, key in enumerate(cells)}
    scores = np.empty((len(subjects), len(cells)))
    chance = np.empty((len(subjects), len(cells)))
    differing = []
    for row, (frame, path) in enumerate(subject_frames):
        keys = _cell_keys(frame)
        if len(keys) != len(cells) or set(keys) != set(cells):
            differing.append(f"{subjects[row]} ({_describe_difference(cells, keys)})")
            continue
        columns = [position[key] for key in keys]
        scores[row, columns] = _scores_column(frame, "balanced_accuracy", path)
        chance[row, columns] = _scores_column(frame, "chance", path)
    if differing:
        raise InputError(None, "roi, direction, n_voxels",
                         f"subjects differ from {subjects[0]} in their cells: {'; '.join(differing)}",
                         "rerun decoding for these subjects with the same analysis config, or leave them out "
                         "with dataset.exclude_subjects")
    off = np.abs(chance - chance[0]) > _CHANCE_TOLERANCE
    if off.any():
        bad_subjects = [subjects[index] for index in np.flatnonzero(off.any(axis=1))]
        raise InputError(None, "chance", f"subject(s) {_short_list(bad_subjects)} have other chance levels than "
                         f"{subjects[0]} for the same cells", _RERUN_FIX)
    return scores, chance[0]


def _read_null(path, name, subject_row, cells_of_roi):
    """One subject x ROI null file in full, with every check: ``((subject, roi), piece)``, or ``(None, path)`` without rows.

    ``piece`` is ``(keys, permutation, values, path)``: per row the study cell
    index (before duplicates are dropped), the permutation (from 0) and the score.
    """
    frame = _read_table(path, SUBJECT_NULL_COLUMNS, "permutation null")
    if frame.empty:
        return None, path  # zero permutations
    subject = _subject_label(_single_value(frame, "subject", path))
    roi = _single_value(frame, "roi", path)
    analysis = _single_value(frame, "analysis", path)
    _check_null_owner(path, name, subject, analysis, roi, subject_row, cells_of_roi)
    # Few distinct keys over many rows: look cells up per distinct (direction, count) pair.
    direction_codes, directions = pd.factorize(frame["direction"])
    count_codes, counts = pd.factorize(frame["n_voxels"])
    lookup = np.array([[cells_of_roi[roi].get(f"{direction}\t{count}", -1) for count in counts]
                       for direction in directions], dtype=np.int64).reshape(len(directions), len(counts))
    keys = lookup[direction_codes, count_codes]
    if np.any(keys < 0):
        row = int(np.flatnonzero(keys < 0)[0])
        raise InputError(path, "direction, n_voxels", f"cell {frame['direction'].iloc[row]}/"
                         f"{frame['n_voxels'].iloc[row]} (data row {row + 1}) is not in the subject's summary",
                         _RERUN_FIX)
    permutation = pd.to_numeric(frame["permutation"], errors="coerce").to_numpy(dtype=np.float64)
    if not np.all(np.isfinite(permutation)) or np.any(permutation < 1) or np.any(permutation != np.round(permutation)):
        raise InputError(path, "permutation", "permutation numbers must be integers 1, 2, ...", _RERUN_FIX)
    return (subject, roi), (keys, permutation.astype(np.int64) - 1, _scores_column(frame, "balanced_accuracy", path), path)


def _check_null_owner(path, name, subject, analysis, roi, subject_row, cells_of_roi):
    if analysis != name:
        raise InputError(path, "analysis", f"the null is of analysis {analysis!r}, this job groups {name!r}",
                         "pass this analysis's nulls only")
    if subject not in subject_row:
        raise InputError(path, "subject", f"subject {subject} is not among the study's subjects",
                         "pass only the study's subjects' nulls")
    if roi not in cells_of_roi:
        raise InputError(path, "roi", f"ROI {roi!r} has no cells in the summaries ({_short_list(cells_of_roi)})",
                         _RERUN_FIX)


_PEEK_BYTES = 1 << 16  # the start of a null file: its header and first rows


def _peek_null(path):
    """``(subject, analysis, roi)`` from a null file's header and first data row, decoding only the file's start.

    None when that does not settle it (no complete data row, another header,
    a quoted, empty or ``n/a`` value, a carriage return): the full read
    (:func:`_read_null`) then decides and gives its own message. A file whose
    later rows name another subject or ROI is caught there too: its ROI is
    computed, since no stored part has its content hash.
    """
    try:
        with open(path, "rb") as handle:
            head = handle.read(_PEEK_BYTES)
        if str(path).endswith(".gz"):
            head = zlib.decompressobj(wbits=31).decompress(head, _PEEK_BYTES)  # 31: a gzip stream
        lines = head.split(b"\n", 2)
        if len(lines) < 3 or b"\r" in lines[0] + lines[1]:
            return None
        header, row = lines[0].decode("utf-8").split("\t"), lines[1].decode("utf-8").split("\t")
    except (OSError, zlib.error, UnicodeDecodeError):
        return None
    if len(row) != len(header) or any(column not in header for column in SUBJECT_NULL_COLUMNS) or header[0].startswith("\ufeff"):
        return None
    values = tuple(row[header.index(column)] for column in ("subject", "analysis", "roi"))
    if any(value in ("", "n/a") or value.startswith('"') for value in values):
        return None
    return values


def _locate_nulls(paths, name, subject_row, cells_of_roi, subjects):
    """Which file holds which subject x ROI, from a peek at each file (files that cannot be peeked are read in full).

    Returns ``(located, read)``: ``{(subject, roi): path}`` and the pieces read
    in full on the way; ``located`` is None when no file has a row (zero
    permutations). Raises on a stranger's or a second file, or a missing one.
    """
    located, read, seen, empty = {}, {}, {}, None
    for path in paths:
        peeked = _peek_null(path)
        if peeked is None:
            key, piece = _read_null(path, name, subject_row, cells_of_roi)
            if key is None:
                empty = piece  # zero permutations
                continue
            read[key] = piece
        else:
            subject, analysis, roi = _subject_label(peeked[0]), peeked[1], peeked[2]
            _check_null_owner(path, name, subject, analysis, roi, subject_row, cells_of_roi)
            key = (subject, roi)
        if key in seen:
            raise InputError(path, "subject, roi", f"a second null for subject {key[0]}, ROI {key[1]} "
                             f"(first: {seen[key]})", "pass one null per subject and ROI")
        seen[key] = path
        located[key] = path
    if not located:
        return None, read
    wanted = [(subject, roi) for subject in subjects for roi in cells_of_roi]
    missing = [f"{subject}/{roi}" for subject, roi in wanted if (subject, roi) not in located]
    if missing:
        raise InputError(empty, "subject, roi", f"no permutation null for subject/ROI {_short_list(missing)}"
                         + (" (this file has no permutations)" if empty else ""), _RERUN_FIX)
    return located, read


def _subject_counts(per_subject, subjects):
    """Each subject's number of relabelings, from ``{subject: {roi: count}}``; the ROIs of a subject must agree."""
    # One subject's ROIs share its relabelings, so they hold equally many; subjects may differ (a design with
    # few distinct relabelings lists all of them, fewer than requested).
    differing = [f"{subject}/{roi}: {count}" for subject, by_roi in per_subject.items() for roi, count in by_roi.items()
                 if len(set(by_roi.values())) > 1]
    if differing:
        raise InputError(None, "permutation", f"the ROIs of a subject have different numbers of permutations "
                         f"({_short_list(differing)})", _RERUN_FIX)
    return np.array([next(iter(per_subject[subject].values())) for subject in subjects], dtype=np.int64)


def _roi_nulls(pieces, roi, columns, n_choices, subjects, n_cells):
    """(n_subjects, max relabelings, len(columns)) null scores of one ROI's cells (``columns``: study cell indices)."""
    local = np.full(n_cells, -1, dtype=np.int64)  # study cell index -> index within this ROI
    local[columns] = np.arange(len(columns))
    nulls = np.empty((len(subjects), int(n_choices.max()), len(columns)))
    for row, subject in enumerate(subjects):
        keys, permutation, values, path = pieces[(subject, roi)]
        n_permutations = int(n_choices[row])
        flat = local[keys] * n_permutations + permutation
        if flat.size != len(columns) * n_permutations or np.any(np.bincount(flat, minlength=flat.size) != 1):
            raise InputError(path, "permutation", f"every cell needs each permutation 1..{n_permutations} exactly once "
                             f"({len(columns)} cells, {flat.size} rows)", _RERUN_FIX)
        nulls[row, permutation, local[keys]] = values
        nulls[row, n_permutations:] = nulls[row, :1]  # rows beyond the subject's own count are never drawn; keep them finite
    return nulls


def _cells_by_roi(cells):
    """ROI -> {"direction\tcount": study cell index}, in cell order."""
    cells_of_roi = {}
    for index, (roi, direction, count) in enumerate(cells):
        cells_of_roi.setdefault(roi, {})[f"{direction}\t{count}"] = index
    return cells_of_roi


def _null_files(paths, name, cells, subjects):
    """``(subject_row, cells_of_roi, located, pieces)`` of the subjects' null files (:func:`_locate_nulls`), or None without permutations."""
    if not paths:
        return None
    subject_row = {subject: index for index, subject in enumerate(subjects)}
    cells_of_roi = _cells_by_roi(cells)
    located, pieces = _locate_nulls(paths, name, subject_row, cells_of_roi, subjects)
    return None if located is None else (subject_row, cells_of_roi, located, pieces)


def _subject_nulls(paths, name, cells, subjects):
    """(n_subjects, n_permutations, n_cells) null scores of every cell and each subject's count, or None without permutations."""
    found = _null_files(paths, name, cells, subjects)
    if found is None:
        return None
    subject_row, cells_of_roi, located, pieces = found
    for key, path in located.items():
        if key not in pieces:
            pieces[key] = _read_null(path, name, subject_row, cells_of_roi)[1]
    per_subject = {}
    for (subject, roi), piece in pieces.items():
        per_subject.setdefault(subject, {})[roi] = int(piece[1].max()) + 1
    n_choices = _subject_counts(per_subject, subjects)
    nulls = np.empty((len(subjects), int(n_choices.max()), len(cells)))
    for roi, columns in cells_of_roi.items():
        nulls[:, :, list(columns.values())] = _roi_nulls(pieces, roi, list(columns.values()), n_choices, subjects, len(cells))
    return nulls, n_choices


def _array_digest(values):
    values = np.ascontiguousarray(values, dtype=np.float64)
    return {"shape": list(values.shape), "sha256": hashlib.sha256(values.tobytes()).hexdigest()}


def _null_draws_by_roi(paths, name, cells, keep, kept_cells, scores, subjects, exact, rng, n_draws, prevalence, seed):
    """The group-mean and minimum nulls of the kept cells, one ROI at a time, each ROI a part of the job's memo.

    Every cell's draws depend on the shared picks and its own column only
    (:func:`foldwise.stats.group.group_null_draws`), so an ROI's block of
    draws, and its rows of the group null table, are a part keyed on what
    they read: the ROI's null files (content hashes), its observed scores,
    its cells, the subjects, which of them list their whole relabeling space,
    the seed and the number of draws. When one ROI changes, Snakemake reruns
    the job; the other ROIs' blocks are restored and their null files are
    not read (a peek at each file's first row says which subject and ROI it
    holds). The family-wise correction and the tables are then computed from
    all the blocks as before, so the outputs keep their bytes.

    Parameters
    ----------
    cells, keep
        Every cell of the summaries and the mask of those kept (duplicates of an ROI's ``all`` dropped).
    kept_cells, scores
        The kept cells (renamed) and their ``(n_subjects, n_kept)`` scores.

    Returns
    -------
    tuple or None
        ``(null_mean, null_minimum, rows)`` over the kept cells (``null_minimum``
        None without prevalence; ``rows`` the null table's text per ROI, None
        when a label needs quoting), or None without permutations.
    """
    found = _null_files(paths, name, cells, subjects)
    if found is None:
        return None
    subject_row, cells_of_roi, located, pieces = found
    kept_position = np.cumsum(keep) - 1  # study cell index -> position among the kept cells
    quoted = _needs_quoting(kept_cells)
    parts = job_parts()
    shared = {"analysis": name, "seed": seed, "n_draws": n_draws, "prevalence": prevalence, "subjects": list(subjects),
              "exact": [bool(value) for value in exact]}
    blocks, computed = {}, {}
    with tempfile.TemporaryDirectory(prefix="foldwise-group-") as folder:
        for number, (roi, columns) in enumerate(cells_of_roi.items()):
            kept_columns = [index for index in columns.values() if keep[index]]
            positions = kept_position[kept_columns]
            identity = {"roi": roi, **shared,
                        "cells": [[cells[index][1], cells[index][2], kept_cells[kept_position[index]][2]] for index in kept_columns],
                        "scores": _array_digest(scores[:, positions]),
                        "nulls": [parts.file_hash(located[(subject, roi)]) for subject in subjects]}
            files = {"n_choices": str(Path(folder) / f"{number}_n_choices.npy"), "mean": str(Path(folder) / f"{number}_mean.npy"),
                     "rows": str(Path(folder) / f"{number}_rows.tsv.gz")}
            if prevalence:
                files["minimum"] = str(Path(folder) / f"{number}_minimum.npy")
            if parts.restore(f"roi-{roi}", identity, files):
                blocks[roi] = {"n_choices": np.load(files["n_choices"], allow_pickle=False),
                               "mean": np.load(files["mean"], allow_pickle=False),
                               "minimum": np.load(files["minimum"], allow_pickle=False) if prevalence else None,
                               "rows": None if quoted else gunzip_bytes(Path(files["rows"]).read_bytes()).decode("utf-8")}
            else:
                computed[roi] = (list(columns.values()), kept_columns, positions, identity, files)
        for roi in computed:  # the null files of the ROIs to compute, read in full with every check
            for subject in subjects:
                if (subject, roi) not in pieces:
                    pieces[(subject, roi)] = _read_null(located[(subject, roi)], name, subject_row, cells_of_roi)[1]
        per_subject = {}
        for (subject, roi), piece in pieces.items():
            if roi in computed:
                per_subject.setdefault(subject, {})[roi] = int(piece[1].max()) + 1
        for roi, block in blocks.items():
            for subject, count in zip(subjects, block["n_choices"].tolist()):
                per_subject.setdefault(subject, {})[roi] = int(count)
        n_choices = _subject_counts(per_subject, subjects)
        picks = group_stats.draw_group_picks(rng, len(subjects), n_draws, n_choices, exact, prevalence)
        for roi, (columns, kept_columns, positions, identity, files) in computed.items():
            nulls = _roi_nulls(pieces, roi, columns, n_choices, subjects, len(cells))[:, :, [columns.index(i) for i in kept_columns]]
            null_mean, null_minimum = group_stats.group_null_draws(scores[:, positions], nulls, *picks)
            rows = None if quoted else "".join(_null_rows_text([kept_cells[i] for i in positions], null_mean))
            blocks[roi] = {"n_choices": n_choices, "mean": null_mean, "minimum": null_minimum, "rows": rows}
            if not parts.stores:
                continue
            save_npy(files["n_choices"], n_choices)
            save_npy(files["mean"], null_mean)
            if prevalence:
                save_npy(files["minimum"], null_minimum)
            write_bytes_atomic(files["rows"], gzip_bytes((rows or "").encode("utf-8"), level=1))
            parts.store(f"roi-{roi}", identity, files)
    order = list(cells_of_roi)  # cells are sorted by ROI: each ROI's kept cells are one run of columns
    null_mean = np.concatenate([blocks[roi]["mean"] for roi in order], axis=1)
    null_minimum = np.concatenate([blocks[roi]["minimum"] for roi in order], axis=1) if prevalence else None
    return null_mean, null_minimum, None if quoted else [blocks[roi]["rows"] for roi in order]


def _optional_column(subject_frames, cells, column):
    """(n_subjects, n_cells) values of an optional summary column (NaN where a summary lacks it)."""
    position = {key: index for index, key in enumerate(cells)}
    values = np.full((len(subject_frames), len(cells)), np.nan)
    for row, (frame, _) in enumerate(subject_frames):
        if column not in frame.columns:
            continue
        numbers = pd.to_numeric(frame[column], errors="coerce").to_numpy(dtype=np.float64)
        for key, value in zip(_cell_keys(frame), numbers):
            if key in position:
                values[row, position[key]] = value
    return values


def _duplicate_counts(cells, n_used):
    """Cells whose count reaches the ROI size in every subject: the same voxels as the ROI's ``all`` cell.

    Returns ``(keep, renamed, notes)``: a mask of the cells to keep (each set of
    duplicates enters once: ``all`` if requested, else the first such count,
    renamed ``all``), the new count label per cell, and per ROI the counts dropped.
    """
    keep = np.ones(len(cells), dtype=bool)
    renamed = [cell[2] for cell in cells]
    dropped = {}
    by_sweep = {}
    for index, (roi, direction, count) in enumerate(cells):
        by_sweep.setdefault((roi, direction), []).append(index)
    for (roi, direction), members in by_sweep.items():
        reference = next((index for index in members if cells[index][2] == "all"), None)

        def uses_every_voxel(index):
            count = cells[index][2]
            if count == "all":
                return True
            if reference is not None:  # the ROI's size per subject is the n_used of its 'all' cell
                return bool(np.array_equal(n_used[:, index], n_used[:, reference]))
            return bool(np.all(n_used[:, index] < contract.parse_count(count)))  # capped in every subject

        whole = [index for index in members if uses_every_voxel(index)]
        if len(whole) < 2 and not (len(whole) == 1 and cells[whole[0]][2] != "all"):
            continue
        chosen = next((index for index in whole if cells[index][2] == "all"), whole[0])
        renamed[chosen] = "all"
        for index in whole:
            if index != chosen:
                keep[index] = False
                dropped.setdefault(roi, set()).add(cells[index][2])
            elif cells[index][2] != "all":
                dropped.setdefault(roi, set()).add(cells[index][2])
    return keep, renamed, {roi: sorted(counts, key=str) for roi, counts in dropped.items()}


def _families(cells, directions, family):
    """Family label per cell and its description."""
    if family == "per_direction":
        return np.array([directions.index(cell[1]) for cell in cells]), [f"direction {cell[1]}" for cell in cells]
    return np.zeros(len(cells), dtype=np.int64), [family.replace("_", " ")] * len(cells)


def _n_used_text(values):
    low, high = int(np.nanmin(values)), int(np.nanmax(values))
    return str(low) if low == high else f"{low}-{high}"


def _result_table(name, cells, n_subjects, chance, columns):
    table = pd.DataFrame({
        "analysis": [name] * len(cells),
        "roi": [cell[0] for cell in cells],
        "direction": [cell[1] for cell in cells],
        "n_voxels": [cell[2] for cell in cells],
        "n_subjects": np.full(len(cells), n_subjects, dtype=np.int64),
        "chance": chance,
    })
    for column in TABLE_COLUMNS[6:]:
        table[column] = columns[column]
    return table[TABLE_COLUMNS]


def _family_text(family, fwe_method, n_analyses):
    scale = ("each cell standardised by its own null (mean and SD of its group-null draws) before the maximum"
             if fwe_method == "standardised" else "each cell entered by its own null p-value (single-step min-p)")
    where = {"per_direction": "over all ROIs x voxel counts, one family per direction",
             "all_directions": "over all ROIs x voxel counts x directions of the analysis, one family",
             "all_analyses": f"over all ROIs x voxel counts x directions, then Bonferroni over the study's {n_analyses} analyses"}[family]
    return f"maximum statistic {where}; {scale}"


# Characters that make the csv writer behind DataFrame.to_csv quote a field (QUOTE_MINIMAL, tab-separated, "\n" lines).
_QUOTED_CHARACTERS = ("\t", '"', "\n", "\r")


def _needs_quoting(cells):
    labels = {str(part) for cell in cells for part in cell}
    return any(character in label for label in labels for character in _QUOTED_CHARACTERS)


def _null_rows_text(cells, null_mean):
    """The data rows of the group null table as ``write_tsv`` writes them, cell by cell; None where a label needs quoting.

    ``DataFrame.to_csv`` formats each float with ``FLOAT_FORMAT % value`` in a
    Python loop and writes row by row (pandas 3.1 source, ``FloatArrayFormatter``):
    most of the group job's time for 10,000 draws x hundreds of cells. Here each
    cell's rows are one ``%`` over a template that holds the draw numbers
    already, the same text (tests/test_group.py compares the bytes with
    ``write_tsv`` of :func:`_null_table`).
    """
    if _needs_quoting(cells):
        return None
    n_draws = null_mean.shape[0]
    template = "".join([f"\x00\t{draw}\t{FLOAT_FORMAT}\n" for draw in range(1, n_draws + 1)])
    return [template.replace("\x00", f"{roi}\t{direction}\t{count}".replace("%", "%%")) % tuple(null_mean[:, index].tolist())
            for index, (roi, direction, count) in enumerate(cells)]


def _write_null_table(path, cells, null_mean, rows=None):
    """Write the group null table: the bytes of ``write_tsv(path, _null_table(cells, null_mean))``, faster.

    ``rows``: the data rows' text in blocks (each ROI's from :func:`_null_rows_text`, perhaps restored
    from the job's memo), when the caller has them.
    """
    if rows is None and null_mean is not None:
        rows = _null_rows_text(cells, null_mean)
    if rows is None:
        write_tsv(path, _null_table(cells, null_mean))
        return
    text = "\t".join(NULL_COLUMNS) + "\n" + "".join(rows)
    data = text.encode("utf-8")
    write_bytes_atomic(path, gzip_bytes(data) if str(path).endswith(".gz") else data)


def _null_table(cells, null_mean):
    if null_mean is None:
        return pd.DataFrame({column: pd.Series(dtype=float if column == "mean" else str) for column in NULL_COLUMNS})
    n_draws, n_cells = null_mean.shape
    return pd.DataFrame({
        "roi": np.repeat(np.array([cell[0] for cell in cells], dtype=object), n_draws),
        "direction": np.repeat(np.array([cell[1] for cell in cells], dtype=object), n_draws),
        "n_voxels": np.repeat(np.array([cell[2] for cell in cells], dtype=object), n_draws),
        "draw": np.tile(np.arange(1, n_draws + 1, dtype=np.int64), n_cells),
        "mean": null_mean.T.ravel(),
    })


def _summary_text(name, analysis, table, directions, n_subjects, n_draws, alpha, notes, family_text=None):
    kind = analysis.get("kind", "within")
    lines = [f"Group statistics of analysis {name!r} ({kind} decoding), {n_subjects} subjects; "
             "score: balanced accuracy (fold mean per subject)."]
    lines += notes
    if not table["p_fwe"].notna().any():
        lines.append("No family-wise corrected p-values (see the note above); nothing is tested.")
    else:
        lines.append(f"Family-wise correction of the group mean minus chance: {family_text}; {n_draws} group draws; "
                     f"a cell counts as significant when p_fwe < alpha ({alpha:g}).")
        gamma_max = table["prevalence_gamma0_max"].dropna()
        if not gamma_max.empty:
            lines.append(f"Largest prevalence bound gamma0 this design can reach ({n_subjects} subjects, {n_draws} draws): "
                         f"{gamma_max.iloc[0]:.3f}" + (" -- below 0.5: the majority test cannot succeed."
                                                      if gamma_max.iloc[0] < 0.5 else "."))
        for direction in directions:
            rows = table[table["direction"] == direction]
            surviving = rows[rows["p_fwe"] < alpha]
            if surviving.empty:
                lines.append(f"direction {direction}: nothing survives FWE correction at alpha {alpha:g}.")
                continue
            lines.append(f"direction {direction}: cells surviving FWE correction at alpha {alpha:g}:")
            for row in surviving.itertuples(index=False):
                gamma = "n/a" if pd.isna(row.prevalence_gamma0) else f"{row.prevalence_gamma0:.3f}"
                gamma_fwe = "n/a" if pd.isna(row.prevalence_gamma0_fwe) else f"{row.prevalence_gamma0_fwe:.3f}"
                lines.append(f"  roi {row.roi}, n_voxels {row.n_voxels}: mean {row.mean:.4f} (chance {row.chance:.4f}), "
                             f"effect size {row.effect_size:.2f}, p_fwe {format_p(row.p_fwe, n_draws)}, prevalence gamma0 {gamma} "
                             f"(family-wise {gamma_fwe})")
    lines.append("Reading: a group test on accuracies speaks about the mean over subjects (is the population-average "
                 "accuracy above chance?), not about how many subjects show the effect; that is what prevalence "
                 "inference addresses (gamma0: the share of the population with an effect exceeds it, at alpha; "
                 "n/a where not even the global null of no effect in anyone is rejected).")
    lines.append("For research use only; not for clinical or diagnostic decisions.")
    return "\n".join(lines) + "\n"


def run(inputs, outputs, params, log):
    """Group statistics of one analysis: table, group-mean null and summary text.

    Parameters
    ----------
    inputs : dict
        ``summaries``: per-subject summary TSVs; ``nulls``: per-subject x ROI
        permutation nulls (TSV.gz).
    outputs : dict
        ``table`` (TSV), ``null`` (TSV.gz), ``summary`` (text).
    params : dict
        ``group`` ({n_draws, alpha, prevalence}), ``analysis`` (the config
        entry), ``subjects`` (expected subject ids), ``seed`` (study seed).
    log : logging.Logger
        Receives warnings (too few subjects, no permutations).

    Notes
    -----
    The random stream is ``default_rng(seed_from(seed, "group", analysis))``;
    the same inputs and params give byte-identical outputs.
    """
    n_draws, alpha, prevalence, name, subjects = _check_params(params)
    fwe_method = params["group"].get("fwe_method", "standardised")
    family = params["group"].get("family", "per_direction")
    n_analyses = int(params.get("n_analyses", 1)) if family == "all_analyses" else 1
    analysis = params["analysis"]
    summaries = inputs.get("summaries") or []
    summaries = [summaries] if isinstance(summaries, str) else list(summaries)
    nulls = inputs.get("nulls") or []
    nulls = [nulls] if isinstance(nulls, str) else list(nulls)
    subject_frames = _read_summaries(summaries, name, subjects)
    cells = _ordered_cells(*subject_frames[0], analysis)
    scores, chance = _subject_scores(subject_frames, cells, subjects)
    n_used = _optional_column(subject_frames, cells, "n_used")
    # subjects whose null lists their whole relabeling space (the actual labeling among its rows)
    exact = np.array([("null_exact" in frame.columns) and frame["null_exact"].astype(str).str.lower().eq("true").any()
                      for frame, _ in subject_frames], dtype=bool)
    subject_p_min = _optional_column(subject_frames, cells, "p_min")
    notes = []
    keep, renamed, dropped = _duplicate_counts(cells, n_used)
    for roi, counts in dropped.items():
        message = (f"ROI {roi}: voxel count(s) {', '.join(map(str, counts))} reach the ROI's size in every subject; "
                   f"they use every voxel and are reported once, as 'all' (see n_used)")
        log.warning(message)
        notes.append("Note: " + message + ".")
    worst_p_min = np.nanmax(np.where(np.isnan(subject_p_min), -np.inf, subject_p_min), axis=0)
    worst_p_min = np.where(np.isfinite(worst_p_min), worst_p_min, np.nan)
    coarse = [subjects[row] for row in range(len(subjects))
              if np.isfinite(subject_p_min[row]).any() and np.nanmin(subject_p_min[row]) > alpha]  # no p_min column: nothing to say
    if coarse:
        message = (f"subject(s) {_short_list(coarse)}: the design allows so few distinct relabelings that no "
                   f"subject-level p can reach alpha {alpha:g} (see subject_p_min)")
        log.warning(message)
        notes.append("Note: " + message + ".")
    # duplicates of the ROI's 'all' cell enter the table and the family once
    kept_cells = [(cell[0], cell[1], renamed[index]) for index, cell in enumerate(cells) if keep[index]]
    kept_scores = scores[:, keep]
    rng = np.random.default_rng(seed_from(params["seed"], "group", name))
    drawn = None
    if len(subjects) < group_stats.MIN_SUBJECTS:
        message = (f"only {len(subjects)} subject(s): descriptive statistics only, inferential columns are n/a "
                   f"(at least {group_stats.MIN_SUBJECTS} are needed)")
        log.warning(message)
        notes.append("Note: " + message + ".")
    else:
        drawn = _null_draws_by_roi(nulls, name, cells, keep, kept_cells, kept_scores, subjects, exact, rng, n_draws,
                                   prevalence, params["seed"])
        if drawn is None:
            message = "no permutation null (n_permutations is 0): p_perm, p_fwe and prevalence columns are n/a"
            log.warning(message)
            notes.append("Note: " + message + ".")
        elif 1.0 / (1 + n_draws) > alpha:
            log.warning("group.n_draws %d cannot reach p <= alpha %g; raise group.n_draws", n_draws, alpha)
    cells, scores = kept_cells, kept_scores
    chance, n_used, worst_p_min = chance[keep], n_used[:, keep], worst_p_min[keep]
    directions = [d for d in _direction_order(analysis) if any(cell[1] == d for cell in cells)]
    families, family_names = _families(cells, directions, family)
    columns, null_mean = group_stats.group_statistics(scores, chance, None, families, rng, n_draws, alpha,
                                                       prevalence=prevalence, fwe_method=fwe_method,
                                                       null_draws=None if drawn is None else drawn[:2])
    if n_analyses > 1:  # one family over the study's analyses: Bonferroni over the analyses' own maxima
        for column in ("p_fwe", "prevalence_p_global_fwe"):
            columns[column] = np.minimum(1.0, columns[column] * n_analyses)
        columns["prevalence_gamma0_fwe"] = group_stats.prevalence_bound(
            np.where(np.isnan(columns["prevalence_p_global_fwe"]), 1.0, columns["prevalence_p_global_fwe"]), len(subjects), alpha)
    columns["n_used"] = np.array([_n_used_text(n_used[:, index]) if np.isfinite(n_used[:, index]).any() else "n/a"
                                  for index in range(len(cells))], dtype=object)
    columns["subject_p_min"] = worst_p_min
    columns["family"] = np.array(family_names, dtype=object)
    table = _result_table(name, cells, len(subjects), chance, columns)
    write_tsv(outputs["table"], table)
    _write_null_table(outputs["null"], cells, null_mean, None if drawn is None else drawn[2])
    write_text_atomic(outputs["summary"], _summary_text(name, analysis, table, directions, len(subjects), n_draws,
                                                        alpha, notes, _family_text(family, fwe_method, n_analyses)))
