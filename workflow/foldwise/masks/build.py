"""Brain masks and ROI masks: pure functions on arrays and affines.

A brain mask keeps the voxels that hold usable signal in every run; an ROI
mask is a set of voxels defined by atlas labels, a probability map, an image
or a sphere, resampled to the data grid and intersected with the brain mask.
"""

import difflib

import numpy as np

from foldwise.errors import InputError

__all__ = [
    "ROBUST_MAX_PERCENTILE",
    "run_statistics",
    "combine_run_statistics",
    "threshold_mean_image",
    "derive_brain_mask",
    "same_grid",
    "resample_nearest",
    "roi_from_labels",
    "roi_from_image",
    "sphere_mask",
    "restrict_to_brain",
]

# The "robust maximum" of a mean image is its 98th percentile, so a few hot
# voxels do not set the threshold (common practice, no source).
ROBUST_MAX_PERCENTILE = 98.0
# Grids whose bounding boxes share less than this fraction are taken to be in
# different spaces (common practice, no source).
_MIN_OVERLAP_FRACTION = 0.5
# Sphere membership tolerates float rounding of the voxel-centre positions.
_SPHERE_TOLERANCE_MM = 1e-6


def _check_affine(affine, name, source_file=None):
    affine = np.asarray(affine, dtype=np.float64)
    if affine.shape != (4, 4) or not np.all(np.isfinite(affine)) or abs(np.linalg.det(affine[:3, :3])) < 1e-12:
        raise InputError(source_file, name, f"expected an invertible 4x4 voxel-to-world affine, got {affine.tolist()!r}",
                         "check the image's sform/qform")
    return affine


def _check_shape(shape, name="shape"):
    shape = tuple(int(size) for size in shape)
    if len(shape) != 3 or min(shape) < 1:
        raise InputError(None, name, f"expected three positive grid sizes, got {shape!r}", "give the 3D grid shape")
    return shape


def run_statistics(data):
    """Per-voxel statistics of one BOLD run that decide brain membership.

    Parameters
    ----------
    data : array_like, shape (x, y, z, t)
        One run's BOLD series.

    Returns
    -------
    mean : ndarray of float64, shape (x, y, z)
        Time mean; 0 where the series is not finite.
    finite : ndarray of bool, shape (x, y, z)
        True where every time point is finite.
    varying : ndarray of bool, shape (x, y, z)
        True where the series is finite and not constant (max > min, exact).

    Example
    -------
    >>> run = np.array([[[[5.0, 5.0, 5.0], [1.0, 2.0, np.nan]]]])  # shape (1, 1, 2, 3)
    >>> mean, finite, varying = run_statistics(run)
    >>> finite.ravel().tolist(), varying.ravel().tolist()
    ([True, False], [False, False])
    """
    data = np.asarray(data)
    if data.ndim != 4:
        raise InputError(None, "dim", f"expected a 4D BOLD run, got shape {data.shape}", "pass the 4D series")
    finite = np.all(np.isfinite(data), axis=3)
    with np.errstate(invalid="ignore", over="ignore"):  # non-finite voxels are masked out below
        mean = data.mean(axis=3, dtype=np.float64)
        varying = finite & (data.max(axis=3) > data.min(axis=3))
    mean[~finite] = 0.0
    return mean, finite, varying


def combine_run_statistics(statistics):
    """Combine :func:`run_statistics` of several runs of one subject.

    Parameters
    ----------
    statistics : sequence of (mean, finite, varying)
        One triple per run, all on one grid.

    Returns
    -------
    mean : ndarray of float64
        Mean over runs of the run means (0 where any run is not finite).
    finite, varying : ndarray of bool
        True where the voxel is finite (varying) in every run.
    """
    statistics = list(statistics)
    if not statistics:
        raise InputError(None, "bold", "no BOLD run was given", "give at least one run per subject")
    shapes = {tuple(np.shape(item[0])) for item in statistics}
    if len(shapes) != 1:
        raise InputError(None, "bold", f"the runs have different grids {sorted(shapes)}", "resample all runs of a subject to one grid")
    finite = np.logical_and.reduce([item[1] for item in statistics])
    varying = np.logical_and.reduce([item[2] for item in statistics])
    mean = np.mean([item[0] for item in statistics], axis=0)
    mean[~finite] = 0.0
    return mean, finite, varying


