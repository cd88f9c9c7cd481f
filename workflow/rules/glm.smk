# Per subject: a brain mask; per subject x run: the GLM patterns.


rule brain_mask:
    input:
        unpack(brain_mask_inputs),
    output:
        mask=BRAIN_MASK,
        mean=BRAIN_MEAN,
        summary=BRAIN_SUMMARY,
        provenance=provenance_path("brain_mask", "sub-{subject}"),
    params:
        settings=brain_mask_settings,
        code=step_code("brain_mask.py"),
    log:
        log_path("brain_mask", "sub-{subject}"),
    threads: 1
    resources:
        mem_mb=2000,
        runtime=10,
    conda:
        "../envs/foldwise.yaml"
    script:
        "../scripts/brain_mask.py"


rule glm:
    input:
        unpack(glm_inputs),
    output:
        patterns=PATTERNS_IMAGE,
        table=PATTERNS_TABLE,
        design=DESIGN_TABLE,
        design_png=DESIGN_FIGURE,
        resvar=RESIDUAL_VARIANCE,
        provenance=provenance_path("glm", "sub-{subject}_{run_id}"),
    params:
        settings=glm_settings,
        code=step_code("glm.py"),
    log:
        log_path("glm", "sub-{subject}_{run_id}"),
    benchmark:
        "results/benchmarks/glm/sub-{subject}_{run_id}.tsv"
    threads: 1
    resources:
        mem_mb=3000,
        runtime=20,
    conda:
        "../envs/foldwise.yaml"
    script:
        "../scripts/glm.py"
