# Per analysis: group statistics over every subject.


rule group:
    input:
        summaries=analysis_summaries,
        nulls=analysis_nulls,
    output:
        table=GROUP_STEM + "_group.tsv",
        null=GROUP_STEM + "_group_null.tsv.gz",
        summary=GROUP_STEM + "_summary.txt",
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
    script:
        "../scripts/group.py"
