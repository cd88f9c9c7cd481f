# The study report: one self-contained HTML page (screen previews embedded) plus every
# figure as PNG (300 dpi), SVG and PDF; the figure list comes from foldwise.report.figures.figure_catalogue.
# Each figure is a part of the job's memo, keyed on the data it draws: a rerun redraws only changed figures.


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
    threads: 1
    resources:
        mem_mb=2000,
        runtime=20,
    conda:
        "../envs/foldwise.yaml"
    script:
        "../scripts/report.py"
