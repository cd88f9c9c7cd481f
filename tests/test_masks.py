"""Tests of foldwise.masks.build and the brain-mask and ROI-mask job functions.

Outside references: OEIS A000605 (lattice points in a ball), scipy.ndimage's
affine_transform (order 0) for nearest-neighbour resampling.
"""

import itertools
import json
import logging
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
import scipy.ndimage
from hypothesis import given, settings
from hypothesis import strategies as st

from foldwise.masks import build as masks
from foldwise.errors import InputError
from foldwise.data.fileio import load_nifti, save_nifti, write_tsv
from foldwise.jobs import brain_mask as brain_mask_job
from foldwise.jobs import roi_mask as roi_mask_job

LOG = logging.getLogger("test_masks")


def _assert_input_error(excinfo, *parts):
    error = excinfo.value
    assert error.field and error.fix and "Fix:" in str(error)
    for part in parts:
        assert str(part) in str(error), (part, str(error))


def _centred_affine(shape, voxel_mm):
    affine = np.diag([voxel_mm, voxel_mm, voxel_mm, 1.0])
    affine[:3, 3] = -voxel_mm * (np.asarray(shape) - 1) / 2.0
    return affine


# ---------------------------------------------------------------- spheres


@pytest.mark.parametrize("radius_mm, expected", [(1, 7), (2, 33), (3, 123), (4, 257), (5, 515)])
def test_sphere_counts_match_lattice_points_in_a_ball(radius_mm, expected):
    # Source: OEIS A000605, number of integer points (x, y, z) with x^2 + y^2 + z^2 <= n^2
    # (values 1, 7, 33, 123, 257, 515 for n = 0..5; quoted from memory and from the brief).
    shape = (13, 13, 13)
    mask = masks.sphere_mask([0.0, 0.0, 0.0], float(radius_mm), shape, _centred_affine(shape, 1.0))
    assert int(mask.sum()) == expected
    assert mask[6, 6, 6] and mask[6 + radius_mm, 6, 6] and not mask[6 + radius_mm, 1 + 6, 6]


def test_sphere_on_an_anisotropic_sheared_grid_matches_a_direct_count():
    affine = np.array([[2.0, 0.3, 0.0, -9.0], [0.0, 2.5, 0.0, -12.0], [0.0, 0.0, 3.0, -10.0], [0, 0, 0, 1]])
    shape, center, radius = (10, 11, 8), np.array([1.0, -2.0, 0.5]), 6.5
    mask = masks.sphere_mask(center, radius, shape, affine)
    expected = np.zeros(shape, dtype=bool)
    for index in itertools.product(*(range(size) for size in shape)):  # plain loop as the reference
        expected[index] = np.linalg.norm(affine[:3, :3] @ np.array(index) + affine[:3, 3] - center) <= radius
    np.testing.assert_array_equal(mask, expected)


@pytest.mark.parametrize("center, radius, field", [([0, 0], 2.0, "center_mm"), ([0, 0, np.nan], 2.0, "center_mm"),
                                                   ([0, 0, 0], 0.0, "radius_mm"), ([0, 0, 0], -1.0, "radius_mm")])
def test_sphere_bad_arguments(center, radius, field):
    with pytest.raises(InputError) as excinfo:
        masks.sphere_mask(center, radius, (5, 5, 5), np.eye(4))
    _assert_input_error(excinfo, field)


# ---------------------------------------------------------------- resampling


