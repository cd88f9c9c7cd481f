# Per subject: a brain mask; per subject x run: the GLM patterns.


rule brain_mask:
    input:
        unpack(inputs_of("brain_mask")),
    output:
        **outputs_of("brain_mask"),
    params:
        settings=settings_of("brain_mask"),
        code=step_code("brain_mask.py"),
    log:
        log_of("brain_mask"),
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
        unpack(inputs_of("glm")),
    output:
        **outputs_of("glm"),
    params:
        settings=settings_of("glm"),
        code=step_code("glm.py"),
    log:
        log_of("glm"),
    benchmark:
        benchmark_of("glm")
    threads: 1
    resources:
        mem_mb=3000,
        runtime=20,
    conda:
        "../envs/foldwise.yaml"
    script:
        "../scripts/glm.py"
