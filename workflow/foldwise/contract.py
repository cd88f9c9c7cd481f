"""The data contract as code: where every artefact lives, what its tables hold, how it is read.

Path templates use Snakemake's ``{wildcard}`` syntax, relative to the
working folder; :func:`fill` turns one into a path. Rules name their outputs
with these templates, :mod:`foldwise.plan` lists every job's outputs from
them, and jobs and the report read artefacts through the readers below --
one reader per artefact, so a check (a grid, a column) is written once.
A subject's pattern set (every run's pattern image and table, sessions and
tasks carried) is read by :func:`foldwise.data.patterns.read_pattern_set`
(tables alone: ``read_pattern_tables``), kept in its own module so that the
steps that never read patterns do not carry it in their code key.
"""

import numpy as np

from foldwise.data.fileio import load_nifti, read_tsv
from foldwise.errors import InputError

__all__ = [
    "RESULTS", "GRID_TOLERANCE_MM", "TEMPLATES", "fill", "cross_directions", "provenance_path", "log_path",
    "ResultPaths", "under_results", "relative_to_results",
    "PATTERN_TABLE_COLUMNS", "SCORE_COLUMNS", "NULL_COLUMNS", "RANKING_COLUMNS", "CONFUSION_COLUMNS", "SUMMARY_COLUMNS",
    "ROI_COUNT_COLUMNS", "GROUP_COLUMNS", "GROUP_NULL_COLUMNS", "SEARCHLIGHT_GROUP_COLUMNS", "SEARCHLIGHT_DIRECTION_COLUMNS",
    "TABLE_COLUMNS", "read_brain_mask", "read_roi_mask", "read_table", "count_label", "parse_count",
]

# The default results folder (study.results_dir). Every template below starts
# with it; a study with another results_dir gets the same paths under its own
# folder through ResultPaths (the study model's ``paths``), never by editing a template.
RESULTS = "results"

# Two grids are one grid when their voxel centres agree to within this many mm:
# NIfTI stores affines as float32, so one grid written twice can differ by float
# rounding (~1e-5 mm at 100 mm from the origin); 1e-3 mm is far above that and
# far below any voxel (common practice, no source).
GRID_TOLERANCE_MM = 1e-3

_PATTERN_STEM = "results/patterns/sub-{subject}/sub-{subject}_{run_id}"
_DECODE_STEM = "results/decoding/{analysis}/sub-{subject}/sub-{subject}_roi-{roi}"
_GROUP_STEM = "results/group/{analysis}/{analysis}"
_SEARCHLIGHT_BLOCK = "results/searchlight/{analysis}/sub-{subject}/sub-{subject}_block-{block}"
_SEARCHLIGHT_SUBJECT = "results/searchlight/{analysis}/sub-{subject}_searchlight"
_SEARCHLIGHT_GROUP = "results/searchlight/{analysis}/{analysis}_searchlight"

