"""Job: gather one subject's searchlight blocks into maps (one subject x analysis).

Inputs
    ``scores`` (list over blocks, in block order), ``nulls`` (list, same
    order): the outputs of :mod:`foldwise.jobs.searchlight_block`; ``mask``:
    the subject's brain mask.
Params
    ``searchlight`` (the config section), ``analysis`` (one ``analyses``
    entry), ``subject``.
Outputs
    ``map``: 4D float32 NIfTI, one volume per direction, the balanced
    accuracy of the sphere centred on each voxel (0 outside the brain);
    ``directions``: TSV ``volume, direction`` (volume 0-based);
    ``null``: .npy float32 ``(n_permutations, n_brain_voxels, n_directions)``,
    brain voxels in C order of the mask.
"""

import numpy as np
import pandas as pd

from foldwise.errors import InputError
from foldwise.data.fileio import save_npy, save_nifti, write_tsv
from foldwise.searchlight.engine import analysis_outline, block_centres
from foldwise.contract import read_brain_mask as load_brain_mask

__all__ = ["run"]


def _load_block(path, what, expected_shape):
    try:
        array = np.load(path, allow_pickle=False)
    except (OSError, ValueError) as error:
        raise InputError(path, "content", f"the searchlight {what} is not a readable .npy file ({error})", "rerun its searchlight_block job") from None
    if array.shape != expected_shape:
        raise InputError(path, "shape", f"the searchlight {what} has shape {array.shape}, expected {expected_shape}",
                         "rerun the block jobs with the current settings and mask")
    return array


def run(inputs, outputs, params, log):
    """Merge the block outputs of one subject into a map, a direction table and a null; see the module docstring."""
    settings, analysis = params["searchlight"], params["analysis"]
    mask, affine = load_brain_mask(inputs["mask"])
    n_voxels = int(mask.sum())
    directions = analysis_outline(analysis)["directions"]
    score_paths, null_paths = list(inputs["scores"]), list(inputs["nulls"])
    n_blocks = settings["n_blocks"]
    if len(score_paths) != n_blocks or len(null_paths) != n_blocks:
        raise InputError(None, "searchlight.n_blocks", f"expected {n_blocks} score and null files, got {len(score_paths)} and {len(null_paths)}",
                         "pass every block's outputs, in block order")
    n_permutations = settings["n_permutations"]
    scores, nulls = [], []
    for block, (score_path, null_path) in enumerate(zip(score_paths, null_paths)):
        n_centres = block_centres(n_voxels, n_blocks, block).size
        scores.append(_load_block(score_path, "scores", (n_centres, len(directions))))
        nulls.append(_load_block(null_path, "null", (n_permutations, n_centres, len(directions))))
    merged = np.concatenate(scores, axis=0).astype(np.float32)
    volume = np.zeros(mask.shape + (len(directions),), dtype=np.float32)
    volume[mask] = merged
    save_nifti(outputs["map"], volume, affine)
    write_tsv(outputs["directions"], pd.DataFrame({"volume": np.arange(len(directions), dtype=np.int64), "direction": directions}))
    save_npy(outputs["null"], np.concatenate(nulls, axis=1).astype(np.float32))
    log.info("sub-%s %s: merged %d blocks into %d voxels x %d direction(s); peak balanced accuracy %s",
             params["subject"], analysis["name"], n_blocks, n_voxels, len(directions),
             ", ".join(f"{name} {value:.4f}" for name, value in zip(directions, merged.max(axis=0))))
