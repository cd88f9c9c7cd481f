# Per subject x analysis x ROI: fold-aware selection, decoding curves and the
# permutation null (one job); per subject x analysis: the gathered tables.


rule decode:
    input:
        patterns=subject_pattern_files,
        tables=subject_pattern_tables,
        mask=ROI_MASK,
    output:
        scores=DECODE_SCORES,
        null=DECODE_NULL,
        rankings=DECODE_RANKINGS,
        confusion=DECODE_CONFUSION,
        provenance=provenance_path("decode", "{analysis}_sub-{subject}_roi-{roi}"),
    params:
        settings=decode_settings,
        code=step_code("decode.py"),
    log:
        log_path("decode", "{analysis}_sub-{subject}_roi-{roi}"),
    benchmark:
        "results/benchmarks/decode/{analysis}_sub-{subject}_roi-{roi}.tsv"
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
        scores=subject_analysis_scores,
    output:
        scores=SUBJECT_SCORES,
        summary=SUBJECT_SUMMARY,
        provenance=provenance_path("decode_gather", "{analysis}_sub-{subject}"),
    params:
        settings=decode_gather_settings,
        code=step_code("decode_gather.py"),
    log:
        log_path("decode_gather", "{analysis}_sub-{subject}"),
    threads: 1
    resources:
        mem_mb=500,
        runtime=5,
    conda:
        "../envs/foldwise.yaml"
    script:
        "../scripts/decode_gather.py"
