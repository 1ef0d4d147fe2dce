"""NIfTI input: headers, BIDS sidecars and the run's TR, grid checks, streamed masked reading.

The BOLD header is read with nibabel; the voxel data are then streamed volume
by volume straight from the (gzipped) file and masked as they arrive into an
``(n_scans, n_voxels_in_mask)`` float32 array, so that the whole 4D image is
never held in memory. The file's bytes are hashed (sha256) on the way, so the
provenance record does not need to read the BOLD a second time.

Decompression uses isal when it is installed (measured about 3x faster than the
standard library's gzip on this project's runs), else the standard ``gzip``. With
one thread (the default for a job) isal decompresses in the calling thread: a
background reader thread (``isal.igzip_threaded``) sharing one core with the
masking was slower (4.8-6.1 s against 4.0-4.2 s for the large benchmark run). It
is used when the job has two threads or more (medians of 5, read phase of the
large float32 run 3.1 s with one thread, 2.4 s with two).
"""

from __future__ import annotations

import gzip
import hashlib
import io
import json
import os
import queue
import threading
import warnings
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Literal

import numpy as np
import numpy.typing as npt

from .acquisition import RunTiming, choose_repetition_time
from .errors import DataError, GlmstepsWarning


def _decompression_errors() -> tuple[type[BaseException], ...]:
    """Exceptions a truncated or corrupt .nii.gz raises while it is decompressed."""
    import zlib

    errors: list[type[BaseException]] = [EOFError, zlib.error, gzip.BadGzipFile]
    try:
        from isal import isal_zlib

        errors.append(isal_zlib.error)
    except ImportError:  # isal is optional: plain gzip is the fallback
        pass
    return tuple(errors)


_DECOMPRESSION_ERRORS = _decompression_errors()

#: Tolerance of the affine comparison between mask and BOLD (mm).
AFFINE_TOLERANCE_MM = 1e-3


@dataclass(frozen=True)
class BoldHeader:
    """What the fit needs from a BOLD header.

    Attributes
    ----------
    path : str
    shape : tuple of 4 int
        (nx, ny, nz, n_volumes).
    affine : ndarray, shape (4, 4)
        Voxel to world (mm).
    dtype : numpy dtype
        On-disk data type, with byte order.
    vox_offset : int
        Byte offset of the data in the (decompressed) file.
    slope, inter : float
        Scaling ``value = slope * stored + inter`` (1 and 0 when unset).
    repetition_time_s : float or None
        ``pixdim[4]`` converted to seconds by its time unit, taken as seconds
        when the header gives no unit (:func:`header_repetition_time_s`);
        ``None`` when it is not positive.
    compressed : bool
    time_unit_known : bool
        The header gives a time unit (s, ms, us); without one its TR is only
        checked against a configured TR, never relied on alone
        (:mod:`glmsteps.acquisition`).
    """

    path: str
    shape: tuple[int, int, int, int]
    affine: npt.NDArray[np.float64]
    dtype: np.dtype
    vox_offset: int
    slope: float
    inter: float
    repetition_time_s: float | None
    compressed: bool
    time_unit_known: bool = True

    @property
    def voxel_size_mm(self) -> npt.NDArray[np.float64]:
        """Voxel edge lengths (mm), from the affine columns."""
        return np.sqrt((self.affine[:3, :3] ** 2).sum(axis=0))


def _load_header(path: str | os.PathLike[str]) -> Any:
    import nibabel as nib

    p = os.fspath(path)
    if not os.path.exists(p):
        raise DataError(f"{p}: file not found; check the input path")
    try:
        img = nib.load(p)
    except Exception as exc:  # nibabel raises many types for unreadable files
        raise DataError(f"{p}: cannot read as NIfTI ({exc}); check the file is a valid .nii/.nii.gz") from exc
    if not isinstance(img, (nib.Nifti1Image, nib.Nifti2Image)):
        raise DataError(f"{p}: expected a NIfTI-1/2 image, found {type(img).__name__}; convert it to NIfTI")
    return img


