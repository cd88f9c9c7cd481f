"""Atomic, reproducible writers and careful readers (foldwise.data.fileio)."""

import gzip
import os

import nibabel as nib
import numpy as np
import pandas as pd
import pytest

from foldwise.errors import InputError
from foldwise.data.fileio import atomic_path, gzip_bytes, load_nifti, read_tsv, save_nifti, write_tsv


def test_identifier_columns_keep_leading_zeros(tmp_path):
    path = tmp_path / "t.tsv"
    write_tsv(path, pd.DataFrame({"subject": ["01", "10"], "n_voxels": ["10", "all"], "score": [0.5, 0.25]}))
    frame = read_tsv(path, required_columns=["subject"])
    assert frame["subject"].tolist() == ["01", "10"]
    assert frame["score"].tolist() == [0.5, 0.25]


def test_missing_column_names_file_and_column(tmp_path):
    path = tmp_path / "events.tsv"
    path.write_text("onset\tduration\n1\t2\n")
    with pytest.raises(InputError, match=r"events.tsv: trial_type: required column"):
        read_tsv(path, required_columns=["onset", "duration", "trial_type"], what="events file")


def test_gzip_output_is_reproducible_and_standard(tmp_path):
    data = b"lanterns " * 1000
    assert gzip_bytes(data) == gzip_bytes(data)
    assert gzip.decompress(gzip_bytes(data)) == data  # Python's own gzip reads it (RFC 1952)
    assert gzip_bytes(data)[4:8] == b"\0\0\0\0", "no time stamp in the gzip header"


def test_nifti_round_trip_matches_nibabel_and_is_byte_stable(tmp_path):
    # Reference: nibabel's own loader reads what we write, affine and data intact.
    affine = np.diag([3.0, 3.0, 3.0, 1.0])
    affine[:3, 3] = [-30, -36, -24]
    data = np.random.default_rng(0).normal(size=(4, 5, 6, 2)).astype(np.float32)
    save_nifti(tmp_path / "a.nii.gz", data, affine)
    save_nifti(tmp_path / "b.nii.gz", data, affine)
    assert (tmp_path / "a.nii.gz").read_bytes() == (tmp_path / "b.nii.gz").read_bytes()
    image = nib.load(tmp_path / "a.nii.gz")
    np.testing.assert_array_equal(image.get_fdata(dtype=np.float32), data)
    np.testing.assert_array_equal(image.affine, affine)
    np.testing.assert_array_equal(load_nifti(tmp_path / "a.nii.gz").get_fdata(dtype=np.float32), data)


