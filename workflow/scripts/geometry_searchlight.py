"""Snakemake script of rule `geometry_searchlight`: runs foldwise.jobs.geometry_searchlight through the content memo."""
from foldwise.jobs import geometry_searchlight
from foldwise.provenance.memo import run_job

run_job(snakemake, step="geometry_searchlight", job=geometry_searchlight.run, end_process=True)  # noqa: F821 (snakemake is injected by Snakemake); end_process: no teardown at exit
