"""Job: one subject's table of ROI voxel counts (from the ROI jobs' info records)."""

import json

import pandas as pd

from ..fileio import write_tsv

__all__ = ["run"]


def run(inputs, outputs, params, log):
    """Write ``subject, roi, n_voxels, min_voxels, below_minimum`` for one subject."""
    infos = [json.loads(open(path, encoding="utf-8").read()) for path in inputs["infos"]]
    table = pd.DataFrame({
        "subject": [params["subject"]] * len(infos),
        "roi": [info["roi"] for info in infos],
        "n_voxels": [int(info["n_voxels"]) for info in infos],
        "min_voxels": [int(info["min_voxels"]) for info in infos],
    })
    table["below_minimum"] = table["n_voxels"] < table["min_voxels"]
    write_tsv(outputs["table"], table)
