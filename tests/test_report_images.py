"""The report's quality-check images drawn into pixels (foldwise.report.images), checked against outside references.

References: matplotlib's viridis table (the colour map the anchors come
from), scipy.ndimage.binary_erosion (a mask's outline), nibabel's
apply_affine (where a voxel lies in mm), the PNG specification (chunks).
"""

import io
import struct

import numpy as np
import pytest
from PIL import Image

from foldwise.errors import InputError
from foldwise.report import images


def _png_chunk_types(data):
    """Chunk types of a PNG (Source: PNG specification, 5.3: length, type, data, CRC)."""
    types, offset = [], 8
    while offset < len(data):
        length = struct.unpack(">I", data[offset:offset + 4])[0]
        types.append(data[offset + 4:offset + 8])
        offset += 12 + length
    return types


def _volumes(shape=(12, 10, 8), seed=3):
    rng = np.random.default_rng(seed)
    x, y, z = np.meshgrid(*[np.linspace(-1, 1, n) for n in shape], indexing="ij")
    brain = x ** 2 + y ** 2 + z ** 2 < 0.8
    mean = np.where(brain, 900 + 50 * rng.random(shape), 20 * rng.random(shape))
    roi = brain & (x > 0.3)
    return mean, brain, roi


def test_viridis_anchors_stay_within_6_of_255_of_matplotlibs_table():
    from matplotlib import colormaps  # reference: matplotlib's own 256-entry viridis

    reference = np.round(colormaps["viridis"](np.linspace(0.0, 1.0, 256))[:, :3] * 255)
    assert np.abs(images.viridis_lookup().astype(float) - reference).max() <= 6


def test_mask_edges_are_the_mask_minus_its_erosion():
    from scipy import ndimage  # reference: erosion by the 4-neighbour cross, outside the image counts as empty

    rng = np.random.default_rng(0)
    for _ in range(5):
        mask = rng.random((15, 11)) < 0.6
        eroded = ndimage.binary_erosion(mask, structure=ndimage.generate_binary_structure(2, 1), border_value=0)
        assert np.array_equal(images.mask_edges(mask), mask & ~eroded)


def test_slices_put_the_smallest_world_coordinate_left_and_down_with_voxels_sized_in_mm():
    import nibabel as nib

    affine = np.diag([-2.0, 3.0, 4.0, 1.0])
    affine[:3, 3] = [10.0, -15.0, -14.0]
    shape = (6, 5, 4)
    volume = np.arange(np.prod(shape), dtype=float).reshape(shape)
    slicer = images._Slicer(affine, shape, panel_px=60)
    oriented = slicer.orient(volume)
    pixels = slicer.pixels(oriented, 2, 1)  # axial: x to the right, y up
    # the bottom-left pixel is the voxel with the smallest x and y (nibabel's voxel -> mm mapping)
    ijk = np.argwhere(volume == pixels[-1, 0])[0]
    corners = nib.affines.apply_affine(affine, np.array([[i, j, ijk[2]] for i in range(shape[0]) for j in range(shape[1])]))
    assert tuple(nib.affines.apply_affine(affine, ijk)[:2]) == (corners[:, 0].min(), corners[:, 1].min())
    # a voxel is a block of pixels proportional to its size in mm: x 2 mm, y 3 mm
    width_mm, height_mm = shape[0] * 2.0, shape[1] * 3.0
    assert pixels.shape == (round(height_mm * slicer.px_per_mm), round(width_mm * slicer.px_per_mm))
    assert slicer.sides(2) and not slicer.sides(0)  # L and R only where x runs across the panel


def test_quality_images_are_deterministic_pngs_without_time_and_show_every_subject():
    mean, brain, roi = _volumes()
    affine = np.diag([3.0, 3.0, 3.0, 1.0])
    one = images.roi_masks_png("ember", [("sub-01", mean, brain, roi)], affine, images.roi_colour(0), "ROI ember")
    three = images.roi_masks_png("ember", [(f"sub-0{k}", mean, brain, roi) for k in (1, 2, 3)], affine,
                                 images.roi_colour(0), "ROI ember")
    assert three == images.roi_masks_png("ember", [(f"sub-0{k}", mean, brain, roi) for k in (1, 2, 3)], affine,
                                         images.roi_colour(0), "ROI ember")
    for data in (one, three, images.brain_mask_png(mean, brain, affine, "brain"),
                 images.resvar_png(np.where(brain, mean, 0.0), brain, affine, "resvar")):
        assert data[:8] == b"\x89PNG\r\n\x1a\n" and b"tIME" not in _png_chunk_types(data)
    heights = [Image.open(io.BytesIO(data)).size[1] for data in (one, three)]
    assert heights[1] > 2.5 * heights[0] * 0.8  # one row of panels per subject


def test_the_roi_fill_is_its_colour_over_the_grey_image_and_every_roi_voxel_is_coloured():
    mean, brain, roi = _volumes()
    affine = np.diag([3.0, 3.0, 3.0, 1.0])
    colour = images.roi_colour(1)
    picture = np.asarray(Image.open(io.BytesIO(images.roi_masks_png("glow", [("sub-01", mean, brain, roi)], affine,
                                                                     colour, "ROI glow"))).convert("RGB")).astype(float)
    # every pixel of the fill lies between the colour at 0.55 over black and over white (Porter & Duff "over")
    low, high = 0.55 * np.asarray(colour), 0.55 * np.asarray(colour) + 0.45 * 255
    tinted = np.all((picture >= low - 1) & (picture <= high + 1), axis=2) & (np.ptp(picture, axis=2) > 30)
    assert tinted.sum() > 50
    # the legend names the ROI in its colour: the colour appears as a pure swatch somewhere
    assert np.any(np.all(np.abs(picture - np.asarray(colour)) <= 1, axis=2))


def test_a_mask_on_another_grid_is_refused():
    mean, brain, roi = _volumes()
    with pytest.raises(InputError):
        images.brain_mask_png(mean, brain[:-1], np.eye(4), "bad")
