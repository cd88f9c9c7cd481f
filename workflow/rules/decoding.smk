# Per subject x analysis x ROI: fold-aware selection, decoding curves and the
# permutation null (one job); per subject x analysis: the gathered tables.
from foldwise.jobs import decode_gather as decode_gather_job
from foldwise.provenance.memo import run_in_process


rule decode:
    input:
        unpack(inputs_of("decode")),
    output:
        **outputs_of("decode"),
    params:
        settings=settings_of("decode"),
        code=step_code("decode.py"),
    log:
        log_of("decode"),
    benchmark:
        benchmark_of("decode")
    threads: 1
    resources:
        mem_mb=2000,
        runtime=30,
    conda:
        "../envs/foldwise.yaml"
    script:
        "../scripts/decode.py"


rule decode_gather:
    input:
        unpack(inputs_of("decode_gather")),
    output:
        **outputs_of("decode_gather"),
    params:
        settings=settings_of("decode_gather"),
        code=step_code("decode_gather.py"),
    log:
        log_of("decode_gather"),
    threads: 1
    resources:
        mem_mb=500,
        runtime=5,
    # Inside Snakemake's process (no conda: here; run: takes none): a job process of
    # its own would spend more CPU starting Python and importing than the step takes.
    run:
        run_in_process("decode_gather", decode_gather_job.run, input, output, params, wildcards, log, config)
