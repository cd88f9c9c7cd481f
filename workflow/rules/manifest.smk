# The manifest: every output file with its sha256 and the job that made it.


rule manifest:
    input:
        records=all_provenance_records(),
    output:
        manifest=MANIFEST,
        provenance=provenance_path("manifest", "study"),
    params:
        settings={},
        code=step_code("manifest.py"),
    log:
        log_path("manifest", "study"),
    threads: 1
    resources:
        mem_mb=500,
        runtime=5,
    conda:
        "../envs/foldwise.yaml"
    script:
        "../scripts/manifest.py"
