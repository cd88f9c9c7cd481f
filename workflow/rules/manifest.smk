# The manifest: every output file with its sha256 and the job that made it.


rule manifest:
    input:
        unpack(inputs_of("manifest")),
    output:
        **outputs_of("manifest"),
    params:
        settings=settings_of("manifest"),
        code=step_code("manifest.py"),
    log:
        log_of("manifest"),
    threads: 1
    resources:
        mem_mb=500,
        runtime=5,
    conda:
        "../envs/foldwise.yaml"
    script:
        "../scripts/manifest.py"
