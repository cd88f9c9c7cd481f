# foldwise: one Snakemake workflow for a whole fMRI MVPA study.
# The study config is validated (strictly, defaults filled) before any job
# runs; the rules are wiring, the science lives in workflow/foldwise.
#
#   snakemake --profile config/profiles/local                  # the demo study
#   snakemake --profile config/profiles/local --config config_file=my_study.yaml

include: "workflow/rules/common.smk"
include: "workflow/rules/demo.smk"
include: "workflow/rules/glm.smk"
include: "workflow/rules/rois.smk"
include: "workflow/rules/decoding.smk"
include: "workflow/rules/group.smk"
include: "workflow/rules/calibrate.smk"
include: "workflow/rules/searchlight.smk"
include: "workflow/rules/geometry.smk"
include: "workflow/rules/report.smk"
include: "workflow/rules/manifest.smk"


rule all:
    default_target: True
    input:
        manifest=MANIFEST,
        outputs=all_job_outputs(),  # every file, so a deleted one is made again


onsuccess:
    try:
        finish_run(all_provenance_records(), STUDY["study"]["store_dir"])  # every output against its provenance record
    except InputError as error:
        raise WorkflowError(f"foldwise: {error}") from None
    print_group_summaries()
    print_closing_lines()  # the warning count, then the report's path, last


onerror:
    print("foldwise: the run stopped; the message above names the file, the field and the fix.")
