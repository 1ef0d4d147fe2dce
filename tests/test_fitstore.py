"""Tests of glmsteps.fitstore: the HDF5 layout of DEVELOPERS.md, round trip and atomic writing."""

from __future__ import annotations

import json
from pathlib import Path

import h5py
import numpy as np
import pytest

from glmsteps.errors import DataError
from glmsteps.fitstore import StoredFit, read_fit, write_fit


def make_fit(v: int = 50, p: int = 4, n: int = 30, b: int = 3, excluded: bool = False) -> StoredFit:
    rng = np.random.default_rng(0)
    shape = (5, 6, 7)
    return StoredFit(
        shape=shape, affine=np.diag([2.0, 2.0, 2.5, 1.0]),
        voxel_index=np.sort(rng.choice(np.prod(shape), v, replace=False)).astype(np.int64),
        design=rng.normal(size=(n, p)), names=["go", "go__derivative", "drift_00", "intercept"][:p],
        roles=["interest", "interest", "drift", "intercept"][:p], conditions=["go", "go", "", ""][:p],
        basis=["main", "derivative", "", ""][:p], beta=rng.normal(size=(p, v)).astype(np.float32),
        residual_variance=rng.random(v).astype(np.float32), dof=np.full(v, n - p, dtype=np.float32),
        ar_coef=rng.random((v, 1)).astype(np.float32), bin=rng.integers(0, b, v).astype(np.int32),
        bin_covariance=rng.normal(size=(b, p, p)), bin_rho=np.linspace(0.1, 0.3, b),
        mean_image=rng.random(shape).astype(np.float32), excluded=excluded,
        attrs={"status_counts": {"outside_mask": 160, "non_finite": 0, "zero_variance": 0, "nonpositive_mean": 0,
                                 "fitted": v},
               "autocorrelation": "ar1", "scaling": "percent", "repetition_time_s": 2.0, "ar_order": 1})


RECORD = {"step": "fit", "glmsteps_version": "0.1.0", "params": {"autocorrelation": "ar1"}, "params_hash": "ab" * 32,
          "inputs": {}, "lineage_hash": "cd" * 32, "warnings": []}


def test_round_trip(tmp_path: Path) -> None:
    fit = make_fit()
    path = tmp_path / "fit.h5"
    write_fit(path, fit, RECORD)
    back = read_fit(path)
    for name in ("affine", "voxel_index", "design", "beta", "residual_variance", "dof", "ar_coef", "bin",
                 "bin_covariance", "bin_rho", "mean_image"):
        a, b = getattr(fit, name), getattr(back, name)
        assert np.array_equal(a, b), name
        assert a.dtype == b.dtype, name
    assert back.shape == fit.shape
    assert (back.names, back.roles, back.conditions, back.basis) == (fit.names, fit.roles, fit.conditions, fit.basis)
    assert back.excluded is False
    assert back.attrs["provenance"] == RECORD
    assert back.attrs["status_counts"] == fit.attrs["status_counts"]
    for key in ("step", "params_hash", "lineage_hash", "glmsteps_version"):
        assert back.attrs[key] == RECORD[key]
    assert (back.attrs["autocorrelation"], back.attrs["scaling"], back.attrs["repetition_time_s"]) == ("ar1", "percent", 2.0)
    assert list(tmp_path.iterdir()) == [path]  # no temporary left behind


def test_layout_names_and_dtypes(tmp_path: Path) -> None:
    path = tmp_path / "fit.h5"
    write_fit(path, make_fit(), RECORD)
    expected = {  # DEVELOPERS.md, "HDF5 fit file"
        "grid/shape": ((3,), np.int64), "grid/affine": ((4, 4), np.float64), "voxels/index": ((50,), np.int64),
        "design/matrix": ((30, 4), np.float64), "estimates/beta": ((4, 50), np.float32),
        "estimates/residual_variance": ((50,), np.float32), "estimates/dof": ((50,), np.float32),
        "noise/ar_coef": ((50, 1), np.float32), "noise/bin": ((50,), np.int32),
        "noise/bin_covariance": ((3, 4, 4), np.float64), "noise/bin_rho": ((3,), np.float64),
        "images/mean": ((5, 6, 7), np.float32),
    }
    with h5py.File(path, "r") as h5:
        for name, (shape, dtype) in expected.items():
            assert h5[name].shape == shape, name
            assert h5[name].dtype == dtype, name
        for name in ("names", "roles", "conditions", "basis"):
            assert h5[f"design/{name}"].shape == (4,)
        assert json.loads(h5.attrs["provenance"])["lineage_hash"] == "cd" * 32
        assert bool(h5.attrs["excluded"]) is False
        assert h5["voxels/status_counts"].attrs["fitted"] == 50


def test_excluded_round_trip(tmp_path: Path) -> None:
    fit = make_fit(v=0, b=0, excluded=True)
    fit.attrs["status_counts"] = {}
    path = tmp_path / "fit.h5"
    write_fit(path, fit, RECORD)
    back = read_fit(path)
    assert back.excluded is True
    assert back.beta.shape == (4, 0) and back.bin_covariance.shape == (0, 4, 4)


def test_failed_write_leaves_nothing(tmp_path: Path) -> None:
    path = tmp_path / "fit.h5"
    fit = make_fit()
    fit.attrs["bad"] = object()  # h5py cannot store this
    with pytest.raises(TypeError):
        write_fit(path, fit, RECORD)
    assert list(tmp_path.iterdir()) == []


def test_read_errors(tmp_path: Path) -> None:
    with pytest.raises(DataError, match="not found"):
        read_fit(tmp_path / "missing.h5")
    other = tmp_path / "other.h5"
    with h5py.File(other, "w") as h5:
        h5.create_dataset("x", data=[1])
    with pytest.raises(DataError, match="not a glmsteps fit file"):
        read_fit(other)
