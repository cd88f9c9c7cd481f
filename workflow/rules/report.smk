# The study report: one self-contained HTML page (figures embedded) plus every
# figure as PNG and SVG; the figure list comes from foldwise.report.figures.figure_catalogue.
REPORT_HTML = "results/report/index.html"
REPORT_FIGURES = figure_catalogue(STUDY, SUBJECTS)  # figures_dir defaults to results/report/figures


rule report:
    input:
        unpack(report_inputs),
    output:
        html=REPORT_HTML,
        figures=[report_figure(entry, path) for entry in REPORT_FIGURES for path in entry["paths"]],
        provenance=REPORT_PROVENANCE[0],
    params:
        settings=report_settings(),
        code=step_code("report.py"),
    log:
        log_path("report", "study"),
    benchmark:
        "results/benchmarks/report/study.tsv"
    threads: 1
    resources:
        mem_mb=2000,
        runtime=20,
    conda:
        "../envs/foldwise.yaml"
    script:
        "../scripts/report.py"