def test_resample_nearest_matches_scipy_affine_transform_order_0():
    # Source: scipy.ndimage.affine_transform(order=0, mode="grid-constant") maps each output
    # voxel o to input coordinates matrix @ o + offset and takes the nearest input voxel.
    rng = np.random.default_rng(7)
    source_shape = (20, 18, 15)
    labels = rng.integers(0, 6, size=source_shape).astype(np.int16)
    source_affine = _centred_affine(source_shape, 2.0)
    rotation = np.array([[np.cos(0.2), -np.sin(0.2), 0], [np.sin(0.2), np.cos(0.2), 0], [0, 0, 1]])
    target_affine = np.eye(4)
    target_affine[:3, :3] = rotation @ np.diag([3.0, 3.0, 2.5])
    target_affine[:3, 3] = [-14.3, -12.1, -9.7]
    target_shape = (11, 12, 13)
    result = masks.resample_nearest(labels, source_affine, target_shape, target_affine, tolerance_mm=0.01)
    voxel_to_voxel = np.linalg.inv(source_affine) @ target_affine
    reference = scipy.ndimage.affine_transform(labels, voxel_to_voxel[:3, :3], offset=voxel_to_voxel[:3, 3],
                                               output_shape=target_shape, order=0, mode="grid-constant", cval=0)
    assert result.dtype == labels.dtype and result.shape == target_shape
    assert (result == 0).mean() < 0.5  # the case covers mostly the inside of the atlas
    np.testing.assert_array_equal(result, reference)


def test_resample_nearest_of_a_4d_atlas_resamples_each_volume():
    rng = np.random.default_rng(3)
    atlas = rng.random((10, 10, 10, 3)).astype(np.float32)
    source_affine = _centred_affine((10, 10, 10), 2.0)
    target_affine = _centred_affine((7, 7, 7), 2.7)
    result = masks.resample_nearest(atlas, source_affine, (7, 7, 7), target_affine, 0.01)
    for volume in range(3):
        np.testing.assert_array_equal(result[..., volume],
                                      masks.resample_nearest(atlas[..., volume], source_affine, (7, 7, 7), target_affine, 0.01))


def test_resample_nearest_same_grid_is_unchanged():
    labels = np.arange(4 * 5 * 6).reshape(4, 5, 6)
    affine = _centred_affine((4, 5, 6), 3.0)
    nudged = affine.copy()
    nudged[0, 3] += 0.004  # within the tolerance: the same grid
    assert masks.resample_nearest(labels, affine, (4, 5, 6), nudged, tolerance_mm=0.01) is labels


def test_resample_nearest_upsampling_by_two_repeats_voxels():
    labels = np.arange(27).reshape(3, 3, 3)
    source_affine = np.diag([2.0, 2.0, 2.0, 1.0])
    target_affine = np.diag([1.0, 1.0, 1.0, 1.0])
    target_affine[:3, 3] = -0.25  # target centres at -0.25, 0.75, ... fall clearly in one source voxel
    result = masks.resample_nearest(labels, source_affine, (6, 6, 6), target_affine, 0.01)
    np.testing.assert_array_equal(result, labels.repeat(2, 0).repeat(2, 1).repeat(2, 2))


def test_resample_nearest_refuses_a_grid_in_another_space():
    affine = _centred_affine((10, 10, 10), 3.0)
    shifted = affine.copy()
    shifted[:3, 3] += 200.0  # e.g. an atlas in a space with its origin at a corner
    with pytest.raises(InputError) as excinfo:
        masks.resample_nearest(np.ones((10, 10, 10)), shifted, (10, 10, 10), affine, 0.01, source_file="atlas.nii.gz")
    _assert_input_error(excinfo, "atlas.nii.gz", "different grid or space", "0%")


# ---------------------------------------------------------------- labels and images


TABLE = pd.DataFrame({"index": [1, 2, 3], "name": ["ember_L", "ember_R", "glow_L"]})


def test_roi_from_labels_3d_union():
    atlas = np.array([0, 1, 2, 3, 1, 2.0000001]).reshape(1, 2, 3)
    roi = masks.roi_from_labels(atlas, TABLE, ["ember_L", "ember_R"])
    assert roi.ravel().tolist() == [False, True, True, False, True, True]


def test_roi_from_labels_unknown_label_suggests_closest():
    with pytest.raises(InputError) as excinfo:
        masks.roi_from_labels(np.zeros((2, 2, 2)), TABLE, ["ember_l"], source_file="labels.tsv")
    _assert_input_error(excinfo, "labels.tsv", "'ember_l'", "closest", "ember_L")


