"""Snakemake script of rule `geometry_searchlight_group`: runs foldwise.jobs.geometry_searchlight_group through the content memo."""
from foldwise.jobs import geometry_searchlight_group
from foldwise.provenance.memo import run_job

run_job(snakemake, step="geometry_searchlight_group", job=geometry_searchlight_group.run, end_process=True)  # noqa: F821 (snakemake is injected by Snakemake); end_process: no teardown at exit
