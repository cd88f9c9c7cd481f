"""The relabelings a design allows: blocks, counting, exact enumeration or random draws.

A permutation null relabels the patterns *within exchangeability blocks*
(runs for plain decoding; run x set for cross-decoding) and reruns the
analysis. One relabeling is one label vector used for every step of a
permutation: training *and* testing, every fold, every voxel count, every ROI
of the subject (Nichols & Holmes 2002, Human Brain Mapping 15:1-25).

How many distinct relabelings exist? Within a block holding ``n_c`` patterns
of class ``c``, the distinct label arrangements number
``n! / prod_c n_c!`` (the multinomial coefficient); over blocks they
multiply. When every block holds the same number of patterns of every class,
renaming the classes (``K!`` ways) maps relabelings onto relabelings and
leaves balanced accuracy unchanged, so only ``product / K!`` give different
scores ("up to class renaming"): 2 classes x 4 runs of one pattern each give
``2**4 / 2 = 8``; 3 classes x 4 runs give ``6**4 / 6 = 216``.

When that space is no larger than the requested number of permutations it is
enumerated exactly, each relabeling once (identity first), and the p-value
``#{null >= observed} / n`` is exact; otherwise ``n`` relabelings are drawn
uniformly (with replacement from the group) and the observed labeling is
counted as one more, ``p = (1 + #{null >= observed}) / (1 + n)`` (Hemerik &
Goeman 2018, JRSS-B 80:137-155; Phipson & Smyth 2010, Stat. Appl. Genet. Mol.
Biol. 9:39). Both are exact level-alpha tests because both use a group of
transformations (or uniform draws from one).

Public names:

``block_codes``        the block of every pattern (set-major for cross-decoding)
``RelabelingSpace``    the size of a design's relabeling space
``relabeling_space``   count it
``enumerate_relabelings``  every distinct relabeling of a small space (identity first)
``draw_relabelings``   uniform random relabelings within blocks
``null_relabelings``   enumerate or draw, as the requested number decides
``smallest_p``         the smallest p-value a null can give
"""

import itertools
import math
from dataclasses import dataclass

import numpy as np

from foldwise.errors import InputError

__all__ = [
    "block_codes",
    "RelabelingSpace",
    "relabeling_space",
    "enumerate_relabelings",
    "draw_relabelings",
    "null_relabelings",
    "smallest_p",
    "subject_p",
    "count_as_float",
]


def _check_labels(labels, blocks):
    array = np.asarray(labels)
    codes = np.asarray(blocks)
    if array.ndim != 1 or codes.shape != array.shape:
        raise InputError(None, "labels", f"labels {array.shape} and blocks {codes.shape} must be 1-D and match",
                         "pass one label and one block per pattern")
    if array.size and (not np.issubdtype(array.dtype, np.integer) or array.min() < 0):
        raise InputError(None, "labels", f"expected non-negative integer class indices, got {array.dtype}", "encode classes as 0 .. n_classes-1")
    _, block_index = np.unique(codes, return_inverse=True)
    return array.astype(np.int64), block_index.reshape(-1)


def block_codes(run_labels, set_index=None):
    """Exchangeability block of every pattern.

    Parameters
    ----------
    run_labels : array_like, shape (n_patterns,)
    set_index : array_like of int, shape (n_patterns,), optional
        0 / 1 for the two sets of a cross analysis.

    Returns
    -------
    ndarray of int64, shape (n_patterns,)
        The run's index among the sorted runs; with sets, ``set * n_runs +
        run`` -- set-major, so all of set A's blocks come before set B's and
        a draw for set A's patterns consumes the random stream exactly as a
        plain within-run draw on set A's patterns alone would.
    """
    _, run_codes = np.unique(np.asarray(run_labels), return_inverse=True)
    run_codes = run_codes.reshape(-1).astype(np.int64)
    if set_index is None:
        return run_codes
    sets = np.asarray(set_index, dtype=np.int64)
    return sets * (int(run_codes.max()) + 1) + run_codes


