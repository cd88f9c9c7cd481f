# Per subject x ROI: the ROI mask on the subject's grid; per subject: the counts table.
from foldwise.jobs import roi_counts as roi_counts_job
from foldwise.jobs import roi_mask as roi_mask_job
from foldwise.provenance.memo import run_in_process


rule roi_mask:
    input:
        unpack(inputs_of("roi_mask")),
    output:
        **outputs_of("roi_mask"),
    params:
        settings=settings_of("roi_mask"),
        code=step_code("roi_mask.py"),
    log:
        log_of("roi_mask"),
    threads: 1
    resources:
        mem_mb=1000,
        runtime=5,
    # Inside Snakemake's process (no conda: here; run: takes none): a job process of
    # its own would spend more CPU starting Python and importing than the step takes.
    run:
        run_in_process("roi_mask", roi_mask_job.run, input, output, params, wildcards, log, config)


rule roi_counts:
    input:
        unpack(inputs_of("roi_counts")),
    output:
        **outputs_of("roi_counts"),
    params:
        settings=settings_of("roi_counts"),
        code=step_code("roi_counts.py"),
    log:
        log_of("roi_counts"),
    threads: 1
    resources:
        mem_mb=500,
        runtime=5,
    # Inside Snakemake's process (no conda: here; run: takes none): a job process of
    # its own would spend more CPU starting Python and importing than the step takes.
    run:
        run_in_process("roi_counts", roi_counts_job.run, input, output, params, wildcards, log, config)
