"""Snakemake script of rule `geometry_patterns`: runs foldwise.jobs.geometry_patterns through the content memo."""
from foldwise.jobs import geometry_patterns
from foldwise.provenance.memo import run_job

run_job(snakemake, step="geometry_patterns", job=geometry_patterns.run, end_process=True)  # noqa: F821 (snakemake is injected by Snakemake); end_process: no teardown at exit
