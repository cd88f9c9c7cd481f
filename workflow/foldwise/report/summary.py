"""The answer in plain words: what survives correction, where, how large (pure functions).

One sentence per ROI and direction of an analysis, from its group table. The
report's summary box and the terminal's closing lines use the same sentences,
so the two say the same thing in the same words.
"""

import math

import numpy as np
import pandas as pd

from foldwise.contract import count_label, parse_count
from foldwise.report.page import format_number, format_p

__all__ = ["count_order", "answer_sentences", "survives"]


def survives(p_fwe, alpha):
    """True where the family-wise corrected p is below ``alpha`` (the rule of every star and bold row).

    Examples
    --------
    >>> survives(np.array([0.01, 0.05, np.nan]), 0.05).tolist()
    [True, False, False]
    """
    values = np.asarray(pd.to_numeric(pd.Series(p_fwe), errors="coerce"), dtype=np.float64)
    return np.isfinite(values) & (values < alpha)


def count_order(counts):
    """Voxel counts in increasing order, ``all`` last.

    Examples
    --------
    >>> count_order(["all", "100", "20"])
    ['20', '100', 'all']
    """
    counts = list(dict.fromkeys(count_label(parse_count(count)) for count in counts))  # one text per count (contract)
    numbers = sorted((count for count in counts if count != "all"), key=parse_count)
    return numbers + (["all"] if "all" in counts else [])


def _count_text(count):
    return "all voxels" if count == "all" else f"{count} voxels"


def answer_sentences(table, alpha, n_draws=None, directions=None, rois=None):
    """Plain-language result lines of one analysis, one per ROI and direction.

    Parameters
    ----------
    table : pandas.DataFrame
        The analysis's group table (``roi``, ``direction``, ``n_voxels``,
        ``chance``, ``mean``, ``p_fwe``, ``prevalence_gamma0``; the
        ``effect_size`` and ``prevalence_gamma0_fwe`` columns are used when
        present).
    alpha : float
        Family-wise level.
    n_draws : int, optional
        Group draws behind ``p_fwe`` (its resolution is printed).
    directions, rois : sequence of str, optional
        Order of the lines (default: first-seen order of the table).

    Returns
    -------
    list of (str, str, bool, str)
        ``(roi, direction, any count survives, sentence)``.

    Examples
    --------
    >>> table = pd.DataFrame({"roi": ["ember"] * 2, "direction": ["within"] * 2, "n_voxels": ["20", "all"],
    ...                       "chance": [0.5, 0.5], "mean": [0.62, 0.58], "p_fwe": [0.0099, 0.2],
    ...                       "prevalence_gamma0": [0.4, float("nan")]})
    >>> answer_sentences(table, 0.05, 100)[0][3]
    'above chance after family-wise correction at 1 of 2 voxel counts (20); largest mean balanced accuracy 0.620 at 20 voxels (chance 0.500, margin +0.120), corrected p < 0.01 (100 draws), prevalence lower bound 0.40.'
    """
    rois = list(rois) if rois is not None else list(dict.fromkeys(table["roi"].astype(str)))
    directions = list(directions) if directions is not None else list(dict.fromkeys(table["direction"].astype(str)))
    lines = []
    roi_column, direction_column = table["roi"].astype(str).to_numpy(), table["direction"].astype(str).to_numpy()
    for roi in rois:
        for direction in directions:
            rows = table[(roi_column == roi) & (direction_column == direction)]
            if rows.empty:
                continue
            order = {count: index for index, count in enumerate(count_order(rows["n_voxels"]))}
            rows = rows.assign(_order=rows["n_voxels"].astype(str).map(order)).sort_values("_order")
            p_fwe = pd.to_numeric(rows["p_fwe"], errors="coerce").to_numpy(dtype=np.float64)
            passed = survives(p_fwe, alpha)
            counts = rows["n_voxels"].astype(str).tolist()
            if not np.isfinite(p_fwe).any():
                lines.append((roi, direction, False, "not tested (no corrected p-values; see the group table's notes)."))
                continue
            if not passed.any():
                best = int(np.nanargmin(p_fwe))
                lines.append((roi, direction, False,
                              f"no voxel count survives family-wise correction (smallest corrected p "
                              f"{format_p(p_fwe[best], n_draws)} at {_count_text(counts[best])})."))
                continue
            means = pd.to_numeric(rows["mean"], errors="coerce").to_numpy(dtype=np.float64)
            best = int(np.nanargmax(np.where(passed, means, -np.inf)))
            row = rows.iloc[best]
            chance = float(row["chance"])
            surviving = [count for count, keep in zip(counts, passed) if keep]
            text = (f"above chance after family-wise correction at {len(surviving)} of {len(counts)} voxel counts "
                    f"({', '.join(surviving)}); largest mean balanced accuracy {format_number(means[best])} at "
                    f"{_count_text(counts[best])} (chance {format_number(chance)}, margin "
                    f"{means[best] - chance:+.3f}), corrected p {format_p(p_fwe[best], n_draws)}")
            if "effect_size" in rows.columns and math.isfinite(float(pd.to_numeric(row["effect_size"], errors="coerce"))):
                text += f", effect size {float(row['effect_size']):.2f}"
            gamma = pd.to_numeric(pd.Series([row.get("prevalence_gamma0")]), errors="coerce").iloc[0]
            gamma_fwe = pd.to_numeric(pd.Series([row.get("prevalence_gamma0_fwe")]), errors="coerce").iloc[0]
            corrected = f" (family-wise corrected {gamma_fwe:.2f})" if math.isfinite(gamma_fwe) else ""
            text += (f", prevalence lower bound {gamma:.2f}{corrected}." if math.isfinite(gamma)
                     else ", prevalence: the global null is not rejected.")
            lines.append((roi, direction, True, text))
    return lines
