"""Job: one subject's table of ROI voxel counts (from the ROI jobs' info records)."""

import json

import pandas as pd

from foldwise.data.fileio import write_tsv

__all__ = ["run"]


def run(inputs, outputs, params, log):
    """Write ``subject, roi, n_voxels, min_voxels`` for one subject.

    An ROI below its minimum never gets here: the ROI job stops with an error.
    """
    infos = [json.loads(open(path, encoding="utf-8").read()) for path in inputs["infos"]]
    table = pd.DataFrame({
        "subject": [params["subject"]] * len(infos),
        "roi": [info["roi"] for info in infos],
        "n_voxels": [int(info["n_voxels"]) for info in infos],
        "min_voxels": [int(info["min_voxels"]) for info in infos],
    })
    write_tsv(outputs["table"], table)
