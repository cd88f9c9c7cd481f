"""Group maps of searchlight scores: Stelzer-style permutation p-values, family-wise correction and TFCE.

Moved out of :mod:`foldwise.searchlight.engine` so that a searchlight block
(per-subject decoding) imports no group statistics. Used by the
``searchlight_group`` job.

``group_permutation_maps``   group mean, p and family-wise corrected p per voxel and direction
``tfce``                     threshold-free cluster enhancement of one or several maps
"""

import numpy as np
import scipy.ndimage

from foldwise.errors import InputError
from foldwise.stats.group import FWE_METHODS, TIE_TOLERANCE, group_mean_null

__all__ = ["TFCE_EXTENT_EXPONENT", "TFCE_HEIGHT_EXPONENT", "TFCE_N_STEPS", "group_permutation_maps", "tfce"]

# TFCE defaults of Smith & Nichols (2009), NeuroImage 44:83-98 (E = 0.5,
# H = 2; from memory). The integral over heights is a sum of N_STEPS equal
# steps up to the map's maximum (common practice, no source for the count).
TFCE_EXTENT_EXPONENT = 0.5
TFCE_HEIGHT_EXPONENT = 2.0
TFCE_N_STEPS = 100
# Largest work array, in float64 elements (32 MB); chunk sizes depend only on shapes (deterministic).
_CHUNK_ELEMENTS = 1 << 22


def _fail(field, problem, fix, file=None):
    raise InputError(file, field, problem, fix)


