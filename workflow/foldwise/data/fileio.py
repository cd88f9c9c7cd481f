"""File I/O at the edges: atomic, deterministic writers and careful readers.

Every writer here writes to a temporary name in the destination folder and
renames it into place (docs/architecture.md, invariant 5), and produces the same bytes for
the same content (invariant 2): gzip headers carry no time stamp and no file
name, figures carry no date, tables use one float format.
"""

import contextlib
import csv
import gzip
import io
import json
import os
import tempfile
import zlib
from pathlib import Path

import nibabel as nib
import numpy as np
import pandas as pd

from foldwise.errors import InputError

try:  # a faster gzip decoder/encoder from PyPI; the standard one is the fallback
    from isal import igzip as _fast_gzip
    from isal import isal_zlib as _fast_zlib
    from isal.isal_zlib import error as _fast_gzip_error
except ImportError:  # pragma: no cover - exercised only where isal is absent
    _fast_gzip = None
    _fast_zlib = zlib
    _fast_gzip_error = zlib.error

#: What a damaged deflate stream raises, from either decoder (isal's error is not a zlib.error).
GZIP_ERRORS = (zlib.error, _fast_gzip_error)

__all__ = [
    "missing_file_error",
    "check_output_folder",
    "atomic_path",
    "write_bytes_atomic",
    "save_npy",
    "write_text_atomic",
    "write_json",
    "write_tsv",
    "read_tsv",
    "gzip_bytes",
    "open_gzip",
    "GZIP_ERRORS",
    "gunzip_bytes",
    "save_nifti",
    "load_nifti",
    "float32_data",
    "load_stored",
    "ByteBuffer",
    "masked_float32",
    "save_figure",
    "FLOAT_FORMAT",
    "TEXT_COLUMNS",
]

# Seven significant digits: float32 round-trips through text at this width.
FLOAT_FORMAT = "%.7g"


def missing_file_error(path, what="file"):
    """The InputError for an input that is not there: a broken symbolic link says so (content not present).

    In an annexed dataset (git-annex) every file is a symbolic link into the
    annex, and a file whose content was never fetched is a link to nothing:
    "does not exist" would send the user looking for a file they can see.
    """
    if os.path.islink(path) and not os.path.exists(path):
        return InputError(path, "file", f"the {what} is a symbolic link whose target is missing (its content is not present, "
                          "as in an annexed dataset whose content was not fetched)",
                          "fetch the content (e.g. git annex get on the dataset) or replace the link by the real file")
    return InputError(path, "file", f"the {what} does not exist", "create it or correct the path in the config")


def check_output_folder(path, field="results folder"):
    """Raise unless this user can write ``path``, or create it in its nearest existing parent.

    Parameters
    ----------
    path : str or os.PathLike
        A folder the workflow writes (``results``, ``study.store_dir``).
    field : str
        What the folder is, for the message.

    Raises
    ------
    InputError
        If a file stands where the folder (or one of its parents) belongs, or
        the folder that would hold it is not writable for this user.

    Notes
    -----
    Called before any job runs, so the user reads one message instead of
    Snakemake's traceback (a file named ``results``) or a failure in the first
    job. Permissions are checked with ``os.access`` (real user and group).
    """
    existing = Path(path)
    while not os.path.lexists(existing) and existing != existing.parent:
        existing = existing.parent
    if not existing.is_dir():
        raise InputError(existing, field, "a file stands where a folder is needed", "move or remove that file, then rerun")
    if not os.access(existing, os.W_OK | os.X_OK):
        raise InputError(existing, field, "this user cannot write here (permission denied)",
                         "make it writable for this user (or remove results left by another user), then rerun")


@contextlib.contextmanager
def atomic_path(path):
    """Yield a temporary path beside ``path``; rename it into place on success.

    On any exception the temporary file is removed, so an interrupted or
    failed write never leaves a file that looks finished.
    """
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    handle, temporary = tempfile.mkstemp(prefix=f".{path.name}.", suffix=".part", dir=path.parent)
    os.close(handle)
    try:
        yield Path(temporary)
        os.chmod(temporary, 0o644)
        os.replace(temporary, path)
    except BaseException:
        with contextlib.suppress(FileNotFoundError):
            os.unlink(temporary)
        raise