def test_roi_from_labels_probability_atlas():
    atlas = np.zeros((2, 2, 1, 3))
    atlas[0, 0, 0] = [0.6, 0.1, 0.0]
    atlas[0, 1, 0] = [0.1, 0.5, 0.9]
    atlas[1, 0, 0] = [0.49, 0.49, 0.9]
    roi = masks.roi_from_labels(atlas, TABLE, ["ember_L", "ember_R"], threshold=0.5)
    assert roi[..., 0].tolist() == [[True, True], [False, False]]
    with pytest.raises(InputError) as excinfo:
        masks.roi_from_labels(atlas, TABLE, ["ember_L"])
    _assert_input_error(excinfo, "threshold")
    with pytest.raises(InputError) as excinfo:
        masks.roi_from_labels(atlas[..., :2], TABLE, ["ember_L"], threshold=0.5)
    _assert_input_error(excinfo, "2 volumes", "3 rows")
    with pytest.raises(InputError) as excinfo:
        masks.roi_from_labels(atlas[..., 0], TABLE, ["ember_L"], threshold=0.5)
    _assert_input_error(excinfo, "3D label atlas")


def test_roi_from_image():
    image = np.array([0.0, 0.2, 0.7, np.nan, -1.0, 1.0]).reshape(1, 2, 3)
    assert masks.roi_from_image(image).ravel().tolist() == [False, True, True, False, True, True]
    assert masks.roi_from_image(image, threshold=0.5).ravel().tolist() == [False, False, True, False, False, True]
    assert masks.roi_from_image(image[..., None]).shape == (1, 2, 3)
    with pytest.raises(InputError):
        masks.roi_from_image(np.zeros((2, 2, 2, 2)))


def test_restrict_to_brain_and_min_voxels():
    roi = np.zeros((4, 4, 4), dtype=bool)
    roi[:2] = True
    brain = np.zeros((4, 4, 4), dtype=bool)
    brain[1:] = True
    assert int(masks.restrict_to_brain(roi, brain, 16, "01", "ember").sum()) == 16
    with pytest.raises(InputError) as excinfo:
        masks.restrict_to_brain(roi, brain, 17, "01", "ember", source_file="atlas.nii.gz")
    _assert_input_error(excinfo, "atlas.nii.gz", "subject 01", "ROI ember", "16 voxels", "min_voxels = 17", "lower min_voxels")
    with pytest.raises(InputError) as excinfo:
        masks.restrict_to_brain(roi, ~roi, 0, "02", "hush")
    _assert_input_error(excinfo, "subject 02", "0 voxels")


# ---------------------------------------------------------------- brain masks


def _runs_with_a_blob(rng, n_runs=2, shape=(8, 8, 6), n_scans=12):
    inside = np.zeros(shape, dtype=bool)
    inside[2:6, 2:6, 1:5] = True
    runs = []
    for _ in range(n_runs):
        data = rng.normal(5.0, 1.0, size=shape + (n_scans,))
        data[inside] += 1000.0
        runs.append(data.astype(np.float32))
    return runs, inside


def test_derive_brain_mask_keeps_bright_finite_varying_voxels():
    rng = np.random.default_rng(0)
    runs, inside = _runs_with_a_blob(rng)
    runs[1][3, 3, 2, 5] = np.nan
    runs[0][4, 4, 3, 0] = np.inf
    runs[0][2, 2, 1, :] = 1000.0  # constant in one run
    mask, n_nonfinite = masks.derive_brain_mask(runs, 0.2)
    expected = inside.copy()
    expected[3, 3, 2] = expected[4, 4, 3] = expected[2, 2, 1] = False
    np.testing.assert_array_equal(mask, expected)
    assert n_nonfinite == 2


def test_derive_brain_mask_refuses_bad_arguments():
    rng = np.random.default_rng(1)
    runs, _ = _runs_with_a_blob(rng)
    with pytest.raises(InputError):
        masks.derive_brain_mask([], 0.2)
    with pytest.raises(InputError) as excinfo:
        masks.derive_brain_mask(runs, 1.5)
    _assert_input_error(excinfo, "mean_fraction", "1.5")
    with pytest.raises(InputError) as excinfo:
        masks.derive_brain_mask([runs[0], runs[1][:7]], 0.2)
    _assert_input_error(excinfo, "different grids")


