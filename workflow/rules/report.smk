# The study report: one self-contained HTML page (figures embedded) plus every
# figure as PNG and SVG; the figure list comes from foldwise.report.figures.figure_catalogue.


def report_figure(entry, path):
    """Curve figures (SVG) go into Snakemake's --report with their caption; every file is an output."""
    if entry["kind"] != "curve" or not path.endswith(".svg"):
        return path
    return report(path, caption=os.path.join(workflow.basedir, entry["caption"]), category=entry["category"],
                  subcategory=entry["analysis"], labels={"analysis": entry["analysis"], "ROI": entry["roi"]})


rule report:
    input:
        unpack(inputs_of("report")),
    output:
        **{**outputs_of("report"),
           "figures": [report_figure(entry, path) for entry in plan.report_figures(MODEL) for path in entry["paths"]]},
    params:
        settings=plan.report_settings(MODEL),
        code=step_code("report.py"),
    log:
        log_of("report"),
    benchmark:
        benchmark_of("report")
    threads: 1
    resources:
        mem_mb=2000,
        runtime=20,
    conda:
        "../envs/foldwise.yaml"
    script:
        "../scripts/report.py"
