"""Snakemake script of rule `brain_mask`: runs foldwise.jobs.brain_mask through the content memo."""
from foldwise.jobs import brain_mask
from foldwise.provenance.memo import run_job

run_job(snakemake, step="brain_mask", job=brain_mask.run, end_process=True)  # noqa: F821 (snakemake is injected by Snakemake); end_process: no teardown at exit