@settings(max_examples=25, deadline=None)
@given(low=st.floats(0.0, 1.0), high=st.floats(0.0, 1.0), seed=st.integers(0, 2**16))
def test_brain_mask_shrinks_as_the_fraction_grows(low, high, seed):
    low, high = min(low, high), max(low, high)
    runs = [np.random.default_rng(seed).gamma(2.0, 50.0, size=(5, 5, 4, 6))]
    loose, _ = masks.derive_brain_mask(runs, low)
    strict, _ = masks.derive_brain_mask(runs, high)
    assert not np.any(strict & ~loose)


# ---------------------------------------------------------------- job functions


def _write_runs(tmp_path, runs, affine):
    paths = []
    for index, data in enumerate(runs):
        path = tmp_path / f"run{index}_bold.nii.gz"
        save_nifti(path, data, affine)
        paths.append(str(path))
    return paths


def test_brain_mask_job_writes_mask_mean_and_summary(tmp_path, caplog):
    rng = np.random.default_rng(2)
    runs, inside = _runs_with_a_blob(rng)
    runs[0][3, 3, 2, 4] = np.nan
    affine = _centred_affine(inside.shape, 3.0)
    outputs = {"mask": str(tmp_path / "mask.nii.gz"), "mean": str(tmp_path / "mean.nii.gz"), "summary": str(tmp_path / "summary.json")}
    with caplog.at_level(logging.WARNING):
        brain_mask_job.run({"bold": _write_runs(tmp_path, runs, affine)}, outputs, {"brain_mask": {"mean_fraction": 0.2}, "subject": "01"}, LOG)
    assert "1 voxel" in caplog.text
    mask_image = load_nifti(outputs["mask"])
    assert mask_image.get_data_dtype() == np.uint8
    np.testing.assert_array_equal(mask_image.affine, affine)
    expected = inside.copy()
    expected[3, 3, 2] = False
    np.testing.assert_array_equal(np.asarray(mask_image.dataobj) == 1, expected)
    mean = load_nifti(outputs["mean"]).get_fdata()
    np.testing.assert_allclose(mean[5, 5, 3], np.mean([run[5, 5, 3].mean(dtype=np.float64) for run in runs]), rtol=1e-6)
    summary = json.loads(Path(outputs["summary"]).read_text())
    assert summary == {"n_voxels": int(expected.sum()), "n_nonfinite_excluded": 1, "source": "derived"}


def test_brain_mask_job_with_a_given_mask_and_a_wrong_grid(tmp_path):
    rng = np.random.default_rng(4)
    runs, inside = _runs_with_a_blob(rng)
    affine = _centred_affine(inside.shape, 3.0)
    bold = _write_runs(tmp_path, runs, affine)
    given = np.zeros(inside.shape, dtype=np.uint8)
    given[3:5, 3:5, 2:4] = 1
    save_nifti(tmp_path / "given.nii.gz", given, affine, dtype=np.uint8)
    outputs = {"mask": str(tmp_path / "mask.nii.gz"), "mean": str(tmp_path / "mean.nii.gz"), "summary": str(tmp_path / "summary.json")}
    params = {"brain_mask": {"mean_fraction": 0.2}, "subject": "01"}
    brain_mask_job.run({"bold": bold, "given_mask": str(tmp_path / "given.nii.gz")}, outputs, params, LOG)
    assert json.loads(Path(outputs["summary"]).read_text()) == {"n_voxels": 8, "n_nonfinite_excluded": 0, "source": "given"}
    save_nifti(tmp_path / "given_small.nii.gz", given[:7], affine, dtype=np.uint8)
    with pytest.raises(InputError) as excinfo:
        brain_mask_job.run({"bold": bold, "given_mask": str(tmp_path / "given_small.nii.gz")}, outputs, params, LOG)
    _assert_input_error(excinfo, "given_small.nii.gz", "grid")
    moved = affine.copy()
    moved[0, 3] += 3.0
    save_nifti(tmp_path / "run_moved.nii.gz", runs[1], moved)
    with pytest.raises(InputError) as excinfo:
        brain_mask_job.run({"bold": [bold[0], str(tmp_path / "run_moved.nii.gz")]}, outputs, params, LOG)
    _assert_input_error(excinfo, "run_moved.nii.gz", "grid")