def write_bytes_atomic(path, data):
    """Write ``data`` to ``path`` atomically (fsync before the rename)."""
    with atomic_path(path) as temporary:
        with open(temporary, "wb") as handle:
            handle.write(data)
            handle.flush()
            os.fsync(handle.fileno())


def save_npy(path, array):
    """Write an array as .npy atomically (serialised in memory first, no pickles)."""
    buffer = io.BytesIO()
    np.save(buffer, np.ascontiguousarray(array), allow_pickle=False)
    write_bytes_atomic(path, buffer.getvalue())


def write_text_atomic(path, text):
    """Write UTF-8 ``text`` to ``path`` atomically."""
    write_bytes_atomic(path, text.encode("utf-8"))


def write_json(path, obj):
    """Write ``obj`` as indented JSON with sorted keys, atomically."""
    write_text_atomic(path, json.dumps(obj, indent=2, sort_keys=True, allow_nan=False) + "\n")


def gzip_bytes(data, level=6):
    """Compress to gzip with a zero time stamp and no file name (reproducible)."""
    if _fast_gzip is not None:
        return _fast_gzip.compress(data, compresslevel=min(level, 3), mtime=0)
    return gzip.compress(data, compresslevel=level, mtime=0)


def gunzip_bytes(data):
    """Decompress gzip data with the fastest decoder available."""
    if _fast_gzip is not None:
        return _fast_gzip.decompress(data)
    return gzip.decompress(data)


def open_gzip(path):
    """A binary stream of a .gz file's decompressed bytes, decoded as they are read, with the fastest decoder available."""
    return (_fast_gzip or gzip).open(path, "rb")


def write_tsv(path, frame):
    """Write a DataFrame as TSV (gzip if the name ends in .gz), atomically.

    Floats use ``FLOAT_FORMAT``; missing values are written ``n/a`` (BIDS).
    """
    text = frame.to_csv(sep="\t", index=False, float_format=FLOAT_FORMAT, na_rep="n/a", lineterminator="\n")
    data = text.encode("utf-8")
    write_bytes_atomic(path, gzip_bytes(data) if str(path).endswith(".gz") else data)


# Identifier columns stay text: subject "01" must not become the number 1.
TEXT_COLUMNS = ("subject", "session", "run", "run_id", "roi", "analysis", "direction", "n_voxels", "condition",
                "trial_type", "name", "true_class", "predicted_class", "train_set", "test_runs")


def _first_overlong_row(path):
    """(line number, cell count, header) of the first row with a non-empty cell beyond the header's columns, or None.

    pandas would silently take the first column as the index (or, with
    ``index_col=False``, drop a missing-value last cell), shifting the columns.
    """
    opener = gzip.open if str(path).endswith(".gz") else open
    with opener(path, "rt", encoding="utf-8", newline="") as handle:
        rows = csv.reader(handle, delimiter="\t")
        header = next(rows, [])
        for cells in rows:
            if len(cells) > len(header) and any(cells[len(header):]):
                return rows.line_num, len(cells), [cell.lstrip("\ufeff") for cell in header]
    return None


def read_tsv(path, required_columns=(), what="table", text_columns=TEXT_COLUMNS):
    """Read a TSV (``n/a`` as missing) and check its required columns.

    Columns named in ``text_columns`` are read as text (identifiers such as
    subject ``01`` keep their leading zeros).

    Raises
    ------
    InputError
        If the file is missing, unreadable, or lacks a required column.
    """
    path = Path(path)
    if not path.is_file():
        raise missing_file_error(path, what)
    try:
        overlong = _first_overlong_row(path)
        if overlong is not None:
            line, n_cells, header = overlong
            raise InputError(path, "format", f"line {line} has {n_cells} cells but the header names {len(header)} columns "
                                             f"({', '.join(header)})",
                             "remove the extra tab-separated cells or name the extra column in the header")
        # index_col=False: a row with one cell more than the header must not turn the first column into the
        # index (shifting every column); an empty trailing cell (a trailing tab) is dropped.
        frame = pd.read_csv(path, sep="\t", na_values=["n/a"], keep_default_na=False, index_col=False,
                            dtype={column: str for column in text_columns})
    except pd.errors.EmptyDataError:
        raise InputError(path, "header", f"the {what} is empty", "write a header line and at least one row") from None
    except (pd.errors.ParserError, csv.Error, UnicodeDecodeError, gzip.BadGzipFile, EOFError, *GZIP_ERRORS) as error:
        raise InputError(path, "format", f"the {what} is not a readable TSV ({str(error).strip()})",
                         "save it as tab-separated UTF-8 text") from None
    missing = [column for column in required_columns if column not in frame.columns]
    if missing:
        raise InputError(path, ", ".join(missing), f"required column(s) missing from the {what} (found: {', '.join(map(str, frame.columns))})",
                         f"add the column(s) {', '.join(missing)}")
    return frame