def read_bold_header(path: str | os.PathLike[str]) -> BoldHeader:
    """Read and check the header of a BOLD series.

    Parameters
    ----------
    path : path-like
        ``.nii`` or ``.nii.gz``.

    Returns
    -------
    BoldHeader

    Raises
    ------
    DataError
        If the file is not a readable NIfTI or not 4D.
    """
    img = _load_header(path)
    hdr = img.header
    shape = tuple(int(s) for s in img.shape)
    if len(shape) != 4:
        raise DataError(f"{path}: BOLD must be 4D (x, y, z, time), found shape {shape}; "
                        "pass the preprocessed time series, not a single volume")
    # The array proxy holds what nibabel itself uses to read the data: the byte offset
    # (vox_offset of the file; the header object of a loaded image may not keep it),
    # the on-disk dtype with its byte order, and scl_slope / scl_inter (1 and 0 when unset).
    proxy = img.dataobj
    slope = float(getattr(proxy, "slope", 1.0))
    inter = float(getattr(proxy, "inter", 0.0))
    slope = 1.0 if not np.isfinite(slope) or slope == 0 else slope
    inter = 0.0 if not np.isfinite(inter) else inter
    return BoldHeader(path=os.fspath(path), shape=shape, affine=np.asarray(img.affine, dtype=np.float64),
                      dtype=np.dtype(proxy.dtype), vox_offset=int(proxy.offset), slope=slope, inter=inter,
                      repetition_time_s=header_repetition_time_s(hdr), compressed=os.fspath(path).endswith(".gz"),
                      time_unit_known=header_time_unit_known(hdr))


#: Seconds per NIfTI time unit (``xyzt_units`` as nibabel names it).
_TIME_UNITS_S: dict[str, float] = {"sec": 1.0, "msec": 1e-3, "usec": 1e-6}


def header_time_unit_known(header: Any) -> bool:
    """True when a NIfTI header gives the time unit of ``pixdim[4]`` (seconds, milliseconds, microseconds)."""
    try:
        return header.get_xyzt_units()[1] in _TIME_UNITS_S
    except (AttributeError, IndexError, TypeError, ValueError):
        return False


def header_repetition_time_s(header: Any) -> float | None:
    """The TR a NIfTI header states: ``pixdim[4]`` converted to seconds by its time unit.

    Parameters
    ----------
    header : nibabel Nifti1Header or Nifti2Header

    Returns
    -------
    float or None
        None when there is no 4th dimension or ``pixdim[4]`` is not positive
        and finite. Without a time unit (``unknown``) the value is taken as
        seconds; :func:`header_time_unit_known` tells such headers apart
        (nibabel and many converters leave ``pixdim[4] = 1`` with no unit,
        which says nothing about the TR).

    Notes
    -----
    NIfTI-1: ``pixdim[4]`` is the time step, its unit in bits 3-5 of
    ``xyzt_units`` (8 = s, 16 = ms, 24 = us; from memory), read with
    nibabel's ``get_xyzt_units``.
    """
    try:
        zooms = header.get_zooms()
        unit = header.get_xyzt_units()[1]
    except (AttributeError, IndexError, TypeError, ValueError):
        return None
    if len(zooms) < 4:
        return None
    value = float(zooms[3]) * _TIME_UNITS_S.get(unit, 1.0)
    return value if np.isfinite(value) and value > 0 else None


def read_mask(path: str | os.PathLike[str]) -> tuple[npt.NDArray[np.bool_], npt.NDArray[np.float64]]:
    """Read a brain mask: voxels with a finite non-zero value are inside.

    Parameters
    ----------
    path : path-like

    Returns
    -------
    mask : ndarray of bool, shape (nx, ny, nz)
    affine : ndarray, shape (4, 4)

    Raises
    ------
    DataError
        If the file is unreadable, not 3D, or the mask is empty.

    Warns
    -----
    GlmstepsWarning
        The mask holds fractional values (a probability map, not a mask).
    """
    img = _load_header(path)
    data = np.asarray(img.dataobj)
    if data.ndim == 4 and data.shape[3] == 1:
        data = data[..., 0]
    if data.ndim != 3:
        raise DataError(f"{path}: mask must be 3D, found shape {data.shape}; pass a single-volume mask")
    mask = np.isfinite(data) & (data != 0)
    if not mask.any():
        raise DataError(f"{path}: mask is empty (no non-zero voxel); pass the brain mask of this run")
    inside = data[mask]
    fractional = inside != np.round(inside)
    if fractional.any():
        # a probability map passed as the mask would put nearly every voxel in it
        warnings.warn(f"{path}: the mask holds fractional values ({int(fractional.sum())} voxels, e.g. "
                      f"{float(inside[fractional][0]):g}); every voxel with a non-zero value is inside, so "
                      "pass a binary mask (threshold a probability map first)", GlmstepsWarning, stacklevel=2)
    return mask, np.asarray(img.affine, dtype=np.float64)


