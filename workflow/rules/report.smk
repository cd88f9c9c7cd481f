# The study report: one self-contained HTML page with every figure embedded (the result figures' screen
# previews and the quality checks' PNGs); the figure list comes from foldwise.report.catalogue.figure_catalogue.
# Each figure is a part of the job's memo, keyed on the data it draws: a rerun redraws only changed figures.
from foldwise.provenance.memo import run_in_process


rule report:
    input:
        unpack(inputs_of("report")),
    output:
        **{**outputs_of("report"),
           "previews": [report_figure(entry, entry["preview"]) for entry in plan.report_figures(MODEL)]},
    params:
        settings=plan.report_settings(MODEL),
        code=step_code("report.py"),
    log:
        log_of("report"),
    threads: 1
    resources:
        mem_mb=2000,
        runtime=20,
    # Inside Snakemake's process (a thread; no conda: here, run: takes none): a process of its own starts Python
    # and imports numpy, pandas and nibabel (~0.5 s of CPU and of wall, at the end of every run). The report is
    # the last job of a study (it reads every result), so its thread does not compete with other jobs' threads;
    # it is the only in-process step that draws with matplotlib (docs/speed.md, "Jobs in Snakemake's process").
    run:
        from foldwise.jobs import report as report_job

        run_in_process("report", report_job.run, input, output, params, wildcards, log, config)


# The result figures' publication files (PNG 300 dpi, SVG, PDF), from the same data as the page's previews.
# Not part of the default target: `snakemake paper_figures` asks for them (the page says so).
rule report_files:
    input:
        unpack(inputs_of("report_files")),
    output:
        **outputs_of("report_files"),
    params:
        settings=plan.report_files_settings(MODEL),
        code=step_code("report_files.py"),
    log:
        log_of("report_files"),
    threads: 1
    resources:
        mem_mb=2000,
        runtime=30,
    conda:
        "../envs/foldwise.yaml"
    script:
        "../scripts/report_files.py"


rule paper_figures:
    input:
        plan.paper_figure_targets(MODEL),
