"""Snakemake script of rule `roi_counts`: runs foldwise.jobs.roi_counts through the content memo."""
from foldwise.jobs import roi_counts
from foldwise.provenance.memo import run_job

run_job(snakemake, step="roi_counts", job=roi_counts.run, end_process=True)  # noqa: F821 (snakemake is injected by Snakemake); end_process: no teardown at exit
