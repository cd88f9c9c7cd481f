# Geometry analyses (docs/geometry.md): per subject the betas and residuals of the
# geometry ROIs' voxels; per analysis x subject the dissimilarities and model
# fits (inside Snakemake's process); per analysis the group tests, noise ceilings and figures.
from foldwise.provenance.memo import run_in_process


rule geometry_patterns:
    input:
        unpack(inputs_of("geometry_patterns")),
    output:
        **outputs_of("geometry_patterns"),
    params:
        settings=settings_of("geometry_patterns"),
        code=step_code("geometry_patterns.py"),
    log:
        log_of("geometry_patterns"),
    threads: 1
    resources:
        mem_mb=3000,
        runtime=20,
    # Inside Snakemake's process (a thread; run: takes no conda:): a process of its own starts Python and
    # imports (~0.5 s of CPU) for each subject, and a one-ROI change of a geometry ROI reruns every
    # subject's job. The refit is numpy's and the fast gzip decoder's, which release the GIL in their loops.
    run:
        from foldwise.jobs import geometry_patterns as geometry_patterns_job

        run_in_process("geometry_patterns", geometry_patterns_job.run, input, output, params, wildcards, log, config)


rule geometry_subject:
    input:
        unpack(inputs_of("geometry_subject")),
    output:
        **outputs_of("geometry_subject"),
    params:
        settings=settings_of("geometry_subject"),
        code=step_code("geometry_subject.py"),
    log:
        log_of("geometry_subject"),
    threads: 1
    resources:
        mem_mb=2000,
        runtime=20,
    # Inside Snakemake's process (no conda: here; run: takes none): distances and model fits on the ROI
    # patterns geometry_patterns wrote (0.04 s in-job CPU per demo job); a process of its own costs ~0.45 s
    # of CPU more. Imported on first use, so a dry run does not import the geometry modules.
    run:
        from foldwise.jobs import geometry_subject as geometry_subject_job

        run_in_process("geometry_subject", geometry_subject_job.run, input, output, params, wildcards, log, config)


rule geometry_group:
    input:
        unpack(inputs_of("geometry_group")),
    output:
        **outputs_of("geometry_group"),
    params:
        settings=settings_of("geometry_group"),
        code=step_code("geometry_group.py"),
    log:
        log_of("geometry_group"),
    threads: 1
    resources:
        mem_mb=2000,
        runtime=10,
    conda:
        "../envs/foldwise.yaml"
    script:
        "../scripts/geometry_group.py"


rule geometry_searchlight:
    input:
        unpack(inputs_of("geometry_searchlight")),
    output:
        **outputs_of("geometry_searchlight"),
    params:
        settings=settings_of("geometry_searchlight"),
        code=step_code("geometry_searchlight.py"),
    log:
        log_of("geometry_searchlight"),
    threads: 1
    resources:
        mem_mb=4000,
        runtime=60,
    conda:
        "../envs/foldwise.yaml"
    script:
        "../scripts/geometry_searchlight.py"


rule geometry_searchlight_group:
    input:
        unpack(inputs_of("geometry_searchlight_group")),
    output:
        **outputs_of("geometry_searchlight_group"),
    params:
        settings=settings_of("geometry_searchlight_group"),
        code=step_code("geometry_searchlight_group.py"),
    log:
        log_of("geometry_searchlight_group"),
    threads: 1
    resources:
        mem_mb=4000,
        runtime=30,
    conda:
        "../envs/foldwise.yaml"
    script:
        "../scripts/geometry_searchlight_group.py"
