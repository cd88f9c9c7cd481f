"""The report's section on geometry analyses: figures, group table and the terminal summary, per analysis.

The geometry_group job draws the figures (report/geometry_figures.py); this
section embeds them with the group table. The report job adds it to its
sections through :func:`section` and :func:`read`.
"""

import base64
import html


from foldwise import contract
from foldwise.report import page as html_page

__all__ = ["INPUT_KEYS", "read", "section"]

INPUT_KEYS = ("geometry_group_table", "geometry_summary", "geometry_matrix_figure", "geometry_mds_figure", "geometry_fits_figure")
_CAPTIONS = {
    "geometry_matrix_figure": "Group mean dissimilarity of every condition pair, per ROI (cross-validated estimates are 0 in "
                              "expectation when two conditions do not differ, so small negative values are noise).",
    "geometry_mds_figure": "The conditions placed in two dimensions by classical scaling of the group mean matrix: nearby "
                           "conditions evoke similar patterns.",
    "geometry_fits_figure": "Each model's fit per ROI: bar = group mean, dots = subjects, grey band = noise ceiling (lower to "
                            "upper bound), * = family-wise corrected p at or below alpha over every model x ROI.",
    "geometry_searchlight_figure": "Searchlight: group mean model fit in the sphere around each voxel (axial slices); outlined "
                                   "voxels have a family-wise corrected p at or below alpha over every voxel x model.",
}


def _bytes(path):
    with open(path, "rb") as handle:
        return handle.read()


def _as_list(value):
    if value is None:
        return []
    return [value] if isinstance(value, str) else list(value)


def read(inputs):
    """The geometry inputs of the report job (empty when the study has no geometry analysis)."""
    paths = {key: _as_list(inputs.get(key)) for key in INPUT_KEYS}
    maps = _as_list(inputs.get("geometry_searchlight_figure"))
    analyses = []
    for index, table_path in enumerate(paths["geometry_group_table"]):
        table = contract.read_table("geometry_group_table", table_path)
        figures = {key: (paths[key][index], _bytes(paths[key][index]))
                   for key in ("geometry_matrix_figure", "geometry_mds_figure", "geometry_fits_figure")}
        name = str(table["analysis"].iloc[0]) if len(table) else ""
        for path in maps:
            if path.endswith("/" + contract.relative_to_results("geometry_searchlight_figure", analysis=name)):  # any results folder
                figures["geometry_searchlight_figure"] = (path, _bytes(path))
        analyses.append({"table": table, "summary": _bytes(paths["geometry_summary"][index]).decode("utf-8"), "figures": figures})
    return analyses


def _figure(path, png, caption):
    data = base64.b64encode(png).decode("ascii")
    return (f"<figure><img src=\"data:image/png;base64,{data}\" alt=\"{html.escape(caption)}\"><figcaption>"
            f"{html.escape(caption)} <span class=\"files\">File: {html.escape(path)}</span></figcaption></figure>")


def section(context):
    """``(id, heading, HTML, contents entries)``, or None without geometry analyses."""
    analyses = context.get("geometry") or []
    if not analyses:
        return None
    parts = ["<p>Representational geometry (docs/geometry.md): cross-validated distances between every pair of "
             "conditions, compared with each model; group tests by sign flips of the subjects' fits, family-wise "
             "corrected over every model x ROI. A fit above 0 at the group level says the subjects' geometry follows "
             "the model on average; it does not say every subject's does, nor that no other model fits as well (see "
             "the pairwise table in the results folder and the noise ceiling). Research use only.</p>"]
    entries = []
    for analysis in analyses:
        table = analysis["table"]
        name = str(table["analysis"].iloc[0]) if len(table) else "geometry"
        identity = html_page.anchor("geometry", name)
        entries.append((identity, f"Geometry {name}"))
        parts.append(f"<h3 id=\"{identity}\">Geometry analysis {html.escape(name)}</h3>")
        parts.append(f"<pre>{html.escape(analysis['summary'])}</pre>")
        for key, (path, png) in analysis["figures"].items():
            parts.append(_figure(path, png, _CAPTIONS[key]))
        rows = [[row.roi, str(row.n_voxels), row.model, html_page.format_number(row.mean), f"{html_page.format_number(row.ci_low)} .. "
                 f"{html_page.format_number(row.ci_high)}", html_page.format_p(row.p_signflip), html_page.format_p(row.p_fwe),
                 f"{html_page.format_number(row.noise_ceiling_lower)} .. {html_page.format_number(row.noise_ceiling_upper)}"]
                for row in table.itertuples(index=False)]
        parts.append(html_page.html_table(["ROI", "voxels", "model", f"mean fit ({table['comparison'].iloc[0]})", "95 % CI", "p (sign flips)",
                                           "p_fwe", "noise ceiling"], rows,
                                          caption="Model fits against 0, one-sided; p_fwe over every model x ROI x voxel count."))
    return ("geometry", "Representational geometry", "".join(parts), entries)