def test_brain_mask_job_empty_mask_is_an_error(tmp_path):
    runs = [np.full((4, 4, 4, 5), 100.0, dtype=np.float32)]  # constant everywhere: no usable voxel
    outputs = {"mask": str(tmp_path / "m.nii.gz"), "mean": str(tmp_path / "mean.nii.gz"), "summary": str(tmp_path / "s.json")}
    with pytest.raises(InputError) as excinfo:
        brain_mask_job.run({"bold": _write_runs(tmp_path, runs, np.eye(4))}, outputs, {"brain_mask": {"mean_fraction": 0.2}, "subject": "07"}, LOG)
    _assert_input_error(excinfo, "subject 07", "no voxel")
    assert not (tmp_path / "m.nii.gz").exists()


def _roi_setup(tmp_path):
    shape = (10, 10, 8)
    affine = _centred_affine(shape, 3.0)
    brain = np.zeros(shape, dtype=np.uint8)
    brain[1:9, 1:9, 1:7] = 1
    save_nifti(tmp_path / "brain.nii.gz", brain, affine, dtype=np.uint8)
    atlas = np.zeros((20, 20, 16), dtype=np.int16)  # a 1.5 mm atlas of the same space
    atlas[2:10, 4:14, 4:12] = 1
    atlas[10:18, 4:14, 4:12] = 2
    atlas[0:20, 0:3, 0:16] = 3  # mostly outside the brain
    save_nifti(tmp_path / "atlas.nii.gz", atlas, _centred_affine(atlas.shape, 1.5), dtype=np.int16)
    write_tsv(tmp_path / "labels.tsv", pd.DataFrame({"index": [1, 2, 3], "name": ["ember_L", "ember_R", "glow_L"]}))
    return shape, affine, brain


def test_roi_mask_job_from_labels(tmp_path):
    _, affine, brain = _roi_setup(tmp_path)
    outputs = {"mask": str(tmp_path / "roi.nii.gz"), "info": str(tmp_path / "roi.json")}
    entry = {"name": "ember", "labels": ["ember_L", "ember_R"], "min_voxels": 10}
    inputs = {"brain_mask": str(tmp_path / "brain.nii.gz"), "atlas": str(tmp_path / "atlas.nii.gz"), "atlas_labels": str(tmp_path / "labels.tsv")}
    roi_mask_job.run(inputs, outputs, {"roi": entry, "subject": "01"}, LOG)
    roi = np.asarray(load_nifti(outputs["mask"]).dataobj)
    assert load_nifti(outputs["mask"]).get_data_dtype() == np.uint8
    assert set(np.unique(roi)) <= {0, 1} and not np.any(roi & (brain == 0))
    info = json.loads(Path(outputs["info"]).read_text())
    assert info == {"roi": "ember", "subject": "01", "n_voxels": int(roi.sum()), "min_voxels": 10, "definition": entry}
    assert info["n_voxels"] == 8 * 5 * 4  # 16x10x8 atlas voxels of 1.5 mm = 8x5x4 voxels of 3 mm, all in the brain
    with pytest.raises(InputError) as excinfo:
        roi_mask_job.run(inputs, outputs, {"roi": {"name": "edge", "labels": ["glow_L"], "min_voxels": 10}, "subject": "01"}, LOG)
    _assert_input_error(excinfo, "subject 01", "ROI edge", "min_voxels = 10")


