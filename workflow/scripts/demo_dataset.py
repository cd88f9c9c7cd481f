"""Snakemake script of rule `demo_dataset`: runs foldwise.jobs.demo through the content memo."""
from foldwise.jobs import demo
from foldwise.provenance.memo import run_job

run_job(snakemake, step="demo_dataset", job=demo.run, end_process=True)  # noqa: F821 (snakemake is injected by Snakemake); end_process: no teardown at exit