def check_grid(mask_path: str | os.PathLike[str], mask_shape: tuple[int, ...], mask_affine: npt.ArrayLike,
               bold: BoldHeader) -> None:
    """Check that a mask lies on the BOLD grid (shape, and affine to 1e-3 mm).

    Raises
    ------
    DataError
    """
    if tuple(mask_shape) != tuple(bold.shape[:3]):
        raise DataError(f"{mask_path}: mask grid {tuple(mask_shape)} differs from BOLD grid {bold.shape[:3]} "
                        f"of {bold.path}; resample the mask to the BOLD")
    diff = float(np.max(np.abs(np.asarray(mask_affine) - bold.affine)))
    if diff > AFFINE_TOLERANCE_MM:
        raise DataError(f"{mask_path}: mask affine differs from the BOLD affine of {bold.path} by up to "
                        f"{diff:.4g} mm (tolerance {AFFINE_TOLERANCE_MM} mm); resample the mask to the BOLD")


def bids_sidecar_of(path: str | os.PathLike[str]) -> Path:
    """The BIDS JSON sidecar next to an image (``x.nii.gz`` -> ``x.json``)."""
    p = Path(path)
    name = p.name
    for ext in (".nii.gz", ".nii"):
        if name.endswith(ext):
            return p.with_name(name[: -len(ext)] + ".json")
    return p.with_suffix(".json")


def read_bids_sidecar(path: str | os.PathLike[str]) -> dict[str, Any]:
    """Read a BIDS JSON sidecar (a JSON object).

    Raises
    ------
    DataError
        Unreadable, not JSON, or not an object.
    """
    try:
        meta = json.loads(Path(path).read_text(encoding="utf-8"))
    except (OSError, UnicodeDecodeError, json.JSONDecodeError) as exc:
        raise DataError(f"{path}: cannot read the BIDS sidecar ({exc}); fix it (a JSON object) or remove it") from exc
    if not isinstance(meta, dict):
        raise DataError(f"{path}: the BIDS sidecar holds a {type(meta).__name__}, expected a JSON object; fix or "
                        "remove it")
    return meta


def sidecar_repetition_time_s(meta: dict[str, Any], path: str | os.PathLike[str]) -> float | None:
    """``RepetitionTime`` of a BIDS sidecar (seconds), None when absent.

    Raises
    ------
    DataError
        Present but not a positive finite number.
    """
    if "RepetitionTime" not in meta:
        return None
    value = meta["RepetitionTime"]
    if isinstance(value, bool) or not isinstance(value, (int, float)) or not np.isfinite(value) or value <= 0:
        raise DataError(f"{path}: RepetitionTime is {value!r}; expected a positive number of seconds (BIDS); fix it")
    return float(value)


def read_run_timing(bold: BoldHeader, sidecar: str | os.PathLike[str] | None,
                    configured_tr_s: float | None) -> RunTiming:
    """The run's TR and slice timing by the one TR rule (:mod:`glmsteps.acquisition`).

    Parameters
    ----------
    bold : BoldHeader
        The run's BOLD header (its ``repetition_time_s`` is the header's TR).
    sidecar : path-like or None
        The run's BIDS JSON sidecar, None when it has none.
    configured_tr_s : float or None
        ``acquisition.repetition_time_s``.

    Returns
    -------
    RunTiming

    Raises
    ------
    DataError, ConfigError
        See :func:`glmsteps.acquisition.choose_repetition_time`; an unreadable
        sidecar.
    """
    meta: dict[str, Any] = {}
    if sidecar is not None:
        meta = read_bids_sidecar(sidecar)
    return choose_repetition_time(
        bold_path=bold.path, sidecar_path=None if sidecar is None else os.fspath(sidecar),
        sidecar_tr_s=sidecar_repetition_time_s(meta, sidecar) if sidecar is not None else None,
        header_tr_s=bold.repetition_time_s, header_unit_known=bold.time_unit_known, configured_tr_s=configured_tr_s,
        slice_timing_s=meta.get("SliceTiming"))


