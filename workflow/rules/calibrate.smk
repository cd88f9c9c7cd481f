# The design self-check: every decoding analysis run on noise of the study's own design (make calibrate).
# Not part of the default target: `snakemake calibration` asks for it.


rule calibrate:
    input:
        unpack(inputs_of("calibrate")),
    output:
        **outputs_of("calibrate"),
    params:
        settings=settings_of("calibrate"),
        code=step_code("calibrate.py"),
    log:
        log_of("calibrate"),
    threads: 1
    resources:
        mem_mb=2000,
        runtime=120,
    conda:
        "../envs/foldwise.yaml"
    script:
        "../scripts/calibrate.py"


rule calibration:
    input:
        calibration_targets(),
