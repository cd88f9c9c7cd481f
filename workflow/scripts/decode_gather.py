"""Snakemake script of rule `decode_gather`: runs foldwise.jobs.decode_gather through the content memo."""
from foldwise.jobs import decode_gather
from foldwise.provenance.memo import run_job

run_job(snakemake, step="decode_gather", job=decode_gather.run, end_process=True)  # noqa: F821 (snakemake is injected by Snakemake); end_process: no teardown at exit