def check_repetition_time(bold: BoldHeader, repetition_time_s: float) -> list[str]:
    """Check a run's files against an expected TR by the one TR rule.

    Parameters
    ----------
    bold : BoldHeader
    repetition_time_s : float
        Expected TR (seconds).

    Returns
    -------
    list of str
        The sources that state a TR (``sidecar``, ``header``); empty if the
        files state none.

    Raises
    ------
    DataError
        If the TR the files state (the sidecar's, else the header's) differs
        from the expected one by more than 1 % (see
        :func:`glmsteps.acquisition.choose_repetition_time`).
    """
    side = bids_sidecar_of(bold.path)
    timing = read_run_timing(bold, side if side.exists() else None, repetition_time_s)
    sources = []
    if timing.source == "sidecar":
        sources.append("sidecar")
    if bold.repetition_time_s is not None:
        sources.append("header")
    return sources


class _HashingReader(io.RawIOBase):
    """A raw binary reader that feeds every byte it returns to a sha256.

    The hashing runs in a helper thread (``hashlib`` releases the GIL while it
    hashes), so that it overlaps with decompression instead of adding to it;
    :meth:`hexdigest` waits for it. Use as a context manager, so the thread
    ends also when reading fails.
    """

    _QUEUE_BLOCKS = 8  # at most this many blocks (of the caller's read size) wait to be hashed

    def __init__(self, handle: Any) -> None:
        self._handle = handle
        self._digest = hashlib.sha256()
        self._blocks: queue.Queue[bytes | None] = queue.Queue(maxsize=self._QUEUE_BLOCKS)
        self._thread = threading.Thread(target=self._consume, name="glmsteps-sha256", daemon=True)
        self._thread.start()

    def _consume(self) -> None:
        while (block := self._blocks.get()) is not None:
            self._digest.update(block)

    def readable(self) -> bool:
        return True

    def readinto(self, buffer: Any) -> int:
        block = self._handle.read(len(buffer))
        n = len(block)
        if n:
            memoryview(buffer)[:n] = block
            self._blocks.put(block)
        return n

    def drain(self) -> None:
        """Read (and hash) whatever is left of the file."""
        for block in iter(lambda: self._handle.read(1 << 20), b""):
            self._blocks.put(block)

    def hexdigest(self) -> str:
        """The sha256 of every byte read so far (waits for the hashing thread)."""
        self._finish()
        return self._digest.hexdigest()

    def _finish(self) -> None:
        if self._thread.is_alive():
            self._blocks.put(None)
            self._thread.join()

    def __exit__(self, *exc: Any) -> None:
        self._finish()
        super().__exit__(*exc)


def _open_decompressed(raw: io.BufferedReader, threads: int) -> Any:
    """A decompressing reader: isal (single thread, or a reader thread when ``threads >= 2``), else gzip."""
    try:
        from isal import igzip, igzip_threaded
    except ImportError:  # plain gzip fallback
        return gzip.GzipFile(fileobj=raw, mode="rb")
    if threads >= 2:
        return igzip_threaded.open(raw, "rb", threads=1)
    return igzip.IGzipFile(fileobj=raw, mode="rb")


def _read_exact(stream: Any, view: memoryview, path: str) -> None:
    got = 0
    while got < len(view):
        n = stream.readinto(view[got:])
        if not n:
            raise DataError(f"{path}: file ends early ({got} of {len(view)} bytes of a volume read); "
                            "the file is truncated, regenerate it")
        got += n


@dataclass(frozen=True)
class MaskedSeries:
    """The in-mask voxel series of a BOLD run.

    Attributes
    ----------
    Y : ndarray, shape (n_scans, n_voxels), float32
        Kept volumes (from ``first_volume``), one column per voxel of the mask,
        in the order of ``flat_index``.
    flat_index : ndarray of int64, shape (n_voxels,)
        Index of each column's voxel in the C-order flattened grid.
    mean : ndarray, shape (n_voxels,), float64
        Temporal mean over the kept volumes (NaN if a value is not finite).
    minimum, maximum : ndarray, shape (n_voxels,), float32
        Temporal extremes (NaN propagates).
    sha256 : str
        Hash of the file's bytes.
    """

    Y: npt.NDArray[np.float32]
    flat_index: npt.NDArray[np.int64]
    mean: npt.NDArray[np.float64]
    minimum: npt.NDArray[np.float32]
    maximum: npt.NDArray[np.float32]
    sha256: str


