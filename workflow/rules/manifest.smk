# The manifest: every output file with its sha256 and the job that made it.
from foldwise.jobs import manifest as manifest_job
from foldwise.provenance.memo import run_in_process


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
    # Inside Snakemake's process (no conda: here; run: takes none): a job process of
    # its own would spend more CPU starting Python and importing than the step takes.
    run:
        run_in_process("manifest", manifest_job.run, input, output, params, wildcards, log, config)