def save_nifti(path, data, affine, header=None, dtype=np.float32):
    """Save an array as NIfTI-1 (gzip if ``.nii.gz``), atomically and reproducibly.

    The image is serialised in memory, so the gzip stream carries neither the
    temporary file name nor a time stamp.
    """
    array = np.asarray(data, dtype=dtype)
    image = nib.Nifti1Image(array, np.asarray(affine, dtype=np.float64), header=header)
    image.header.set_data_dtype(dtype)
    if header is None:
        image.header.set_xyzt_units("mm", "sec")
    image.set_qform(image.affine, code=1)
    image.set_sform(image.affine, code=1)
    raw = image.to_bytes()
    write_bytes_atomic(path, gzip_bytes(raw) if str(path).endswith(".gz") else raw)


def _image_from_bytes(path, data):
    """The file's bytes decompressed once, and the NIfTI-1 or NIfTI-2 image over them."""
    if str(path).endswith(".gz"):
        data = gunzip_bytes(data)
    image_class = nib.Nifti2Image if len(data) >= 4 and int.from_bytes(data[:4], "little") == 540 else nib.Nifti1Image
    return image_class.from_bytes(data), data


def load_nifti(path, what="image", float32=True):
    """Load a NIfTI file fully into memory, decoding gzip with the fast decoder.

    Parameters
    ----------
    path : str or os.PathLike
    what : str
        What the file is, for messages.
    float32 : bool
        Also compute the float32 data (``get_fdata``), kept in the image for
        the caller; False leaves that to the caller (:func:`float32_data`
        does it faster for integer files), the stored values are still read
        and checked for truncation.

    Returns
    -------
    nibabel.Nifti1Image
        An in-memory image; ``get_fdata`` applies scl_slope/scl_inter.

    Raises
    ------
    InputError
        If the file is missing, truncated or not a NIfTI image.
    """
    path = Path(path)
    if not path.is_file():
        raise missing_file_error(path, what)
    data = path.read_bytes()
    try:
        image, data = _image_from_bytes(path, data)
        if float32:
            image.get_fdata(caching="fill", dtype=np.float32)  # force a full read (truncation shows here); kept for the caller
        else:
            image.dataobj.get_unscaled()  # the stored values: truncation shows here too
    except (OSError, EOFError, *GZIP_ERRORS, ValueError, nib.filebasedimages.ImageFileError) as error:
        raise InputError(path, "content", f"the {what} is truncated or not a NIfTI file ({type(error).__name__}: {error})",
                         "re-export or re-copy the file") from None
    return image


# Volumes scaled at a time by float32_data: small enough for the float64
# temporaries to stay in cache, large enough for few Python steps.
_SCALING_BLOCK_VALUES = 1 << 20


