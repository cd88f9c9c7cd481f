"""Searchlight information maps: the fold-aware decode repeated in a sphere around every brain voxel.

A searchlight (Kriegeskorte, Goebel & Bandettini 2006, PNAS 103:3863-3868)
moves a small sphere over the brain, decodes the classes from the patterns
of the voxels inside it, and writes the cross-validated score at the
sphere's centre voxel.

How the work is organised, so that no per-sphere Python loop is needed for
the batched classifiers:

1. The spheres are a neighbourhood index matrix (``n_centres x n_offsets``,
   indices into the brain voxels, ``-1`` padding) built once, and the same
   neighbourhoods as a sparse ``n_centres x n_voxels`` indicator matrix.
2. Per fold, the z-scoring (mean and SD of every voxel over the training
   patterns, as :func:`foldwise.decoding.curves.fit_scaler`) is computed once for
   all voxels; it is label-free, so every permutation reuses it.
3. Correlation to class centroids and Gaussian naive Bayes are sums over the
   sphere of per-voxel terms (products of a test pattern and a centroid,
   per-voxel log-likelihoods). Each term is computed once per voxel for the
   whole brain and summed over every sphere at once by one sparse matrix
   product: a voxel's term is shared by the ~100 spheres that contain it.
4. Shrinkage LDA needs a covariance per sphere. Class means, residuals and
   class SDs are per-voxel quantities, computed once per labeling; a chunk
   of centres gathers them and solves, per sphere, an ``n_train x n_train``
   system (Woodbury identity) instead of the ``p x p`` one (or the
   ``p x p`` one when it is the smaller), batched with ``np.linalg.solve``
   on stacks.
5. The linear SVM (libsvm, exactly as ``sklearn.svm.SVC(kernel="linear")``)
   is the slow exact option: batched Gram matrices, one fit per sphere.

Permutations relabel within runs (:func:`foldwise.decoding.curves.permute_within_runs`)
and rerun the whole fold loop; for the batched classifiers all relabelings of
a chunk go through the same array operations.

Public names, in the order a searchlight uses them:

``SEARCHLIGHT_CLASSIFIERS``  the classifier names this module accepts
``sphere_offsets``           voxel offsets within ``radius_mm`` of a voxel centre
``Neighbourhoods``           the spheres of a set of centres (index matrix and sizes)
``sphere_neighbourhoods``    build them inside a brain mask
``block_centres``            the centres of block ``b`` of ``n_blocks``
``analysis_outline``         class, set and direction names of an analysis entry
``sample_design``            patterns, labels, runs and sets of one analysis entry
``neighbourhood_sums``       per-voxel values summed over every sphere
``predict_correlation_centroid``, ``predict_gaussian_nb``, ``predict_shrinkage_lda``,
``predict_linear_svm``       batched-over-spheres classifiers
``searchlight_scores``       fold-mean balanced accuracy per centre and direction, with the null

The group maps (Stelzer-style p-values, family-wise correction, TFCE) live
in :mod:`foldwise.stats.maps`, so a searchlight block imports no group
statistics.
"""

from dataclasses import dataclass
from functools import cached_property

import numpy as np
import scipy.sparse

from foldwise.decoding.classifiers import linear_svm_fit_predict
from foldwise.decoding.curves import apply_scaler, balanced_accuracy, cross_directions, fit_scaler, permute_within_runs
from foldwise.errors import InputError
from foldwise.decoding.folds import FOLD_SCHEMES, make_folds
from foldwise.decoding.permutations import block_codes

__all__ = [
    "SEARCHLIGHT_CLASSIFIERS",
    "GNB_VAR_SMOOTHING",
    "sphere_offsets",
    "Neighbourhoods",
    "sphere_neighbourhoods",
    "block_centres",
    "analysis_outline",
    "sample_design",
    "neighbourhood_sums",
    "predict_correlation_centroid",
    "predict_gaussian_nb",
    "predict_shrinkage_lda",
    "predict_linear_svm",
    "searchlight_scores",
]

SEARCHLIGHT_CLASSIFIERS = ("correlation_centroid", "gaussian_nb", "shrinkage_lda", "linear_svm")

# scikit-learn's GaussianNB default. sklearn adds var_smoothing times the largest
# training variance of the sphere's features; after z-scoring by the training
# fold that variance is 1 (up to rounding), so the added variance is
# GNB_VAR_SMOOTHING itself, the same for every sphere.
GNB_VAR_SMOOTHING = 1e-9

# A voxel at exactly the radius is inside; this absorbs float rounding of
# voxel-centre distances (the same tolerance as foldwise.masks.build.sphere_mask).
_RADIUS_TOLERANCE_MM = 1e-6
# Largest work array, in float64 elements (32 MB). Chunk sizes depend only on
# array shapes, never on timing, so chunking is deterministic.
_CHUNK_ELEMENTS = 1 << 22


def _fail(field, problem, fix, file=None):
    raise InputError(file, field, problem, fix)


def _check_affine(affine):
    affine = np.asarray(affine, dtype=np.float64)
    if affine.shape != (4, 4) or not np.all(np.isfinite(affine)) or abs(np.linalg.det(affine[:3, :3])) < 1e-12:
        _fail("affine", f"expected an invertible 4x4 voxel-to-world affine, got {affine.tolist()!r}", "check the image's sform/qform")
    return affine


def _check_radius(radius_mm):
    if isinstance(radius_mm, bool) or not isinstance(radius_mm, (int, float, np.integer, np.floating)) or not np.isfinite(radius_mm) \
            or radius_mm <= 0:
        _fail("searchlight.radius_mm", f"expected a positive radius in mm, got {radius_mm!r}", "set searchlight.radius_mm > 0 (e.g. 6)")
    return float(radius_mm)


def _check_count(value, name, minimum, fix):
    if isinstance(value, bool) or not isinstance(value, (int, np.integer)) or value < minimum:
        _fail(name, f"expected an integer >= {minimum}, got {value!r}", fix)
    return int(value)


