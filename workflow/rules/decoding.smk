# Per subject x analysis: fold-aware selection, decoding curves and the
# permutation null of every ROI of the analysis (one job, the patterns read
# once; each ROI a part of the job's memo), then the gathered tables; both inside Snakemake's process.
# A rule's outputs cannot depend on a wildcard: the analyses that decode
# another list of ROIs get a rule of their own (decode_2, ...; plan.roi_list_rules).
import re

from foldwise.jobs import decode_gather as decode_gather_job
from foldwise.provenance.memo import run_in_process


for _number, (_analyses, _rois) in enumerate(plan.roi_list_rules(MODEL, "decode"), start=1):

    rule:
        name:
            "decode" if _number == 1 else f"decode_{_number}"
        wildcard_constraints:
            analysis="|".join(re.escape(name) for name in _analyses),
        input:
            unpack(inputs_of("decode")),
        output:
            **outputs_of("decode", _rois),
        params:
            settings=settings_of("decode"),
            code=step_code("decode.py"),
        log:
            log_of("decode"),
        threads: 1
        resources:
            # one ROI at a time (its null arrays) plus the subject's patterns over the ROIs' union
            mem_mb=2000,
            # the allowance of one ROI (30 min, the earlier job's) for each ROI of the analysis
            runtime=30 * len(_rois),
        # Inside Snakemake's process (a thread; no conda: here, run: takes none): a process of its own
        # starts Python and imports (~0.35 s of CPU), and with the linear SVM all of scikit-learn
        # (~1 s), for every subject x analysis; a one-ROI change reruns every decode job of the study
        # (docs/speed.md). The job's arrays are numpy's, which releases the GIL in its loops.
        run:
            from foldwise.jobs import decode as decode_job

            run_in_process("decode", decode_job.run, input, output, params, wildcards, log, config)


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
