"""Job: results/manifest.tsv, every output with its sha256 and the job that made it.

Built from the jobs' provenance records, which already hold each output's
hash; the records themselves, logs and benchmarks are not listed (they carry
times, which differ from run to run), so two runs of the same study give the
same manifest whatever ``--cores`` or job order.
"""

import json

import pandas as pd

from foldwise.data.fileio import write_tsv

__all__ = ["run", "job_label"]


def job_label(record):
    """``rule[key=value,...]``: the job that made an output, as the manifest names it."""
    wildcards = ",".join(f"{key}={value}" for key, value in sorted(record["wildcards"].items()))
    return f"{record['step']}[{wildcards}]" if wildcards else record["step"]


def run(inputs, outputs, params, log):
    rows = []
    for path in inputs["records"]:
        with open(path, encoding="utf-8") as handle:
            record = json.load(handle)
        for output in record["outputs"]:
            rows.append({"path": output["path"], "sha256": output["sha256"], "job": job_label(record)})
    table = pd.DataFrame(rows, columns=["path", "sha256", "job"]).sort_values("path", kind="stable")
    duplicated = table["path"][table["path"].duplicated()].tolist()
    if duplicated:
        raise RuntimeError(f"two jobs claim the same output: {duplicated[:3]}")
    write_tsv(outputs["manifest"], table)