def test_truncated_nifti_is_an_input_error(tmp_path):
    save_nifti(tmp_path / "a.nii.gz", np.ones((4, 4, 4, 3)), np.eye(4))
    raw = (tmp_path / "a.nii.gz").read_bytes()
    (tmp_path / "cut.nii.gz").write_bytes(raw[: len(raw) // 2])
    with pytest.raises(InputError, match="truncated or not a NIfTI"):
        load_nifti(tmp_path / "cut.nii.gz")


def test_interrupted_write_leaves_nothing_that_looks_finished(tmp_path):
    target = tmp_path / "out.tsv"
    with pytest.raises(RuntimeError):
        with atomic_path(target) as temporary:
            temporary.write_text("half")
            raise RuntimeError("killed")
    assert not target.exists()
    assert os.listdir(tmp_path) == []


@pytest.mark.parametrize("name", ["functional.nii", "example4d.nii.gz", "example_nifti2.nii.gz"])
def test_float32_data_equals_nibabel_on_files_nibabel_ships(name):
    # Source: nibabel's own test images (functional.nii: int16 with scl_slope 0.0754 and scl_inter 3100.76;
    # example4d: unscaled int16; example_nifti2: NIfTI-2), read by nibabel's get_fdata(dtype=float32).
    from pathlib import Path as _Path

    import nibabel

    path = _Path(nibabel.__file__).parent / "tests" / "data" / name
    if not path.is_file():
        pytest.skip(f"nibabel's test data are not installed ({name})")
    expected = nibabel.load(path).get_fdata(dtype=np.float32)
    from foldwise.data.fileio import float32_data as _float32_data

    got = _float32_data(load_nifti(path, float32=False))
    assert got.dtype == np.float32 and np.array_equal(got, expected)


@pytest.mark.parametrize("dtype, slope, inter", [(np.int16, 0.37, 12.5), (np.int16, 1.0, -3.0), (np.uint8, 1.0, 0.0),
                                                 (np.int32, 1e-3, 7.0), (np.float32, 1.0, 0.0)])
def test_float32_data_equals_nibabel_bit_for_bit(tmp_path, dtype, slope, inter):
    # Reference: nibabel's get_fdata(dtype=float32) on the same file (scaled in float64, then cast).
    import nibabel

    rng = np.random.default_rng(5)
    stored = rng.integers(0, 200, size=(7, 5, 4, 300)).astype(dtype)
    image = nibabel.Nifti1Image(stored, np.eye(4))
    image.header.set_slope_inter(slope, inter)
    path = tmp_path / "bold.nii.gz"
    nibabel.save(image, path)
    expected = nibabel.load(path).get_fdata(dtype=np.float32)
    from foldwise.data.fileio import float32_data as _float32_data

    got = _float32_data(load_nifti(path, float32=False))
    assert np.array_equal(got, expected)


def test_load_nifti_without_float32_still_finds_a_truncated_file(tmp_path):
    import gzip

    import nibabel

    path = tmp_path / "bold.nii.gz"
    nibabel.save(nibabel.Nifti1Image(np.ones((4, 4, 4, 10), dtype=np.int16), np.eye(4)), path)
    raw = gzip.decompress(path.read_bytes())
    cut = tmp_path / "cut.nii.gz"
    cut.write_bytes(gzip.compress(raw[:-100]))  # a complete gzip stream holding too few values
    with pytest.raises(InputError, match="truncated"):
        load_nifti(cut, float32=False)


@pytest.mark.parametrize("dtype, slope, inter", [(np.int16, 0.37, 12.5), (np.int16, 1.0, 0.0), (np.uint8, 1.0, 0.0),
                                                 (np.int32, 1e-3, 7.0), (np.int32, 1.0, 0.0), (np.float32, 1.0, 0.0),
                                                 (np.float32, 2.0, 1.0)])
def test_masked_float32_equals_nibabel_at_the_voxels_bit_for_bit(tmp_path, dtype, slope, inter):
    # Reference: nibabel's get_fdata(dtype=float32) of the same file, indexed at the voxels (NIfTI's Fortran order).
    import nibabel

    from foldwise.data.fileio import load_stored, masked_float32

    rng = np.random.default_rng(6)
    stored = rng.integers(0, 30000 if dtype != np.uint8 else 250, size=(7, 5, 4, 30)).astype(dtype)
    image = nibabel.Nifti1Image(stored, np.eye(4))
    image.header.set_slope_inter(slope, inter)
    path = tmp_path / "bold.nii.gz"
    nibabel.save(image, path)
    expected = nibabel.load(path).get_fdata(dtype=np.float32)
    voxels = np.sort(rng.choice(7 * 5 * 4, size=50, replace=False))
    got = masked_float32(*load_stored(path), voxels)
    assert got.dtype == np.float32 and got.shape == (30, 50) and got.flags.c_contiguous
    assert np.array_equal(got, expected.reshape(-1, 30, order="F")[voxels].T)


@pytest.mark.parametrize("name", ["functional.nii", "example4d.nii.gz", "example_nifti2.nii.gz"])
def test_load_stored_reads_the_files_nibabel_ships(name):
    # Source: nibabel's own test images (scaled int16, unscaled int16, NIfTI-2); reference: nibabel's reader.
    from pathlib import Path as _Path

    import nibabel

    from foldwise.data.fileio import load_stored, masked_float32

    path = _Path(nibabel.__file__).parent / "tests" / "data" / name
    if not path.is_file():
        pytest.skip(f"nibabel's test data are not installed ({name})")
    reference = nibabel.load(path)
    image, stored = load_stored(path)
    assert np.array_equal(stored, np.asanyarray(reference.dataobj.get_unscaled())) and np.array_equal(image.affine, reference.affine)
    every_voxel = np.arange(int(np.prod(stored.shape[:3])))
    expected = reference.get_fdata(dtype=np.float32).reshape(-1, stored.shape[3], order="F").T
    assert np.array_equal(masked_float32(image, stored, every_voxel), expected)


@pytest.mark.parametrize("suffix", [".nii", ".nii.gz"])
def test_load_stored_finds_a_truncated_file_from_its_size(tmp_path, suffix):
    import gzip

    import nibabel

    from foldwise.data.fileio import load_stored

    path = tmp_path / "bold.nii"
    nibabel.save(nibabel.Nifti1Image(np.ones((4, 4, 4, 10), dtype=np.int16), np.eye(4)), path)
    raw = path.read_bytes()[:-100]  # complete header, too few values
    cut = tmp_path / f"cut{suffix}"
    cut.write_bytes(gzip.compress(raw) if suffix == ".nii.gz" else raw)
    with pytest.raises(InputError, match="truncated") as excinfo:
        load_stored(cut, what="BOLD image")
    assert excinfo.value.file == str(cut) and excinfo.value.field == "content"


def test_a_damaged_deflate_stream_is_a_content_error_not_a_traceback(tmp_path):
    # A .nii.gz whose first deflate byte is flipped: the fast decoder (isal) raises its own error class, which is
    # not a zlib.error; the readers must still name the file and the field instead of raising it.
    from foldwise.data import fileio

    path = tmp_path / "damaged.nii.gz"
    nib.save(nib.Nifti1Image(np.arange(8 * 8 * 8 * 5, dtype=np.float32).reshape(8, 8, 8, 5), np.eye(4)), path)
    damaged = bytearray(path.read_bytes())
    damaged[10] ^= 0xFF  # the first byte after the 10-byte gzip header (RFC 1952)
    path.write_bytes(bytes(damaged))
    with pytest.raises(fileio.GZIP_ERRORS):  # what the decoder itself raises
        with fileio.open_gzip(path) as stream:
            stream.read()
    for read in (fileio.load_nifti, fileio.load_stored):
        with pytest.raises(InputError) as caught:
            read(path)
        assert caught.value.field == "content", read.__name__


def _scaled_run(tmp_path, name, shape, seed):
    rng = np.random.default_rng(seed)
    image = nib.Nifti1Image(rng.integers(-3000, 30000, size=shape).astype(np.int16), np.diag([3.0, 3.0, 3.0, 1.0]))
    image.header.set_slope_inter(0.37, 12.5)
    path = tmp_path / name
    nib.save(image, path)
    return path


def test_runs_read_through_one_reused_buffer_match_nibabel(tmp_path):
    # Reference: nibabel's reader of each file. A small run after a large one, then a larger one (the buffer grows),
    # all through the same two buffers, as the GLM job reads a subject's runs.
    from foldwise.data.fileio import ByteBuffer, load_stored, masked_float32

    decoded, series = ByteBuffer(), ByteBuffer()
    for index, shape in enumerate([(6, 5, 4, 30), (3, 4, 2, 7), (9, 8, 7, 40)]):
        path = _scaled_run(tmp_path, f"run{index}.nii.gz", shape, index)
        reference = nib.load(path)
        image, stored = load_stored(path, buffer=decoded)
        assert not stored.flags.writeable
        assert np.array_equal(stored, np.asanyarray(reference.dataobj.get_unscaled())) and np.array_equal(image.affine, reference.affine)
        voxels = np.arange(0, int(np.prod(shape[:3])), 3)
        expected = reference.get_fdata(dtype=np.float32).reshape(-1, shape[3], order="F")[voxels].T
        assert np.array_equal(masked_float32(image, stored, voxels, buffer=series), expected)


def test_a_multi_member_gzip_file_with_zero_padding_reads_whole(tmp_path):
    # RFC 1952 section 2.2: a gzip file is a series of members; the standard library's gzip reader reads them all
    # and ignores zero padding after the last. Here the trailer's size (the last member's) is far below the whole,
    # so the streamed decode must also grow its buffer past that hint.
    from foldwise.data.fileio import load_stored

    path = _scaled_run(tmp_path, "whole.nii", (6, 5, 4, 30), 3)
    raw = path.read_bytes()
    split = tmp_path / "split.nii.gz"
    split.write_bytes(gzip.compress(raw[:-500]) + gzip.compress(raw[-500:]) + bytes(64))
    with gzip.open(split) as stream:
        assert stream.read() == raw  # the standard library's reading of the same file
    image, stored = load_stored(split)
    assert np.array_equal(stored, np.asanyarray(nib.load(path).dataobj.get_unscaled()))


def test_a_gzip_stream_cut_inside_a_member_is_a_content_error(tmp_path):
    from foldwise.data.fileio import load_stored

    path = _scaled_run(tmp_path, "whole.nii", (6, 5, 4, 30), 4)
    cut = tmp_path / "cut.nii.gz"
    cut.write_bytes(gzip.compress(path.read_bytes())[:-20])  # the last bytes of the stream and its trailer are missing
    with pytest.raises(InputError) as caught:
        load_stored(cut, what="BOLD image")
    assert caught.value.field == "content" and caught.value.file == str(cut)
