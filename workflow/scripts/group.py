"""Snakemake script of rule `group`: runs foldwise.jobs.group through the content memo."""
from foldwise.jobs import group
from foldwise.provenance.memo import run_job

run_job(snakemake, step="group", job=group.run, end_process=True)  # noqa: F821 (snakemake is injected by Snakemake); end_process: no teardown at exit
