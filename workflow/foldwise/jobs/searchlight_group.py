"""Job: group searchlight maps of one analysis (all subjects).

Inputs
    ``maps`` (list, in the order of ``params["subjects"]``): each subject's
    accuracy map from :mod:`foldwise.jobs.searchlight_merge`; ``nulls`` (list,
    same order): each subject's merged null (.npy); ``masks`` (list, same
    order): each subject's brain mask. All on one grid.
Params
    ``searchlight`` (the config section), ``analysis`` (one ``analyses``
    entry), ``subjects`` (list), ``group`` (``n_draws``, ``alpha``), ``seed``.
Outputs
    ``mean_map``: 4D float32 NIfTI, one volume per direction, the group mean
    of balanced accuracy minus chance (0 outside the group mask);
    ``p_map``: uncorrected permutation p per voxel (Stelzer, Chen & Turner
    2013); ``p_fwe_map``: family-wise corrected p per voxel by the voxel-wise
    maximum statistic (Nichols & Holmes 2002) of each voxel's group mean
    standardised by its own null (:func:`foldwise.stats.maps.group_permutation_maps`),
    each direction's map one family; p maps are 1 outside the group mask and NaN where no test ran;
    ``table``: TSV, one row per direction (see ``TABLE_COLUMNS``).
    Optional, when the rule declares them: ``tfce_map`` (TFCE of the mean
    map, Smith & Nichols 2009; E = 0.5, H = 2, 26-connectivity) and
    ``p_tfce_map`` (its max-statistic FWE p from the same draws).

The group mask is the intersection of the subjects' brain masks: every
voxel tested has a score from every subject. Fewer than three subjects: a
warning, and the mean map only (p maps NaN inside the mask).
"""

import numpy as np
import pandas as pd

from foldwise.errors import InputError
from foldwise.data.fileio import load_nifti, save_nifti, write_tsv
from foldwise.stats.group import MIN_SUBJECTS, TIE_TOLERANCE, draw_indices
from foldwise.provenance.hashing import seed_from
from foldwise.searchlight.engine import analysis_outline
from foldwise.stats.maps import group_permutation_maps, tfce
from foldwise.masks.build import same_grid
from foldwise.contract import GRID_TOLERANCE_MM, SEARCHLIGHT_GROUP_COLUMNS
from foldwise.contract import read_brain_mask as load_brain_mask

__all__ = ["run", "TABLE_COLUMNS"]

TABLE_COLUMNS = SEARCHLIGHT_GROUP_COLUMNS  # defined once, in the data contract
# Null maps enhanced per scipy.ndimage.label call (memory: this many brain-grid volumes).
_TFCE_BATCH = 64
MIN_CALIBRATED_PERMUTATIONS = 100  # per subject; with ~20 the map FWE measured 0.11 at alpha 0.05 (docs/inference.md)


def _load_map(path, shape, n_directions):
    image = load_nifti(path, what="searchlight map")
    data = np.asarray(image.dataobj, dtype=np.float64)
    if data.ndim == 3:
        data = data[..., np.newaxis]
    if data.shape != tuple(shape) + (n_directions,):
        raise InputError(path, "dim", f"the map has shape {data.shape}, expected {tuple(shape) + (n_directions,)} (one volume per direction)",
                         "rerun searchlight_merge with the current analysis")
    return data, np.asarray(image.affine, dtype=np.float64)


def _load_null(path, n_voxels, n_directions):
    try:
        null = np.load(path, mmap_mode="r", allow_pickle=False)
    except (OSError, ValueError) as error:
        raise InputError(path, "content", f"not a readable .npy null ({error})", "rerun searchlight_merge") from None
    if null.ndim != 3 or null.shape[1:] != (n_voxels, n_directions):
        raise InputError(path, "shape", f"the null has shape {null.shape}, expected (n_permutations, {n_voxels}, {n_directions})",
                         "rerun searchlight_merge with the current mask and analysis")
    return null


def _null_mean_batch(nulls, voxel_maps, draws, direction, chance):
    """Group-mean null maps (n_batch, n_voxels) of the given draws (rows of the index matrix)."""
    total = np.zeros((draws.shape[0], voxel_maps[0].size))
    for subject, (null, columns) in enumerate(zip(nulls, voxel_maps)):
        total += np.asarray(null[draws[:, subject]][:, columns, direction], dtype=np.float64)
    return total / len(nulls) - chance


