"""Snakemake script of rule `report`: runs foldwise.jobs.report through the content memo."""
from foldwise.jobs import report
from foldwise.provenance.memo import run_job

run_job(snakemake, step="report", job=report.run, end_process=True)  # noqa: F821 (snakemake is injected by Snakemake); end_process: no teardown at exit