def group_permutation_maps(subject_scores, subject_nulls, indices, chance, voxel_maps=None, tolerance=TIE_TOLERANCE,
                           fwe_method="standardised"):
    """Group mean maps with Stelzer-style permutation p-values and max-statistic FWE p-values.

    Parameters
    ----------
    subject_scores : array_like, shape (n_subjects, n_voxels, n_directions)
        Each subject's accuracy map at the group's voxels.
    subject_nulls : sequence of array_like, each (n_permutations, n_subject_voxels, n_directions)
        Each subject's permutation maps (may be memory-mapped; read in voxel
        chunks). Permutation ``k`` of a subject is one relabeling for all its
        voxels, so every draw below is a joint null over the brain.
    indices : array_like of int, shape (n_draws, n_subjects)
        Which permutation of each subject enters each draw
        (:func:`foldwise.stats.group.draw_indices`).
    chance : float
        Chance accuracy (1 / number of classes).
    voxel_maps : sequence of array_like of int, optional
        Per subject, the column of its null holding each group voxel
        (default: the identity, nulls already on the group voxels).
    tolerance : float
        Null values within ``tolerance`` below the observed count as ties.
    fwe_method : {"standardised", "raw"}
        ``standardised`` (default): each voxel's group mean and null draws
        are centred and scaled by that voxel's null mean and SD before the
        maximum over the map, so voxels whose nulls are wider (fewer test
        patterns in a sphere at the brain's edge, different spheres) do not
        dominate the family (as :func:`foldwise.stats.group.standardised_max_p`).
        ``raw``: the maximum of the group mean minus chance.

    Returns
    -------
    dict
        ``mean`` (n_voxels, n_directions): group mean minus chance;
        ``p`` (same shape): ``(1 + #{draws with null mean >= observed}) /
        (1 + n_draws)``; ``p_fwe``: ``(1 + #{draws whose maximum over the
        direction's voxels >= observed}) / (1 + n_draws)``, both on the
        standardised scale by default; ``null_max`` (n_draws, n_directions):
        each draw's maximum over voxels (on that scale).

    Notes
    -----
    The group-level null of Stelzer, Chen & Turner (2013), NeuroImage
    65:69-82: one permutation map per subject, drawn with replacement, is
    averaged, many times (:func:`foldwise.stats.group.group_mean_null`, run here on
    chunks of voxels so that only ``n_draws x chunk`` values are held at
    once). The family-wise correction is the maximum statistic of Nichols &
    Holmes (2002), Human Brain Mapping 15:1-25, over the voxels of each
    direction's map, with the same draws for every voxel, each voxel first
    standardised by its own null (Westfall & Young 1993, Resampling-Based
    Multiple Testing, Wiley); p-values count the
    observed labeling as one draw (Phipson & Smyth 2010, Stat. Appl. Genet.
    Mol. Biol. 9:39), as :func:`foldwise.stats.group.permutation_p` and
    :func:`foldwise.stats.group.max_statistic_p` do.
    """
    scores = np.asarray(subject_scores, dtype=np.float64)
    if scores.ndim != 3 or scores.shape[0] < 1:
        _fail("maps", f"expected (n_subjects, n_voxels, n_directions) scores, got shape {scores.shape}", "stack one map per subject")
    n_subjects, n_voxels, n_directions = scores.shape
    if len(subject_nulls) != n_subjects:
        _fail("nulls", f"expected {n_subjects} subject nulls, got {len(subject_nulls)}", "give one null per subject")
    indices = np.asarray(indices)
    if indices.ndim != 2 or indices.shape[1] != n_subjects or not np.issubdtype(indices.dtype, np.integer):
        _fail("indices", f"expected integer indices of shape (n_draws, {n_subjects}), got {indices.dtype} {indices.shape}", "use foldwise.stats.group.draw_indices")
    n_permutations = {int(np.shape(null)[0]) for null in subject_nulls}
    if len(n_permutations) != 1 or any(np.ndim(null) != 3 or np.shape(null)[2] != n_directions for null in subject_nulls):
        _fail("nulls", f"subject nulls must share (n_permutations, *, {n_directions}); got shapes {[np.shape(null) for null in subject_nulls]}",
              "compute every subject's null with the same searchlight settings")
    if voxel_maps is None:
        voxel_maps = [np.arange(n_voxels)] * n_subjects
    voxel_maps = [np.asarray(columns, dtype=np.int64) for columns in voxel_maps]
    if len(voxel_maps) != n_subjects or any(columns.shape != (n_voxels,) for columns in voxel_maps):
        _fail("voxel_maps", f"expected {n_subjects} index arrays of shape ({n_voxels},)", "map every group voxel in every subject")
    if fwe_method not in FWE_METHODS[:1] + ("raw",):
        _fail("group.fwe_method", f"searchlight maps take standardised or raw, got {fwe_method!r}",
              "set group.fwe_method to standardised (min_p is for ROI tables)")
    observed = scores.mean(axis=0) - chance
    n_draws = indices.shape[0]
    at_least = np.zeros((n_voxels, n_directions), dtype=np.int64)
    null_max = np.full((n_draws, n_directions), -np.inf)
    observed_scaled = np.empty_like(observed)
    step = max(1, _CHUNK_ELEMENTS // max(1, n_draws))
    for direction in range(n_directions):
        for start in range(0, n_voxels, step):
            stop = min(start + step, n_voxels)
            chunk_nulls = np.stack([np.asarray(null[:, columns[start:stop], direction], dtype=np.float64)
                                    for null, columns in zip(subject_nulls, voxel_maps)])
            null_mean = group_mean_null(chunk_nulls, indices) - chance  # (n_draws, chunk)
            chunk_observed = observed[start:stop, direction]
            at_least[start:stop, direction] = (null_mean >= chunk_observed - tolerance).sum(axis=0)
            if fwe_method == "standardised":  # each voxel on the scale of its own null (ties shifted first, as in group.py)
                members = np.vstack([chunk_observed[np.newaxis], null_mean])  # observed and draws alike (symmetric)
                centre, spread = members.mean(axis=0), members.std(axis=0)
                constant = spread <= 0
                safe = np.where(constant, 1.0, spread)
                scaled_observed = np.where(constant, np.where(chunk_observed - tolerance > centre, np.inf, 0.0),
                                           (chunk_observed - tolerance - centre) / safe)
                null_mean = np.where(constant, 0.0, (null_mean - centre) / safe)
            else:
                scaled_observed = chunk_observed - tolerance
            observed_scaled[start:stop, direction] = scaled_observed
            np.maximum(null_max[:, direction], null_mean.max(axis=1), out=null_max[:, direction])
    p_value = (1.0 + at_least) / (1.0 + n_draws)
    p_fwe = np.empty_like(p_value)
    for direction in range(n_directions):
        family_max = np.sort(null_max[:, direction])
        below = np.searchsorted(family_max, observed_scaled[:, direction], side="left")
        p_fwe[:, direction] = (1.0 + n_draws - below) / (1.0 + n_draws)
    return {"mean": observed, "p": p_value, "p_fwe": p_fwe, "null_max": null_max}


def tfce(maps, mask, extent_exponent=TFCE_EXTENT_EXPONENT, height_exponent=TFCE_HEIGHT_EXPONENT, step=None, connectivity=26):
    """Threshold-free cluster enhancement of one or several 3D maps (positive part).

    Parameters
    ----------
    maps : array_like, shape (x, y, z) or (n_maps, x, y, z)
        Statistic maps (here: group mean accuracy minus chance).
    mask : array_like of bool, shape (x, y, z)
        Voxels that count; everything outside is treated as 0.
    extent_exponent, height_exponent : float
        ``E`` and ``H`` of the TFCE integral (defaults 0.5 and 2).
    step : float, optional
        Height step ``dh``; default the largest value over all maps divided
        by ``TFCE_N_STEPS``. Pass the observed map's step when enhancing null
        maps so observed and null share one integral.
    connectivity : {26, 6}
        Voxels that touch by a corner (26) or by a face (6) are neighbours.

    Returns
    -------
    ndarray of float64, the shape of ``maps``
        ``TFCE(v) = sum over h = dh, 2 dh, ... <= map(v) of e(h)^E h^H dh``,
        where ``e(h)`` is the voxel count of the cluster holding ``v`` in
        the map thresholded at ``h`` (>= h); 0 where the map is <= 0.

    Notes
    -----
    Smith & Nichols (2009), NeuroImage 44:83-98, with their recommended
    ``E = 0.5, H = 2`` (from memory) and the integral taken as a left Riemann
    sum in equal steps (the heights ``h = k dh``, each weighing ``dh``).
    Several maps are labelled in one call of ``scipy.ndimage.label`` with a
    structure that joins no voxels across maps.

    Examples
    --------
    >>> line = np.zeros((1, 1, 5)); line[0, 0, 1:4] = [1.0, 2.0, 1.0]
    >>> tfce(line, np.ones((1, 1, 5), bool), step=1.0)[0, 0].tolist()  # h=1: e=3; h=2: e=1
    [0.0, 1.7320508075688772, 5.732050807568877, 1.7320508075688772, 0.0]
    """
    array = np.asarray(maps, dtype=np.float64)
    single = array.ndim == 3
    stack = array[np.newaxis] if single else array
    mask = np.asarray(mask, dtype=bool)
    if stack.ndim != 4 or mask.shape != stack.shape[1:]:
        _fail("maps", f"expected (x, y, z) or (n, x, y, z) maps matching the mask {mask.shape}, got {array.shape}", "pass maps on the mask's grid")
    if connectivity not in (6, 26):
        _fail("connectivity", f"expected 6 or 26, got {connectivity!r}", "use 26 (corners touch) or 6 (faces touch)")
    for name, value in (("extent_exponent", extent_exponent), ("height_exponent", height_exponent)):
        if not np.isscalar(value) or not np.isfinite(value) or value <= 0:
            _fail(name, f"expected a positive number, got {value!r}", "use the defaults E = 0.5, H = 2")
    values = np.where(mask[np.newaxis] & np.isfinite(stack), stack, 0.0)
    top = float(values.max()) if values.size else 0.0
    if step is None:
        step = top / TFCE_N_STEPS
    if not np.isscalar(step) or not np.isfinite(step) or step < 0:
        _fail("step", f"expected a non-negative height step, got {step!r}", "pass a step > 0")
    enhanced = np.zeros_like(values)
    if top <= 0 or step == 0:
        return enhanced[0] if single else enhanced
    # Voxels outside the mask are 0 and never join a cluster: work inside the mask's bounding box.
    inside = np.argwhere(mask)
    box = (slice(None),) + tuple(slice(low, high + 1) for low, high in zip(inside.min(axis=0), inside.max(axis=0)))
    cropped = values[box]
    total = np.zeros_like(cropped)
    structure = np.zeros((3, 3, 3, 3), dtype=bool)  # no links across maps (the first axis)
    structure[1] = scipy.ndimage.generate_binary_structure(3, 3 if connectivity == 26 else 1)
    n_steps = int(np.floor(top / step + 1e-9))
    for level in range(1, n_steps + 1):
        height = level * step
        labelled, n_clusters = scipy.ndimage.label(cropped >= height, structure=structure)
        if n_clusters == 0:
            break
        extents = np.bincount(labelled.ravel(), minlength=n_clusters + 1).astype(np.float64)
        gain = extents**extent_exponent * (height**height_exponent * step)  # one value per cluster
        gain[0] = 0.0  # label 0: below the height
        total += gain[labelled]
    enhanced[box] = total
    return enhanced[0] if single else enhanced