def run(inputs, outputs, params, log):
    """Group maps and table of one analysis; see the module docstring."""
    analysis, subjects, group = params["analysis"], [str(subject) for subject in params["subjects"]], params["group"]
    outline = analysis_outline(analysis)
    directions, chance = outline["directions"], outline["chance"]
    map_paths, null_paths, mask_paths = list(inputs["maps"]), list(inputs["nulls"]), list(inputs["masks"])
    if not (len(map_paths) == len(null_paths) == len(mask_paths) == len(subjects)) or not subjects:
        raise InputError(None, "subjects", f"got {len(map_paths)} maps, {len(null_paths)} nulls and {len(mask_paths)} masks for "
                         f"{len(subjects)} subjects", "pass one map, null and mask per subject, in the order of params subjects")
    masks, affine = [], None
    for path in mask_paths:
        mask, mask_affine = load_brain_mask(path)
        if affine is None:
            affine, shape, first = mask_affine, mask.shape, path
        elif not same_grid(mask.shape, mask_affine, shape, affine, GRID_TOLERANCE_MM):
            raise InputError(path, "affine", f"group maps need all subjects in one space: this mask's grid {mask.shape} "
                             f"(affine {np.round(mask_affine, 3).tolist()}) differs from {first}'s {shape} "
                             f"(affine {np.round(affine, 3).tolist()})",
                             "bring every subject's patterns to one template grid before the searchlight, or run the group step per space")
        masks.append(mask)
    group_mask = np.logical_and.reduce(masks)
    if not group_mask.any():
        raise InputError(None, "masks", "the subjects' brain masks share no voxel", "check the brain masks and the common space")
    coordinates = np.argwhere(group_mask)
    scores, nulls, voxel_maps = [], [], []
    for map_path, null_path, mask in zip(map_paths, null_paths, masks):
        data, map_affine = _load_map(map_path, shape, len(directions))
        if not same_grid(shape, map_affine, shape, affine, GRID_TOLERANCE_MM):
            raise InputError(map_path, "affine", "group maps need all subjects in one space: the map's affine differs from the masks'",
                             "rerun searchlight_merge")
        scores.append(data[group_mask])
        lookup = np.full(shape, -1, dtype=np.int64)
        lookup[mask] = np.arange(int(mask.sum()))
        voxel_maps.append(lookup[group_mask])
        nulls.append(_load_null(null_path, int(mask.sum()), len(directions)))
    scores = np.stack(scores)  # (S, V, D)
    n_subjects, n_voxels = scores.shape[:2]
    n_permutations = {null.shape[0] for null in nulls}
    if len(n_permutations) != 1:
        raise InputError(None, "nulls", f"the subjects' nulls hold different numbers of permutations: {sorted(n_permutations)}",
                         "compute every subject's null with the same searchlight.n_permutations")
    n_permutations = n_permutations.pop()
    n_draws, alpha = int(group["n_draws"]), float(group["alpha"])
    mean = scores.mean(axis=0) - chance
    p_value = np.full((n_voxels, len(directions)), np.nan)
    p_fwe = np.full((n_voxels, len(directions)), np.nan)
    want_tfce = "tfce_map" in outputs or "p_tfce_map" in outputs
    tfce_values = np.zeros((n_voxels, len(directions)))
    p_tfce = np.full((n_voxels, len(directions)), np.nan)
    tested = n_subjects >= MIN_SUBJECTS and n_permutations > 0
    if n_subjects < MIN_SUBJECTS:
        log.warning("analysis %s: %d subject(s) (< %d): group maps of means only, no permutation test", analysis["name"], n_subjects, MIN_SUBJECTS)
    elif n_permutations == 0:
        log.warning("analysis %s: searchlight.n_permutations is 0: group maps of means only, no permutation test", analysis["name"])
    elif n_permutations < MIN_CALIBRATED_PERMUTATIONS:
        # the standardised map maximum estimates each voxel's null SD from the subjects' permutations:
        # with ~20 per subject the family-wise rate measured 0.11 at alpha 0.05 (docs/inference.md)
        log.warning("analysis %s: searchlight.n_permutations is %d (< %d): the map's p_fwe may not hold its level; "
                    "raise searchlight.n_permutations to %d or more", analysis["name"], n_permutations,
                    MIN_CALIBRATED_PERMUTATIONS, MIN_CALIBRATED_PERMUTATIONS)
    if tested:
        rng = np.random.default_rng(seed_from(params["seed"], "searchlight-group", analysis["name"]))
        indices = draw_indices(rng, n_permutations, n_subjects, n_draws)
        # each voxel standardised by its own null before the map's maximum (min_p is offered for ROI tables only)
        results = group_permutation_maps(scores, nulls, indices, chance, voxel_maps=voxel_maps, fwe_method="standardised")
        p_value, p_fwe = results["p"], results["p_fwe"]
        log.info("analysis %s: %d subjects, %d group voxels, %d permutations per subject, %d group draws",
                 analysis["name"], n_subjects, n_voxels, n_permutations, n_draws)
    if want_tfce:
        for direction in range(len(directions)):
            observed_volume = np.zeros(shape)
            observed_volume[group_mask] = mean[:, direction]
            step = max(float(observed_volume.max()), 0.0) / 100.0
            tfce_values[:, direction] = tfce(observed_volume, group_mask, step=step or None)[group_mask]
            if not tested:
                continue
            if step == 0:  # no voxel above chance: TFCE is 0 everywhere and nothing can be significant
                p_tfce[:, direction] = 1.0
                continue
            null_max = np.empty(n_draws)
            for start in range(0, n_draws, _TFCE_BATCH):
                draws = indices[start:start + _TFCE_BATCH]
                volumes = np.zeros((draws.shape[0],) + tuple(shape))
                volumes[:, group_mask] = _null_mean_batch(nulls, voxel_maps, draws, direction, chance)
                null_max[start:start + draws.shape[0]] = tfce(volumes, group_mask, step=step).reshape(draws.shape[0], -1).max(axis=1)
            family_max = np.sort(null_max)
            below = np.searchsorted(family_max, tfce_values[:, direction] - TIE_TOLERANCE, side="left")
            p_tfce[:, direction] = (1.0 + n_draws - below) / (1.0 + n_draws)

    def volume_of(values, outside):
        volume = np.full(tuple(shape) + (len(directions),), outside, dtype=np.float32)
        volume[group_mask] = values
        return volume

    save_nifti(outputs["mean_map"], volume_of(mean, 0.0), affine)
    save_nifti(outputs["p_map"], volume_of(p_value, 1.0), affine)
    save_nifti(outputs["p_fwe_map"], volume_of(p_fwe, 1.0), affine)
    if "tfce_map" in outputs:
        save_nifti(outputs["tfce_map"], volume_of(tfce_values, 0.0), affine)
    if "p_tfce_map" in outputs:
        save_nifti(outputs["p_tfce_map"], volume_of(p_tfce, 1.0), affine)

    rows = []
    for direction, name in enumerate(directions):
        peak = int(np.argmax(mean[:, direction]))  # the first voxel in C order on ties
        row = {"analysis": analysis["name"], "direction": name, "n_subjects": n_subjects, "n_brain_voxels": n_voxels, "chance": chance,
               "n_permutations": n_permutations, "n_draws": n_draws if tested else 0, "alpha": alpha,
               "n_voxels_p_below_alpha": int((p_value[:, direction] < alpha).sum()) if tested else np.nan,
               "n_voxels_p_fwe_below_alpha": int((p_fwe[:, direction] < alpha).sum()) if tested else np.nan,
               "peak_accuracy": mean[peak, direction] + chance, "peak_i": int(coordinates[peak, 0]), "peak_j": int(coordinates[peak, 1]),
               "peak_k": int(coordinates[peak, 2]), "peak_p": p_value[peak, direction], "peak_p_fwe": p_fwe[peak, direction]}
        if want_tfce:
            row["n_voxels_p_tfce_below_alpha"] = int((p_tfce[:, direction] < alpha).sum()) if tested else np.nan
        rows.append(row)
        log.info("%s %s: peak accuracy %.4f at voxel %s, %s voxel(s) with p_fwe < %g", analysis["name"], name, row["peak_accuracy"],
                 coordinates[peak].tolist(), row["n_voxels_p_fwe_below_alpha"], alpha)
    table = pd.DataFrame(rows)
    for column in ("n_voxels_p_below_alpha", "n_voxels_p_fwe_below_alpha", "n_voxels_p_tfce_below_alpha"):
        if column in table:
            table[column] = table[column].astype("Int64")
    write_tsv(outputs["table"], table)
