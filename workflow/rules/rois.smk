# Per subject x ROI: the ROI mask on the subject's grid; per subject: the counts table.


rule roi_mask:
    input:
        unpack(roi_inputs),
    output:
        mask=ROI_MASK,
        info=ROI_INFO,
        provenance=provenance_path("roi_mask", "sub-{subject}_roi-{roi}"),
    params:
        settings=roi_settings,
        code=step_code("roi_mask.py"),
    log:
        log_path("roi_mask", "sub-{subject}_roi-{roi}"),
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
        infos=subject_roi_infos,
    output:
        table=ROI_COUNTS,
        provenance=provenance_path("roi_counts", "sub-{subject}"),
    params:
        settings=subject_settings,
        code=step_code("roi_counts.py"),
    log:
        log_path("roi_counts", "sub-{subject}"),
    threads: 1
    resources:
        mem_mb=500,
        runtime=5,
    conda:
        "../envs/foldwise.yaml"
    script:
        "../scripts/roi_counts.py"
