# The invented demo study, simulated into a BIDS dataset under results/demo.
if STUDY["dataset"]["source"] == "demo":

    rule demo_dataset:
        output:
            description=DEMO_DESCRIPTION,
            atlas=STUDY["dataset"]["atlas_image"],
            atlas_labels=STUDY["dataset"]["atlas_labels"],
            ground_truth=DEMO_TRUTH,
            bold=[run["bold"] for run in PLAN.runs],
            events=[run["events"] for run in PLAN.runs],
            sidecars=[run["sidecar"] for run in PLAN.runs],
            confounds=[run["confounds"] for run in PLAN.runs],
            provenance=provenance_path("demo_dataset", "study"),
        params:
            settings=demo_settings(),
            code=step_code("demo_dataset.py"),
        log:
            log_path("demo_dataset", "study"),
        benchmark:
            "results/benchmarks/demo_dataset/study.tsv"
        threads: 1
        resources:
            mem_mb=1000,
            runtime=10,
        conda:
            "../envs/foldwise.yaml"
        script:
            "../scripts/demo_dataset.py"
