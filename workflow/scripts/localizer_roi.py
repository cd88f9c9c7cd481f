"""Snakemake script of rule `localizer_roi`: runs foldwise.jobs.localizer_roi through the content memo."""
from foldwise.jobs import localizer_roi
from foldwise.provenance.memo import run_job

run_job(snakemake, step="localizer_roi", job=localizer_roi.run, end_process=True)  # noqa: F821 (snakemake is injected by Snakemake); end_process: no teardown at exit
