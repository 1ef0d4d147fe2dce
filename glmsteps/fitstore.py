"""The per-run HDF5 fit file (layout in DEVELOPERS.md, "HDF5 fit file").

Large per-voxel datasets are chunked along the voxel axis and stored without a
compression filter: on the project's large benchmark run (2026-12-02, see
``tests/benchmarks/README.md``) writing the fit took 0.22 s uncompressed
(44 MB), 0.99 s with LZF (32 MB) and 1.30 s with gzip (29 MB); the 1.4x
smaller file is not worth 10 % of the whole job's time.
"""

from __future__ import annotations

import json
import os
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import numpy.typing as npt

from .errors import DataError
from .fileio import atomic_path

#: Version tag of the layout, stored as a root attribute.
LAYOUT_VERSION = 1
#: HDF5 filter of the per-voxel datasets ("lzf" or None; chosen by ``tests/benchmarks/bench_fit.py``).
COMPRESSION: str | None = None
#: Voxels per HDF5 chunk of per-voxel datasets.
_CHUNK_VOXELS = 16384
#: Root attributes copied from the provenance record.
_RECORD_ATTRS = ("step", "params_hash", "lineage_hash", "glmsteps_version")
#: Root attributes describing the fit (taken from ``StoredFit.attrs``, else the record's params).
_FIT_ATTRS = ("autocorrelation", "scaling", "repetition_time_s")
#: Voxel status counters stored as attributes of ``voxels/status_counts``.
STATUS_KEYS = ("outside_mask", "non_finite", "zero_variance", "nonpositive_mean", "fitted")


@dataclass
class StoredFit:
    """A run's fit as stored in ``fit.h5``.

    Attributes
    ----------
    shape : tuple of 3 int
        Voxel grid of the BOLD.
    affine : ndarray, shape (4, 4)
        Voxel to world (mm).
    voxel_index : ndarray of int64, shape (v,)
        Flat C-order indices of the fitted voxels.
    design : ndarray, shape (n, p), float64
        Design actually fitted (kept volumes).
    names, roles, conditions, basis : list of str, length p
        Column metadata.
    beta : ndarray, shape (p, v), float32
    residual_variance, dof : ndarray, shape (v,), float32
    ar_coef : ndarray, shape (v, order), float32
    bin : ndarray of int32, shape (v,)
    bin_covariance : ndarray, shape (b, p, p), float64
    bin_rho : ndarray, shape (b,), float64
    mean_image : ndarray, shape (nx, ny, nz), float32
    excluded : bool
    attrs : dict
        Root attributes (``provenance`` parsed to a dict) and
        ``status_counts`` (dict of the ``voxels/status_counts`` attributes).
    """

    shape: tuple[int, int, int]
    affine: npt.NDArray[np.float64]
    voxel_index: npt.NDArray[np.int64]
    design: npt.NDArray[np.float64]
    names: list[str]
    roles: list[str]
    conditions: list[str]
    basis: list[str]
    beta: npt.NDArray[np.float32]
    residual_variance: npt.NDArray[np.float32]
    dof: npt.NDArray[np.float32]
    ar_coef: npt.NDArray[np.float32]
    bin: npt.NDArray[np.int32]
    bin_covariance: npt.NDArray[np.float64]
    bin_rho: npt.NDArray[np.float64]
    mean_image: npt.NDArray[np.float32]
    excluded: bool = False
    attrs: dict[str, Any] = field(default_factory=dict)


def _voxel_dataset(group: Any, name: str, data: np.ndarray, voxel_axis: int) -> None:
    data = np.ascontiguousarray(data)
    if data.size == 0:
        group.create_dataset(name, data=data)
        return
    chunks = list(data.shape)
    chunks[voxel_axis] = min(data.shape[voxel_axis], _CHUNK_VOXELS)
    group.create_dataset(name, data=data, chunks=tuple(chunks), compression=COMPRESSION,
                         shuffle=COMPRESSION is not None)


def _strings(group: Any, name: str, values: list[str]) -> None:
    import h5py

    group.create_dataset(name, data=np.array([str(v) for v in values], dtype=object),
                         dtype=h5py.string_dtype(encoding="utf-8"))


