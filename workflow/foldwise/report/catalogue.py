"""The report's figure catalogue: every figure's stem, kind, files and caption (no plotting library imported).

Snakemake reads the catalogue while it reads the workflow (every start, dry
runs included), so this module imports nothing heavier than the package's
own errors: the figure builders (``foldwise.report.figures``, matplotlib;
``foldwise.report.images``, numpy and Pillow) are imported by the jobs that
draw.

Two sorts of figure:

- **result figures** (decoding curves, confusion matrices, ROI comparisons,
  searchlight maps): the page embeds a screen preview
  (``preview/<stem>.png``, written by the report job); the publication files
  (PNG 300 dpi, SVG, PDF) are written by the ``report_files`` step, which the
  study runs only when asked (``snakemake ... paper_figures``);
- **quality-check figures** (design, brain mask, ROI placement, residual
  variance): one PNG each, which the page embeds.
"""

from foldwise.errors import InputError

__all__ = ["FIGURE_FORMATS", "FIGURES_DIR", "CAPTIONS", "RESULT_KINDS", "QUALITY_KINDS", "analysis_rois",
           "figure_catalogue", "figure_plan", "publication_files", "embedded_files"]

FIGURE_FORMATS = ("png", "svg", "pdf")
FIGURES_DIR = "results/report/figures"
#: Figures with publication files (FIGURE_FORMATS); the others are quality checks, one PNG each.
RESULT_KINDS = ("curve", "confusion", "comparison", "searchlight")
QUALITY_KINDS = ("design", "brainmask", "roimasks", "resvar")
# Caption files for Snakemake's report(), relative to the repository root.
CAPTIONS = {
    "design": "workflow/report/design_matrix.rst",
    "brainmask": "workflow/report/brain_mask.rst",
    "roimasks": "workflow/report/masks.rst",
    "resvar": "workflow/report/residual_variance.rst",
    "curve_within": "workflow/report/decoding_curve.rst",
    "curve_cross": "workflow/report/cross_decoding_curve.rst",
    "confusion": "workflow/report/confusion.rst",
    "comparison": "workflow/report/roi_comparison.rst",
    "searchlight": "workflow/report/searchlight.rst",
}


def analysis_rois(study_config, analysis):
    """The ROIs of one analysis: its own list, or every ROI of the study.

    Parameters
    ----------
    study_config : dict
        The validated study config.
    analysis : dict
        One entry of ``study_config["analyses"]``.

    Returns
    -------
    list of str
    """
    return list(analysis.get("rois") or []) or [roi["name"] for roi in study_config["rois"]]


