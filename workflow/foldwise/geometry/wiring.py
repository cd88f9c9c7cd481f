"""The geometry analysis kind in the study model and the plan: steps, inputs, outputs, settings.

Three steps (docs/geometry.md):

``geometry_patterns`` (per subject)
    Refits the run GLMs on the voxels of the geometry analyses' ROIs only,
    with per-condition betas whatever ``glm.pattern_mode`` and
    ``glm.statistic`` say (cross-validated distances want betas), and keeps
    the (AR(1)-whitened) residuals of those voxels for noise normalisation.
    It exists only when a geometry analysis does, and holds ROI voxels only,
    so the GLM job of every run stays as it was.
``geometry_subject`` (per analysis x subject)
    Distances of every condition pair in every ROI of the analysis, and
    each model's fit.
``geometry_group`` (per analysis)
    Group tests, noise ceilings, pairwise model comparisons, the group mean
    matrices, figures and the terminal summary.
``geometry_searchlight`` (per analysis x subject) and ``geometry_searchlight_group`` (per analysis)
    When the analysis asks for it (``geometry.searchlight``): every model's
    fit in the sphere (``searchlight.radius_mm``) around every brain voxel,
    and group maps with max-statistic FWE over voxels x models.
"""

from foldwise import contract
from foldwise.errors import InputError
from foldwise.geometry.models import model_vectors

__all__ = ["KIND", "STEPS", "outline", "condition_keys", "check", "geometry_analyses", "effective_normalisation",
           "planned_jobs", "STEP_OUTPUTS", "JOB_INPUTS", "STEP_SETTINGS", "group_summary_paths"]

KIND = "geometry"
STEPS = ("geometry_subject", "geometry_group")


def outline(entry):
    return tuple(entry["geometry"]["conditions"]), None, ("geometry",)


def condition_keys(entry):
    return [(f"geometry.conditions[{index}]", condition) for index, condition in enumerate(entry["geometry"]["conditions"])]


def check(entry, where, path):
    """What the schema cannot express: unique model names, usable models, no decoding keys."""
    for key in ("classes", "sets"):
        if key in entry:
            raise InputError(path, f"{where}.{key}", f"a 'geometry' analysis takes 'geometry', not '{key}'", f"remove '{key}'")
    geometry = entry["geometry"]
    names = [model["name"] for model in geometry["models"]]
    repeated = sorted({name for name in names if names.count(name) > 1})
    if repeated:
        raise InputError(path, f"{where}.geometry.models", f"model name '{repeated[0]}' is used twice", "give each model a unique name")
    model_vectors(geometry["conditions"], geometry.get("features") or {}, geometry["models"], file=path, field=f"{where}.geometry.models")
    counts = list(geometry.get("voxel_counts") or ["all"])
    if counts != ["all"] and geometry.get("distance", "crossnobis") == "correlation":
        raise InputError(path, f"{where}.geometry.voxel_counts", "a voxel-count sweep needs a cross-validated distance "
                         "(correlation distance is computed on every run at once, so no run is left to test the choice on)",
                         "use distance crossnobis or euclidean_cv, or voxel_counts [all]")
    numbers = [count for count in counts if count != "all"]
    if numbers != sorted(numbers) or ("all" in counts and counts[-1] != "all"):
        raise InputError(path, f"{where}.geometry.voxel_counts", f"counts {counts} are not increasing", "list the counts from small to large ('all' last)")


def geometry_analyses(study):
    return [analysis for analysis in study.analyses.values() if analysis.kind == KIND]


def effective_normalisation(geometry):
    """The noise normalisation actually applied: only crossnobis is normalised."""
    return geometry["noise_normalisation"] if geometry["distance"] == "crossnobis" else "none"


def searchlight_normalisation(geometry):
    """The searchlight's: univariate where the ROIs use multivariate (a covariance per sphere is not offered)."""
    return "none" if effective_normalisation(geometry) == "none" else "univariate"


def _union(study):
    """Conditions and ROIs of every geometry analysis, in config order (what geometry_patterns computes)."""
    conditions, rois = {}, {}
    for analysis in geometry_analyses(study):
        conditions.update(dict.fromkeys(analysis.entry["geometry"]["conditions"]))
        rois.update(dict.fromkeys(analysis.rois))
    return list(conditions), list(rois)


def planned_jobs(study):
    analyses = geometry_analyses(study)
    if not analyses:
        return []
    jobs = [("geometry_patterns", {"subject": subject}) for subject in study.subjects]
    for analysis in analyses:
        jobs += [("geometry_subject", {"analysis": analysis.name, "subject": subject}) for subject in study.subjects]
        jobs += [("geometry_group", {"analysis": analysis.name})]
        if analysis.entry["geometry"]["searchlight"]:
            jobs += [("geometry_searchlight", {"analysis": analysis.name, "subject": subject}) for subject in study.subjects]
            jobs += [("geometry_searchlight_group", {"analysis": analysis.name})]
    return jobs


def _named(**names):
    return lambda study: {output: study.paths.template(name) for output, name in names.items()}


