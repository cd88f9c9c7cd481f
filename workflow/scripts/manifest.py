"""Snakemake script of rule `manifest`: runs foldwise.jobs.manifest through the content memo."""
from foldwise.jobs import manifest
from foldwise.provenance.memo import run_job

run_job(snakemake, step="manifest", job=manifest.run, end_process=True)  # noqa: F821 (snakemake is injected by Snakemake); end_process: no teardown at exit
