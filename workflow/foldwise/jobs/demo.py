"""Job: simulate the invented lanterns demo study (a BIDS dataset, atlas and ground truth)."""

from foldwise.data.bids import run_files
from foldwise.data.demo import planned_runs, write_demo_study
from foldwise.errors import InputError

__all__ = ["run"]

_RUN_OUTPUTS = {"bold": "bold", "events": "events", "sidecars": "sidecar", "confounds": "confounds"}


def _as_list(paths):
    if paths is None:
        return []
    return [paths] if isinstance(paths, str) else list(paths)


def run(inputs, outputs, params, log):
    """Write the demo dataset to exactly the declared outputs.

    The run outputs (``bold``, ``events``, ``sidecars``, ``confounds``) must
    list, in :func:`foldwise.data.demo.planned_runs` order, the paths that
    :func:`foldwise.data.bids.run_files` gives for each planned run; anything else
    is a wiring error and nothing is written.
    """
    planned = planned_runs(params["demo"])
    expected = [run_files(params["bids_root"], params["patterns"], params["task"], subject, session, run)
                for subject, session, run in planned]
    for output_name, file_name in _RUN_OUTPUTS.items():
        wanted = [files[file_name] for files in expected if files[file_name] is not None]
        declared = _as_list(outputs.get(output_name))
        if declared != wanted:
            raise InputError(None, f"outputs.{output_name}",
                             f"the declared paths ({len(declared)}) are not the planned runs' files ({len(wanted)}; "
                             f"first expected {wanted[:1]}, declared {declared[:1]})",
                             "declare run_files(...) of each planned run, in planned_runs order")
    written = write_demo_study(params["bids_root"], params["patterns"], params["demo"], params["seed"], params["task"],
                               params["confounds"], outputs["atlas"], outputs["atlas_labels"], outputs["ground_truth"],
                               outputs["description"])
    log.info("simulated %d runs of the invented lanterns study", len(written))
