# The invented demo study, simulated into a BIDS dataset at dataset.bids_root (inside the study's results folder).
if MODEL.is_demo:

    rule demo_dataset:
        input:
            unpack(inputs_of("demo_dataset")),
        output:
            **outputs_of("demo_dataset"),
        params:
            settings=settings_of("demo_dataset"),
            code=step_code("demo_dataset.py"),
        log:
            log_of("demo_dataset"),
        threads: 1
        resources:
            mem_mb=1000,
            runtime=10,
        conda:
            "../envs/foldwise.yaml"
        script:
            "../scripts/demo_dataset.py"
