# Per analysis: group statistics over every subject.
from foldwise.provenance.memo import run_in_process


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
    # Inside Snakemake's process (a thread; no conda: here, run: takes none): a process of its own starts
    # Python and imports (~0.45 s of CPU) for a job that, after a one-ROI change, computes that ROI's draws
    # and restores the others (~0.3-1.4 s; docs/speed.md, "Group statistics"). Its gzip, hashing and numpy
    # loops release the GIL.
    run:
        from foldwise.jobs import group as group_job

        run_in_process("group", group_job.run, input, output, params, wildcards, log, config)
