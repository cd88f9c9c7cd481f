"""Job: searchlight scores and permutation null of one block of centres (one subject x analysis x block).

Inputs
    ``patterns`` (list): per run a 4D float32 NIfTI, one volume per pattern;
    ``tables`` (list, same order): per run the TSV ``volume, subject, session,
    run_id, condition, trial_index, onset_s``; ``mask``: the subject's brain
    mask (3D uint8 NIfTI) on the patterns' grid.
Params
    ``searchlight`` (the config section: ``radius_mm``, ``classifier``,
    ``n_blocks``, ``n_permutations``), ``analysis`` (one ``analyses`` entry),
    ``subject``, ``block`` (0-based), ``seed`` (the study seed).
Outputs
    ``scores``: .npy float32 ``(n_block_centres, n_directions)``, fold-mean
    balanced accuracy at each centre of the block (real labels);
    ``null``: .npy float32 ``(n_permutations, n_block_centres, n_directions)``.

Every block needs the whole brain's patterns (a sphere reaches beyond its
block). The permutations are seeded by subject and analysis, never by block,
so permutation ``k`` is the same relabeling in every block and the merged
null is a joint null over the brain.
"""

import numpy as np

from foldwise.errors import InputError
from foldwise.data.fileio import save_npy
from foldwise.data.patterns import analysis_task_rows, files_label, read_pattern_set  # the one reader of a subject's pattern set
from foldwise.provenance.hashing import seed_from
from foldwise.contract import read_brain_mask  # the one brain-mask reader
from foldwise.searchlight.engine import SEARCHLIGHT_CLASSIFIERS, block_centres, sample_design, searchlight_scores, sphere_neighbourhoods

__all__ = ["run"]

def run(inputs, outputs, params, log):
    """Score one block of searchlight centres and its permutation null; see the module docstring."""
    settings, analysis = params["searchlight"], params["analysis"]
    subject, block, seed = str(params["subject"]), params["block"], params["seed"]
    classifier = settings["classifier"]
    if classifier not in SEARCHLIGHT_CLASSIFIERS:
        raise InputError("config", "searchlight.classifier", f"unknown classifier {classifier!r}", f"use one of {', '.join(SEARCHLIGHT_CLASSIFIERS)}")
    n_permutations = settings["n_permutations"]
    if isinstance(n_permutations, bool) or not isinstance(n_permutations, int) or n_permutations < 0:
        raise InputError("config", "searchlight.n_permutations", f"expected an integer >= 0, got {n_permutations!r}", "set it to e.g. 100")
    mask, affine = read_brain_mask(inputs["mask"])
    pattern_set = read_pattern_set(inputs["patterns"], inputs["tables"], subject, mask, affine, inputs["mask"])
    # the searchlight maps the main task only (the study refuses other tasks): another task may reuse a condition name
    of_task = analysis_task_rows(pattern_set.table, analysis)
    patterns, table = pattern_set.patterns[of_task], pattern_set.table[of_task].reset_index(drop=True)
    design = sample_design(table["condition"].to_numpy(), table["run"].to_numpy(), analysis, file=files_label(inputs["tables"]))
    if analysis.get("demean_patterns"):
        log.warning("analysis %s: demean_patterns is ignored by the searchlight (it would demean per sphere)", analysis["name"])
    centres = block_centres(int(mask.sum()), settings["n_blocks"], block)
    spheres = sphere_neighbourhoods(mask, affine, settings["radius_mm"], centres=centres)
    rng = np.random.default_rng(seed_from(seed, "searchlight-permutation", subject, analysis["name"]))
    cross = analysis["kind"] == "cross"
    folds = analysis.get("folds", {})
    log.info("sub-%s %s block %d/%d: %d centres of %d brain voxels, spheres of %d-%d voxels (radius %.3g mm), %d patterns, %s, %d permutations",
             subject, analysis["name"], block + 1, settings["n_blocks"], spheres.n_centres, spheres.n_voxels,
             int(spheres.sizes.min()) if spheres.n_centres else 0, int(spheres.sizes.max()) if spheres.n_centres else 0,
             settings["radius_mm"], design["rows"].size, classifier, n_permutations)
    if classifier == "linear_svm" and n_permutations:
        log.warning("the linear SVM fits libsvm once per sphere, fold and labeling: about %d fits in this block; "
                    "correlation_centroid, gaussian_nb or shrinkage_lda are batched and far faster",
                    spheres.n_centres * len(set(design["runs"].tolist())) * (1 + n_permutations) * (2 if cross else 1))
    n_directions = len(design["directions"])
    if spheres.n_centres == 0:
        scores = np.zeros((1 + n_permutations, 0, n_directions))
    else:
        scores, _ = searchlight_scores(
            patterns[design["rows"]], design["labels"], design["runs"], spheres,
            set_index=design["sets"] if cross else None, set_names=design["set_names"], classifier=classifier,
            n_permutations=n_permutations, rng=rng, fold_scheme=folds.get("scheme", "leave_one_run_out"),
            n_groups=folds.get("n_groups", 2), svm_c=analysis.get("svm_c", 1.0), n_classes=len(design["class_names"]))
        log.info("mean balanced accuracy over the block's centres: %s (chance %.4g)",
                 ", ".join(f"{name} {value:.4f}" for name, value in zip(design["directions"], scores[0].mean(axis=0))), design["chance"])
    save_npy(outputs["scores"], scores[0].astype(np.float32))
    save_npy(outputs["null"], scores[1:].astype(np.float32))