# Every output of the workflow, by name. The demo's own files (its BIDS dataset
# and atlas) follow the config (dataset.bids_root, dataset.atlas_*), not this list.
TEMPLATES = {
    "demo_truth": "results/demo/ground_truth.json",
    "brain_mask": "results/masks/sub-{subject}/sub-{subject}_brainmask.nii.gz",
    "brain_mean": "results/masks/sub-{subject}/sub-{subject}_mean.nii.gz",
    "brain_summary": "results/masks/sub-{subject}/sub-{subject}_brainmask.json",
    "patterns_image": f"{_PATTERN_STEM}_patterns.nii.gz",
    "patterns_table": f"{_PATTERN_STEM}_patterns.tsv",
    "design_table": f"{_PATTERN_STEM}_design.tsv",
    "design_figure": f"{_PATTERN_STEM}_design.png",
    "residual_variance": f"{_PATTERN_STEM}_resvar.nii.gz",
    "glm_facts": f"{_PATTERN_STEM}_glm.json",  # per run: confounds used, volumes and events rows dropped
    "roi_mask": "results/masks/sub-{subject}/sub-{subject}_roi-{roi}_mask.nii.gz",
    "roi_info": "results/masks/sub-{subject}/sub-{subject}_roi-{roi}.json",
    "roi_counts": "results/masks/sub-{subject}/sub-{subject}_roi_counts.tsv",
    "decode_scores": f"{_DECODE_STEM}_scores.tsv",
    "decode_null": f"{_DECODE_STEM}_null.tsv.gz",
    "decode_rankings": f"{_DECODE_STEM}_rankings.tsv.gz",
    "decode_confusion": f"{_DECODE_STEM}_confusion.tsv",
    "subject_scores": "results/decoding/{analysis}/sub-{subject}_scores.tsv",
    "subject_summary": "results/decoding/{analysis}/sub-{subject}_summary.tsv",
    "group_table": f"{_GROUP_STEM}_group.tsv",
    "group_null": f"{_GROUP_STEM}_group_null.tsv.gz",
    "group_summary": f"{_GROUP_STEM}_summary.txt",
    # the design self-check (make calibrate; off the default target)
    "calibration_table": "results/calibration/{analysis}_calibration.tsv",
    "calibration_figure": "results/calibration/{analysis}_calibration.png",
    "calibration_summary": "results/calibration/{analysis}_calibration.txt",
    "searchlight_block_scores": f"{_SEARCHLIGHT_BLOCK}_scores.npy",
    "searchlight_block_null": f"{_SEARCHLIGHT_BLOCK}_null.npy",
    "searchlight_map": f"{_SEARCHLIGHT_SUBJECT}_map.nii.gz",
    "searchlight_directions": f"{_SEARCHLIGHT_SUBJECT}_directions.tsv",
    "searchlight_subject_null": f"{_SEARCHLIGHT_SUBJECT}_null.npy",
    "searchlight_mean": f"{_SEARCHLIGHT_GROUP}_mean.nii.gz",
    "searchlight_p": f"{_SEARCHLIGHT_GROUP}_p.nii.gz",
    "searchlight_p_fwe": f"{_SEARCHLIGHT_GROUP}_p_fwe.nii.gz",
    "searchlight_tfce": f"{_SEARCHLIGHT_GROUP}_tfce.nii.gz",
    "searchlight_p_tfce": f"{_SEARCHLIGHT_GROUP}_p_tfce.nii.gz",
    "searchlight_group_table": f"{_SEARCHLIGHT_GROUP}_group.tsv",
    # geometry analyses (docs/geometry.md)
    "geometry_betas": "results/patterns/sub-{subject}/sub-{subject}_geometry_betas.npy",
    "geometry_residuals": "results/patterns/sub-{subject}/sub-{subject}_geometry_residuals.npy",
    "geometry_index": "results/patterns/sub-{subject}/sub-{subject}_geometry_index.json",
    "geometry_distances": "results/geometry/{analysis}/sub-{subject}/sub-{subject}_distances.tsv",
    "geometry_matrices": "results/geometry/{analysis}/sub-{subject}/sub-{subject}_matrices.tsv",
    "geometry_fits": "results/geometry/{analysis}/sub-{subject}/sub-{subject}_fits.tsv",
    "geometry_group_table": "results/geometry/{analysis}/{analysis}_group.tsv",
    "geometry_pairwise": "results/geometry/{analysis}/{analysis}_pairwise.tsv",
    "geometry_mean_matrices": "results/geometry/{analysis}/{analysis}_mean_matrices.tsv",
    "geometry_noise_ceilings": "results/geometry/{analysis}/{analysis}_noise_ceilings.tsv",
    "geometry_summary": "results/geometry/{analysis}/{analysis}_summary.txt",
    "geometry_matrix_figure": "results/geometry/{analysis}/{analysis}_matrices.png",
    "geometry_mds_figure": "results/geometry/{analysis}/{analysis}_mds.png",
    "geometry_fits_figure": "results/geometry/{analysis}/{analysis}_fits.png",
    "geometry_searchlight_map": "results/geometry/{analysis}/sub-{subject}/sub-{subject}_searchlight_fits.nii.gz",
    "geometry_searchlight_models": "results/geometry/{analysis}/sub-{subject}/sub-{subject}_searchlight_models.tsv",
    "geometry_searchlight_mean": "results/geometry/{analysis}/{analysis}_searchlight_mean.nii.gz",
    "geometry_searchlight_p": "results/geometry/{analysis}/{analysis}_searchlight_p.nii.gz",
    "geometry_searchlight_p_fwe": "results/geometry/{analysis}/{analysis}_searchlight_p_fwe.nii.gz",
    "geometry_searchlight_table": "results/geometry/{analysis}/{analysis}_searchlight_group.tsv",
    "geometry_searchlight_figure": "results/geometry/{analysis}/{analysis}_searchlight.png",
    "report_html": "results/report/index.html",
    "report_figures_dir": "results/report/figures",
    "manifest": "results/manifest.tsv",
}