def stream_masked(bold: BoldHeader, mask: npt.NDArray[np.bool_], first_volume: int = 0,
                  threads: int = 1, voxel_order: Literal["C", "disk"] = "C") -> MaskedSeries:
    """Read the in-mask voxels of a BOLD run volume by volume.

    Parameters
    ----------
    bold : BoldHeader
    mask : ndarray of bool, shape (nx, ny, nz)
        On the BOLD grid.
    first_volume : int
        Volumes before this one are read (and hashed) but not kept.
    threads : int
        Threads of the job; with 2 or more, isal decompresses in a reader thread.
    voxel_order : {"C", "disk"}
        Order of the columns: ``C`` (the grid flattened in C order, ``flat_index``
        increasing) or ``disk`` (the order in which NIfTI stores the voxels, x
        fastest). Gathering a volume in disk order reads it sequentially, about 3x
        faster than in C order (``tests/benchmarks/README.md``).

    Returns
    -------
    MaskedSeries

    Notes
    -----
    NIfTI stores each volume with x varying fastest (Fortran order). Values
    are scaled in float32: ``slope * stored + inter`` when the header sets a
    slope (NIfTI-1 standard, ``scl_slope``/``scl_inter``).
    """
    nx, ny, nz, nt = bold.shape
    if voxel_order == "C":
        flat_c = np.flatnonzero(mask)
        disk_pos = np.ravel_multi_index(np.unravel_index(flat_c, (nx, ny, nz)), (nx, ny, nz), order="F")
    elif voxel_order == "disk":
        disk_pos = np.flatnonzero(np.asarray(mask).ravel(order="F"))
        flat_c = np.ravel_multi_index(np.unravel_index(disk_pos, (nx, ny, nz), order="F"), (nx, ny, nz))
    else:
        raise ValueError(f"voxel_order must be 'C' or 'disk', not {voxel_order!r}")
    n_keep = nt - first_volume
    v = flat_c.size
    Y = np.empty((n_keep, v), dtype=np.float32)
    total = np.zeros(v, dtype=np.float64)
    vmin = np.full(v, np.inf, dtype=np.float32)
    vmax = np.full(v, -np.inf, dtype=np.float32)
    dtype = np.dtype(bold.dtype)
    vol_bytes = nx * ny * nz * dtype.itemsize
    scaled = bold.slope != 1.0 or bold.inter != 0.0
    buf = bytearray(vol_bytes)
    view = memoryview(buf)
    with open(bold.path, "rb", buffering=0) as handle, _HashingReader(handle) as raw:
        braw = io.BufferedReader(raw, buffer_size=1 << 20)
        stream = _open_decompressed(braw, threads) if bold.compressed else braw
        try:
            skip = bold.vox_offset
            while skip > 0:
                chunk = stream.read(min(skip, 1 << 20))
                if not chunk:
                    raise DataError(f"{bold.path}: file ends before its data offset; regenerate it")
                skip -= len(chunk)
            for t in range(nt):
                _read_exact(stream, view, bold.path)
                if t < first_volume:
                    continue
                vals = np.frombuffer(buf, dtype=dtype).take(disk_pos)
                row = Y[t - first_volume]
                row[...] = vals
                if scaled:
                    row *= np.float32(bold.slope)
                    row += np.float32(bold.inter)
                total += row
                np.minimum(vmin, row, out=vmin)
                np.maximum(vmax, row, out=vmax)
            if bold.compressed:
                while stream.read(1 << 20):
                    pass
        except _DECOMPRESSION_ERRORS as exc:
            raise DataError(f"{bold.path}: cannot decompress the image data ({type(exc).__name__}: {exc}); "
                            "the file is truncated or corrupt, regenerate or copy it again") from exc
        finally:
            if stream is not braw:
                stream.close()
        raw.drain()
        digest = raw.hexdigest()
    mean = total / max(n_keep, 1)
    return MaskedSeries(Y=Y, flat_index=flat_c, mean=mean, minimum=vmin, maximum=vmax, sha256=digest)
