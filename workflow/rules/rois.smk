# Per subject x ROI: the ROI mask on the subject's grid (localizer ROIs by their own rule); per subject: the counts table.
from foldwise.jobs import roi_counts as roi_counts_job
from foldwise.jobs import roi_mask as roi_mask_job
from foldwise.provenance.memo import run_in_process


rule roi_mask:
    wildcard_constraints:
        roi=plan.roi_wildcard(MODEL, "roi_mask"),  # the ROIs of the kinds this rule builds (not localizer ROIs)
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


# A localizer ROI: a GLM of the subject's localizer runs, then the top voxels of the contrast
# inside the anatomical constraint (its own rule: its code key covers the GLM, roi_mask's does not).
rule localizer_roi:
    wildcard_constraints:
        roi=plan.roi_wildcard(MODEL, "localizer_roi"),
    input:
        unpack(inputs_of("localizer_roi")),
    output:
        **outputs_of("localizer_roi"),
    params:
        settings=settings_of("localizer_roi"),
        code=step_code("localizer_roi.py"),
    log:
        log_of("localizer_roi"),
    threads: 1
    resources:
        mem_mb=3000,
        runtime=20,
    conda:
        "../envs/foldwise.yaml"
    script:
        "../scripts/localizer_roi.py"


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