def threshold_mean_image(mean_image, usable, mean_fraction):
    """Keep usable voxels whose mean exceeds a fraction of the robust maximum.

    Parameters
    ----------
    mean_image : array_like, shape (x, y, z)
        Mean BOLD over time and runs.
    usable : array_like of bool, shape (x, y, z)
        Voxels allowed in the mask (finite and varying in every run).
    mean_fraction : float
        Fraction in [0, 1] of the robust maximum a voxel's mean must exceed.

    Returns
    -------
    ndarray of bool, shape (x, y, z)

    Notes
    -----
    The robust maximum is the 98th percentile of the mean over the usable
    voxels (common practice, no source); taking it over usable voxels only
    keeps zero-padded background from lowering it.
    """
    if not 0.0 <= float(mean_fraction) <= 1.0:
        raise InputError(None, "brain_mask.mean_fraction", f"expected a fraction in [0, 1], got {mean_fraction!r}",
                         "set brain_mask.mean_fraction between 0 and 1 (0.2 is the default)")
    mean_image = np.asarray(mean_image, dtype=np.float64)
    usable = np.asarray(usable, dtype=bool)
    if mean_image.shape != usable.shape:
        raise InputError(None, "mask", f"mean image {mean_image.shape} and usable mask {usable.shape} differ in shape",
                         "pass arrays of one grid")
    if not usable.any():
        return np.zeros(mean_image.shape, dtype=bool)
    robust_max = np.percentile(mean_image[usable], ROBUST_MAX_PERCENTILE)
    return usable & (mean_image > float(mean_fraction) * robust_max)


def derive_brain_mask(runs_data, mean_fraction):
    """A brain mask from a subject's BOLD runs.

    Parameters
    ----------
    runs_data : list of array_like, each (x, y, z, t)
        The subject's runs on one grid.
    mean_fraction : float
        A voxel's mean must exceed this fraction of the robust maximum.

    Returns
    -------
    mask : ndarray of bool, shape (x, y, z)
        Finite and non-constant in every run, with a mean above
        ``mean_fraction`` x the 98th percentile of the mean image.
    n_nonfinite_excluded : int
        Voxels left out because some run holds NaN or Inf there.

    Notes
    -----
    Intensity thresholding of the mean image at a fraction of a robust
    maximum is common practice (no source); the 98th percentile and the
    usable-voxel reference set are documented in :func:`threshold_mean_image`.

    Example
    -------
    >>> run = np.zeros((2, 1, 1, 4)); run[0, 0, 0] = [9, 11, 10, 10]
    >>> mask, n_bad = derive_brain_mask([run], 0.2)
    >>> mask.ravel().tolist(), n_bad
    ([True, False], 0)
    """
    if isinstance(runs_data, np.ndarray) or not len(runs_data):
        raise InputError(None, "bold", f"expected a non-empty list of 4D runs, got {type(runs_data).__name__}",
                         "pass the subject's runs as a list")
    mean, finite, varying = combine_run_statistics(run_statistics(data) for data in runs_data)
    mask = threshold_mean_image(mean, varying, mean_fraction)
    return mask, int((~finite).sum())


def _grid_corners_mm(shape, affine):
    """World positions of the 8 outer corners of a grid (voxel edges, not centres)."""
    corners = np.array([[i, j, k] for i in (-0.5, shape[0] - 0.5) for j in (-0.5, shape[1] - 0.5)
                        for k in (-0.5, shape[2] - 0.5)], dtype=np.float64)
    return corners @ affine[:3, :3].T + affine[:3, 3]


