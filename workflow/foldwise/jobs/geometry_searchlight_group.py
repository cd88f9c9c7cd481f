"""Job: group maps of a geometry searchlight -- mean fit, sign-flip p and FWE-corrected p per model and voxel."""

import numpy as np
import pandas as pd
from matplotlib.figure import Figure

from foldwise.contract import GRID_TOLERANCE_MM, read_brain_mask
from foldwise.data.fileio import load_nifti, save_figure, save_nifti, write_tsv
from foldwise.errors import InputError
from foldwise.geometry.inference import sign_flips, signflip_test
from foldwise.masks.build import same_grid
from foldwise.provenance.hashing import seed_from

__all__ = ["run", "GROUP_MAP_COLUMNS", "map_figure"]

GROUP_MAP_COLUMNS = ("analysis", "model", "comparison", "n_subjects", "n_voxels", "n_flips", "exact", "alpha", "n_voxels_p_below_alpha",
                     "n_voxels_p_fwe_below_alpha", "peak_mean", "peak_i", "peak_j", "peak_k", "peak_p_fwe")
_N_SLICES = 5


def map_figure(mean_maps, significant, mask, models, title, fit_label):
    """Axial slices of each model's group mean fit map; voxels with p_fwe <= alpha outlined in black."""
    n_models = len(models)
    slices = np.unique(np.linspace(0, mask.shape[2] - 1, _N_SLICES + 2).round().astype(int)[1:-1])
    figure = Figure(figsize=(1.5 * slices.size + 0.8, 1.6 * n_models + 0.5))
    top = float(np.nanmax(np.abs(mean_maps))) or 1.0
    for m, model in enumerate(models):
        for s, k in enumerate(slices):
            ax = figure.add_subplot(n_models, slices.size, m * slices.size + s + 1)
            shown = np.where(mask[:, :, k], mean_maps[:, :, k, m], np.nan).T
            image = ax.imshow(shown, cmap="viridis", vmin=-top, vmax=top, origin="lower", interpolation="nearest")
            if significant[:, :, k, m].any():
                ax.contour(significant[:, :, k, m].T.astype(float), levels=[0.5], colors="black", linewidths=0.6)
            ax.set_xticks([])
            ax.set_yticks([])
            if s == 0:
                ax.set_ylabel(model, fontsize=6)
            if m == 0:
                ax.set_title(f"k = {k}", fontsize=6)
    bar = figure.colorbar(image, ax=figure.axes, fraction=0.02, pad=0.02)
    bar.ax.tick_params(labelsize=5)
    bar.set_label(fit_label, fontsize=6)
    figure.suptitle(title, fontsize=7)
    return figure


def run(inputs, outputs, settings, log):
    """Write the mean, p and p_fwe maps (4D, one volume per model), the table and a slice figure."""
    analysis, subjects = settings["analysis"], list(settings["subjects"])
    name, geometry = analysis["name"], analysis["geometry"]
    models = [model["name"] for model in geometry["models"]]
    if len(subjects) < 2:
        raise InputError("the study config", "dataset.subjects", "group maps need two or more subjects", "add subjects")
    masks, maps, affine, shape = [], [], None, None
    for map_path, mask_path in zip(inputs["maps"], inputs["masks"]):
        mask, mask_affine = read_brain_mask(mask_path)
        image = load_nifti(map_path, what="geometry searchlight map")
        if affine is None:
            affine, shape = mask_affine, mask.shape
        if mask.shape != shape or not same_grid(mask.shape, mask_affine, shape, affine, GRID_TOLERANCE_MM):
            raise InputError(mask_path, "affine", "subjects' brain masks are on different grids",
                             "bring every subject to one grid (space) before a group searchlight")
        data = np.asarray(image.dataobj, dtype=np.float64)
        if data.shape != shape + (len(models),):
            raise InputError(map_path, "dim", f"expected {len(models)} model volumes on the mask's grid, got shape {data.shape}",
                             "rerun the geometry_searchlight step")
        masks.append(mask)
        maps.append(data)
    common = np.logical_and.reduce(masks)
    fits = np.stack([data[common] for data in maps])  # (subjects, voxels, models)
    n_voxels = fits.shape[1]
    rng = np.random.default_rng(seed_from(settings["seed"], "geometry_searchlight_group", name))
    flips, exact = sign_flips(len(subjects), int(settings["group"]["n_draws"]), rng)
    tested = signflip_test(fits.reshape(len(subjects), -1), flips)  # one family: every voxel x model
    alpha = float(settings["group"]["alpha"])
    mean = fits.mean(axis=0)
    p_value, p_fwe = tested["p"].reshape(n_voxels, -1), tested["p_fwe"].reshape(n_voxels, -1)

    def volume(values):
        grid = np.zeros(shape + (len(models),), dtype=np.float32)
        grid[common] = values
        return grid

    save_nifti(outputs["mean_map"], volume(mean), affine)
    save_nifti(outputs["p_map"], volume(p_value), affine)
    save_nifti(outputs["p_fwe_map"], volume(p_fwe), affine)
    coordinates = np.argwhere(common)
    rows = []
    for m, model in enumerate(models):
        peak = int(np.argmax(mean[:, m]))
        rows.append({"analysis": name, "model": model, "comparison": geometry["comparison"], "n_subjects": len(subjects),
                     "n_voxels": n_voxels, "n_flips": flips.shape[0], "exact": exact, "alpha": alpha,
                     "n_voxels_p_below_alpha": int((p_value[:, m] <= alpha).sum()),
                     "n_voxels_p_fwe_below_alpha": int((p_fwe[:, m] <= alpha).sum()), "peak_mean": float(mean[peak, m]),
                     "peak_i": int(coordinates[peak, 0]), "peak_j": int(coordinates[peak, 1]), "peak_k": int(coordinates[peak, 2]),
                     "peak_p_fwe": float(p_fwe[peak, m])})
    write_tsv(outputs["table"], pd.DataFrame(rows, columns=list(GROUP_MAP_COLUMNS)))
    significant = volume(p_fwe <= alpha) > 0
    save_figure(map_figure(volume(mean), significant, common, models,
                           f"{name}: geometry searchlight, group mean fit (outlined: p_fwe <= {alpha:g}, every voxel x model)",
                           geometry["comparison"]), outputs["figure"])
    log.info("%s: %d voxels, %d flips; voxels with p_fwe <= %g: %s", name, n_voxels, flips.shape[0], alpha,
             ", ".join(f"{row['model']} {row['n_voxels_p_fwe_below_alpha']}" for row in rows))
