"""Snakemake script of rule `decode`: runs foldwise.jobs.decode through the content memo."""
from foldwise.jobs import decode
from foldwise.provenance.memo import run_job

run_job(snakemake, step="decode", job=decode.run, end_process=True)  # noqa: F821 (snakemake is injected by Snakemake); end_process: no teardown at exit