@dataclass(frozen=True)
class RelabelingSpace:
    """Size of the relabeling space of a design.

    Attributes
    ----------
    n_arrangements : int
        Distinct label vectors reachable by permuting within blocks
        (product over blocks of the multinomial coefficients).
    renaming_invariant : bool
        Every block holds equally many patterns of every class, so renaming
        the classes maps the space onto itself and does not change a score.
    n_distinct : int
        Relabelings that can give different scores: ``n_arrangements / K!``
        when ``renaming_invariant``, else ``n_arrangements``.
    anchor_block : int or None
        A block holding exactly one pattern of each class (renaming
        invariant designs only): fixing its labels picks one relabeling per
        renaming class, and those relabelings form a group (the permutations
        of the other blocks).
    """

    n_arrangements: int
    renaming_invariant: bool
    n_distinct: int
    anchor_block: int | None

    @property
    def n_enumerated(self):
        """How many relabelings an exact enumeration lists."""
        return self.n_distinct if self.anchor_block is not None else self.n_arrangements


def relabeling_space(labels, blocks, n_classes=None):
    """Count the distinct relabelings of a design.

    Parameters
    ----------
    labels : array_like of int, shape (n_patterns,)
    blocks : array_like, shape (n_patterns,)
        Exchangeability block of every pattern (:func:`block_codes`).
    n_classes : int, optional
        Default: the largest label + 1.

    Returns
    -------
    RelabelingSpace

    Examples
    --------
    >>> relabeling_space([0, 1] * 4, np.repeat(np.arange(4), 2)).n_distinct
    8
    >>> relabeling_space([0, 1, 2] * 4, np.repeat(np.arange(4), 3)).n_distinct
    216
    """
    classes, block_index = _check_labels(labels, blocks)
    n_classes = int(classes.max()) + 1 if n_classes is None else int(n_classes)
    n_blocks = int(block_index.max()) + 1 if block_index.size else 0
    counts = np.zeros((n_blocks, n_classes), dtype=np.int64)
    np.add.at(counts, (block_index, classes), 1)
    n_arrangements = 1
    for row in counts:
        n_arrangements *= math.factorial(int(row.sum())) // math.prod(math.factorial(int(count)) for count in row)
    invariant = bool(n_blocks) and bool(np.all(counts == counts[:, :1]))
    anchors = np.flatnonzero(np.all(counts == 1, axis=1)) if invariant else np.empty(0, dtype=np.int64)
    n_distinct = n_arrangements // math.factorial(n_classes) if invariant else n_arrangements
    return RelabelingSpace(n_arrangements=n_arrangements, renaming_invariant=invariant, n_distinct=n_distinct,
                           anchor_block=int(anchors[0]) if anchors.size else None)


def _arrangements(values):
    """Every distinct ordering of a small multiset, the given order first: (n_orderings, len(values))."""
    values = np.asarray(values)
    unique, counts = np.unique(values, return_counts=True)
    found = []

    def grow(prefix, remaining):
        if len(prefix) == values.size:
            found.append(tuple(prefix))
            return
        for position, klass in enumerate(unique):
            if remaining[position]:
                remaining[position] -= 1
                grow(prefix + [klass], remaining)
                remaining[position] += 1

    grow([], counts.copy())
    given = tuple(values.tolist())
    found.remove(given)
    return np.array([given] + found, dtype=np.int64).reshape(-1, values.size)


def enumerate_relabelings(labels, blocks, n_classes=None):
    """Every distinct relabeling of a small design, the actual labels first.

    Parameters
    ----------
    labels : array_like of int, shape (n_patterns,)
    blocks : array_like, shape (n_patterns,)
    n_classes : int, optional

    Returns
    -------
    ndarray of int64, shape (n_enumerated, n_patterns)
        Row 0 is the actual labeling. In a renaming-invariant design with an
        anchor block (one pattern per class), the anchor's labels stay fixed
        and every other block takes each of its distinct arrangements: one
        relabeling per renaming class (``n_distinct`` rows). Otherwise every
        distinct label vector (``n_arrangements`` rows).

    Notes
    -----
    The listed relabelings form a group (all within-block permutations of
    the non-anchor blocks, taken up to equal labels), so the permutation
    test over them is exact (Hemerik & Goeman 2018, JRSS-B 80:137-155).
    Call it for small spaces only (see :func:`null_relabelings`).
    """
    classes, block_index = _check_labels(labels, blocks)
    space = relabeling_space(classes, block_index, n_classes)
    members = [np.flatnonzero(block_index == block) for block in range(int(block_index.max()) + 1)]
    options = [classes[positions][np.newaxis] if block == space.anchor_block else _arrangements(classes[positions])
               for block, positions in enumerate(members)]
    rows = np.empty((math.prod(len(option) for option in options), classes.size), dtype=np.int64)
    for row, choice in enumerate(itertools.product(*(range(len(option)) for option in options))):
        for positions, option, pick in zip(members, options, choice):
            rows[row, positions] = option[pick]
    return rows


