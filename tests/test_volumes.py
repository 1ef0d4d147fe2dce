"""Tests of glmsteps.volumes: the streamed masked reader against nibabel, and the input checks."""

from __future__ import annotations

import json
from pathlib import Path

import nibabel as nib
import numpy as np
import pytest
from numpy.testing import assert_allclose

from glmsteps import provenance
from glmsteps.errors import DataError, GlmstepsWarning
from glmsteps.volumes import (bids_sidecar_of, check_grid, check_repetition_time, read_bold_header, read_mask,
                              stream_masked)

SHAPE = (7, 6, 5)
AFFINE = np.array([[-3.0, 0, 0, 90], [0, 3, 0, -120], [0, 0, 3.5, -70], [0, 0, 0, 1]])


def make_mask() -> np.ndarray:
    mask = np.zeros(SHAPE, dtype=bool)
    mask[1:6, 2:5, 1:4] = True
    mask[0, 0, 0] = True
    return mask


def write_bold(path: Path, data: np.ndarray, tr_s: float = 2.0, endianness: str | None = None,
               slope: float | None = None, inter: float = 0.0, dtype: type = np.float32) -> None:
    hdr = nib.Nifti1Header(endianness=endianness) if endianness else nib.Nifti1Header()
    img = nib.Nifti1Image(data.astype(dtype), AFFINE, hdr)
    img.set_data_dtype(dtype)
    img.header.set_zooms((3.0, 3.0, 3.5, tr_s))
    img.header.set_xyzt_units("mm", "sec")
    if slope is not None:
        img.header.set_slope_inter(slope, inter)
    nib.save(img, path)


@pytest.fixture
def series() -> np.ndarray:
    rng = np.random.default_rng(0)
    return (500 + 30 * rng.standard_normal(SHAPE + (11,))).astype(np.float32)


@pytest.mark.parametrize("name, kwargs", [
    ("f32.nii.gz", {}),
    ("f32.nii", {}),
    ("big.nii.gz", {"endianness": ">"}),
    ("big.nii", {"endianness": ">"}),
])
def test_stream_equals_nibabel_float(tmp_path: Path, series: np.ndarray, name: str, kwargs: dict) -> None:
    path = tmp_path / name
    write_bold(path, series, **kwargs)
    hdr = read_bold_header(path)
    if kwargs.get("endianness") == ">":
        assert hdr.dtype.byteorder == ">"
    mask = make_mask()
    got = stream_masked(hdr, mask, first_volume=2)
    ref = nib.load(path).get_fdata()  # reference: nibabel get_fdata
    expected = ref[mask][:, 2:].T     # C-order mask voxels, kept volumes
    assert np.array_equal(got.Y, expected.astype(np.float32))
    assert_allclose(got.mean, expected.mean(axis=0), rtol=1e-12)
    assert np.array_equal(got.minimum, expected.min(axis=0).astype(np.float32))
    assert got.sha256 == provenance.hash_file(path)


@pytest.mark.parametrize("name", ["f32.nii.gz", "f32.nii"])
def test_disk_voxel_order_equals_nibabel(tmp_path: Path, series: np.ndarray, name: str) -> None:
    path = tmp_path / name
    write_bold(path, series)
    mask = make_mask()
    got = stream_masked(read_bold_header(path), mask, first_volume=1, voxel_order="disk")
    ref = nib.load(path).get_fdata()  # reference: nibabel get_fdata
    # NIfTI stores x fastest (NIfTI-1 standard): the disk order is the grid flattened in Fortran order
    disk = np.flatnonzero(mask.ravel(order="F"))
    assert np.array_equal(got.flat_index, np.ravel_multi_index(np.unravel_index(disk, SHAPE, order="F"), SHAPE))
    expected = ref.reshape(-1, ref.shape[3], order="F")[disk][:, 1:].T
    assert np.array_equal(got.Y, expected.astype(np.float32))
    c_order = stream_masked(read_bold_header(path), mask, first_volume=1)
    assert np.array_equal(c_order.flat_index, np.flatnonzero(mask))
    back = np.argsort(got.flat_index)
    assert np.array_equal(got.Y[:, back], c_order.Y) and np.array_equal(got.mean[back], c_order.mean)


def test_stream_equals_nibabel_int16_with_scaling(tmp_path: Path) -> None:
    rng = np.random.default_rng(1)
    raw = rng.integers(-3000, 3000, size=SHAPE + (9,)).astype(np.int16)
    path = tmp_path / "i16.nii.gz"
    hdr = nib.Nifti1Header()
    img = nib.Nifti1Image(raw, AFFINE, hdr)
    img.set_data_dtype(np.int16)
    img.header.set_zooms((3.0, 3.0, 3.5, 2.0))
    img.header["scl_slope"] = 0.37
    img.header["scl_inter"] = 1000.0
    nib.save(img, path)
    hdr = read_bold_header(path)
    assert (hdr.slope, hdr.inter) == pytest.approx((0.37, 1000.0))
    mask = make_mask()
    got = stream_masked(hdr, mask)
    ref = nib.load(path).get_fdata()[mask].T  # reference: nibabel get_fdata (scaling in float64)
    # float32 scaling: each of the two float32 operations rounds by at most eps/2 of its operands' size
    bound = np.finfo(np.float32).eps * (np.abs(raw[mask].T * 0.37) + 1000.0)
    assert np.all(np.abs(got.Y - ref) <= bound)
    assert got.sha256 == provenance.hash_file(path)


