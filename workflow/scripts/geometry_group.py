"""Snakemake script of rule `geometry_group`: runs foldwise.jobs.geometry_group through the content memo."""
from foldwise.jobs import geometry_group
from foldwise.provenance.memo import run_job

run_job(snakemake, step="geometry_group", job=geometry_group.run, end_process=True)  # noqa: F821 (snakemake is injected by Snakemake); end_process: no teardown at exit
