"""Snakemake script of rule `searchlight_group`: runs foldwise.jobs.searchlight_group through the content memo."""
from foldwise.jobs import searchlight_group
from foldwise.provenance.memo import run_job

run_job(snakemake, step="searchlight_group", job=searchlight_group.run, end_process=True)  # noqa: F821 (snakemake is injected by Snakemake); end_process: no teardown at exit