def same_grid(shape_a, affine_a, shape_b, affine_b, tolerance_mm):
    """True when two grids have one shape and voxel centres within ``tolerance_mm``.

    Parameters
    ----------
    shape_a, shape_b : sequence of int
        Grid shapes (first three axes are used).
    affine_a, affine_b : array_like, shape (4, 4)
        Voxel-to-world affines.
    tolerance_mm : float
        Largest allowed distance between corresponding voxel centres.

    Returns
    -------
    bool
    """
    if tuple(shape_a)[:3] != tuple(shape_b)[:3]:
        return False
    shape = tuple(shape_a)[:3]
    # The extreme voxel centres bound the distance of every other centre (affine maps).
    centres = np.array([[i, j, k] for i in (0, shape[0] - 1) for j in (0, shape[1] - 1) for k in (0, shape[2] - 1)], dtype=np.float64)
    a = centres @ np.asarray(affine_a, dtype=np.float64)[:3, :3].T + np.asarray(affine_a, dtype=np.float64)[:3, 3]
    b = centres @ np.asarray(affine_b, dtype=np.float64)[:3, :3].T + np.asarray(affine_b, dtype=np.float64)[:3, 3]
    return bool(np.max(np.linalg.norm(a - b, axis=1)) <= tolerance_mm)


def resample_nearest(label_data, source_affine, target_shape, target_affine, tolerance_mm, source_file=None):
    """Nearest-neighbour resampling of a label or probability atlas to a data grid.

    Parameters
    ----------
    label_data : array_like, shape (x, y, z) or (x, y, z, n)
        Atlas on its own grid (a 4D atlas is resampled volume by volume).
    source_affine : array_like, shape (4, 4)
        The atlas's voxel-to-world affine.
    target_shape : sequence of int
        The data grid's 3D shape.
    target_affine : array_like, shape (4, 4)
        The data grid's voxel-to-world affine.
    tolerance_mm : float
        Grids whose voxel centres agree within this distance are the same
        grid; the atlas is then returned unchanged.
    source_file : str, optional
        The atlas file, named in error messages.

    Returns
    -------
    ndarray
        The atlas on the target grid (same dtype); 0 where a target voxel
        centre falls outside the atlas grid.

    Raises
    ------
    InputError
        If the two grids' bounding boxes share less than half of the smaller
        one ("atlas on a different grid or space").

    Notes
    -----
    Each target voxel centre is mapped to atlas voxel coordinates by
    ``inv(source_affine) @ target_affine`` and rounded half up
    (``floor(x + 0.5)``), which is nearest-neighbour interpolation
    (order 0) as in ``scipy.ndimage.affine_transform``.
    """
    target_shape = _check_shape(target_shape, "target_shape")
    source_affine = _check_affine(source_affine, "source_affine", source_file)
    target_affine = _check_affine(target_affine, "target_affine", source_file)
    if not np.isfinite(tolerance_mm) or tolerance_mm < 0:
        raise InputError(source_file, "tolerance_mm", f"expected a distance >= 0, got {tolerance_mm!r}", "pass a tolerance in mm")
    label_data = np.asarray(label_data)
    if label_data.ndim not in (3, 4):
        raise InputError(source_file, "dim", f"expected a 3D or 4D atlas, got shape {label_data.shape}", "give a label or probability atlas")
    if same_grid(label_data.shape, source_affine, target_shape, target_affine, tolerance_mm):
        return label_data

    source_box = _grid_corners_mm(label_data.shape, source_affine)
    target_box = _grid_corners_mm(target_shape, target_affine)
    low = np.maximum(source_box.min(axis=0), target_box.min(axis=0))
    high = np.minimum(source_box.max(axis=0), target_box.max(axis=0))
    overlap = np.prod(np.clip(high - low, 0.0, None))
    smaller = min(np.prod(np.ptp(source_box, axis=0)), np.prod(np.ptp(target_box, axis=0)))
    if overlap < _MIN_OVERLAP_FRACTION * smaller:
        raise InputError(source_file, "affine",
                         f"atlas on a different grid or space: its bounding box shares {overlap / smaller:.0%} of the smaller grid "
                         f"(atlas {source_box.min(axis=0).round(1).tolist()}..{source_box.max(axis=0).round(1).tolist()} mm, "
                         f"data {target_box.min(axis=0).round(1).tolist()}..{target_box.max(axis=0).round(1).tolist()} mm)",
                         "give an atlas in the same space as the BOLD data (check both images' sform/qform)")

    voxel_to_voxel = np.linalg.solve(source_affine, target_affine)
    grid = np.indices(target_shape, dtype=np.float64).reshape(3, -1)
    source_coords = voxel_to_voxel[:3, :3] @ grid + voxel_to_voxel[:3, 3:4]
    nearest = np.floor(source_coords + 0.5).astype(np.int64)
    inside = np.all((nearest >= 0) & (nearest < np.array(label_data.shape[:3])[:, None]), axis=0)
    resampled = np.zeros((int(np.prod(target_shape)),) + label_data.shape[3:], dtype=label_data.dtype)
    resampled[inside] = label_data[nearest[0, inside], nearest[1, inside], nearest[2, inside]]
    return resampled.reshape(target_shape + label_data.shape[3:])