def test_truncated_file_is_a_data_error(tmp_path: Path, series: np.ndarray) -> None:
    path = tmp_path / "t.nii"
    write_bold(path, series)
    data = path.read_bytes()
    path.write_bytes(data[: len(data) - 100])
    with pytest.raises(DataError, match="ends early"):
        stream_masked(read_bold_header(path), make_mask())


def test_truncated_gzip_is_a_data_error(tmp_path: Path, series: np.ndarray) -> None:
    """A .nii.gz cut short (header intact, compressed stream cut off) is a one-line DataError."""
    path = tmp_path / "t.nii.gz"
    write_bold(path, series)
    path.write_bytes(path.read_bytes()[:1000])
    with pytest.raises(DataError, match="truncated or corrupt") as info:
        stream_masked(read_bold_header(path), make_mask())
    assert "\n" not in str(info.value) and str(path) in str(info.value)


def test_3d_bold_is_rejected(tmp_path: Path) -> None:
    path = tmp_path / "vol.nii.gz"
    nib.save(nib.Nifti1Image(np.zeros(SHAPE, np.float32), AFFINE), path)
    with pytest.raises(DataError, match=r"must be 4D .* found shape \(7, 6, 5\)") as info:
        read_bold_header(path)
    assert str(path) in str(info.value) and "\n" not in str(info.value)


def test_repetition_time_checks(tmp_path: Path, series: np.ndarray) -> None:
    path = tmp_path / "sub-01_task-x_bold.nii.gz"
    write_bold(path, series, tr_s=2.0)
    hdr = read_bold_header(path)
    assert hdr.repetition_time_s == pytest.approx(2.0)
    assert check_repetition_time(hdr, 2.019) == ["header"]        # within 1 %
    with pytest.raises(DataError, match=r"header TR .* 2 s .* 2.5 s") as info:
        check_repetition_time(hdr, 2.5)
    assert "\n" not in str(info.value)
    side = bids_sidecar_of(path)
    assert side.name == "sub-01_task-x_bold.json"
    side.write_text(json.dumps({"RepetitionTime": 1.5}))
    # the sidecar wins over the header (warned), then fails the check against the expected 2 s
    with pytest.warns(GlmstepsWarning, match="sidecar's value is used"), \
            pytest.raises(DataError, match=r"RepetitionTime 1.5 s differs .* 2 s"):
        check_repetition_time(hdr, 2.0)
    side.write_text(json.dumps({"RepetitionTime": 2.0}))
    assert check_repetition_time(hdr, 2.0) == ["sidecar", "header"]


def test_tr_in_milliseconds_is_converted(tmp_path: Path, series: np.ndarray) -> None:
    path = tmp_path / "ms.nii"
    img = nib.Nifti1Image(series, AFFINE)
    img.header.set_zooms((3.0, 3.0, 3.5, 2000.0))
    img.header.set_xyzt_units("mm", "msec")
    nib.save(img, path)
    assert read_bold_header(path).repetition_time_s == pytest.approx(2.0)


def test_mask_checks(tmp_path: Path, series: np.ndarray) -> None:
    bold_path = tmp_path / "b.nii.gz"
    write_bold(bold_path, series)
    bold = read_bold_header(bold_path)
    good = tmp_path / "mask.nii.gz"
    nib.save(nib.Nifti1Image(make_mask().astype(np.uint8), AFFINE), good)
    mask, aff = read_mask(good)
    check_grid(good, mask.shape, aff, bold)  # no error
    shifted = AFFINE.copy()
    shifted[0, 3] += 0.01
    with pytest.raises(DataError, match=r"affine differs .* 0.01 mm") as info:
        check_grid(good, mask.shape, shifted, bold)
    assert str(good) in str(info.value)
    with pytest.raises(DataError, match=r"mask grid \(7, 6, 4\) differs from BOLD grid \(7, 6, 5\)"):
        check_grid(good, (7, 6, 4), AFFINE, bold)
    empty = tmp_path / "empty.nii.gz"
    nib.save(nib.Nifti1Image(np.zeros(SHAPE, np.uint8), AFFINE), empty)
    with pytest.raises(DataError, match="mask is empty") as info:
        read_mask(empty)
    assert str(empty) in str(info.value)


def test_voxel_size_from_affine(tmp_path: Path, series: np.ndarray) -> None:
    path = tmp_path / "b.nii"
    write_bold(path, series)
    assert_allclose(read_bold_header(path).voxel_size_mm, [3.0, 3.0, 3.5])


@pytest.mark.parametrize("variant", ["reader_thread", "stdlib_gzip"])
def test_decompression_variants_agree(tmp_path: Path, series: np.ndarray, variant: str,
                                      monkeypatch: pytest.MonkeyPatch) -> None:
    path = tmp_path / "f32.nii.gz"
    write_bold(path, series)
    mask = make_mask()
    ref = stream_masked(read_bold_header(path), mask)
    if variant == "stdlib_gzip":
        import sys

        monkeypatch.setitem(sys.modules, "isal", None)  # makes "from isal import ..." fail
    got = stream_masked(read_bold_header(path), mask, threads=2 if variant == "reader_thread" else 1)
    assert np.array_equal(got.Y, ref.Y)
    assert got.sha256 == ref.sha256 == provenance.hash_file(path)
