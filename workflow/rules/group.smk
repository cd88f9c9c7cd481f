# Per analysis: group statistics over every subject.


rule group:
    input:
        summaries=analysis_summaries,
        nulls=analysis_nulls,
    output:
        table=GROUP_TABLE,
        null=GROUP_NULL,
        summary=GROUP_SUMMARY,
        provenance=provenance_path("group", "{analysis}"),
    params:
        settings=group_settings,
        code=step_code("group.py"),
    log:
        log_path("group", "{analysis}"),
    benchmark:
        "results/benchmarks/group/{analysis}.tsv"
    threads: 1
    resources:
        mem_mb=2000,
        runtime=10,
    conda:
        "../envs/foldwise.yaml"
    script:
        "../scripts/group.py"
