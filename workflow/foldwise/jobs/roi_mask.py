"""Job: one subject's mask of one ROI (atlas labels, an image, or a sphere), inside the brain mask.

A localizer ROI has a step of its own (:mod:`foldwise.jobs.localizer_roi`),
which reuses :func:`defined_region` for its anatomical constraint; this
module imports nothing of the GLM, so a GLM edit reruns no plain ROI mask.
"""

import numpy as np

from foldwise.errors import InputError
from foldwise.data.fileio import load_nifti, read_tsv, save_nifti, write_json
from foldwise.masks.build import resample_nearest, restrict_to_brain, roi_from_image, roi_from_labels, sphere_mask
from foldwise.contract import GRID_TOLERANCE_MM, read_brain_mask

__all__ = ["run"]

_DEFAULT_MIN_VOXELS = 10  # the schema's default, for entries not filled by validation


def _needed(inputs, name, roi):
    path = inputs.get(name)
    if not path:
        raise InputError(None, name, f"ROI {roi} needs the {name} input but none was given", "set dataset.atlas_image / atlas_labels")
    return path


def run(inputs, outputs, params, log):
    """Write ``mask`` (uint8 NIfTI on the brain-mask grid) and ``info`` (JSON) for one subject and ROI."""
    entry, subject = params["roi"], params["subject"]
    if "localizer" in entry:  # its own step (foldwise.jobs.localizer_roi), so this step's code key leaves the GLM out
        raise InputError(None, f"rois[{entry['name']}]", "a localizer ROI is built by the localizer_roi step, not roi_mask",
                         "plan the ROI's jobs through foldwise.plan (RoiKind.step)")
    name = entry["name"]
    min_voxels = int(entry.get("min_voxels", _DEFAULT_MIN_VOXELS))
    brain, affine = read_brain_mask(inputs["brain_mask"])
    shape = brain.shape
    roi, source = defined_region(entry, inputs, shape, affine, name)
    kept = restrict_to_brain(roi, brain, min_voxels, subject, name, source_file=source)
    save_nifti(outputs["mask"], kept.astype(np.uint8), affine, dtype=np.uint8)
    write_json(outputs["info"], {"roi": name, "subject": subject, "n_voxels": int(kept.sum()), "min_voxels": min_voxels,
                                 "definition": entry})


def defined_region(entry, inputs, shape, affine, name):
    """The region an entry with ``labels``, ``image`` or ``sphere`` defines, on the grid ``(shape, affine)``.

    Also the anatomical constraint of a localizer ROI (its ``within`` entry).

    Returns
    -------
    roi : ndarray of bool
    source : str
        The file the region comes from (named in messages).
    """
    if "labels" in entry:
        atlas_path, labels_path = _needed(inputs, "atlas", name), _needed(inputs, "atlas_labels", name)
        table = read_tsv(labels_path, required_columns=("index", "name"), what="atlas label table")
        atlas_image = load_nifti(atlas_path, what="atlas")
        atlas = resample_nearest(atlas_image.get_fdata(caching="unchanged", dtype=np.float32), atlas_image.affine,
                                 shape, affine, GRID_TOLERANCE_MM, source_file=atlas_path)
        roi = roi_from_labels(atlas, table, entry["labels"], entry.get("threshold"), source_file=labels_path)
        source = atlas_path
    elif "image" in entry:
        image_path = _needed(inputs, "image", name)
        image = load_nifti(image_path, what="ROI image")
        data = resample_nearest(image.get_fdata(caching="unchanged", dtype=np.float32), image.affine, shape, affine,
                                GRID_TOLERANCE_MM, source_file=image_path)
        roi = roi_from_image(data, entry.get("threshold"), source_file=image_path)
        source = image_path
    elif "sphere" in entry:
        roi = sphere_mask(entry["sphere"]["center_mm"], entry["sphere"]["radius_mm"], shape, affine)
        source = inputs["brain_mask"]
    else:
        raise InputError(None, f"rois[{name}]", "the ROI entry has none of labels, image, sphere", "give exactly one of them")
    return roi, source