def fill(name, **wildcards):
    """The path of artefact ``name`` (a key of TEMPLATES) for these wildcards.

    >>> fill("roi_mask", subject="01", roi="ember")
    'results/masks/sub-01/sub-01_roi-ember_mask.nii.gz'
    """
    return TEMPLATES[name].format(**wildcards)


def provenance_path(step, identity, results_dir=RESULTS):
    """Where a job's provenance record goes: <results_dir>/provenance/<step>/<identity>.json."""
    return f"{results_dir}/provenance/{step}/{identity}.json"


def log_path(step, identity, results_dir=RESULTS):
    return f"{results_dir}/logs/{step}/{identity}.log"


def under_results(path, results_dir):
    """A path of the default results folder moved under ``results_dir`` (the same path when it is the default).

    >>> under_results("results/masks/sub-{subject}/sub-{subject}_brainmask.nii.gz", "studies/b")
    'studies/b/masks/sub-{subject}/sub-{subject}_brainmask.nii.gz'
    """
    if not path.startswith(RESULTS + "/"):
        raise ValueError(f"{path!r} is not under the default results folder {RESULTS!r}/")
    return path if results_dir == RESULTS else results_dir + path[len(RESULTS):]


def relative_to_results(name, **wildcards):
    """The path of artefact ``name`` inside whichever results folder holds it (for matching a path a job was given).

    >>> relative_to_results("group_table", analysis="shape")
    'group/shape/shape_group.tsv'
    """
    return fill(name, **wildcards)[len(RESULTS) + 1:]


class ResultPaths:
    """Every output path of one study, under its results folder (``study.results_dir``).

    The templates are :data:`TEMPLATES` (written once, under the default
    folder ``results``); this moves them under the study's own folder, so two
    studies in one checkout never share an output, a provenance record, a log
    or a run guard.

    >>> paths = ResultPaths("results_b")
    >>> paths.fill("roi_mask", subject="01", roi="ember")
    'results_b/masks/sub-01/sub-01_roi-ember_mask.nii.gz'
    >>> paths.provenance("group", "{analysis}")
    'results_b/provenance/group/{analysis}.json'
    """

    def __init__(self, results_dir=RESULTS):
        self.root = results_dir

    def template(self, name):
        """Template ``name`` of :data:`TEMPLATES`, wildcards unfilled, under this results folder."""
        return under_results(TEMPLATES[name], self.root)

    def fill(self, name, **wildcards):
        return self.template(name).format(**wildcards)

    def provenance(self, step, identity):
        return provenance_path(step, identity, self.root)

    def log(self, step, identity):
        return log_path(step, identity, self.root)

    def folder(self, *parts):
        """A folder (or file) of the results folder that no template names: ``folder("provenance")``."""
        return "/".join((self.root, *parts))


assert all(template.startswith(RESULTS + "/") for template in TEMPLATES.values()), "every template starts with the results folder"


def cross_directions(set_names):
    """The five directions of a cross analysis, in the order of every table and map: A->B, B->A, A<->B, A->A, B->B.

    ``A->B`` trains on set A and tests on set B; ``A<->B`` is the mean of the
    two; ``A->A`` and ``B->B`` decode within each set.

    >>> cross_directions(["seen", "heard"])
    ('seen->heard', 'heard->seen', 'seen<->heard', 'seen->seen', 'heard->heard')
    """
    first, second = set_names
    return (f"{first}->{second}", f"{second}->{first}", f"{first}<->{second}", f"{first}->{first}", f"{second}->{second}")