# -- spheres ---------------------------------------------------------------------------------
def sphere_offsets(radius_mm, affine):
    """Integer voxel offsets whose world distance from the centre is at most ``radius_mm``.

    Parameters
    ----------
    radius_mm : float
        Sphere radius in mm (> 0); a voxel centre at exactly the radius is inside.
    affine : array_like, shape (4, 4)
        Voxel-to-world affine of the grid (only its 3x3 part matters).

    Returns
    -------
    ndarray of int64, shape (n_offsets, 3)
        Offsets ``(di, dj, dk)`` in C (lexicographic) order; ``(0, 0, 0)`` is
        always included.

    Notes
    -----
    On an isotropic grid with a radius of ``r`` voxels the counts are the
    numbers of integer lattice points in a ball of radius ``r`` (OEIS
    A000605: 1, 7, 33, 123, 257, 515 for r = 0..5). On an anisotropic or
    oblique grid the sphere is a sphere in mm, an ellipsoid in voxels.

    Examples
    --------
    >>> len(sphere_offsets(6.0, np.diag([3.0, 3.0, 3.0, 1.0])))  # 2 voxels of 3 mm
    33
    """
    radius_mm = _check_radius(radius_mm)
    linear = _check_affine(affine)[:3, :3]
    # |offset_i| = |(A^-1 w)_i| <= ||row i of A^-1|| * ||w|| bounds the search box.
    bounds = np.floor((radius_mm + _RADIUS_TOLERANCE_MM) * np.linalg.norm(np.linalg.inv(linear), axis=1)).astype(np.int64)
    axes = [np.arange(-bound, bound + 1) for bound in bounds]
    grid = np.stack(np.meshgrid(*axes, indexing="ij"), axis=-1).reshape(-1, 3)
    world = grid @ linear.T
    inside = np.einsum("ij,ij->i", world, world) <= (radius_mm + _RADIUS_TOLERANCE_MM) ** 2
    return grid[inside].astype(np.int64)


@dataclass(frozen=True, eq=False)
class Neighbourhoods:
    """The spheres of a set of centre voxels, as indices into the brain voxels.

    Attributes
    ----------
    indices : ndarray of int64, shape (n_centres, n_offsets)
        Row ``c``: the brain-voxel indices (C order of the mask) inside the
        sphere of centre ``c``, ascending, then ``-1`` padding. The width is
        the full sphere's voxel count, whatever the centres, so every chunk
        of every block has the same shape.
    sizes : ndarray of int64, shape (n_centres,)
        Voxels in each sphere (the brain part of it).
    centres : ndarray of int64, shape (n_centres,)
        Brain-voxel index of each centre.
    n_voxels : int
        Voxels in the brain mask (the column space of the indices).
    """

    indices: np.ndarray
    sizes: np.ndarray
    centres: np.ndarray
    n_voxels: int

    @property
    def n_centres(self):
        return int(self.indices.shape[0])

    @property
    def valid(self):
        """Boolean (n_centres, n_offsets): True where ``indices`` is a voxel, not padding."""
        return self.indices >= 0

    @cached_property
    def sum_operator(self):
        """The sparse (n_centres x n_voxels) indicator matrix of the spheres (CSR)."""
        valid = self.valid
        indptr = np.concatenate([[0], np.cumsum(self.sizes)]).astype(np.int64)
        data = np.ones(int(indptr[-1]), dtype=np.float64)
        return scipy.sparse.csr_array((data, self.indices[valid], indptr), shape=(self.n_centres, self.n_voxels))

    @cached_property
    def padded(self):
        """``indices`` with padding pointing at column ``n_voxels`` (an all-zero column the gathers append)."""
        return np.where(self.valid, self.indices, self.n_voxels)

    def subset(self, rows):
        """The neighbourhoods of some of the centres (an index array into the rows)."""
        rows = np.asarray(rows, dtype=np.int64)
        return Neighbourhoods(self.indices[rows], self.sizes[rows], self.centres[rows], self.n_voxels)


