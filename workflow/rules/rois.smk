# Per subject x ROI: the ROI mask on the subject's grid; per subject: the counts table.


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
    conda:
        "../envs/foldwise.yaml"
    script:
        "../scripts/roi_mask.py"


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
    conda:
        "../envs/foldwise.yaml"
    script:
        "../scripts/roi_counts.py"
