"""Snakemake script of rule `glm`: runs foldwise.jobs.glm through the content memo."""
from foldwise.jobs import glm
from foldwise.provenance.memo import run_job

run_job(snakemake, step="glm", job=glm.run, end_process=True)  # noqa: F821 (snakemake is injected by Snakemake); end_process: no teardown at exit
