"""Snakemake script of rule `roi_mask`: runs foldwise.jobs.roi_mask through the content memo."""
from foldwise.jobs import roi_mask
from foldwise.provenance.memo import run_job

run_job(snakemake, step="roi_mask", job=roi_mask.run, end_process=True)  # noqa: F821 (snakemake is injected by Snakemake); end_process: no teardown at exit