def sphere_neighbourhoods(mask, affine, radius_mm, centres=None):
    """The sphere of ``radius_mm`` around each centre voxel, cut to the brain mask.

    Parameters
    ----------
    mask : array_like of bool, shape (x, y, z)
        The brain mask; its voxels in C order are the columns everything
        else indexes.
    affine : array_like, shape (4, 4)
        Voxel-to-world affine (mm).
    radius_mm : float
        Sphere radius in mm.
    centres : array_like of int, optional
        Brain-voxel indices of the centres (default: every brain voxel).

    Returns
    -------
    Neighbourhoods

    Notes
    -----
    Spheres at the edge of the mask keep only their brain voxels, so they
    are smaller; ``sizes`` says by how much. Searchlight of Kriegeskorte,
    Goebel & Bandettini (2006), PNAS 103:3863-3868.

    Examples
    --------
    >>> mask = np.ones((3, 3, 3), dtype=bool)
    >>> spheres = sphere_neighbourhoods(mask, np.eye(4), 1.0, centres=[13])  # the middle voxel
    >>> spheres.sizes.tolist(), spheres.indices[0].tolist()
    ([7], [4, 10, 12, 13, 14, 16, 22])
    """
    mask = np.asarray(mask)
    if mask.ndim != 3:
        _fail("mask", f"expected a 3D brain mask, got shape {mask.shape}", "give one 3D mask volume")
    mask = mask.astype(bool)
    n_voxels = int(mask.sum())
    if n_voxels == 0:
        _fail("mask", "the brain mask is empty", "check the brain mask step")
    offsets = sphere_offsets(radius_mm, affine)
    lookup = np.full(mask.shape, -1, dtype=np.int64)
    lookup[mask] = np.arange(n_voxels)
    coordinates = np.argwhere(mask)  # C order, the order of lookup
    centres = np.arange(n_voxels, dtype=np.int64) if centres is None else np.asarray(centres, dtype=np.int64)
    if centres.ndim != 1 or (centres.size and (centres.min() < 0 or centres.max() >= n_voxels)):
        _fail("centres", f"expected brain-voxel indices in [0, {n_voxels}), got shape {centres.shape} "
              f"range {centres.min() if centres.size else None}..{centres.max() if centres.size else None}", "pass indices into the mask's voxels")
    shape = np.asarray(mask.shape)
    indices = np.empty((centres.size, len(offsets)), dtype=np.int64)
    step = max(1, _CHUNK_ELEMENTS // (3 * len(offsets)))
    for start in range(0, centres.size, step):
        chosen = centres[start:start + step]
        positions = coordinates[chosen][:, np.newaxis, :] + offsets[np.newaxis]
        inside = np.all((positions >= 0) & (positions < shape), axis=2)
        clipped = np.clip(positions, 0, shape - 1)
        found = np.where(inside, lookup[clipped[..., 0], clipped[..., 1], clipped[..., 2]], -1)
        # Offsets are in C order, so the found voxels already ascend; a stable
        # sort on "is padding" moves the padding to the end and keeps that order.
        order = np.argsort(found < 0, axis=1, kind="stable")
        indices[start:start + step] = np.take_along_axis(found, order, axis=1)
    sizes = (indices >= 0).sum(axis=1).astype(np.int64)
    return Neighbourhoods(indices, sizes, centres, n_voxels)


def block_centres(n_voxels, n_blocks, block):
    """The centres of block ``block`` of ``n_blocks``: a contiguous run of brain voxels in C order.

    Parameters
    ----------
    n_voxels : int
        Voxels in the brain mask.
    n_blocks : int
        Number of blocks (>= 1); ``np.array_split`` sizes (differ by at most
        one, the larger blocks first). A block may be empty.
    block : int
        Which block, ``0 <= block < n_blocks``.

    Returns
    -------
    ndarray of int64
        Brain-voxel indices of the block's centres.

    Examples
    --------
    >>> [block_centres(5, 2, b).tolist() for b in range(2)]
    [[0, 1, 2], [3, 4]]
    """
    n_voxels = _check_count(n_voxels, "n_voxels", 0, "pass the number of brain voxels")
    n_blocks = _check_count(n_blocks, "searchlight.n_blocks", 1, "set searchlight.n_blocks >= 1")
    if isinstance(block, bool) or not isinstance(block, (int, np.integer)) or not 0 <= block < n_blocks:
        _fail("block", f"expected a block index in [0, {n_blocks}), got {block!r}", f"pass 0 .. {n_blocks - 1}")
    return np.array_split(np.arange(n_voxels, dtype=np.int64), n_blocks)[int(block)]


# -- the analysis entry -------------------------------------------------------------------------
def analysis_outline(analysis, file=None):
    """Class names, set names, direction names and chance level of an analysis entry.

    Parameters
    ----------
    analysis : dict
        An ``analyses`` entry: ``kind: within`` with ``classes`` (class ->
        list of conditions) or ``kind: cross`` with ``sets`` (two sets, each
        class -> condition).
    file : str, optional
        Named in error messages.

    Returns
    -------
    dict
        ``class_names`` (entry order), ``set_names`` (``None`` for plain
        decoding), ``directions`` (``["within"]`` or the five cross-decoding
        directions of :func:`foldwise.decoding.curves.cross_directions`, the order of
        the map volumes) and ``chance`` (1 / number of classes).

    Examples
    --------
    >>> analysis_outline({"name": "s", "kind": "cross", "sets": {"seen": {"a": "s_a", "b": "s_b"}, "heard": {"a": "h_a", "b": "h_b"}}})["directions"]
    ['seen->heard', 'heard->seen', 'seen<->heard', 'seen->seen', 'heard->heard']
    """
    if not isinstance(analysis, dict) or analysis.get("kind") not in ("within", "cross"):
        _fail("analyses.kind", f"expected an analysis entry with kind within or cross, got {analysis!r:.200}", "fix the analysis entry", file)
    name = analysis.get("name", "?")
    if analysis["kind"] == "within":
        classes = analysis.get("classes") or {}
        if len(classes) < 2:
            _fail(f"analyses[{name}].classes", f"need at least two classes, got {list(classes)}", "define two or more classes", file)
        class_names, set_names, directions = list(classes), None, ["within"]
    else:
        sets_entry = analysis.get("sets") or {}
        set_names = list(sets_entry)
        if len(set_names) != 2:
            _fail(f"analyses[{name}].sets", f"cross-decoding needs exactly two sets, got {set_names}", "define two sets", file)
        class_names = list(sets_entry[set_names[0]])
        if sorted(class_names) != sorted(sets_entry[set_names[1]]) or len(class_names) < 2:
            _fail(f"analyses[{name}].sets", f"the sets must share two or more class names, got {class_names} and {list(sets_entry[set_names[1]])}",
                  "give both sets the same class names", file)
        directions = list(cross_directions(set_names))
    return {"class_names": class_names, "set_names": set_names, "directions": directions, "chance": 1.0 / len(class_names)}


def sample_design(conditions, run_labels, analysis, file=None):
    """Which patterns an analysis uses, with their class, set and run.

    Parameters
    ----------
    conditions : array_like of str, shape (n_patterns,)
        The condition of every available pattern.
    run_labels : array_like, shape (n_patterns,)
        The run of every pattern.
    analysis : dict
        An ``analyses`` entry of the config: ``kind: within`` with ``classes``
        (class -> list of conditions) or ``kind: cross`` with ``sets`` (two
        sets, each class -> condition); ``name`` is used in messages.
    file : str, optional
        Named in error messages (e.g. the pattern tables).

    Returns
    -------
    dict
        ``rows`` (indices of the used patterns), ``labels``, ``sets`` (0 for
        plain decoding; 0/1 for the two sets), ``runs`` (all shape
        (n_used,)), ``class_names``, ``set_names`` (``None`` for plain
        decoding), ``directions`` (``["within"]``, or the five cross-decoding
        directions of :func:`foldwise.decoding.curves.cross_directions`) and
        ``chance`` (1 / number of classes).

    Raises
    ------
    InputError
        For an unknown kind, a condition claimed by two classes or sets, sets
        whose classes differ, or a class with no pattern.

    Examples
    --------
    >>> design = sample_design(["a", "b", "c", "a"], [1, 1, 1, 2], {"name": "t", "kind": "within", "classes": {"x": ["a"], "y": ["b"]}})
    >>> design["rows"].tolist(), design["labels"].tolist(), design["directions"]
    ([0, 1, 3], [0, 1, 0], ['within'])
    """
    conditions = np.asarray(conditions).astype(str)
    runs = np.asarray(run_labels)
    if conditions.ndim != 1 or runs.shape != conditions.shape:
        _fail("condition", f"conditions {conditions.shape} and runs {runs.shape} must be 1-D and match", "pass one condition and run per pattern", file)
    outline = analysis_outline(analysis, file)
    name = analysis.get("name", "?")
    class_names, set_names = outline["class_names"], outline["set_names"]
    if analysis["kind"] == "within":
        classes = analysis["classes"]
        owner = {}
        for index, class_name in enumerate(class_names):
            for condition in classes[class_name]:
                if condition in owner:
                    _fail(f"analyses[{name}].classes", f"condition {condition!r} belongs to classes {class_names[owner[condition]]!r} "
                          f"and {class_name!r}", "give each condition to one class", file)
                owner[condition] = index
        label_of = np.array([owner.get(condition, -1) for condition in conditions], dtype=np.int64)
        rows = np.flatnonzero(label_of >= 0)
        labels, sets = label_of[rows], np.zeros(rows.size, dtype=np.int64)
        wanted = {class_name: classes[class_name] for class_name in class_names}
    else:
        sets_entry = analysis["sets"]
        owner = {}
        for set_index, set_name in enumerate(set_names):
            for class_name, condition in sets_entry[set_name].items():
                if condition in owner:
                    _fail(f"analyses[{name}].sets", f"condition {condition!r} is used twice", "map each condition to one class of one set", file)
                owner[condition] = (class_names.index(class_name), set_index)
        pairs = [owner.get(condition, (-1, -1)) for condition in conditions]
        label_of = np.array([pair[0] for pair in pairs], dtype=np.int64)
        set_of = np.array([pair[1] for pair in pairs], dtype=np.int64)
        rows = np.flatnonzero(label_of >= 0)
        labels, sets = label_of[rows], set_of[rows]
        wanted = {f"{set_name}/{class_name}": [sets_entry[set_name][class_name]] for set_name in set_names for class_name in class_names}
    present = set(conditions[rows].tolist())
    for what, wanted_conditions in wanted.items():
        if not present.intersection(wanted_conditions):
            _fail("condition", f"analysis {name}: class {what} (conditions {wanted_conditions}) has no pattern; "
                  f"conditions found: {sorted(set(conditions.tolist()))}", "fix the condition names in the analysis or model them in the GLM", file)
    return {"rows": rows.astype(np.int64), "labels": labels, "sets": sets, "runs": runs[rows], **outline}


# -- sums over spheres ---------------------------------------------------------------------------
def neighbourhood_sums(values, spheres):
    """Sum per-voxel values over every sphere.

    Parameters
    ----------
    values : array_like, shape (n_rows, n_voxels)
        One row per quantity, one column per brain voxel.
    spheres : Neighbourhoods

    Returns
    -------
    ndarray of float64, shape (n_rows, n_centres)
        ``sums[r, c] = sum over v in sphere(c) of values[r, v]``.

    Notes
    -----
    One sparse (CSR) matrix product with the sphere indicator matrix. Each
    sphere's sum runs over its voxels in ascending order whatever the other
    centres, so a centre's sum does not depend on the block it is in.
    """
    values = np.asarray(values, dtype=np.float64)
    if values.ndim != 2 or values.shape[1] != spheres.n_voxels:
        _fail("values", f"expected shape (n_rows, {spheres.n_voxels}), got {values.shape}", "pass one column per brain voxel")
    return np.ascontiguousarray((spheres.sum_operator @ np.ascontiguousarray(values.T)).T)


def _check_fold_arrays(z_train, train_labels, z_test, spheres, n_classes):
    z_train = np.asarray(z_train, dtype=np.float64)
    z_test = np.asarray(z_test, dtype=np.float64)
    labels = np.asarray(train_labels)
    if labels.ndim == 1:
        labels = labels[np.newaxis]
    n_classes = _check_count(n_classes, "n_classes", 2, "define two or more classes")
    if z_train.ndim != 2 or z_test.ndim != 2 or z_train.shape[1] != spheres.n_voxels or z_test.shape[1] != spheres.n_voxels:
        _fail("patterns", f"expected (n, {spheres.n_voxels}) training and test patterns, got {z_train.shape} and {z_test.shape}",
              "pass one column per brain voxel")
    if labels.ndim != 2 or labels.shape[1] != z_train.shape[0] or not np.issubdtype(labels.dtype, np.integer):
        _fail("labels", f"expected integer labels of shape (n_labelings, {z_train.shape[0]}), got {labels.dtype} {labels.shape}",
              "pass one label per training pattern")
    if labels.size and (labels.min() < 0 or labels.max() >= n_classes):
        _fail("labels", f"labels must lie in [0, {n_classes}), got {np.unique(labels)[:10].tolist()}", "encode classes as 0 .. n_classes-1")
    counts = np.stack([(labels == klass).sum(axis=1) for klass in range(n_classes)], axis=1)
    if np.any(counts == 0):
        row, klass = np.argwhere(counts == 0)[0]
        _fail("labels", f"labeling {int(row)} has no training pattern of class {int(klass)}", "train on folds that contain every class")
    return z_train, labels.astype(np.int64), z_test, n_classes, counts


def _class_weights(labels, n_classes):
    """(L, K, n) weights that average each class's patterns: one-hot transposed over counts."""
    indicator = (labels[:, np.newaxis, :] == np.arange(n_classes)[np.newaxis, :, np.newaxis]).astype(np.float64)
    return indicator / indicator.sum(axis=2, keepdims=True)


def _labeling_chunks(n_labelings, elements_per_labeling):
    step = max(1, _CHUNK_ELEMENTS // max(1, int(elements_per_labeling)))
    return [slice(start, min(start + step, n_labelings)) for start in range(0, n_labelings, step)]


# -- correlation to class centroids ---------------------------------------------------------------
def predict_correlation_centroid(z_train, train_labels, z_test, spheres, n_classes):
    """Correlation-to-centroid predictions for every sphere and labeling.

    Parameters
    ----------
    z_train : array_like, shape (n_train, n_voxels)
        Training patterns over all brain voxels, z-scored by the fold.
    train_labels : array_like of int, shape (n_labelings, n_train) or (n_train,)
        Row 0 the real labels, further rows permutations.
    z_test : array_like, shape (n_test, n_voxels)
        Test patterns, scaled with the training fold's scaler.
    spheres : Neighbourhoods
    n_classes : int

    Returns
    -------
    ndarray of int64, shape (n_labelings, n_centres, n_test)
        The class whose centroid (mean training pattern over the sphere)
        correlates most with each test pattern over the sphere's voxels.

    Notes
    -----
    The correlation classifier of Haxby et al. (2001), Science
    293:2425-2430. Pearson's r over the ``p`` sphere voxels is assembled
    from sphere sums of per-voxel terms,
    ``r = (S_tc - S_t S_c / p) / sqrt((S_tt - S_t^2 / p)(S_cc - S_c^2 / p))``
    with ``S_tc = sum_v t_v c_v`` etc., so each term is computed once per
    voxel and summed over all spheres by one sparse product. An undefined
    correlation (a constant pattern over the sphere) counts as 0; ties go to
    the lower class index, as in :func:`foldwise.decoding.classifiers.correlation_centroid_predict`.
    """
    z_train, labels, z_test, n_classes, _ = _check_fold_arrays(z_train, train_labels, z_test, spheres, n_classes)
    n_test, n_voxels = z_test.shape
    size = spheres.sizes.astype(np.float64)
    test_sums = neighbourhood_sums(np.vstack([z_test, z_test**2]), spheres)  # label-free
    sum_t, sum_tt = test_sums[:n_test], test_sums[n_test:]
    spread_t = sum_tt - sum_t**2 / size  # (n_test, C)
    predictions = np.empty((labels.shape[0], spheres.n_centres, n_test), dtype=np.int64)
    rows_per_labeling = n_classes * (n_test + 2)
    for chunk in _labeling_chunks(labels.shape[0], rows_per_labeling * n_voxels):
        n_chunk = chunk.stop - chunk.start
        centroids = np.matmul(_class_weights(labels[chunk], n_classes), z_train)  # (L, K, V)
        products = z_test[np.newaxis, :, np.newaxis, :] * centroids[:, np.newaxis, :, :]  # (L, t, K, V)
        stacked = np.concatenate([products.reshape(-1, n_voxels), centroids.reshape(-1, n_voxels), (centroids**2).reshape(-1, n_voxels)])
        sums = neighbourhood_sums(stacked, spheres)
        split = n_chunk * n_test * n_classes
        sum_tc = sums[:split].reshape(n_chunk, n_test, n_classes, -1)
        sum_c = sums[split:split + n_chunk * n_classes].reshape(n_chunk, 1, n_classes, -1)
        sum_cc = sums[split + n_chunk * n_classes:].reshape(n_chunk, 1, n_classes, -1)
        covariation = sum_tc - sum_t[np.newaxis, :, np.newaxis, :] * sum_c / size
        spread_c = sum_cc - sum_c**2 / size
        with np.errstate(divide="ignore", invalid="ignore"):
            correlation = covariation / np.sqrt(spread_t[np.newaxis, :, np.newaxis, :] * spread_c)
        correlation = np.where(np.isfinite(correlation), correlation, 0.0)
        predictions[chunk] = np.argmax(correlation, axis=2).transpose(0, 2, 1)
    return predictions


# -- Gaussian naive Bayes --------------------------------------------------------------------------
def predict_gaussian_nb(z_train, train_labels, z_test, spheres, n_classes, var_smoothing=GNB_VAR_SMOOTHING):
    """Equal-prior Gaussian naive Bayes predictions for every sphere and labeling.

    Parameters
    ----------
    z_train, train_labels, z_test, spheres, n_classes
        As for :func:`predict_correlation_centroid`.
    var_smoothing : float
        Variance added to every class variance (see ``GNB_VAR_SMOOTHING``).

    Returns
    -------
    ndarray of int64, shape (n_labelings, n_centres, n_test)

    Notes
    -----
    ``sklearn.naive_bayes.GaussianNB(priors=equal)`` fitted on the sphere's
    voxels: class means and population variances per voxel, and the joint
    log-likelihood
    ``sum_v -[log(2 pi var_kv) + (x_v - theta_kv)^2 / var_kv] / 2``. Naive
    Bayes treats voxels as independent, so a sphere's log-likelihood is the
    sphere sum of per-voxel log-likelihoods, each computed once per voxel.
    scikit-learn's smoothing is ``var_smoothing * max_v var(X[:, v])``;
    after z-scoring by the training fold that maximum is 1 (up to rounding),
    which is what is used here. Ties go to the lower class index.
    """
    if not np.isscalar(var_smoothing) or not var_smoothing >= 0:
        _fail("var_smoothing", f"expected a non-negative number, got {var_smoothing!r}", "use 1e-9 (scikit-learn's default)")
    z_train, labels, z_test, n_classes, _ = _check_fold_arrays(z_train, train_labels, z_test, spheres, n_classes)
    n_train, n_voxels = z_train.shape
    n_test = z_test.shape[0]
    predictions = np.empty((labels.shape[0], spheres.n_centres, n_test), dtype=np.int64)
    for chunk in _labeling_chunks(labels.shape[0], max(n_train, n_test * n_classes) * n_voxels):
        n_chunk = chunk.stop - chunk.start
        weights = _class_weights(labels[chunk], n_classes)
        theta = np.matmul(weights, z_train)  # (L, K, V)
        residuals = z_train[np.newaxis] - np.take_along_axis(theta, labels[chunk][:, :, np.newaxis], axis=1)  # (L, n, V)
        variance = np.matmul(weights, residuals**2) + float(var_smoothing)  # two-pass, as np.var
        del residuals
        log_likelihood = -0.5 * (np.log(2.0 * np.pi * variance)[:, np.newaxis]
                                 + (z_test[np.newaxis, :, np.newaxis, :] - theta[:, np.newaxis]) ** 2 / variance[:, np.newaxis])
        sums = neighbourhood_sums(log_likelihood.reshape(-1, n_voxels), spheres).reshape(n_chunk, n_test, n_classes, -1)
        predictions[chunk] = np.argmax(sums, axis=2).transpose(0, 2, 1)
    return predictions


# -- gathered spheres ------------------------------------------------------------------------------
def _centre_chunks(n_centres, elements_per_centre):
    step = max(1, _CHUNK_ELEMENTS // max(1, int(elements_per_centre)))
    return [slice(start, min(start + step, n_centres)) for start in range(0, n_centres, step)]


def _gather(patterns_padded, spheres, chunk):
    """(n_centres_in_chunk, n_patterns, n_offsets): each sphere's voxels, padding as zeros."""
    return np.ascontiguousarray(patterns_padded[:, spheres.padded[chunk]].transpose(1, 0, 2))


def _with_zero_column(patterns):
    return np.hstack([patterns, np.zeros((patterns.shape[0], 1))])


# -- shrinkage LDA ------------------------------------------------------------------------------
def _is_constant(variance, mean, n_samples):
    """scikit-learn's near-constant test for a variance from the two-pass formula."""
    eps = np.finfo(np.float64).eps
    return variance <= n_samples * eps * variance + (n_samples * mean * eps) ** 2


def _lda_voxel_terms(z_train, labels, z_test, n_classes):
    """Label-dependent per-voxel pieces of the LDA of one labeling, rows in class order, as gather tables.

    Returns the class slices and three (n_voxels + 1, rows) tables (the extra
    row is the padding voxel): ``[test; class means; residuals]``, the
    residuals standardised by their class SD (``sklearn``'s per-class
    ``StandardScaler`` inside ``_cov(X, "auto")``), and the class variances
    (1 on padding: a positive, inert diagonal).
    """
    order = np.argsort(labels, kind="stable")
    ordered = labels[order]
    counts = np.bincount(ordered, minlength=n_classes)
    bounds = np.concatenate([[0], np.cumsum(counts)])
    slices = [slice(int(bounds[k]), int(bounds[k + 1])) for k in range(n_classes)]
    train = z_train[order]
    means = np.stack([train[part].mean(axis=0) for part in slices])  # (K, V)
    residuals = train - means[ordered]
    variance = np.stack([(residuals[part] ** 2).mean(axis=0) for part in slices])
    scale = np.where(_is_constant(variance, means, counts[:, np.newaxis]), 1.0, np.sqrt(variance))
    standard = residuals / scale[ordered]
    n_voxels = z_train.shape[1]
    rows = np.zeros((n_voxels + 1, z_test.shape[0] + n_classes + train.shape[0]))
    rows[:n_voxels] = np.vstack([z_test, means, residuals]).T
    standard_rows = np.zeros((n_voxels + 1, train.shape[0]))
    standard_rows[:n_voxels] = standard.T
    scale_rows = np.ones((n_voxels + 1, n_classes))
    scale_rows[:n_voxels] = (scale**2).T
    return slices, counts, rows, standard_rows, scale_rows


def _ledoit_wolf_sphere(small, n_k, size):
    """Ledoit-Wolf shrinkage and target scale per sphere from the Gram matrices of standardised class data.

    ``small`` (b, n_k, n_k) is ``Y Y'`` of one class's standardised patterns
    over each sphere; the formula of ``sklearn.covariance.ledoit_wolf_shrinkage``
    (``||Y'Y||_F = ||YY'||_F`` and the row norms are its diagonal).
    """
    row_norms = np.einsum("bnn->bn", small)
    trace_sum = row_norms.sum(axis=1)  # n * tr(S)
    mu = trace_sum / (n_k * size)
    delta_ = np.einsum("bij,bij->b", small, small) / n_k**2
    beta = ((row_norms**2).sum(axis=1) / n_k - delta_) / (size * n_k)
    delta = (delta_ - 2.0 * mu * trace_sum / n_k + size * mu**2) / size
    beta = np.minimum(beta, delta)
    with np.errstate(divide="ignore", invalid="ignore"):
        shrinkage = np.where(beta == 0, 0.0, beta / delta)
    return np.where(size == 1, 0.0, shrinkage), mu  # one feature: sklearn skips the shrinkage


def _lda_chunk(gathered, standard, variances, slices, counts, n_test, size, valid):
    """Shrinkage-LDA predictions (b, n_test) of one labeling for a chunk of spheres.

    ``gathered`` (b, P, t + K + n) holds each sphere's test patterns, class
    means and residuals (voxels along axis 1, padding zeros); ``standard``
    (b, P, n) the standardised residuals; ``variances`` (b, P, K) the class
    variances.
    """
    n_spheres, n_pad = gathered.shape[:2]
    n_classes, n_train = len(slices), int(counts.sum())
    prior = 1.0 / n_classes
    shrink_weight = np.empty((n_spheres, n_classes))  # prior * alpha_k * mu_k: the weight of s_k^2 on the diagonal
    row_weight = np.empty((n_spheres, n_train))  # sqrt(prior (1 - alpha_k) / n_k) for the rows of class k
    for klass, part in enumerate(slices):
        block = standard[:, :, part]
        shrinkage, mu = _ledoit_wolf_sphere(np.matmul(block.transpose(0, 2, 1), block), counts[klass], size)
        shrink_weight[:, klass] = prior * shrinkage * mu
        row_weight[:, part] = np.sqrt(prior * (1.0 - shrinkage) / counts[klass])[:, np.newaxis]
    ridge = np.matmul(variances, shrink_weight[:, :, np.newaxis])[:, :, 0]  # D = sum_k prior alpha_k mu_k s_k^2  (b, P)
    regular = np.all((ridge > 0) | ~valid, axis=1)
    decisions = np.empty((n_spheres, n_test, n_classes))
    means_at, residuals_at = slice(n_test, n_test + n_classes), slice(n_test + n_classes, None)
    chosen = slice(None) if regular.all() else regular  # a view, not a copy, in the usual case
    if regular.any() and n_train > n_pad:
        # More patterns than voxels: the p x p system Sigma = D + U'U itself is the smaller one.
        weighted = gathered[chosen][:, :, residuals_at] * row_weight[chosen][:, np.newaxis, :]  # U'  (b, P, n)
        covariance = np.matmul(weighted, weighted.transpose(0, 2, 1))
        covariance[:, np.arange(n_pad), np.arange(n_pad)] += ridge[chosen]  # padding voxels: an inert positive ridge
        class_means = gathered[chosen][:, :, means_at]
        coef = np.linalg.solve(covariance, class_means)  # Sigma^-1 M'  (b, P, K)
        intercept = -0.5 * np.einsum("bpk,bpk->bk", class_means, coef)
        decisions[chosen] = np.matmul(gathered[chosen][:, :, :n_test].transpose(0, 2, 1), coef) + intercept[:, np.newaxis, :]
    elif regular.any():
        # Sigma = D + U'U with D = diag(ridge) and U the weighted residuals; by Woodbury
        # Sigma^-1 = D^-1 - D^-1 U' (I + U D^-1 U')^-1 U D^-1, so only an n x n system is solved.
        # One product gives every inner product needed: [test; M; R] against D^-1 [M; R]; the row
        # weights of U are applied to the small result.
        inner = gathered[chosen]
        scaled = inner[:, :, n_test:] / ridge[chosen][:, :, np.newaxis]
        products = np.matmul(inner.transpose(0, 2, 1), scaled)  # (b, t + K + n, K + n)
        weights = row_weight[chosen]
        system = products[:, residuals_at, n_classes:] * weights[:, :, np.newaxis] * weights[:, np.newaxis, :]
        system[:, np.arange(n_train), np.arange(n_train)] += 1.0  # I + U D^-1 U'
        right = products[:, residuals_at, :n_classes] * weights[:, :, np.newaxis]  # U D^-1 M'
        solved = np.linalg.solve(system, right)
        # x Sigma^-1 M' = x D^-1 M' - (x D^-1 U') solved, for the test rows and the class means (intercepts).
        head = slice(0, n_test + n_classes)
        through = products[:, head, :n_classes] - np.matmul(products[:, head, n_classes:] * weights[:, np.newaxis, :], solved)
        intercept = -0.5 * np.einsum("bkk->bk", through[:, n_test:])
        decisions[chosen] = through[:, :n_test] + intercept[:, np.newaxis, :]
    for sphere in np.flatnonzero(~regular):  # no shrinkage anywhere (degenerate data): sklearn's lstsq, explicitly
        columns = valid[sphere]
        weighted = gathered[sphere][columns][:, residuals_at] * row_weight[sphere][np.newaxis, :]
        covariance = weighted @ weighted.T + np.diag(ridge[sphere][columns])
        class_means = gathered[sphere][columns][:, means_at]
        coef = np.linalg.lstsq(covariance, class_means, rcond=None)[0]
        intercept = -0.5 * np.einsum("pk,pk->k", class_means, coef)
        decisions[sphere] = gathered[sphere][columns][:, :n_test].T @ coef + intercept
    return np.argmax(decisions, axis=2)


def predict_shrinkage_lda(z_train, train_labels, z_test, spheres, n_classes):
    """Shrinkage-LDA predictions for every sphere and labeling.

    Parameters
    ----------
    z_train, train_labels, z_test, spheres, n_classes
        As for :func:`predict_correlation_centroid`.

    Returns
    -------
    ndarray of int64, shape (n_labelings, n_centres, n_test)

    Notes
    -----
    ``sklearn.discriminant_analysis.LinearDiscriminantAnalysis(solver="lsqr",
    shrinkage="auto", priors=equal)`` on the sphere's voxels: each class's
    covariance is the Ledoit-Wolf estimate (Ledoit & Wolf 2004, J.
    Multivariate Analysis 88:365-411) of its standardised patterns,
    rescaled, and the class covariances are averaged with the (equal)
    priors; ``w_k = Sigma^-1 m_k``, ``b_k = -m_k' w_k / 2`` (Duda, Hart &
    Stork 2001, Pattern Classification, 2nd ed., section 2.6).

    Class means, residuals and class SDs are per-voxel quantities, computed
    once per labeling for the whole brain and gathered per sphere. With
    ``n_train`` patterns and ``p`` voxels, ``Sigma`` is a diagonal plus
    ``U'U`` with ``U`` the ``n_train x p`` weighted residuals, so the
    Woodbury identity (Woodbury 1950, Memorandum Report 42, Princeton) turns
    the ``p x p`` solve into one ``n_train x n_train`` solve per sphere, done
    for a chunk of spheres by ``np.linalg.solve`` on stacks; with more
    training patterns than sphere voxels the ``p x p`` system is solved
    directly instead.

    This is scikit-learn's estimate, which differs from the pooled
    within-class estimate of :func:`foldwise.decoding.classifiers.shrinkage_lda_fit`
    (one Ledoit-Wolf intensity for the pooled residuals).
    """
    z_train, labels, z_test, n_classes, _ = _check_fold_arrays(z_train, train_labels, z_test, spheres, n_classes)
    n_train, n_test = z_train.shape[0], z_test.shape[0]
    width = spheres.indices.shape[1]
    predictions = np.empty((labels.shape[0], spheres.n_centres, n_test), dtype=np.int64)
    valid, padded = spheres.valid, spheres.padded
    chunks = _centre_chunks(spheres.n_centres, (n_test + 2 * n_classes + 2 * n_train) * width * 3)
    for row in range(labels.shape[0]):
        slices, counts, rows, standard_rows, variance_rows = _lda_voxel_terms(z_train, labels[row], z_test, n_classes)
        for chunk in chunks:
            where = padded[chunk]
            predictions[row, chunk] = _lda_chunk(rows[where], standard_rows[where], variance_rows[where], slices, counts, n_test,
                                                 spheres.sizes[chunk].astype(np.float64), valid[chunk])
    return predictions


# -- linear SVM -------------------------------------------------------------------------------
def predict_linear_svm(z_train, train_labels, z_test, spheres, n_classes, C=1.0):
    """Linear-SVM predictions for every sphere and labeling (one libsvm fit per sphere and labeling).

    Parameters
    ----------
    z_train, train_labels, z_test, spheres, n_classes
        As for :func:`predict_correlation_centroid`.
    C : float
        Soft-margin penalty (> 0).

    Returns
    -------
    ndarray of int64, shape (n_labelings, n_centres, n_test)

    Notes
    -----
    The slow exact option: ``sklearn.svm.SVC(kernel="linear", C=C)`` on the
    sphere's voxels, through :func:`foldwise.decoding.classifiers.linear_svm_fit_predict`
    on Gram matrices that are computed for a chunk of spheres at once
    (padding voxels are zeros and add nothing to a linear kernel). Cortes &
    Vapnik (1995), Machine Learning 20:273-297.
    """
    z_train, labels, z_test, n_classes, _ = _check_fold_arrays(z_train, train_labels, z_test, spheres, n_classes)
    n_train, n_test = z_train.shape[0], z_test.shape[0]
    train_padded, test_padded = _with_zero_column(z_train), _with_zero_column(z_test)
    width = spheres.indices.shape[1]
    predictions = np.empty((labels.shape[0], spheres.n_centres, n_test), dtype=np.int64)
    for chunk in _centre_chunks(spheres.n_centres, (n_train + n_test) * width):
        train, test = _gather(train_padded, spheres, chunk), _gather(test_padded, spheres, chunk)
        train_gram = np.matmul(train, train.transpose(0, 2, 1))
        train_gram = (train_gram + train_gram.transpose(0, 2, 1)) / 2.0  # exactly symmetric, as a kernel must be
        test_gram = np.matmul(test, train.transpose(0, 2, 1))
        for offset, sphere in enumerate(range(chunk.start, chunk.stop)):
            predictions[:, sphere] = linear_svm_fit_predict(train_gram[offset], labels, test_gram[offset], C=C)
    return predictions


_PREDICTORS = {
    "correlation_centroid": predict_correlation_centroid,
    "gaussian_nb": predict_gaussian_nb,
    "shrinkage_lda": predict_shrinkage_lda,
    "linear_svm": predict_linear_svm,
}


# -- the fold loop -------------------------------------------------------------------------------
def searchlight_scores(patterns, labels, run_labels, spheres, *, set_index=None, set_names=None, classifier="correlation_centroid",
                       n_permutations=0, rng=None, fold_scheme="leave_one_run_out", n_groups=2, svm_c=1.0, n_classes=None):
    """Fold-mean balanced accuracy of every sphere, for the real labels and each permutation.

    Parameters
    ----------
    patterns : array_like, shape (n_patterns, n_voxels)
        The analysis's patterns over all brain voxels (every sphere needs
        its voxels, wherever its centre lies).
    labels : array_like of int, shape (n_patterns,)
        Class index of each pattern.
    run_labels : array_like, shape (n_patterns,)
        Run of each pattern (folds hold out whole runs; permutations stay
        within runs).
    spheres : Neighbourhoods
        The spheres of the centres to score.
    set_index : array_like of int, shape (n_patterns,), optional
        Cross-decoding: 0 for set A, 1 for set B (``set_names`` then required).
    set_names : (str, str), optional
        Names of the two sets, used in the direction names.
    classifier : str
        One of ``SEARCHLIGHT_CLASSIFIERS``.
    n_permutations : int
        Relabelings within runs for the null (0: none).
    rng : numpy.random.Generator, optional
        Draws the permutations (required when ``n_permutations > 0``).
    fold_scheme : {"leave_one_run_out", "run_groups"}
    n_groups : int
        Groups of runs for ``run_groups``.
    svm_c : float
        Penalty of the linear SVM.
    n_classes : int, optional
        Default: the largest label + 1.

    Returns
    -------
    scores : ndarray of float64, shape (1 + n_permutations, n_centres, n_directions)
        Row 0 the real labels; row ``k`` permutation ``k``. The fold mean of
        the per-fold balanced accuracy (mean recall over the classes in the
        held-out patterns, as :func:`foldwise.decoding.curves.balanced_accuracy`).
    directions : list of str
        ``["within"]``, or ``A->B, B->A, A<->B, A->A, B->B``.

    Notes
    -----
    Each fold z-scores every voxel with the mean and SD of the training
    patterns (:func:`foldwise.decoding.curves.fit_scaler`, StandardScaler's
    arithmetic) once, for all spheres and permutations, and the classifier
    sees nothing else of the held-out run. The null follows the ROI decoding
    of :mod:`foldwise.decoding.curves`: each permutation relabels all patterns
    once, within runs (cross-decoding: within run-by-set blocks, set A's
    first), and that one label vector is both the training labels and the
    held-out truth of every direction (Nichols & Holmes 2002, Human Brain
    Mapping 15:1-25). ``A->B`` trains on set A's
    patterns of the training runs and tests set B's patterns of the held-out
    runs; ``A->B`` and ``A->A`` share one fit per fold; ``A<->B`` is the mean
    of ``A->B`` and ``B->A``.
    """
    if classifier not in SEARCHLIGHT_CLASSIFIERS:
        _fail("searchlight.classifier", f"unknown searchlight classifier {classifier!r}", f"use one of {', '.join(SEARCHLIGHT_CLASSIFIERS)}")
    if fold_scheme not in FOLD_SCHEMES:
        _fail("folds.scheme", f"unknown fold scheme {fold_scheme!r}", f"use one of {', '.join(FOLD_SCHEMES)}")
    n_permutations = _check_count(n_permutations, "searchlight.n_permutations", 0, "set searchlight.n_permutations >= 0")
    if n_permutations and not isinstance(rng, np.random.Generator):
        _fail("rng", f"expected a numpy.random.Generator, got {type(rng).__name__}", "pass np.random.default_rng(seed)")
    if not isinstance(spheres, Neighbourhoods):
        _fail("spheres", f"expected Neighbourhoods, got {type(spheres).__name__}", "build them with sphere_neighbourhoods")
    data = np.asarray(patterns, dtype=np.float64)
    if data.ndim != 2 or data.shape[0] < 2 or data.shape[1] != spheres.n_voxels:
        _fail("patterns", f"expected (n_patterns >= 2, {spheres.n_voxels}) patterns, got shape {data.shape}", "pass every brain voxel of every pattern")
    if not np.all(np.isfinite(data)):
        _fail("patterns", "the patterns contain NaN or infinite values inside the brain mask", "recompute the patterns or shrink the brain mask")
    classes = np.asarray(labels)
    if classes.shape != (data.shape[0],) or not np.issubdtype(classes.dtype, np.integer) or classes.min() < 0:
        _fail("labels", f"expected {data.shape[0]} non-negative integer labels, got {classes.dtype} {classes.shape}", "encode classes as 0 .. n_classes-1")
    classes = classes.astype(np.int64)
    n_classes = int(classes.max()) + 1 if n_classes is None else _check_count(n_classes, "n_classes", 2, "define two or more classes")
    if n_classes < 2 or classes.max() >= n_classes:
        _fail("labels", f"need labels in [0, n_classes) with n_classes >= 2, got {n_classes} and {np.unique(classes).tolist()}", "define two or more classes")
    runs = np.asarray(run_labels)
    if runs.shape != classes.shape:
        _fail("run_id", f"expected {classes.size} run labels, got shape {runs.shape}", "pass the run of every pattern")
    cross = set_index is not None
    if cross:
        sets = np.asarray(set_index)
        if sets.shape != classes.shape or not np.isin(sets, (0, 1)).all() or np.unique(sets).size != 2:
            _fail("sets", f"set_index must hold 0 (set A) and 1 (set B), got {np.unique(sets).tolist()}", "give both sets patterns")
        if set_names is None or len(set_names) != 2 or set_names[0] == set_names[1]:
            _fail("sets", f"expected two distinct set names, got {set_names!r}", "name the two sets differently")
        directions = list(cross_directions(set_names))
        pairs = [(0, 1), (1, 0), (0, 0), (1, 1)]  # A->B, B->A, A->A, B->B; A<->B is their mean below
        permuted = permute_within_runs(classes, block_codes(runs, sets), n_permutations, rng)
    else:
        sets = np.zeros_like(classes)
        directions, pairs = ["within"], [(0, 0)]
        permuted = permute_within_runs(classes, runs, n_permutations, rng)
    label_rows = np.vstack([classes[np.newaxis], permuted])  # one relabeling per row, for training and testing alike
    n_labelings = label_rows.shape[0]
    folds = make_folds(runs, fold_scheme, n_groups)
    totals = {pair: np.zeros((n_labelings, spheres.n_centres)) for pair in pairs}
    predict = _PREDICTORS[classifier]
    extra = {"C": float(svm_c)} if classifier == "linear_svm" else {}
    names = set_names if cross else ["within"]
    for train, test in folds:
        for train_set in sorted({pair[0] for pair in pairs}):
            train_rows = train[sets[train] == train_set]
            if train_rows.size == 0:
                _fail("sets", f"set {names[train_set]!r} has no pattern in the training runs of a fold", "give each set patterns in every run")
            missing = sorted(set(range(n_classes)) - set(classes[train_rows].tolist()))
            if missing:
                _fail("condition", f"with run(s) {sorted(set(runs[test].tolist()))} held out, the training patterns of {names[train_set]!r} "
                      f"hold no pattern of class {missing[0]}", "model that class in more runs or use folds.scheme run_groups")
            mean, scale = fit_scaler(data[train_rows])  # label-free: once per fold for every sphere and permutation
            z_train = apply_scaler(data[train_rows], mean, scale)
            z_test = apply_scaler(data[test], mean, scale)
            test_sets = [pair[1] for pair in pairs if pair[0] == train_set]
            for test_set in test_sets:
                if not np.any(sets[test] == test_set):
                    _fail("sets", f"set {names[test_set]!r} has no pattern in held-out run(s) {sorted(set(runs[test].tolist()))}",
                          "give each set patterns in every run")
            for chunk in _labeling_chunks(n_labelings, spheres.n_centres * test.size):
                predictions = predict(z_train, label_rows[chunk][:, train_rows], z_test, spheres, n_classes, **extra)
                for test_set in test_sets:
                    columns = np.flatnonzero(sets[test] == test_set)
                    truth = label_rows[chunk][:, test[columns]][:, np.newaxis, :]
                    totals[(train_set, test_set)][chunk] += balanced_accuracy(truth, predictions[:, :, columns], n_classes)
    fold_means = {pair: total / len(folds) for pair, total in totals.items()}
    if cross:
        forward, backward = fold_means[(0, 1)], fold_means[(1, 0)]
        ordered = [forward, backward, (forward + backward) / 2.0, fold_means[(0, 0)], fold_means[(1, 1)]]
    else:
        ordered = [fold_means[(0, 0)]]
    return np.stack(ordered, axis=2), directions
