"""Job: one subject x analysis -- every ROI's fold scores in one table, and their fold means.

``scores`` is the ROIs' score tables concatenated and sorted by ROI (by
name), direction (within; or A->B, B->A, A<->B, A->A, B->B), the analysis's
configured voxel-count order and fold. ``summary`` holds one row per ROI x
direction x count: the fold means of accuracy and balanced accuracy, the
number of folds, and chance = 1 / number of classes.
"""

import numpy as np
import pandas as pd

from foldwise.contract import SCORE_COLUMNS, SUMMARY_COLUMNS, count_label, cross_directions, read_table
from foldwise.errors import InputError
from foldwise.data.fileio import write_tsv

__all__ = ["SUMMARY_COLUMNS", "gather_scores", "summarise_scores", "run"]



def _directions(analysis):
    if analysis["kind"] == "cross":
        return list(cross_directions(list(analysis["sets"])))
    return ["within"]


def _n_classes(analysis):
    if analysis["kind"] == "cross":
        return len(next(iter(analysis["sets"].values())))
    return len(analysis["classes"])


def _plain_subject(value):
    text = str(value)
    return text[4:] if text.startswith("sub-") else text


def gather_scores(frames, paths, analysis, subject):
    """Concatenate per-ROI score tables and sort them (ROI, direction, configured count order, fold).

    Parameters
    ----------
    frames : list of pandas.DataFrame
        Per-ROI score tables (``SCORE_COLUMNS``).
    paths : list of str
        Their files (named in errors).
    analysis : dict
        The analysis entry (name, kind, classes or sets, voxel_counts).
    subject : str

    Returns
    -------
    pandas.DataFrame
    """
    name = analysis["name"]
    directions = _directions(analysis)
    count_order = [count_label(count) for count in analysis["voxel_counts"]]
    seen_rois = {}
    for frame, path in zip(frames, paths):
        for column, expected in (("analysis", name), ("subject", _plain_subject(subject))):
            values = {(_plain_subject(value) if column == "subject" else str(value)) for value in frame[column]}
            if values != {expected}:
                raise InputError(path, column, f"expected {column} {expected!r} only, found {sorted(values)}", "pass this subject's scores of this analysis")
        rois = sorted(set(frame["roi"].astype(str)))
        if len(rois) != 1:
            raise InputError(path, "roi", f"a score table holds one ROI, found {rois}", "pass one decode job's scores per ROI")
        if rois[0] in seen_rois:
            raise InputError(path, "roi", f"ROI {rois[0]!r} is also in {seen_rois[rois[0]]}", "pass each ROI's scores once")
        seen_rois[rois[0]] = path
        stray = sorted(set(frame["direction"].astype(str)) - set(directions))
        if stray:
            raise InputError(path, "direction", f"direction(s) {stray} are not of analysis {name!r} (expected {directions})",
                             "rerun the decode job with this analysis's config")
        stray = sorted(set(frame["n_voxels"].astype(str)) - set(count_order))
        if stray:
            raise InputError(path, "n_voxels", f"count(s) {stray} are not among the analysis's voxel_counts {count_order}",
                             "rerun the decode job with this analysis's config")
    table = pd.concat(frames, ignore_index=True)
    table["n_voxels"] = table["n_voxels"].astype(str)
    keys = pd.DataFrame({
        "roi": table["roi"].astype(str),
        "direction": table["direction"].astype(str).map({value: index for index, value in enumerate(directions)}),
        "count": table["n_voxels"].map({value: index for index, value in enumerate(count_order)}),
        "fold": pd.to_numeric(table["fold"], errors="coerce")})
    if keys["fold"].isna().any():
        raise InputError(paths[0], "fold", "fold numbers must be integers", "rerun the decode jobs")
    order = keys.sort_values(["roi", "direction", "count", "fold"], kind="stable").index.to_numpy()
    return table.iloc[order].reset_index(drop=True)[list(SCORE_COLUMNS)]


def summarise_scores(scores, analysis):
    """Fold means per ROI x direction x count, in the order of the gathered scores.

    Parameters
    ----------
    scores : pandas.DataFrame
        Output of :func:`gather_scores`.
    analysis : dict

    Returns
    -------
    pandas.DataFrame
        ``SUMMARY_COLUMNS``; chance = 1 / number of classes.
    """
    keys = ["subject", "analysis", "roi", "direction", "n_voxels"]
    grouped = scores.groupby(keys, sort=False)
    summary = grouped.agg(n_used=("n_used", "first"), n_folds=("fold", "size"), accuracy=("accuracy", "mean"),
                          balanced_accuracy=("balanced_accuracy", "mean"), p_perm=("p_perm", "first"), p_min=("p_min", "first"),
                          n_relabelings=("n_relabelings", "first"), null_exact=("null_exact", "first")).reset_index()
    summary["n_used"] = summary["n_used"].astype(np.int64)
    summary["chance"] = 1.0 / _n_classes(analysis)
    return summary[list(SUMMARY_COLUMNS)]


def run(inputs, outputs, params, log):
    """Gather one subject's per-ROI scores of an analysis and write scores and summary.

    Parameters
    ----------
    inputs : dict
        ``scores``: one score TSV per ROI (a list, or one path).
    outputs : dict
        ``scores`` (TSV), ``summary`` (TSV).
    params : dict
        ``analysis`` (config entry), ``subject``.
    log : logging.Logger
        Unused (nothing to warn about); kept for the job interface.
    """
    for key in ("analysis", "subject"):
        if key not in params:
            raise InputError(None, f"params.{key}", "missing from the job's params", "pass analysis and subject")
    paths = inputs["scores"]
    paths = [paths] if isinstance(paths, str) else list(paths)
    if not paths:
        raise InputError(None, "inputs.scores", "no score tables to gather", "list at least one ROI for the analysis")
    frames = [read_table("decode_scores", path) for path in paths]
    scores = gather_scores(frames, paths, params["analysis"], str(params["subject"]))
    write_tsv(outputs["scores"], scores)
    write_tsv(outputs["summary"], summarise_scores(scores, params["analysis"]))