def figure_catalogue(study_config, subjects, figures_dir=FIGURES_DIR):
    """Every figure of the report, in page order, with its files and caption.

    Parameters
    ----------
    study_config : dict
        The validated study config (``rois`` and ``analyses`` are read).
    subjects : sequence of str
        The study's subjects (without ``sub-``), in study order.
    figures_dir : str
        Folder of the figure files.

    Returns
    -------
    list of dict
        Keys ``stem``, ``kind`` (curve, confusion, comparison, searchlight,
        design, brainmask, roimasks, resvar), ``subject``, ``analysis``,
        ``roi`` (None where not applicable), ``publication`` (True for the
        result figures), ``paths`` (the files linked under the figure: one
        per format in ``FIGURE_FORMATS`` for a result figure, written by the
        ``report_files`` step; the PNG for a quality check), ``preview``
        (the PNG the page embeds: ``preview/<stem>.png`` for a result
        figure, the figure's own PNG for a quality check), ``caption`` (a
        file of ``CAPTIONS``) and ``category`` (for Snakemake's report()).

    Notes
    -----
    The page leads with the results: per analysis and ROI the decoding curve
    and the group confusion matrix, then per analysis the ROI comparison;
    then the searchlight maps; the quality checks come last: per subject its
    design (the GLM job's image of its first run) and its brain mask, per ROI
    its placement in every subject, and the residual variance of the first
    subject. Every quality-check figure shows one subject or one ROI, so a
    change to one ROI's masks redraws that ROI's figure only.

    Examples
    --------
    >>> study = {"rois": [{"name": "ember"}], "analyses": [{"name": "shape", "kind": "within"}]}
    >>> [entry["stem"] for entry in figure_catalogue(study, ["01"])]
    ['shape_roi-ember_curve', 'shape_roi-ember_confusion', 'shape_rois', 'sub-01_design', 'sub-01_brainmask', 'roi-ember_masks', 'sub-01_resvar']
    """
    subjects = [str(subject) for subject in subjects]
    if not subjects:
        raise InputError(None, "subjects", "the study has no subject", "list at least one subject")
    entries = []

    def add(stem, kind, caption, category, subject=None, analysis=None, roi=None):
        publication = kind in RESULT_KINDS
        paths = [f"{figures_dir}/{stem}.{suffix}" for suffix in (FIGURE_FORMATS if publication else ("png",))]
        preview = f"{figures_dir}/preview/{stem}.png" if publication else paths[0]
        entries.append({"stem": stem, "kind": kind, "subject": subject, "analysis": analysis, "roi": roi,
                        "publication": publication, "paths": paths, "preview": preview, "caption": CAPTIONS[caption],
                        "category": category})

    for analysis in study_config["analyses"]:
        if analysis["kind"] == "geometry":  # figures of their own (report/geometry_figures.py, written by geometry_group)
            continue
        name = analysis["name"]
        curve_caption = "curve_cross" if analysis["kind"] == "cross" else "curve_within"
        for roi in analysis_rois(study_config, analysis):
            add(f"{name}_roi-{roi}_curve", "curve", curve_caption, "Decoding curves", analysis=name, roi=roi)
            add(f"{name}_roi-{roi}_confusion", "confusion", "confusion", "Confusion matrices", analysis=name, roi=roi)
        add(f"{name}_rois", "comparison", "comparison", "ROI comparison", analysis=name)
    searchlight = study_config.get("searchlight") or {}
    for name in (searchlight.get("analyses", []) if searchlight.get("enabled") else []):
        add(f"{name}_searchlight", "searchlight", "searchlight", "Searchlight maps", analysis=name)
    for subject in subjects:
        add(f"sub-{subject}_design", "design", "design", "Quality checks", subject=subject)
        add(f"sub-{subject}_brainmask", "brainmask", "brainmask", "Quality checks", subject=subject)
    for roi in [roi["name"] for roi in study_config["rois"]]:
        add(f"roi-{roi}_masks", "roimasks", "roimasks", "Quality checks", roi=roi)
    add(f"sub-{subjects[0]}_resvar", "resvar", "resvar", "Quality checks", subject=subjects[0])
    return entries


def embedded_files(catalogue):
    """The PNG files the page embeds (the report job's figure outputs), in catalogue order.

    Examples
    --------
    >>> study = {"rois": [{"name": "ember"}], "analyses": [{"name": "shape", "kind": "within"}]}
    >>> embedded_files(figure_catalogue(study, ["01"]))[:1]
    ['results/report/figures/preview/shape_roi-ember_curve.png']
    """
    return [entry["preview"] for entry in catalogue]


def publication_files(catalogue):
    """The publication files of the result figures (PNG 300 dpi, SVG, PDF; the ``report_files`` step's outputs).

    Examples
    --------
    >>> study = {"rois": [{"name": "ember"}], "analyses": [{"name": "shape", "kind": "within"}]}
    >>> publication_files(figure_catalogue(study, ["01"]))[:3]
    ['results/report/figures/shape_roi-ember_curve.png', 'results/report/figures/shape_roi-ember_curve.svg', 'results/report/figures/shape_roi-ember_curve.pdf']
    """
    return [path for entry in catalogue if entry["publication"] for path in entry["paths"]]


def figure_plan(study_config, subjects, figures_dir=FIGURES_DIR):
    """Every figure file of the report (the embedded PNGs, then the publication files), in a fixed order.

    Parameters
    ----------
    study_config : dict
        The validated study config.
    subjects : sequence of str
        The study's subjects, in study order.
    figures_dir : str
        Folder of the figure files (default ``results/report/figures``).

    Returns
    -------
    list of str
    """
    catalogue = figure_catalogue(study_config, subjects, figures_dir)
    return embedded_files(catalogue) + publication_files(catalogue)
