"""Snakemake script of rule `geometry_subject`: runs foldwise.jobs.geometry_subject through the content memo."""
from foldwise.jobs import geometry_subject
from foldwise.provenance.memo import run_job

run_job(snakemake, step="geometry_subject", job=geometry_subject.run, end_process=True)  # noqa: F821 (snakemake is injected by Snakemake); end_process: no teardown at exit