# -- voxel counts: the config's form (a whole number or "all") and the tables' n_voxels cell ----------
def count_label(count):
    """A voxel count as the text of its ``n_voxels`` table cell: ``10`` -> ``"10"``, ``"all"`` -> ``"all"``.

    The one conversion from the config's counts (checked once, by the schema
    and the study model) to the tables' cells; :func:`parse_count` reverses it.

    >>> [count_label(count) for count in (10, np.int64(25), "all", "50")]
    ['10', '25', 'all', '50']
    """
    if isinstance(count, str) and count == "all":
        return count
    return str(int(count))


def parse_count(cell):
    """A table's ``n_voxels`` cell back to the config's count: ``"10"`` (or ``10``) -> ``10``, ``"all"`` -> ``"all"``.

    >>> [parse_count(cell) for cell in ("10", 25, "all")]
    [10, 25, 'all']
    >>> all(parse_count(count_label(count)) == count for count in (1, 400, "all"))
    True
    """
    text = str(cell).strip()
    return text if text == "all" else int(text)


# -- table columns (every TSV the workflow writes, in column order; jobs import them from here) ---
PATTERN_TABLE_COLUMNS = ("volume", "subject", "session", "run_id", "condition", "trial_index", "onset_s")
SCORE_COLUMNS = ("subject", "analysis", "roi", "direction", "n_voxels", "n_used", "fold", "test_runs", "n_train", "n_test",
                 "accuracy", "balanced_accuracy", "p_perm", "p_min", "n_relabelings", "null_exact")
NULL_COLUMNS = ("subject", "analysis", "roi", "direction", "n_voxels", "permutation", "balanced_accuracy", "accuracy")
RANKING_COLUMNS = ("fold", "rank", "voxel_index", "i", "j", "k", "score")  # cross analyses: train_set first
CONFUSION_COLUMNS = ("direction", "n_voxels", "true_class", "predicted_class", "count")
SUMMARY_COLUMNS = ("subject", "analysis", "roi", "direction", "n_voxels", "n_used", "n_folds", "accuracy", "balanced_accuracy", "chance",
                   "p_perm", "p_min", "n_relabelings", "null_exact")
ROI_COUNT_COLUMNS = ("subject", "roi", "n_voxels", "min_voxels")
GROUP_COLUMNS = ("analysis", "roi", "direction", "n_voxels", "n_subjects", "chance", "mean", "sem", "ci_low", "ci_high", "effect_size", "t",
                 "p_t", "p_wilcoxon", "p_perm", "p_fwe", "prevalence_p_global", "prevalence_gamma0", "prevalence_p_majority",
                 "prevalence_p_global_fwe", "prevalence_gamma0_fwe", "prevalence_gamma0_max", "n_used", "subject_p_min", "family")
GROUP_NULL_COLUMNS = ("roi", "direction", "n_voxels", "draw", "mean")
SEARCHLIGHT_DIRECTION_COLUMNS = ("volume", "direction")
SEARCHLIGHT_GROUP_COLUMNS = ("analysis", "direction", "n_subjects", "n_brain_voxels", "chance", "n_permutations", "n_draws", "alpha",
                             "n_voxels_p_below_alpha", "n_voxels_p_fwe_below_alpha", "peak_accuracy", "peak_i", "peak_j", "peak_k",
                             "peak_p", "peak_p_fwe")

# geometry analyses (docs/geometry.md)
GEOMETRY_DISTANCE_COLUMNS = ("subject", "analysis", "roi", "n_voxels", "n_used", "distance", "noise_normalisation", "condition_a", "condition_b",
                             "dissimilarity")
GEOMETRY_FIT_COLUMNS = ("subject", "analysis", "roi", "n_voxels", "n_used", "model", "comparison", "fit")
GEOMETRY_GROUP_COLUMNS = ("analysis", "roi", "n_voxels", "model", "comparison", "n_subjects", "mean", "sem", "ci_low", "ci_high", "t", "p_t",
                          "p_wilcoxon", "p_signflip", "p_fwe", "n_flips", "exact", "noise_ceiling_lower", "noise_ceiling_upper")
