# The study report: one self-contained HTML page (figures embedded) plus every
# figure as PNG (300 dpi), SVG and PDF; the figure list comes from foldwise.report.figures.figure_catalogue.


def report_figure(entry, path):
    """Every figure's SVG goes into Snakemake's --report with its caption and category; every file is an output."""
    if not path.endswith(".svg"):
        return path
    labels = {"figure": entry["stem"]}
    labels.update({key: entry[field] for key, field in (("analysis", "analysis"), ("ROI", "roi"), ("subject", "subject"))
                   if entry[field]})
    return report(path, caption=os.path.join(workflow.basedir, entry["caption"]), category=entry["category"],
                  subcategory=entry["analysis"] or (f"sub-{entry['subject']}" if entry["subject"] else "study"), labels=labels)


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