def float32_data(image):
    """``image.get_fdata(dtype=np.float32)``, bit for bit, with far less memory traffic for integer files.

    nibabel scales stored integers in float64 (``value * scl_slope +
    scl_inter``) over the whole array, then casts to float32: two full-size
    float64 temporaries, about 0.5-1 s of CPU for a 60,000-voxel, 180-volume
    int16 run. The same float64 arithmetic and cast, a block of volumes at a
    time, gives the identical float32 values in a fraction of that
    (tests/test_fileio.py checks equality against nibabel on scaled int16,
    uint8 and unscaled files). Float files go through nibabel unchanged.

    Parameters
    ----------
    image : nibabel.Nifti1Image or nibabel.Nifti2Image
        An image whose data live in an array proxy (as :func:`load_nifti` returns).

    Returns
    -------
    ndarray of float32, the image's shape (Fortran order, as nibabel returns it)
    """
    proxy = image.dataobj
    stored = np.asanyarray(proxy.get_unscaled()) if hasattr(proxy, "get_unscaled") else None
    # Integers of up to 32 bits are exact in float64, so a block's arithmetic is nibabel's; others go through nibabel.
    if stored is None or stored.dtype.kind not in "iu" or stored.dtype.itemsize > 4 or stored.ndim != 4:
        return image.get_fdata(caching="unchanged", dtype=np.float32)
    slope, inter = np.float64(proxy.slope), np.float64(proxy.inter)
    if not (np.isfinite(slope) and np.isfinite(inter) and np.isfinite(abs(slope) * 2.0**32 + abs(inter))):  # nibabel widens then
        return image.get_fdata(caching="unchanged", dtype=np.float32)
    result = np.empty(stored.shape, dtype=np.float32, order="F")
    step = max(1, _SCALING_BLOCK_VALUES // max(1, int(np.prod(stored.shape[:3]))))
    for start in range(0, stored.shape[3], step):
        block = stored[..., start:start + step].astype(np.float64)
        if slope != 1.0:
            block *= slope
        if inter != 0.0:
            block += inter
        result[..., start:start + step] = block
    return result


class ByteBuffer:
    """One byte array that successive reads of files of about one size reuse (the runs of a GLM job).

    A large array that is new to the process costs a page fault for every 4 kB
    page the first time it is written (about 14,000 for the 56 MB of a
    60,000-voxel, 186-volume int16 run), and those pages are returned to the
    system when it is freed; a buffer kept for the next file is written
    again without faulting.
    """

    def __init__(self):
        self._array = np.empty(0, dtype=np.uint8)

    def take(self, n_bytes):
        """A writable uint8 view of ``n_bytes`` bytes (the previous view's content is not kept)."""
        if self._array.size < n_bytes:
            self._array = np.empty(n_bytes, dtype=np.uint8)
        return self._array[:n_bytes]

    def grow(self, n_bytes, n_kept):
        """A view of ``n_bytes`` bytes whose first ``n_kept`` bytes are those of the current view."""
        if self._array.size < n_bytes:
            larger = np.empty(n_bytes, dtype=np.uint8)
            larger[:n_kept] = self._array[:n_kept]
            self._array = larger
        return self._array[:n_bytes]


# A streamed decode reads this many compressed bytes at a time and takes at most _STREAM_OUT_BYTES of output
# per call: pieces this small come from memory the allocator reuses, where one 56-MB result would be fresh pages
# (measured on a 186-volume int16 run: 41 page faults and ~0.004 s of system time against ~25,000 and ~0.05 s).
_STREAM_IN_BYTES = 1 << 18
_STREAM_OUT_BYTES = 1 << 20


def _gzip_size_hint(handle):
    """The decoded size the gzip trailer records (ISIZE: the last member's size modulo 2**32), or 0.

    Only a first guess (the buffer grows past it): capped at 1,032 times the
    compressed size, deflate's largest ratio, so the last bytes of a cut or
    damaged file cannot ask for gigabytes.
    """
    handle.seek(0, os.SEEK_END)
    compressed_bytes = handle.tell()
    if compressed_bytes < 18:  # shorter than an empty gzip member: the decoder reports it
        handle.seek(0)
        return 0
    handle.seek(-4, os.SEEK_END)
    size = int.from_bytes(handle.read(4), "little")
    handle.seek(0)
    return min(size, 1032 * compressed_bytes)


def _gunzip_into(path, buffer):
    """Decode a .gz file into ``buffer`` (:class:`ByteBuffer`) piece by piece; the uint8 view of its bytes.

    Every member of a multi-member file is decoded; zero padding after the
    last member is ignored (as the standard library's reader does); a stream
    that ends inside a member raises EOFError.
    """
    n_decoded = 0
    with open(path, "rb") as handle:
        out = buffer.take(_gzip_size_hint(handle))
        decoder, fed = _fast_zlib.decompressobj(wbits=31), False
        while True:
            chunk = handle.read(_STREAM_IN_BYTES)
            if not chunk:
                break
            while chunk:
                if decoder.eof:  # a new member starts after the previous one's trailer
                    if not chunk.strip(b"\0"):
                        chunk = b""
                        break
                    decoder, fed = _fast_zlib.decompressobj(wbits=31), False
                fed = True
                piece = decoder.decompress(chunk, _STREAM_OUT_BYTES)
                if n_decoded + len(piece) > out.size:
                    out = buffer.grow(max(2 * out.size, n_decoded + len(piece)), n_decoded)
                out[n_decoded:n_decoded + len(piece)] = np.frombuffer(piece, dtype=np.uint8)
                n_decoded += len(piece)
                chunk = decoder.unconsumed_tail or (decoder.unused_data if decoder.eof else b"")
        if fed and not decoder.eof:
            raise EOFError("the compressed stream ends before its end-of-stream marker")
    return out[:n_decoded]


class _ViewReader(io.RawIOBase):
    """A read-only file over an array's bytes, without the copy ``io.BytesIO`` makes of anything but ``bytes``."""

    def __init__(self, array):
        self._view = memoryview(array).cast("B")
        self._position = 0

    def readable(self):
        return True

    def seekable(self):
        return True

    def readinto(self, target):
        n_bytes = max(0, min(len(target), len(self._view) - self._position))
        memoryview(target).cast("B")[:n_bytes] = self._view[self._position:self._position + n_bytes]
        self._position += n_bytes
        return n_bytes

    def seek(self, offset, whence=os.SEEK_SET):
        base = {os.SEEK_SET: 0, os.SEEK_CUR: self._position, os.SEEK_END: len(self._view)}[whence]
        self._position = max(0, base + int(offset))
        return self._position

    def tell(self):
        return self._position


def load_stored(path, what="image", buffer=None):
    """Read a NIfTI file once: the image (header, affine) and its stored values as a view of the decoded bytes.

    For a reader that needs part of a large image (the GLM's masked time
    series): the file is decoded once (the fast gzip decoder), nothing is
    scaled or copied, and :func:`masked_float32` then converts only the
    voxels wanted. Truncation is checked from the byte count the header
    implies, without reading the values.

    Parameters
    ----------
    path : str or os.PathLike
    what : str
        What the file is, for messages.
    buffer : ByteBuffer, optional
        Where a .gz file is decoded, piece by piece; a caller that reads
        several files passes the same buffer each time (the previous file's
        image and values are then overwritten). Default: a new one.

    Returns
    -------
    image : nibabel.Nifti1Image or nibabel.Nifti2Image
        The in-memory image (as :func:`load_nifti` returns it with ``float32=False``).
    stored : ndarray
        The stored values, the image's shape in Fortran order (NIfTI's),
        read-only, without scaling.

    Raises
    ------
    InputError
        If the file is missing, truncated or not a NIfTI image.
    """
    path = Path(path)
    if not path.is_file():
        raise missing_file_error(path, what)
    try:
        if str(path).endswith(".gz"):
            data = _gunzip_into(path, buffer if buffer is not None else ByteBuffer())
            image_class = nib.Nifti2Image if data.size >= 4 and int.from_bytes(data[:4].tobytes(), "little") == 540 else nib.Nifti1Image
            reader = _ViewReader(data)
            image = image_class.from_file_map(image_class.make_file_map({"image": reader, "header": reader}))
        else:
            image, data = _image_from_bytes(path, path.read_bytes())
        proxy = image.dataobj  # where nibabel itself reads the values: offset, dtype, shape, order
        shape, dtype, offset = tuple(int(n) for n in proxy.shape), np.dtype(proxy.dtype), int(proxy.offset)
        if getattr(proxy, "order", "F") != "F":
            raise ValueError(f"values stored in {proxy.order!r} order, not NIfTI's")
        n_values = int(np.prod(shape))
        if len(data) < offset + n_values * dtype.itemsize:
            raise ValueError(f"the header promises {n_values * dtype.itemsize} data bytes after byte {offset}, "
                             f"the file holds {max(0, len(data) - offset)}")
    except (OSError, EOFError, *GZIP_ERRORS, ValueError, nib.filebasedimages.ImageFileError) as error:
        raise InputError(path, "content", f"the {what} is truncated or not a NIfTI file ({type(error).__name__}: {error})",
                         "re-export or re-copy the file") from None
    stored = np.frombuffer(data, dtype=dtype, count=n_values, offset=offset).reshape(shape, order="F")
    stored.flags.writeable = False
    return image, stored


def masked_float32(image, stored, voxels, buffer=None):
    """``float32_data(image)`` at some voxels, as ``(volumes, voxels)``, bit for bit, converting only those voxels.

    Parameters
    ----------
    image : nibabel.Nifti1Image or nibabel.Nifti2Image
        A 4D image from :func:`load_stored` (its scale factors are read here).
    stored : ndarray
        Its stored values (:func:`load_stored`).
    voxels : array_like of int
        Flat voxel indices in NIfTI's (Fortran) order.
    buffer : ByteBuffer, optional
        Memory for the result, reused by a caller that reads several runs
        (the previous result held there is overwritten). Default: new memory.

    Returns
    -------
    ndarray of float32, shape (volumes, len(voxels)), C order

    Notes
    -----
    The arithmetic per value is :func:`float32_data`'s (stored integer to
    float64, times ``scl_slope``, plus ``scl_inter``, cast to float32), so
    the result equals ``float32_data(image)`` gathered at ``voxels``
    (tests/test_fileio.py checks this); the values of other voxels are
    never converted. Float files, and scale factors :func:`float32_data`
    leaves to nibabel, take its full-image path.
    """
    proxy = image.dataobj
    n_volumes = stored.shape[3]
    slope, inter = np.float64(proxy.slope), np.float64(proxy.inter)
    exact = (stored.dtype.kind in "iu" and stored.dtype.itemsize <= 4 and stored.ndim == 4
             and np.isfinite(slope) and np.isfinite(inter) and np.isfinite(abs(slope) * 2.0**32 + abs(inter)))
    if not exact:
        return np.take(float32_data(image).reshape(-1, n_volumes, order="F").T, voxels, axis=1)
    # Fortran order: the reshape is a view in which each volume is one contiguous row, so the gather reads rows.
    by_volume = stored.reshape(-1, n_volumes, order="F").T
    shape = (n_volumes, len(voxels))
    result = (np.empty(shape, dtype=np.float32) if buffer is None
              else buffer.take(int(np.prod(shape)) * 4).view(np.float32).reshape(shape))
    unscaled = slope == 1.0 and inter == 0.0 and stored.dtype.itemsize <= 2  # 16-bit integers are exact in float32
    step = max(1, _SCALING_BLOCK_VALUES // max(1, len(voxels)))
    for start in range(0, n_volumes, step):  # a block of volumes at a time: no run-sized integer or float64 copy
        picked = np.take(by_volume[start:start + step], voxels, axis=1)
        if unscaled:
            result[start:start + step] = picked
            continue
        block = picked.astype(np.float64)
        if slope != 1.0:
            block *= slope
        if inter != 0.0:
            block += inter
        result[start:start + step] = block
    return result


def save_figure(figure, path):
    """Save a matplotlib figure (PNG, SVG or PDF by suffix) without a date stamp.

    PNG at 300 dpi (recorded in the file's pHYs chunk); SVG and PDF keep
    text as text (SVG ``<text>`` elements, PDF TrueType fonts), so labels
    stay editable in a figure editor.
    """
    suffix = Path(path).suffix.lower()
    metadata = {"png": {"Software": None}, "svg": {"Date": None, "Creator": None},
                "pdf": {"CreationDate": None, "ModDate": None, "Creator": None, "Producer": None}}[suffix.lstrip(".")]
    import matplotlib

    matplotlib.rcParams["svg.hashsalt"] = "foldwise"  # stable SVG element ids
    matplotlib.rcParams["svg.fonttype"] = "none"
    matplotlib.rcParams["pdf.fonttype"] = 42
    buffer = io.BytesIO()
    figure.savefig(buffer, format=suffix.lstrip("."), metadata=metadata, dpi=300)
    write_bytes_atomic(path, buffer.getvalue())
