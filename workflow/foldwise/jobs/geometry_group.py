"""Job: group inference of a geometry analysis -- model fits against 0, model against model, noise ceilings."""

import numpy as np
import pandas as pd
from scipy import stats

from foldwise import contract
from foldwise.data.fileio import save_figure, write_text_atomic, write_tsv
from foldwise.errors import InputError
from foldwise.geometry.compare import noise_ceiling
from foldwise.geometry.distances import BIASED_DISTANCES, condition_pairs, square_form
from foldwise.geometry.inference import pairwise_differences, sign_flips, signflip_test
from foldwise.geometry.wiring import effective_normalisation
from foldwise.provenance.hashing import seed_from
from foldwise.report.geometry_figures import fits_figure, matrix_figure, mds_figure
from foldwise.stats.group import mean_sem_ci, t_test_greater, wilcoxon_greater

__all__ = ["run", "group_geometry"]

_COMPARISON_LABELS = {"kendall_tau_a": "Kendall's tau-a", "spearman": "Spearman's rho", "pearson": "Pearson's r"}


def group_geometry(fits, dissimilarities, comparison, flips):
    """Every group statistic of one geometry analysis (arrays in, arrays out).

    Parameters
    ----------
    fits : ndarray, shape (n_subjects, n_rois, n_models)
    dissimilarities : ndarray, shape (n_subjects, n_rois, n_pairs)
    comparison : str
    flips : ndarray, shape (n_flips, n_subjects)
        From :func:`foldwise.geometry.inference.sign_flips`.

    Returns
    -------
    dict
        ``cells`` (per ROI x model, flattened ROI-major: mean, sem, ci, t, p_t,
        p_wilcoxon, p_signflip, p_fwe), ``pairwise`` (per ROI x model pair),
        ``ceilings`` ``(n_rois, 2)`` and ``mean_dissimilarity`` ``(n_rois, n_pairs)``.

    Notes
    -----
    One family for the FWE correction: every model x ROI, by the maximum
    studentised statistic of the same sign flips; pairwise comparisons are
    one family of their own (two-sided).
    """
    n_subjects, n_rois, n_models = fits.shape
    flat = fits.reshape(n_subjects, -1)
    described = mean_sem_ci(flat)
    t_value, p_t = t_test_greater(flat, 0.0)
    flipped = signflip_test(flat, flips)
    cells = {**described, "t": flipped["t"], "p_t": p_t, "p_wilcoxon": wilcoxon_greater(flat, 0.0),
             "p_signflip": flipped["p"], "p_fwe": flipped["p_fwe"]}
    differences, pairs = pairwise_differences(fits, list(range(n_models)))
    pairwise = {"pairs": pairs, "mean_difference": np.zeros((n_rois, 0))}
    if pairs:
        flat_differences = differences.reshape(n_subjects, -1)
        tested = signflip_test(flat_differences, flips, two_sided=True)
        wilcoxon = np.array([stats.wilcoxon(column, zero_method="pratt").pvalue if np.any(column != 0) else np.nan
                             for column in flat_differences.T])
        pairwise = {"pairs": pairs, "mean_difference": flat_differences.mean(axis=0), "t": tested["t"], "p_signflip": tested["p"],
                    "p_fwe": tested["p_fwe"], "p_wilcoxon": wilcoxon}
    ceilings = np.array([[noise_ceiling(dissimilarities[:, r], comparison)[key] for key in ("lower", "upper")] for r in range(n_rois)])
    return {"cells": cells, "pairwise": pairwise, "ceilings": ceilings, "mean_dissimilarity": dissimilarities.mean(axis=0)}


