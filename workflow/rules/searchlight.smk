# Searchlight maps: per subject x analysis x block of the brain (scatter), per
# subject x analysis (gather, inside Snakemake's process), per analysis (group maps).
from foldwise.provenance.memo import run_in_process


rule searchlight_block:
    input:
        unpack(inputs_of("searchlight_block")),
    output:
        **outputs_of("searchlight_block"),
    params:
        settings=settings_of("searchlight_block"),
        code=step_code("searchlight_block.py"),
    log:
        log_of("searchlight_block"),
    threads: 1
    resources:
        mem_mb=4000,
        runtime=60,
    conda:
        "../envs/foldwise.yaml"
    script:
        "../scripts/searchlight_block.py"


rule searchlight_merge:
    input:
        unpack(inputs_of("searchlight_merge")),
    output:
        **outputs_of("searchlight_merge"),
    params:
        settings=settings_of("searchlight_merge"),
        code=step_code("searchlight_merge.py"),
    log:
        log_of("searchlight_merge"),
    threads: 1
    resources:
        mem_mb=2000,
        runtime=10,
    # Inside Snakemake's process (no conda: here; run: takes none): it concatenates the block files
    # (0.06 s in-job CPU per demo job), a process of its own costs ~0.35 s of CPU more. Imported on first use.
    run:
        from foldwise.jobs import searchlight_merge as searchlight_merge_job

        run_in_process("searchlight_merge", searchlight_merge_job.run, input, output, params, wildcards, log, config)


rule searchlight_group:
    input:
        unpack(inputs_of("searchlight_group")),
    output:
        **outputs_of("searchlight_group"),
    params:
        settings=settings_of("searchlight_group"),
        code=step_code("searchlight_group.py"),
    log:
        log_of("searchlight_group"),
    threads: 1
    resources:
        mem_mb=4000,
        runtime=30,
    conda:
        "../envs/foldwise.yaml"
    script:
        "../scripts/searchlight_group.py"
