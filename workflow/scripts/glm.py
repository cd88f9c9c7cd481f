"""Snakemake script of rule `glm`: runs foldwise.jobs.glm through the content memo."""
from foldwise.jobs import glm
from foldwise.provenance.memo import run_job

run_job(snakemake, step="glm", job=glm.run)  # noqa: F821 (snakemake is injected by Snakemake)