def draw_relabelings(labels, blocks, n_draws, rng):
    """Uniform random relabelings within blocks.

    Parameters
    ----------
    labels : array_like of int, shape (n_patterns,)
    blocks : array_like, shape (n_patterns,)
    n_draws : int
    rng : numpy.random.Generator

    Returns
    -------
    ndarray, shape (n_draws, n_patterns)
        Within every block, a uniformly random reordering of its labels;
        blocks are drawn in sorted block order, each with one
        ``rng.random((n_draws, block_size))`` call.
    """
    array = np.asarray(labels)
    codes = np.asarray(blocks)
    permuted = np.empty((int(n_draws), array.size), dtype=array.dtype)
    if not n_draws:
        return permuted
    _, block_index = np.unique(codes, return_inverse=True)
    block_index = block_index.reshape(-1)
    for block in range(int(block_index.max()) + 1):
        members = np.flatnonzero(block_index == block)
        order = np.argsort(rng.random((int(n_draws), members.size)), axis=1)
        permuted[:, members] = array[members][order]
    return permuted


def null_relabelings(labels, blocks, n_permutations, rng, n_classes=None):
    """The null's relabelings: the whole space when it is small enough, else random draws.

    Parameters
    ----------
    labels : array_like of int, shape (n_patterns,)
    blocks : array_like, shape (n_patterns,)
    n_permutations : int
        Requested permutations (0: no null).
    rng : numpy.random.Generator or None
        Used only for random draws.
    n_classes : int, optional

    Returns
    -------
    relabelings : ndarray of int64, shape (n_null, n_patterns)
        Exact: every relabeling once, the actual labeling first (``n_null =
        space.n_enumerated <= n_permutations``). Drawn: ``n_permutations``
        random relabelings.
    exact : bool
    space : RelabelingSpace
    """
    classes, block_index = _check_labels(labels, blocks)
    space = relabeling_space(classes, block_index, n_classes)
    if not n_permutations:
        return np.empty((0, classes.size), dtype=np.int64), False, space
    if space.n_enumerated <= n_permutations:
        return enumerate_relabelings(classes, block_index, n_classes), True, space
    if not isinstance(rng, np.random.Generator):
        raise InputError(None, "rng", f"expected a numpy.random.Generator, got {type(rng).__name__}", "pass np.random.default_rng(seed)")
    return draw_relabelings(classes, block_index, n_permutations, rng), False, space


def smallest_p(n_null, exact, space):
    """The smallest p-value a subject's null can give.

    Exact: ``1 / n_distinct`` (the actual labeling is one of the listed
    relabelings, and renamed relabelings score alike). Drawn: ``1 / (1 + n)``,
    but never below ``1 / n_distinct``, the share of one relabeling in the
    space.
    """
    if n_null == 0:
        return float("nan")
    floor = 1.0 / space.n_distinct if space.n_distinct < 10**300 else 0.0  # beyond float range: no floor at all
    return floor if exact else max(1.0 / (1 + n_null), floor)


def count_as_float(count):
    """A relabeling count as a float for a table (``inf`` beyond the float range, e.g. many trials per run)."""
    return float(count) if count < 10**300 else float("inf")


def subject_p(observed, null, exact, tolerance=1e-9):
    """p-value of observed scores against a subject's null, per column.

    Parameters
    ----------
    observed : array_like, shape (n_cells,)
    null : array_like, shape (n_null, n_cells)
    exact : bool
        The null lists the whole space, the actual labeling included:
        ``p = #{null >= observed} / n_null``. Otherwise random draws:
        ``p = (1 + #{null >= observed}) / (1 + n_null)`` (Hemerik & Goeman
        2018; Phipson & Smyth 2010).
    tolerance : float
        Null values this close below the observed count as ties (float noise
        between equal scores computed in different orders).

    Returns
    -------
    ndarray, shape (n_cells,)
        NaN without a null.
    """
    observed = np.asarray(observed, dtype=np.float64)
    null = np.asarray(null, dtype=np.float64)
    if null.shape[0] == 0:
        return np.full(observed.shape, np.nan)
    at_least = (null >= observed - tolerance).sum(axis=0)
    if exact:
        return at_least / null.shape[0]
    return (1.0 + at_least) / (1.0 + null.shape[0])
