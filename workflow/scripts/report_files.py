"""Snakemake script of rule `report_files`: the result figures' publication files, through the content memo."""
from foldwise.jobs import report
from foldwise.provenance.memo import run_job

run_job(snakemake, step="report_files", job=report.run_publication_files, end_process=True)  # noqa: F821 (snakemake is injected by Snakemake)