def _check_label_table(label_table, source_file):
    missing = [column for column in ("index", "name") if column not in getattr(label_table, "columns", ())]
    if missing:
        raise InputError(source_file, ", ".join(missing), "the label table lacks the column(s)", "give a TSV with columns index and name")
    names = [str(name) for name in label_table["name"]]
    duplicated = sorted({name for name in names if names.count(name) > 1})
    if duplicated:
        raise InputError(source_file, "name", f"label name(s) {', '.join(duplicated)} appear more than once", "give each label one row")
    return names


def roi_from_labels(atlas_data, label_table, names, threshold=None, source_file=None):
    """An ROI as the union of named atlas labels.

    Parameters
    ----------
    atlas_data : array_like, shape (x, y, z) or (x, y, z, n_labels)
        A label atlas (integer index per voxel) or a probability atlas (one
        volume per label-table row, in table order).
    label_table : pandas.DataFrame
        Columns ``index`` and ``name``.
    names : sequence of str
        Labels to join.
    threshold : float, optional
        Probability atlases only (required there): keep voxels where a named
        label's probability is at or above it.
    source_file : str, optional
        The label table or atlas, named in error messages.

    Returns
    -------
    ndarray of bool, shape (x, y, z)

    Raises
    ------
    InputError
        For an unknown label (the closest names are suggested), a missing or
        superfluous threshold, or a probability atlas whose volume count does
        not match the table.
    """
    table_names = _check_label_table(label_table, source_file)
    names = [str(name) for name in names]
    if not names:
        raise InputError(source_file, "labels", "no label was named", "list at least one label of the atlas")
    for name in names:
        if name not in table_names:
            close = difflib.get_close_matches(name, table_names, n=3, cutoff=0.4)
            raise InputError(source_file, "labels", f"unknown label {name!r}" + (f" (closest: {', '.join(close)})" if close else ""),
                             "use names from the atlas label table's name column")
    atlas_data = np.asarray(atlas_data)
    rows = [table_names.index(name) for name in names]
    if atlas_data.ndim == 3:
        if threshold is not None:
            raise InputError(source_file, "threshold", f"a threshold ({threshold!r}) was given for a 3D label atlas",
                             "remove threshold, or give a 4D probability atlas")
        indices = np.asarray(label_table["index"], dtype=np.float64)[rows]
        return np.isin(np.rint(atlas_data), indices) & np.isfinite(atlas_data)
    if atlas_data.ndim == 4:
        if threshold is None:
            raise InputError(source_file, "threshold", "a 4D probability atlas needs a threshold",
                             "add threshold (e.g. 0.5) to the ROI entry")
        if atlas_data.shape[3] != len(table_names):
            raise InputError(source_file, "index", f"the probability atlas has {atlas_data.shape[3]} volumes but the label table "
                             f"{len(table_names)} rows", "give one table row per atlas volume, in volume order")
        with np.errstate(invalid="ignore"):
            return np.any(atlas_data[..., rows] >= float(threshold), axis=3)
    raise InputError(source_file, "dim", f"expected a 3D or 4D atlas, got shape {atlas_data.shape}", "give a label or probability atlas")


