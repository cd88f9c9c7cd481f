"""Snakemake script of rule `searchlight_merge`: runs foldwise.jobs.searchlight_merge through the content memo."""
from foldwise.jobs import searchlight_merge
from foldwise.provenance.memo import run_job

run_job(snakemake, step="searchlight_merge", job=searchlight_merge.run, end_process=True)  # noqa: F821 (snakemake is injected by Snakemake); end_process: no teardown at exit
