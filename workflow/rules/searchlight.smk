# Searchlight maps: per subject x analysis x block of the brain (scatter), per
# subject x analysis (gather), per analysis (group maps).


rule searchlight_block:
    input:
        patterns=subject_pattern_files,
        tables=subject_pattern_tables,
        mask=BRAIN_MASK,
    output:
        scores=f"{SEARCHLIGHT_BLOCK}_scores.npy",
        null=f"{SEARCHLIGHT_BLOCK}_null.npy",
        provenance=provenance_path("searchlight_block", "{analysis}_sub-{subject}_block-{block}"),
    params:
        settings=searchlight_block_settings,
        code=step_code("searchlight_block.py"),
    log:
        log_path("searchlight_block", "{analysis}_sub-{subject}_block-{block}"),
    benchmark:
        "results/benchmarks/searchlight_block/{analysis}_sub-{subject}_block-{block}.tsv"
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
        scores=searchlight_block_scores,
        nulls=searchlight_block_nulls,
        mask=BRAIN_MASK,
    output:
        map=f"{SEARCHLIGHT_SUBJECT}_map.nii.gz",
        directions=f"{SEARCHLIGHT_SUBJECT}_directions.tsv",
        null=f"{SEARCHLIGHT_SUBJECT}_null.npy",
        provenance=provenance_path("searchlight_merge", "{analysis}_sub-{subject}"),
    params:
        settings=searchlight_merge_settings,
        code=step_code("searchlight_merge.py"),
    log:
        log_path("searchlight_merge", "{analysis}_sub-{subject}"),
    threads: 1
    resources:
        mem_mb=2000,
        runtime=10,
    conda:
        "../envs/foldwise.yaml"
    script:
        "../scripts/searchlight_merge.py"


rule searchlight_group:
    input:
        maps=searchlight_subject_maps,
        nulls=searchlight_subject_nulls,
        masks=all_brain_masks,
    output:
        **searchlight_group_outputs(),
        provenance=provenance_path("searchlight_group", "{analysis}"),
    params:
        settings=searchlight_group_settings,
        code=step_code("searchlight_group.py"),
    log:
        log_path("searchlight_group", "{analysis}"),
    benchmark:
        "results/benchmarks/searchlight_group/{analysis}.tsv"
    threads: 1
    resources:
        mem_mb=4000,
        runtime=30,
    conda:
        "../envs/foldwise.yaml"
    script:
        "../scripts/searchlight_group.py"