def write_fit(path: str | os.PathLike[str], fit: StoredFit, record: dict[str, Any]) -> None:
    """Write a fit to HDF5 atomically (temporary file, then rename).

    Parameters
    ----------
    path : path-like
        Destination ``fit.h5``.
    fit : StoredFit
    record : dict
        Provenance record (``provenance.build_record``); stored as JSON text in
        the root attribute ``provenance`` with its hashes as separate attributes.
    """
    import h5py

    params = record.get("params", {}) if isinstance(record, dict) else {}
    with atomic_path(path) as tmp:
        with h5py.File(tmp, "w") as h5:
            h5.attrs["provenance"] = json.dumps(record, sort_keys=True, default=_plain)
            for key in _RECORD_ATTRS:
                h5.attrs[key] = str(record.get(key, ""))
            for key in _FIT_ATTRS:
                value = fit.attrs.get(key, params.get(key))
                if value is not None:
                    h5.attrs[key] = value
            h5.attrs["excluded"] = bool(fit.excluded)
            h5.attrs["layout_version"] = LAYOUT_VERSION
            for key, value in fit.attrs.items():
                if key in ("provenance", "status_counts", "excluded") or key in _FIT_ATTRS or key in _RECORD_ATTRS:
                    continue
                h5.attrs[key] = value
            grid = h5.create_group("grid")
            grid.create_dataset("shape", data=np.asarray(fit.shape, dtype=np.int64))
            grid.create_dataset("affine", data=np.asarray(fit.affine, dtype=np.float64))
            vox = h5.create_group("voxels")
            _voxel_dataset(vox, "index", np.asarray(fit.voxel_index, dtype=np.int64), 0)
            counts = vox.create_group("status_counts")
            for key, value in dict(fit.attrs.get("status_counts", {})).items():
                counts.attrs[key] = int(value)
            des = h5.create_group("design")
            des.create_dataset("matrix", data=np.asarray(fit.design, dtype=np.float64))
            for name in ("names", "roles", "conditions", "basis"):
                _strings(des, name, list(getattr(fit, name)))
            est = h5.create_group("estimates")
            _voxel_dataset(est, "beta", np.asarray(fit.beta, dtype=np.float32), 1)
            _voxel_dataset(est, "residual_variance", np.asarray(fit.residual_variance, dtype=np.float32), 0)
            _voxel_dataset(est, "dof", np.asarray(fit.dof, dtype=np.float32), 0)
            noise = h5.create_group("noise")
            _voxel_dataset(noise, "ar_coef", np.asarray(fit.ar_coef, dtype=np.float32), 0)
            _voxel_dataset(noise, "bin", np.asarray(fit.bin, dtype=np.int32), 0)
            noise.create_dataset("bin_covariance", data=np.asarray(fit.bin_covariance, dtype=np.float64))
            noise.create_dataset("bin_rho", data=np.asarray(fit.bin_rho, dtype=np.float64))
            images = h5.create_group("images")
            images.create_dataset("mean", data=np.asarray(fit.mean_image, dtype=np.float32))


def _plain(obj: Any) -> Any:
    if isinstance(obj, np.generic):
        return obj.item()
    if isinstance(obj, np.ndarray):
        return obj.tolist()
    return str(obj)


def _attr(value: Any) -> Any:
    if isinstance(value, bytes):
        return value.decode("utf-8")
    if isinstance(value, np.generic):
        return value.item()
    return value


def read_fit(path: str | os.PathLike[str]) -> StoredFit:
    """Read a fit written by :func:`write_fit`.

    Parameters
    ----------
    path : path-like

    Returns
    -------
    StoredFit

    Raises
    ------
    DataError
        If the file is missing or does not have the fit layout.
    """
    import h5py

    p = os.fspath(path)
    if not os.path.exists(p):
        raise DataError(f"{p}: fit file not found; run the fit step first")
    try:
        with h5py.File(p, "r") as h5:
            attrs = {k: _attr(v) for k, v in h5.attrs.items()}
            if "provenance" in attrs:
                attrs["provenance"] = json.loads(attrs["provenance"])
            attrs["status_counts"] = {k: int(v) for k, v in h5["voxels/status_counts"].attrs.items()}

            def strings(name: str) -> list[str]:
                return [s.decode("utf-8") if isinstance(s, bytes) else str(s) for s in h5[name][()]]

            return StoredFit(
                shape=tuple(int(s) for s in h5["grid/shape"][()]),
                affine=h5["grid/affine"][()],
                voxel_index=h5["voxels/index"][()].astype(np.int64),
                design=h5["design/matrix"][()],
                names=strings("design/names"), roles=strings("design/roles"),
                conditions=strings("design/conditions"), basis=strings("design/basis"),
                beta=h5["estimates/beta"][()], residual_variance=h5["estimates/residual_variance"][()],
                dof=h5["estimates/dof"][()], ar_coef=h5["noise/ar_coef"][()], bin=h5["noise/bin"][()],
                bin_covariance=h5["noise/bin_covariance"][()], bin_rho=h5["noise/bin_rho"][()],
                mean_image=h5["images/mean"][()], excluded=bool(attrs.get("excluded", False)), attrs=attrs,
            )
    except (OSError, KeyError) as exc:
        raise DataError(f"{p}: not a glmsteps fit file ({exc}); rerun the fit step") from exc
