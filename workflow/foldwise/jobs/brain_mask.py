"""Job: one subject's brain mask (derived from the BOLD runs, or a given mask checked against them)."""

import io

import nibabel as nib
import numpy as np

from foldwise.data.bids import load_bold
from foldwise.errors import InputError
from foldwise.data.fileio import GZIP_ERRORS, load_nifti, open_gzip, save_nifti, write_json
from foldwise.contract import GRID_TOLERANCE_MM  # one tolerance for every grid comparison
from foldwise.masks.build import combine_run_statistics, run_statistics, same_grid, threshold_mean_image

__all__ = ["GRID_TOLERANCE_MM", "run"]

def _as_list(paths):
    return [paths] if isinstance(paths, str) else list(paths)


# The largest NIfTI header (NIfTI-2; NIfTI-1's is 348 bytes): read first, to learn where the volumes start.
_HEADER_BYTES = 540


def _leading_volumes(path, n_volumes):
    """The first ``n_volumes`` volumes of a 4D run as float32 (scaling applied), with its affine.

    A .nii.gz stores the volumes one after the other, so only the header and
    these volumes are decompressed (for 20 of 180 volumes about a ninth of a
    full read), with the fast gzip decoder where it is installed (isal; the
    standard library's otherwise). nibabel then reads the header, the affine
    and the scaled values from those bytes, as it reads them from a file, so
    the values are the ones ``nib.load(path).dataobj[..., :n_volumes]`` gives
    (tests/test_masks.py compares them). 0 (or more volumes than the run
    has) reads every volume, as :func:`foldwise.data.bids.load_bold` does.
    """
    if not n_volumes:
        data, affine, _ = load_bold(path)
        return data, affine
    try:
        opener = open_gzip if str(path).endswith(".gz") else (lambda name: open(name, "rb"))
        with opener(path) as stream:
            head = stream.read(_HEADER_BYTES)
            size = int.from_bytes(head[:4], "little")
            size = size if size in (348, 540) else int.from_bytes(head[:4], "big")  # a big-endian header
            image_class = nib.Nifti2Image if size == 540 else nib.Nifti1Image
            header = image_class.header_class.from_fileobj(io.BytesIO(head))
            shape = tuple(int(n) for n in header.get_data_shape())
            if len(shape) != 4:
                raise InputError(path, "dim", f"expected a 4D BOLD time series, got an image of shape {shape}",
                                 "point dataset.patterns.bold at the 4D preprocessed BOLD series, not a 3D volume")
            n_read = min(int(n_volumes), shape[3])
            needed = int(header.get_data_offset()) + int(np.prod(shape[:3])) * n_read * header.get_data_dtype().itemsize
            prefix = head + stream.read(max(0, needed - len(head)))
        if len(prefix) < needed:
            raise EOFError(f"the file ends after {len(prefix)} of the {needed} bytes of its first {n_read} volumes")
        image = image_class.from_bytes(prefix)  # nibabel's own reader over the bytes: header, affine, scaling
        data = np.asanyarray(image.dataobj[..., :n_read], dtype=np.float32)
    except InputError:
        raise
    except FileNotFoundError:
        raise InputError(path, "file", "the BOLD image does not exist", "create it or correct the path in the config") from None
    except (OSError, EOFError, *GZIP_ERRORS, ValueError, nib.filebasedimages.ImageFileError,
            nib.spatialimages.HeaderDataError) as error:
        raise InputError(path, "content", f"the BOLD image is truncated or not a NIfTI file ({type(error).__name__}: {error})",
                         "re-export or re-copy the file") from None
    return data, np.asarray(image.affine, dtype=np.float64)


def _load_given_mask(path, shape, affine):
    image = load_nifti(path, what="brain mask")
    data = image.get_fdata(caching="unchanged", dtype=np.float32)
    if data.ndim == 4 and data.shape[3] == 1:
        data = data[..., 0]
    if data.ndim != 3:
        raise InputError(path, "dim", f"expected a 3D brain mask, got shape {data.shape}", "give one 3D mask volume")
    if not same_grid(data.shape, image.affine, shape, affine, GRID_TOLERANCE_MM):
        raise InputError(path, "affine", f"the brain mask's grid (shape {data.shape}) differs from the BOLD grid (shape {tuple(shape)})",
                         "give a brain mask on the BOLD runs' grid (same shape and affine)")
    return np.isfinite(data) & (data > 0)


def run(inputs, outputs, params, log):
    """Write ``mask`` (uint8), ``mean`` (float32) and ``summary`` (JSON) for one subject.

    The mean image is the mean over runs of each run's time mean. Without a
    given mask, the mask is derived by :func:`foldwise.masks.build.threshold_mean_image`
    (``brain_mask.mean_fraction``); a given mask is kept as it is except for
    voxels whose data hold NaN or Inf, which are left out with a warning.

    With ``brain_mask.summary_volumes`` = k > 0 every statistic (time mean,
    finite, non-constant) is taken over the first k volumes of each run,
    which are all this job decodes; absent or 0: over every volume. A voxel
    that turns NaN later in a run then stops that run's GLM with a message
    naming the file (the GLM refuses non-finite data inside the mask).
    """
    subject = params["subject"]
    mean_fraction = params["brain_mask"]["mean_fraction"]
    n_volumes = int(params["brain_mask"].get("summary_volumes", 0))
    bold_paths = _as_list(inputs["bold"])
    if not bold_paths:
        raise InputError(None, "bold", f"subject {subject} has no BOLD run", "add runs or exclude the subject")
    statistics, shape, affine = [], None, None
    for path in bold_paths:  # one run in memory at a time
        data, run_affine = _leading_volumes(path, n_volumes)
        if affine is None:
            shape, affine = data.shape[:3], run_affine
        elif not same_grid(data.shape, run_affine, shape, affine, GRID_TOLERANCE_MM):
            raise InputError(path, "affine", f"this run's grid (shape {data.shape[:3]}) differs from that of {bold_paths[0]} (shape {shape})",
                             "resample all runs of a subject to one grid")
        statistics.append(run_statistics(data))
        del data
    mean, finite, varying = combine_run_statistics(statistics)

    given_path = inputs.get("given_mask")
    if given_path:
        given = _load_given_mask(given_path, shape, affine)
        n_nonfinite = int((given & ~finite).sum())
        mask, source, where = given & finite, "given", given_path
    else:
        n_nonfinite = int((~finite).sum())
        mask, source, where = threshold_mean_image(mean, varying, mean_fraction), "derived", bold_paths[0]
    if n_nonfinite:
        log.warning("subject %s: excluded %d voxel(s) whose BOLD holds NaN or Inf in some run", subject, n_nonfinite)
    if not mask.any():
        raise InputError(where, "mask", f"subject {subject}: no voxel is left in the brain mask ({source})",
                         "check the BOLD data (finite, non-constant, positive mean) or lower brain_mask.mean_fraction")
    save_nifti(outputs["mask"], mask.astype(np.uint8), affine, dtype=np.uint8)
    save_nifti(outputs["mean"], mean, affine, dtype=np.float32)
    write_json(outputs["summary"], {"n_voxels": int(mask.sum()), "n_nonfinite_excluded": n_nonfinite, "source": source})
