# Per analysis: group statistics over every subject.


rule group:
    input:
        unpack(inputs_of("group")),
    output:
        **outputs_of("group"),
    params:
        settings=settings_of("group"),
        code=step_code("group.py"),
    log:
        log_of("group"),
    threads: 1
    resources:
        mem_mb=2000,
        runtime=10,
    conda:
        "../envs/foldwise.yaml"
    script:
        "../scripts/group.py"