GEOMETRY_PAIRWISE_COLUMNS = ("analysis", "roi", "n_voxels", "model_a", "model_b", "comparison", "n_subjects", "mean_difference", "t", "p_signflip",
                             "p_fwe", "p_wilcoxon")
GEOMETRY_CEILING_COLUMNS = ("analysis", "roi", "n_voxels", "comparison", "n_subjects", "lower", "upper")

# artefact name -> (columns a reader requires, what the table is called in messages)
TABLE_COLUMNS = {
    "patterns_table": (PATTERN_TABLE_COLUMNS, "pattern table"),
    "decode_scores": (SCORE_COLUMNS, "score table"),
    "decode_null": (NULL_COLUMNS, "null table"),
    "decode_confusion": (CONFUSION_COLUMNS, "confusion table"),
    "subject_summary": (SUMMARY_COLUMNS, "subject summary"),
    "roi_counts": (ROI_COUNT_COLUMNS, "ROI counts table"),
    "group_table": (GROUP_COLUMNS, "group table"),
    "group_null": (GROUP_NULL_COLUMNS, "group null table"),
    "searchlight_directions": (SEARCHLIGHT_DIRECTION_COLUMNS, "searchlight direction table"),
    "searchlight_group_table": (SEARCHLIGHT_GROUP_COLUMNS, "searchlight group table"),
    "geometry_distances": (GEOMETRY_DISTANCE_COLUMNS, "geometry distance table"),
    "geometry_fits": (GEOMETRY_FIT_COLUMNS, "geometry model-fit table"),
    "geometry_group_table": (GEOMETRY_GROUP_COLUMNS, "geometry group table"),
    "geometry_pairwise": (GEOMETRY_PAIRWISE_COLUMNS, "geometry pairwise table"),
    "geometry_noise_ceilings": (GEOMETRY_CEILING_COLUMNS, "geometry noise-ceiling table"),
}


# -- readers: one per artefact ----------------------------------------------------------
def read_table(name, path):
    """Read one of the workflow's tables, checking the columns its contract names.

    Parameters
    ----------
    name : str
        A key of TABLE_COLUMNS (``"decode_scores"``, ``"subject_summary"``, ...).
    path : str
    """
    columns, what = TABLE_COLUMNS[name]
    return read_tsv(path, columns, what=what)


def read_brain_mask(path):
    """A subject's brain mask as ``(bool array (I, J, K), affine float64 (4, 4))``.

    Refuses a mask that is not 3-D (a single-volume 4-D file is accepted) or
    holds no voxel: every later step needs at least one.
    """
    image = load_nifti(path, what="brain mask")
    data = np.asanyarray(image.dataobj)
    if data.ndim == 4 and data.shape[3] == 1:
        data = data[..., 0]
    if data.ndim != 3:
        raise InputError(path, "dim", f"expected a 3D brain mask, got shape {data.shape}", "give one 3D mask volume")
    mask = np.asarray(data) > 0
    if not mask.any():
        raise InputError(path, "data", "the brain mask holds no voxel", "check the brain mask step (brain_mask.mean_fraction)")
    return mask, np.asarray(image.affine, dtype=np.float64)


def read_roi_mask(path):
    """One subject's ROI mask as ``(bool array (I, J, K), affine float64 (4, 4))``.

    Refuses a mask that is not 3-D, holds values other than 0 and 1 (the
    roi_mask step writes exactly those), or holds no voxel.
    """
    image = load_nifti(path, what="ROI mask")
    data = np.asarray(image.dataobj)
    if data.ndim != 3:
        raise InputError(path, "dim", f"an ROI mask must be 3-D, got shape {data.shape}", "write the ROI mask as a 3-D image")
    values = np.unique(data)
    if not np.isin(values, (0, 1)).all():
        raise InputError(path, "data", f"an ROI mask holds 0 and 1 only, found {values[:10].tolist()}", "binarise the mask (1 = in ROI)")
    inside = data == 1
    if not inside.any():
        raise InputError(path, "data", "the ROI mask is empty", "check the ROI definition (labels, image or sphere) against the data")
    return inside, np.asarray(image.affine, dtype=np.float64)
