"""Snakemake script of rule `calibrate`: runs foldwise.jobs.calibrate through the content memo."""
from foldwise.jobs import calibrate
from foldwise.provenance.memo import run_job

run_job(snakemake, step="calibrate", job=calibrate.run, end_process=True)  # noqa: F821 (snakemake is injected by Snakemake); end_process: no teardown at exit
