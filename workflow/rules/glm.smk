# Per subject: a brain mask; the GLM patterns of every run (one job per
# subject: the process start and imports paid once, each run a part of the
# job's memo, every run's files as before).
# A rule's outputs cannot depend on a wildcard: subjects with another list of
# runs get a rule of their own (glm_2, ...; plan.run_list_rules).
import re

from foldwise.jobs import brain_mask as brain_mask_job
from foldwise.provenance.memo import run_in_process


rule brain_mask:
    input:
        unpack(inputs_of("brain_mask")),
    output:
        **outputs_of("brain_mask"),
    params:
        settings=settings_of("brain_mask"),
        code=step_code("brain_mask.py"),
    log:
        log_of("brain_mask"),
    threads: 1
    resources:
        mem_mb=2000,
        runtime=10,
    # Inside Snakemake's process (no conda: here; run: takes none): the job hashes the subject's runs and
    # decodes their first volumes, ~0.45 s of CPU for 7 full-size runs; a process of its own added ~0.4 s of
    # start-up and imports to each (docs/speed.md, "Brain mask").
    run:
        run_in_process("brain_mask", brain_mask_job.run, input, output, params, wildcards, log, config)


for _number, (_subjects, _run_ids) in enumerate(plan.run_list_rules(MODEL, "glm"), start=1):

    rule:
        name:
            "glm" if _number == 1 else f"glm_{_number}"
        wildcard_constraints:
            subject="|".join(re.escape(subject) for subject in _subjects),
        input:
            unpack(inputs_of("glm")),
        output:
            **outputs_of("glm", run_ids=_run_ids),
        params:
            settings=settings_of("glm"),
            code=step_code("glm.py"),
        log:
            log_of("glm"),
        threads: 1
        resources:
            # one run in memory at a time (as the earlier one-run job: its decoded file, the masked series, the fit)
            mem_mb=3000,
            # the allowance of one run (20 min, the earlier job's) for each run of the subject
            runtime=20 * len(_run_ids),
        conda:
            "../envs/foldwise.yaml"
        script:
            "../scripts/glm.py"
