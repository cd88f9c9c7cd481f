"""Snakemake script of rule `searchlight_block`: runs foldwise.jobs.searchlight_block through the content memo."""
from foldwise.jobs import searchlight_block
from foldwise.provenance.memo import run_job

run_job(snakemake, step="searchlight_block", job=searchlight_block.run, end_process=True)  # noqa: F821 (snakemake is injected by Snakemake); end_process: no teardown at exit