def test_roi_mask_job_from_sphere_and_image(tmp_path):
    shape, affine, brain = _roi_setup(tmp_path)
    outputs = {"mask": str(tmp_path / "roi.nii.gz"), "info": str(tmp_path / "roi.json")}
    entry = {"name": "ball", "sphere": {"center_mm": [0.0, 0.0, 0.0], "radius_mm": 4.0}, "min_voxels": 1}
    roi_mask_job.run({"brain_mask": str(tmp_path / "brain.nii.gz")}, outputs, {"roi": entry, "subject": "01"}, LOG)
    expected = masks.sphere_mask([0, 0, 0], 4.0, shape, affine) & (brain == 1)
    np.testing.assert_array_equal(np.asarray(load_nifti(outputs["mask"]).dataobj) == 1, expected)
    image = np.zeros(shape, dtype=np.float32)
    image[2:5, 2:5, 2:5] = 0.8
    image[5:7, 5:7, 2:5] = 0.3
    save_nifti(tmp_path / "map.nii.gz", image, affine)
    entry = {"name": "map", "image": "map.nii.gz", "threshold": 0.5, "min_voxels": 5}
    roi_mask_job.run({"brain_mask": str(tmp_path / "brain.nii.gz"), "image": str(tmp_path / "map.nii.gz")}, outputs,
                     {"roi": entry, "subject": "01"}, LOG)
    assert json.loads(Path(outputs["info"]).read_text())["n_voxels"] == 27


def test_roi_mask_job_is_deterministic(tmp_path):
    _roi_setup(tmp_path)
    inputs = {"brain_mask": str(tmp_path / "brain.nii.gz"), "atlas": str(tmp_path / "atlas.nii.gz"), "atlas_labels": str(tmp_path / "labels.tsv")}
    params = {"roi": {"name": "ember", "labels": ["ember_L"], "min_voxels": 10}, "subject": "01"}
    digests = []
    for attempt in range(2):
        outputs = {"mask": str(tmp_path / f"roi{attempt}.nii.gz"), "info": str(tmp_path / f"roi{attempt}.json")}
        roi_mask_job.run(inputs, outputs, params, LOG)
        digests.append((Path(outputs["mask"]).read_bytes(), Path(outputs["info"]).read_bytes()))
    assert digests[0] == digests[1]


def test_brain_mask_from_leading_volumes_equals_the_pure_function_on_those_volumes(tmp_path):
    # Reference: derive_brain_mask (tested above against a brute-force rule) on the first k volumes of each run.
    rng = np.random.default_rng(11)
    runs, inside = _runs_with_a_blob(rng, n_runs=3, n_scans=30)
    runs[1][1, 1, 1, 20] = np.nan  # after the leading volumes: not seen with k = 8
    runs[2][6, 6, 4, 3] = np.inf   # within them: excluded as before
    affine = _centred_affine(inside.shape, 3.0)
    paths = _write_runs(tmp_path, runs, affine)
    outputs = {"mask": str(tmp_path / "mask.nii.gz"), "mean": str(tmp_path / "mean.nii.gz"), "summary": str(tmp_path / "summary.json")}
    brain_mask_job.run({"bold": paths}, outputs, {"brain_mask": {"mean_fraction": 0.2, "summary_volumes": 8}, "subject": "01"}, LOG)
    expected, n_bad = masks.derive_brain_mask([run[..., :8] for run in runs], 0.2)
    np.testing.assert_array_equal(np.asarray(load_nifti(outputs["mask"]).dataobj) == 1, expected)
    expected_mean = np.mean([run[..., :8].mean(axis=3, dtype=np.float64) for run in runs], axis=0)
    expected_mean[~np.all([np.all(np.isfinite(run[..., :8]), axis=3) for run in runs], axis=0)] = 0.0
    np.testing.assert_allclose(load_nifti(outputs["mean"]).get_fdata(), expected_mean, rtol=1e-6)
    assert json.loads(Path(outputs["summary"]).read_text())["n_nonfinite_excluded"] == n_bad == 1
    # 0 reads every volume: the late NaN is found and excluded too.
    brain_mask_job.run({"bold": paths}, outputs, {"brain_mask": {"mean_fraction": 0.2, "summary_volumes": 0}, "subject": "01"}, LOG)
    assert json.loads(Path(outputs["summary"]).read_text())["n_nonfinite_excluded"] == 2