STEP_OUTPUTS = {
    "geometry_patterns": ("sub-{subject}", _named(betas="geometry_betas", residuals="geometry_residuals", index="geometry_index")),
    "geometry_subject": ("{analysis}_sub-{subject}", _named(distances="geometry_distances", matrices="geometry_matrices",
                                                           fits="geometry_fits")),
    "geometry_group": ("{analysis}", _named(table="geometry_group_table", pairwise="geometry_pairwise",
                                            mean_matrices="geometry_mean_matrices", ceilings="geometry_noise_ceilings",
                                            summary="geometry_summary", matrix_png="geometry_matrix_figure",
                                            mds_png="geometry_mds_figure", fits_png="geometry_fits_figure")),
    "geometry_searchlight": ("{analysis}_sub-{subject}", _named(map="geometry_searchlight_map", models="geometry_searchlight_models")),
    "geometry_searchlight_group": ("{analysis}", _named(mean_map="geometry_searchlight_mean", p_map="geometry_searchlight_p",
                                                        p_fwe_map="geometry_searchlight_p_fwe", table="geometry_searchlight_table",
                                                        figure="geometry_searchlight_figure")),
}


def _patterns_inputs(study, w):
    subject = w["subject"]
    _, rois = _union(study)
    runs = study.runs_of(subject)
    inputs = {"bold": [run["bold"] for run in runs], "events": [run["events"] for run in runs],
              "sidecars": [run["sidecar"] for run in runs], "mask": study.paths.fill("brain_mask", subject=subject),
              "roi_masks": [study.paths.fill("roi_mask", subject=subject, roi=roi) for roi in rois]}
    dataset = study.config["dataset"]
    if dataset["confounds"] or isinstance(dataset["drop_initial_volumes"], dict):
        inputs["confounds"] = [run["confounds"] for run in runs]
    return inputs


def _model_files(analysis):
    return [model["tsv"] for model in analysis.entry["geometry"]["models"] if model.get("tsv")]


def _subject_inputs(study, w):
    subject = w["subject"]
    inputs = {name: study.paths.fill(f"geometry_{name}", subject=subject) for name in ("betas", "residuals", "index")}
    models = _model_files(study.analyses[w["analysis"]])
    if models:
        inputs["models"] = models
    return inputs


def _group_inputs(study, w):
    name = w["analysis"]
    return {"distances": [study.paths.fill("geometry_distances", analysis=name, subject=s) for s in study.subjects],
            "fits": [study.paths.fill("geometry_fits", analysis=name, subject=s) for s in study.subjects]}


def _searchlight_inputs(study, w):
    inputs = {key: value for key, value in _patterns_inputs(study, w).items() if key != "roi_masks"}
    models = _model_files(study.analyses[w["analysis"]])
    if models:
        inputs["models"] = models
    return inputs


def _searchlight_group_inputs(study, w):
    return {"maps": [study.paths.fill("geometry_searchlight_map", analysis=w["analysis"], subject=s) for s in study.subjects],
            "masks": [study.paths.fill("brain_mask", subject=s) for s in study.subjects]}


JOB_INPUTS = {"geometry_patterns": _patterns_inputs, "geometry_subject": _subject_inputs, "geometry_group": _group_inputs,
              "geometry_searchlight": _searchlight_inputs, "geometry_searchlight_group": _searchlight_group_inputs}


def _plain(value):
    if hasattr(value, "items"):
        return {key: _plain(item) for key, item in value.items()}
    if isinstance(value, (list, tuple)):
        return [_plain(item) for item in value]
    return value


def _patterns_settings(study, w):
    conditions, rois = _union(study)
    dataset = study.config["dataset"]
    run_ids = [run["run_id"] for run in study.runs_of(w["subject"])]
    glm = {key: value for key, value in study.config["glm"].items() if key not in ("pattern_mode", "statistic")}  # always betas per condition
    return {"glm": glm, "confounds": dataset["confounds"], "drop_initial_volumes": dataset["drop_initial_volumes"],
            "condition_column": dataset["condition_column"], "subject": w["subject"], "run_ids": run_ids,
            "conditions": conditions, "rois": rois}


def _analysis_view(analysis, searchlight=False):
    """What the steps of one analysis read: its name, ROIs and geometry entry (the searchlight switch only for the searchlight)."""
    geometry = {key: value for key, value in _plain(analysis.entry["geometry"]).items()
                if (key != "voxel_counts" if searchlight else key != "searchlight")}  # the searchlight uses every sphere voxel
    view = {"name": analysis.name, "kind": analysis.kind, "geometry": geometry}
    if not searchlight:
        view["rois"] = list(analysis.rois)
    return view


def _searchlight_settings(study, w):
    settings = _patterns_settings(study, w)
    settings.pop("rois")
    settings["conditions"] = list(study.analyses[w["analysis"]].entry["geometry"]["conditions"])
    settings["analysis"] = _analysis_view(study.analyses[w["analysis"]], searchlight=True)
    settings["radius_mm"] = study.config["searchlight"]["radius_mm"]
    return settings


STEP_SETTINGS = {
    "geometry_patterns": _patterns_settings,
    "geometry_subject": lambda study, w: {"analysis": _analysis_view(study.analyses[w["analysis"]]), "subject": w["subject"]},
    "geometry_group": lambda study, w: {"analysis": _analysis_view(study.analyses[w["analysis"]]), "subjects": list(study.subjects),
                                        "group": {"n_draws": study.config["group"]["n_draws"], "alpha": study.config["group"]["alpha"]},
                                        "seed": study.seed},
    "geometry_searchlight": _searchlight_settings,
    "geometry_searchlight_group": lambda study, w: {"analysis": _analysis_view(study.analyses[w["analysis"]], searchlight=True),
                                                    "subjects": list(study.subjects), "seed": study.seed,
                                                    "group": {"n_draws": study.config["group"]["n_draws"],
                                                              "alpha": study.config["group"]["alpha"]}},
}


def group_summary_paths(study):
    """The terminal summary file of each geometry analysis."""
    return [study.paths.fill("geometry_summary", analysis=analysis.name) for analysis in geometry_analyses(study)]