def run(inputs, outputs, settings, log):
    """Write the group table, pairwise comparisons, noise ceilings, mean matrices, figures and the terminal summary."""
    analysis, subjects = settings["analysis"], list(settings["subjects"])
    geometry, name, rois = analysis["geometry"], analysis["name"], list(analysis["rois"])
    conditions, comparison = list(geometry["conditions"]), geometry["comparison"]
    models = [model["name"] for model in geometry["models"]]
    if len(subjects) < 2:
        raise InputError("the study config", "dataset.subjects", "group statistics need two or more subjects", "add subjects")
    counts = [contract.count_label(count) for count in geometry.get("voxel_counts") or ["all"]]
    groups = [(roi, count) for roi in rois for count in counts]  # the cells of every table: ROI x voxel count
    rows, columns = condition_pairs(len(conditions))
    pair_keys = [f"{conditions[a]}|{conditions[b]}" for a, b in zip(rows, columns)]
    fits = np.full((len(subjects), len(groups), len(models)), np.nan)
    dissimilarities = np.full((len(subjects), len(groups), len(pair_keys)), np.nan)
    for s, (fit_path, distance_path) in enumerate(zip(inputs["fits"], inputs["distances"])):
        fit_table = contract.read_table("geometry_fits", fit_path)
        distance_table = contract.read_table("geometry_distances", distance_path)
        distance_table = distance_table.assign(pair=distance_table["condition_a"].astype(str) + "|" + distance_table["condition_b"].astype(str))
        for g, (roi, count) in enumerate(groups):
            fit_rows = fit_table[(fit_table["roi"].astype(str) == roi) & (fit_table["n_voxels"].astype(str) == count)].set_index("model")["fit"]
            pair_rows = distance_table[(distance_table["roi"].astype(str) == roi)
                                       & (distance_table["n_voxels"].astype(str) == count)].set_index("pair")["dissimilarity"]
            if set(models) - set(fit_rows.index) or set(pair_keys) - set(pair_rows.index):
                raise InputError(fit_path, "roi", f"ROI {roi} at {count} voxels lacks models or condition pairs of this analysis",
                                 "rerun the geometry_subject step")
            fits[s, g] = fit_rows.loc[models].to_numpy(dtype=np.float64)
            dissimilarities[s, g] = pair_rows.loc[pair_keys].to_numpy(dtype=np.float64)
    rng = np.random.default_rng(seed_from(settings["seed"], "geometry_group", name))
    flips, exact = sign_flips(len(subjects), int(settings["group"]["n_draws"]), rng)
    result = group_geometry(fits, dissimilarities, comparison, flips)
    alpha = float(settings["group"]["alpha"])

    cells = result["cells"]
    table = pd.DataFrame([{
        "analysis": name, "roi": roi, "n_voxels": count, "model": model, "comparison": comparison, "n_subjects": len(subjects),
        **{key: cells[key][g * len(models) + m] for key in ("mean", "sem", "ci_low", "ci_high", "t", "p_t", "p_wilcoxon", "p_signflip", "p_fwe")},
        "n_flips": flips.shape[0], "exact": exact, "noise_ceiling_lower": result["ceilings"][g, 0],
        "noise_ceiling_upper": result["ceilings"][g, 1]} for g, (roi, count) in enumerate(groups) for m, model in enumerate(models)],
        columns=list(contract.GEOMETRY_GROUP_COLUMNS))
    write_tsv(outputs["table"], table)
    pairwise = result["pairwise"]
    pair_rows = []
    for g, (roi, count) in enumerate(groups):
        for k, (a, b) in enumerate(pairwise["pairs"]):
            cell = g * len(pairwise["pairs"]) + k
            pair_rows.append({"analysis": name, "roi": roi, "n_voxels": count, "model_a": models[a], "model_b": models[b],
                              "comparison": comparison, "n_subjects": len(subjects), "mean_difference": pairwise["mean_difference"][cell],
                              "t": pairwise["t"][cell], "p_signflip": pairwise["p_signflip"][cell], "p_fwe": pairwise["p_fwe"][cell],
                              "p_wilcoxon": pairwise["p_wilcoxon"][cell]})
    write_tsv(outputs["pairwise"], pd.DataFrame(pair_rows, columns=list(contract.GEOMETRY_PAIRWISE_COLUMNS)))
    write_tsv(outputs["ceilings"], pd.DataFrame([{"analysis": name, "roi": roi, "n_voxels": count, "comparison": comparison,
                                                  "n_subjects": len(subjects), "lower": result["ceilings"][g, 0],
                                                  "upper": result["ceilings"][g, 1]}
                                                 for g, (roi, count) in enumerate(groups)], columns=list(contract.GEOMETRY_CEILING_COLUMNS)))
    squares = {group: square_form(result["mean_dissimilarity"][g], len(conditions)) for g, group in enumerate(groups)}
    write_tsv(outputs["mean_matrices"], pd.DataFrame([[name, roi, count, condition, *values] for (roi, count), matrix in squares.items()
                                                      for condition, values in zip(conditions, matrix)],
                                                     columns=["analysis", "roi", "n_voxels", "condition", *conditions]))
    shown = counts[-1]  # the figures show the largest count (the whole ROI by default)
    shown_groups = [g for g, (_, count) in enumerate(groups) if count == shown]
    matrices = {roi: squares[(roi, shown)] for roi in rois}

    distance = geometry["distance"]
    normalisation = effective_normalisation(geometry)
    biased = " (biased by noise: not cross-validated)" if distance in BIASED_DISTANCES else ""
    value_label = f"{distance}{biased}" + (f", {normalisation} noise normalisation" if distance == "crossnobis" else "")
    save_figure(matrix_figure(matrices, conditions, f"{name}: group mean dissimilarity", value_label), outputs["matrix_png"])
    save_figure(mds_figure(matrices, conditions, f"{name}: conditions in 2-D (classical scaling of the group mean)"), outputs["mds_png"])
    significant = (cells["p_fwe"] <= alpha).reshape(len(groups), len(models))
    mean_fit = cells["mean"].reshape(len(groups), len(models))
    count_label = "" if shown == "all" else f", {shown} voxels"
    save_figure(fits_figure(rois, models, mean_fit[shown_groups], fits[:, shown_groups], result["ceilings"][shown_groups],
                            significant[shown_groups],
                            f"{name}: model fits{count_label} (* p_fwe <= {alpha:g}; band: noise ceiling)", _COMPARISON_LABELS[comparison]),
                outputs["fits_png"])

    lines = [f"geometry {name}: {distance}{biased}, {normalisation} noise normalisation, {_COMPARISON_LABELS[comparison]}, "
             f"{len(subjects)} subjects, {flips.shape[0]} sign flips{' (exact)' if exact else ''}, FWE over "
             f"{len(rois)} ROIs x {len(counts)} voxel count(s) x {len(models)} models"]
    for g, (roi, count) in enumerate(groups):
        parts = []
        for m, model in enumerate(models):
            cell = g * len(models) + m
            mark = " *" if cells["p_fwe"][cell] <= alpha else ""
            parts.append(f"{model} {cells['mean'][cell]:+.3f} (p_fwe {cells['p_fwe'][cell]:.4f}){mark}")
        best = [models[m] for m in range(len(models)) if significant[g, m]]
        verdict = f"fits {', '.join(best)}" if best else "no model fits"
        where = roi if counts == ["all"] else f"{roi} ({count} voxels)"
        lines.append(f"  {where}: {verdict}; " + "; ".join(parts) +
                     f"; noise ceiling {result['ceilings'][g, 0]:.3f}..{result['ceilings'][g, 1]:.3f}")
    write_text_atomic(outputs["summary"], "\n".join(lines) + "\n")
    log.info("%s", "\n".join(lines))