def roi_from_image(data, threshold=None, source_file=None):
    """An ROI from an image: non-zero voxels, or voxels at or above a threshold.

    Parameters
    ----------
    data : array_like, shape (x, y, z) (or (x, y, z, 1))
        A binary mask or a map.
    threshold : float, optional
        Keep voxels with value >= threshold; without it, keep non-zero voxels.
    source_file : str, optional
        The image file, named in error messages.

    Returns
    -------
    ndarray of bool, shape (x, y, z)
        Non-finite voxels are never kept.
    """
    data = np.asarray(data)
    if data.ndim == 4 and data.shape[3] == 1:
        data = data[..., 0]
    if data.ndim != 3:
        raise InputError(source_file, "dim", f"expected a 3D ROI image, got shape {data.shape}", "give one 3D volume per image ROI")
    finite = np.isfinite(data)
    with np.errstate(invalid="ignore"):
        kept = (data != 0) if threshold is None else (data >= float(threshold))
    return kept & finite


def sphere_mask(center_mm, radius_mm, shape, affine):
    """Voxels whose centres lie within ``radius_mm`` of a world point (inclusive).

    Parameters
    ----------
    center_mm : sequence of 3 float
        Sphere centre in world coordinates (mm).
    radius_mm : float
        Radius in mm (> 0); a centre at exactly the radius is inside.
    shape : sequence of int
        The 3D grid shape.
    affine : array_like, shape (4, 4)
        Voxel-to-world affine.

    Returns
    -------
    ndarray of bool, shape ``shape``

    Notes
    -----
    On a 1 mm isotropic grid centred on a voxel the counts are the numbers of
    integer lattice points in a ball (OEIS A000605: 1, 7, 19, 27, 33, ...).

    Example
    -------
    >>> affine = np.eye(4)
    >>> affine[:3, 3] = -2.0  # voxel (2, 2, 2) sits at the origin
    >>> int(sphere_mask([0, 0, 0], 1.0, (5, 5, 5), affine).sum())
    7
    """
    center_mm = np.asarray(center_mm, dtype=np.float64)
    if center_mm.shape != (3,) or not np.all(np.isfinite(center_mm)):
        raise InputError(None, "sphere.center_mm", f"expected three finite coordinates, got {center_mm.tolist()!r}",
                         "give center_mm as [x, y, z] in mm")
    if not np.isfinite(radius_mm) or radius_mm <= 0:
        raise InputError(None, "sphere.radius_mm", f"expected a positive radius, got {radius_mm!r}", "give radius_mm > 0")
    shape = _check_shape(shape)
    affine = _check_affine(affine, "affine")
    grid = np.indices(shape, dtype=np.float64).reshape(3, -1)
    offsets_mm = affine[:3, :3] @ grid + (affine[:3, 3] - center_mm)[:, None]
    squared_mm2 = np.einsum("ij,ij->j", offsets_mm, offsets_mm)
    return (squared_mm2 <= (float(radius_mm) + _SPHERE_TOLERANCE_MM) ** 2).reshape(shape)


def restrict_to_brain(roi_mask, brain_mask, min_voxels, subject, roi, source_file=None):
    """Intersect an ROI with the brain mask and check it keeps enough voxels.

    Parameters
    ----------
    roi_mask, brain_mask : array_like of bool, shape (x, y, z)
        The ROI and the subject's brain mask on one grid.
    min_voxels : int
        Fewest voxels the ROI may keep (an empty ROI is always refused).
    subject, roi : str
        Named in the error message.
    source_file : str, optional
        The file the ROI came from.

    Returns
    -------
    ndarray of bool, shape (x, y, z)

    Raises
    ------
    InputError
        If the intersection holds fewer than ``max(min_voxels, 1)`` voxels.
    """
    roi_mask = np.asarray(roi_mask, dtype=bool)
    brain_mask = np.asarray(brain_mask, dtype=bool)
    if roi_mask.shape != brain_mask.shape:
        raise InputError(source_file, "shape", f"ROI {roi} has shape {roi_mask.shape} but subject {subject}'s brain mask {brain_mask.shape}",
                         "resample the ROI to the data grid first")
    kept = roi_mask & brain_mask
    n_voxels = int(kept.sum())
    if n_voxels < max(int(min_voxels), 1):
        raise InputError(source_file, f"rois[{roi}].min_voxels",
                         f"subject {subject}, ROI {roi}: {n_voxels} voxels inside the brain mask "
                         f"({int(roi_mask.sum())} before masking), fewer than min_voxels = {int(min_voxels)}",
                         "check that the ROI and the data share one space, enlarge the ROI, lower min_voxels, "
                         "or exclude the subject")
    return kept