def test_brain_mask_from_leading_volumes_decodes_only_those_volumes(tmp_path):
    # A .nii.gz cut short after the first volumes still gives the mask with k = 4 (nothing beyond is
    # decoded), while a full read (k = 0) reports the truncation as before.
    import gzip

    rng = np.random.default_rng(12)
    runs, inside = _runs_with_a_blob(rng, n_runs=1, n_scans=40)
    affine = _centred_affine(inside.shape, 3.0)
    full = _write_runs(tmp_path, runs, affine)[0]
    raw = gzip.decompress(Path(full).read_bytes())
    volume_bytes = int(np.prod(inside.shape)) * 4
    cut = tmp_path / "cut_bold.nii.gz"
    cut.write_bytes(gzip.compress(raw[: len(raw) - 30 * volume_bytes])[:-8])  # 30 volumes and the gzip trailer missing
    outputs = {"mask": str(tmp_path / "mask.nii.gz"), "mean": str(tmp_path / "mean.nii.gz"), "summary": str(tmp_path / "summary.json")}
    brain_mask_job.run({"bold": [str(cut)]}, outputs, {"brain_mask": {"mean_fraction": 0.2, "summary_volumes": 4}, "subject": "01"}, LOG)
    expected, _ = masks.derive_brain_mask([runs[0][..., :4]], 0.2)
    np.testing.assert_array_equal(np.asarray(load_nifti(outputs["mask"]).dataobj) == 1, expected)
    with pytest.raises(InputError) as excinfo:
        brain_mask_job.run({"bold": [str(cut)]}, outputs, {"brain_mask": {"mean_fraction": 0.2, "summary_volumes": 0}, "subject": "01"}, LOG)
    _assert_input_error(excinfo, "cut_bold.nii.gz", "truncated")
    with pytest.raises(InputError) as excinfo:
        brain_mask_job.run({"bold": [str(cut)]}, outputs, {"brain_mask": {"mean_fraction": 0.2, "summary_volumes": 20}, "subject": "01"}, LOG)
    _assert_input_error(excinfo, "cut_bold.nii.gz", "truncated")


@pytest.mark.parametrize("dtype, slope, inter, suffix", [(np.int16, 0.25, 100.0, ".nii.gz"), (np.float32, None, None, ".nii.gz"),
                                                         (np.int16, None, None, ".nii")])
def test_leading_volumes_equal_nibabels_read_of_those_volumes(tmp_path, dtype, slope, inter, suffix):
    # Reference: nibabel reading the file itself, np.asanyarray(nib.load(path).dataobj[..., :k], dtype=float32),
    # on a scaled int16 run as scanners export them, a float32 run and an uncompressed file.
    import nibabel as nib
    rng = np.random.default_rng(13)
    values = rng.normal(800, 120, (7, 6, 5, 12))
    image = nib.Nifti1Image(values.astype(dtype) if slope is None else np.round((values - inter) / slope).astype(dtype), np.eye(4))
    if slope is not None:
        image.header.set_slope_inter(slope, inter)
    path = str(tmp_path / f"run_bold{suffix}")
    nib.save(image, path)
    for k in (1, 5, 12, 40):
        data, affine = brain_mask_job._leading_volumes(path, k)
        expected = np.asanyarray(nib.load(path).dataobj[..., :min(k, 12)], dtype=np.float32)
        assert data.dtype == np.float32 and data.shape == expected.shape
        assert np.array_equal(data, expected) and np.array_equal(affine, nib.load(path).affine)
    save_nifti(tmp_path / "volume.nii.gz", values[..., 0], np.eye(4))
    with pytest.raises(InputError) as excinfo:
        brain_mask_job._leading_volumes(str(tmp_path / "volume.nii.gz"), 4)
    assert excinfo.value.field == "dim"
