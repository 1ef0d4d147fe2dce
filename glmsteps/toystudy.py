"""The invented demo study: "Lighthouse keepers", a three-site toy dataset.

An entirely made-up scenario, written only to exercise the workflow. Twelve
volunteers at three harbour sites (``north``, ``east``, ``south``; four each)
perform the *beacon* task twice: they keep a rhythm by tapping during long
blocks (``tap``), watch brief light flashes (``flash``, 2 s) and hear short
fog-horn tones (``horn``, impulses). Each site's scanner has its own gain and
baseline; every run has slow drift, AR(1) noise, head motion with a few
spikes, and three planted activation blobs with known amplitude per
condition. Nothing here is real data.

The simulated response uses its own double-gamma kernel, written here
independently of :mod:`glmsteps.hrf`, normalised to unit integral: a sustained
block of one condition then raises the signal by its amplitude (percent of
baseline), which is the beta a unit-integral design should recover.
"""

from __future__ import annotations

import json
import os
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import numpy.typing as npt
import pandas as pd
from scipy import signal
from scipy.special import gammaln

from .fileio import save_nifti, write_json, write_text, write_tsv

#: Default seed: every call with it writes byte-identical files.
DEFAULT_SEED = 20261202
TASK = "beacon"
REPETITION_TIME_S = 2.0
N_VOLUMES = 120
GRID_SHAPE = (24, 28, 20)
VOXEL_SIZE_MM = 4.0
#: World position (mm) of voxel (0, 0, 0).
ORIGIN_MM = (-46.0, -62.0, -34.0)
SITES: dict[str, dict[str, float]] = {
    # gain multiplies the whole signal; baseline is the mean grey-level in the brain
    "north": {"gain": 1.00, "baseline": 900.0},
    "east": {"gain": 1.35, "baseline": 1150.0},
    "south": {"gain": 0.80, "baseline": 700.0},
}
SUBJECTS_PER_SITE = 4
RUNS = ("1", "2")
AR_RHO = 0.3
NOISE_SD_PERCENT = 1.0


@dataclass(frozen=True)
class Blob:
    """A planted activation: a Gaussian-edged sphere responding to one condition."""

    condition: str
    centre_mm: tuple[float, float, float]
    radius_mm: float
    amplitude_percent: float


BLOBS: tuple[Blob, ...] = (
    Blob("tap", (-26.0, -18.0, 26.0), 10.0, 2.0),
    Blob("flash", (6.0, -50.0, 2.0), 10.0, 4.5),
    Blob("horn", (34.0, -14.0, 2.0), 9.0, 9.0),
)


def toy_affine() -> npt.NDArray[np.float64]:
    """Voxel-to-world affine of the toy grid (4 mm isotropic, RAS)."""
    aff = np.diag([VOXEL_SIZE_MM, VOXEL_SIZE_MM, VOXEL_SIZE_MM, 1.0])
    aff[:3, 3] = ORIGIN_MM
    return aff


def world_grid() -> npt.NDArray[np.float64]:
    """World coordinates (mm) of every voxel centre, shape (nx, ny, nz, 3)."""
    ijk = np.stack(np.meshgrid(*[np.arange(n) for n in GRID_SHAPE], indexing="ij"), axis=-1)
    return ijk * VOXEL_SIZE_MM + np.asarray(ORIGIN_MM)


def brain_mask() -> npt.NDArray[np.bool_]:
    """An ellipsoidal 'brain' filling most of the box."""
    xyz = world_grid()
    centre = np.array([0.0, -8.0, 4.0])
    radii = np.array([42.0, 50.0, 34.0])
    return (((xyz - centre) / radii) ** 2).sum(axis=-1) <= 1.0


def response_kernel(dt_s: float, length_s: float = 32.0) -> npt.NDArray[np.float64]:
    """Double-gamma kernel (peak shape 6, undershoot 16, ratio 1/6), unit integral."""
    t = np.arange(0.0, length_s, dt_s)
    def gpdf(a: float) -> npt.NDArray[np.float64]:
        with np.errstate(divide="ignore"):
            return np.where(t > 0, np.exp((a - 1) * np.log(np.maximum(t, 1e-12)) - t - gammaln(a)), 0.0)
    h = gpdf(6.0) - gpdf(16.0) / 6.0
    return h / (h.sum() * dt_s)


def make_events(rng: np.random.Generator) -> pd.DataFrame:
    """One run's events: 4 tapping blocks, 10 flashes, 10 horn tones, jittered."""
    scan_s = N_VOLUMES * REPETITION_TIME_S
    rows: list[dict[str, object]] = []
    block_starts = [14.0, 74.0, 134.0, 194.0]
    for start in block_starts:
        rows.append({"onset": start + rng.uniform(0, 4), "duration": 18.0, "trial_type": "tap",
                     "response_time": np.nan})
    # brief events sit on distinct 4 s slots in the gaps between blocks (never overlapping)
    gaps = [(2.0, 14.0)] + [(s + 24.0, s + 60.0) for s in block_starts[:-1]] + [(block_starts[-1] + 24.0, scan_s - 12.0)]
    slots = np.concatenate([np.arange(lo, hi - 3.0, 4.0) for lo, hi in gaps])
    chosen = rng.choice(slots, size=20, replace=False)
    for k, slot in enumerate(chosen):
        kind, duration = ("flash", 2.0) if k < 10 else ("horn", 0.0)
        rt = rng.uniform(0.35, 0.9) if kind == "flash" and rng.random() > 0.2 else np.nan
        rows.append({"onset": slot + rng.uniform(0.0, 1.0), "duration": duration, "trial_type": kind,
                     "response_time": rt})
    table = pd.DataFrame(rows).sort_values("onset", kind="stable").reset_index(drop=True)
    table["onset"] = table["onset"].round(2)
    table["response_time"] = table["response_time"].round(3)
    return table


def predicted_response(events: pd.DataFrame, condition: str, dt_s: float = 0.05) -> npt.NDArray[np.float64]:
    """The simulated (noise-free) response of one condition at each volume's mid-time."""
    n_fine = int(round(N_VOLUMES * REPETITION_TIME_S / dt_s))
    stim = np.zeros(n_fine)
    for onset, duration in events.loc[events["trial_type"] == condition, ["onset", "duration"]].to_numpy(float):
        i0 = int(round(onset / dt_s))
        if duration <= 0:
            stim[i0] += 1.0 / dt_s
        else:
            stim[i0:i0 + max(1, int(round(duration / dt_s)))] += 1.0
    resp = np.convolve(stim, response_kernel(dt_s))[:n_fine] * dt_s
    frame_s = (np.arange(N_VOLUMES) + 0.5) * REPETITION_TIME_S
    return np.interp(frame_s, np.arange(n_fine) * dt_s, resp)


def blob_weights(blob: Blob) -> npt.NDArray[np.float64]:
    """Spatial profile of a blob: 1 inside its radius, Gaussian fall-off (sigma 3 mm) outside."""
    dist = np.linalg.norm(world_grid() - np.asarray(blob.centre_mm), axis=-1)
    return np.where(dist <= blob.radius_mm, 1.0, np.exp(-0.5 * ((dist - blob.radius_mm) / 3.0) ** 2))


def make_motion(rng: np.random.Generator) -> tuple[pd.DataFrame, npt.NDArray[np.int64]]:
    """Rigid-body motion (mm, rad), displacement per volume (mm), and spike volumes."""
    steps = rng.normal(0.0, 0.02, size=(N_VOLUMES, 6))
    steps[:, 3:] *= 0.01  # rotations in radians are small
    n_spikes = int(rng.integers(2, 5))
    spikes = np.sort(rng.choice(np.arange(10, N_VOLUMES - 5), size=n_spikes, replace=False))
    for v in spikes:
        steps[v, :3] += rng.normal(0.0, 0.5, 3)
        steps[v, 3:] += rng.normal(0.0, 0.004, 3)
    motion = np.cumsum(steps, axis=0)
    motion -= motion[0]
    names = ["move_x_mm", "move_y_mm", "move_z_mm", "turn_x_rad", "turn_y_rad", "turn_z_rad"]
    table = pd.DataFrame(motion, columns=names)
    diff = np.vstack([np.zeros((1, 6)), np.diff(motion, axis=0)])
    # displacement: translations plus rotations as arc length on a 50 mm sphere (Power et al. 2012)
    table["displacement_mm"] = np.abs(diff[:, :3]).sum(axis=1) + 50.0 * np.abs(diff[:, 3:]).sum(axis=1)
    return table, spikes


def simulate_run(rng: np.random.Generator, site: str, subject_gain: float,
                 events: pd.DataFrame) -> tuple[npt.NDArray[np.float32], pd.DataFrame]:
    """One run's 4D BOLD (float32) and confounds table."""
    mask = brain_mask()
    params = SITES[site]
    xyz = world_grid()
    # smooth baseline: brighter centre, dim outside the brain
    shade = 1.0 + 0.15 * np.cos(xyz[..., 0] / 30.0) * np.cos(xyz[..., 2] / 40.0)
    base = np.where(mask, params["baseline"] * shade, 0.05 * params["baseline"])
    t_s = (np.arange(N_VOLUMES) + 0.5) * REPETITION_TIME_S
    drift = 0.6 * (t_s / t_s[-1] - 0.5) + 0.3 * np.sin(2 * np.pi * t_s / 230.0 + rng.uniform(0, 2 * np.pi))
    percent = np.broadcast_to(drift, GRID_SHAPE + (N_VOLUMES,)).copy()
    for blob in BLOBS:
        percent += (blob_weights(blob) * mask)[..., None] * (subject_gain * blob.amplitude_percent) * \
            predicted_response(events, blob.condition)[None, None, None, :]
    white = rng.standard_normal(GRID_SHAPE + (N_VOLUMES,)) * (NOISE_SD_PERCENT * np.sqrt(1 - AR_RHO**2))
    noise = signal.lfilter([1.0], [1.0, -AR_RHO], white, axis=-1)
    # stationary start: the first sample has the AR(1) marginal variance
    percent += noise
    motion, spikes = make_motion(rng)
    for v in spikes:  # a motion spike shifts the whole image's intensity for one volume
        percent[..., v] += rng.choice([-1.0, 1.0]) * 4.0
    bold = params["gain"] * base[..., None] * (1.0 + percent / 100.0)
    wm_region = mask & (np.abs(xyz[..., 0]) < 12) & (np.abs(xyz[..., 2] - 20) < 8)
    confounds = motion.copy()
    confounds["white_matter_mean"] = bold[wm_region].mean(axis=0)
    return bold.astype(np.float32), confounds


def participants_table() -> pd.DataFrame:
    """participant_id, site, age, group for the 12 invented volunteers."""
    rng = np.random.default_rng(7)
    rows = []
    n = 0
    for site in SITES:
        for k in range(SUBJECTS_PER_SITE):
            n += 1
            rows.append({"participant_id": f"sub-{n:02d}", "site": site,
                         "age": int(rng.integers(21, 64)), "group": "novice" if k % 2 == 0 else "veteran"})
    table = pd.DataFrame(rows)
    table["age"] = table["age"].astype("Int64")
    table.loc[5, "age"] = pd.NA  # one age not recorded: n/a in the TSV
    return table


def write_toy_study(dest: str | os.PathLike[str], seed: int = DEFAULT_SEED) -> Path:
    """Write the invented study as a BIDS-style dataset below ``dest``.

    Parameters
    ----------
    dest : path-like
        Output folder (created).
    seed : int
        Random seed; the same seed always writes the same files.

    Returns
    -------
    Path
        The dataset folder.

    Notes
    -----
    Layout (all names are this project's own)::

        participants.tsv  truth.json  dataset_description.json
        sub-XX/func/sub-XX_task-beacon_run-R_space-toy_desc-preproc_bold.nii.gz (+ .json)
        sub-XX/func/sub-XX_task-beacon_run-R_events.tsv
        sub-XX/func/sub-XX_task-beacon_run-R_desc-nuisance_timeseries.tsv
        sub-XX/anat/sub-XX_space-toy_desc-brain_mask.nii.gz
    """
    root = Path(dest)
    root.mkdir(parents=True, exist_ok=True)
    rng_master = np.random.default_rng(seed)
    participants = participants_table()
    affine = toy_affine()
    mask = brain_mask()
    write_tsv(root / "participants.tsv", participants)
    write_json(root / "dataset_description.json", {
        "Name": "Lighthouse keepers (invented demo study for glmsteps)", "BIDSVersion": "1.9.0",
        "DatasetType": "derivative", "License": "CC0",
        "GeneratedBy": [{"Name": "glmsteps toy-study", "Description": "simulated; not real data"}],
    })
    subject_gains: dict[str, float] = {}
    for _, row in participants.iterrows():
        sub = row["participant_id"].removeprefix("sub-")
        subject_gain = float(np.clip(rng_master.normal(1.0, 0.1), 0.75, 1.25))
        subject_gains[row["participant_id"]] = subject_gain
        anat = root / f"sub-{sub}" / "anat"
        save_nifti(anat / f"sub-{sub}_space-toy_desc-brain_mask.nii.gz", mask.astype(np.uint8), affine, dtype=np.uint8)
        for run in RUNS:
            rng = np.random.default_rng(rng_master.integers(2**63))
            events = make_events(rng)
            bold, confounds = simulate_run(rng, row["site"], subject_gain, events)
            stem = root / f"sub-{sub}" / "func" / f"sub-{sub}_task-{TASK}_run-{run}"
            write_tsv(Path(f"{stem}_events.tsv"), events)
            write_tsv(Path(f"{stem}_desc-nuisance_timeseries.tsv"), confounds.round(6))
            bold_path = Path(f"{stem}_space-toy_desc-preproc_bold.nii.gz")
            _save_bold(bold_path, bold, affine)
            write_json(Path(f"{stem}_space-toy_desc-preproc_bold.json"),
                       {"RepetitionTime": REPETITION_TIME_S, "TaskName": TASK, "SkullStripped": False})
    truth = {
        "description": "Planted effects of the invented 'Lighthouse keepers' study. amplitude_percent "
                       "is the beta (percent signal change) of a unit-integral double-gamma regressor; "
                       "each subject's amplitudes are scaled by its amplitude_gain (drawn with mean 1, sd 0.1); "
                       "the site gain scales the whole signal (baseline and response alike).",
        "seed": seed, "repetition_time_s": REPETITION_TIME_S, "n_volumes": N_VOLUMES,
        "ar1_rho": AR_RHO, "noise_sd_percent": NOISE_SD_PERCENT,
        "sites": SITES,
        "subjects": [{"participant_id": pid, "site": site, "amplitude_gain": round(subject_gains[pid], 12)}
                     for pid, site in zip(participants["participant_id"], participants["site"])],
        "blobs": [
            {"condition": b.condition, "centre_mm": list(b.centre_mm), "radius_mm": b.radius_mm,
             "amplitude_percent": b.amplitude_percent} for b in BLOBS],
    }
    write_text(root / "truth.json", json.dumps(truth, indent=2) + "\n")
    return root


def _save_bold(path: Path, bold: npt.NDArray[np.float32], affine: npt.NDArray[np.float64]) -> None:
    """Save a 4D BOLD with TR in the header (seconds)."""
    import nibabel as nib

    from .fileio import atomic_path

    img = nib.Nifti1Image(bold, affine)
    img.set_data_dtype(np.float32)
    img.header.set_xyzt_units("mm", "sec")
    zooms = img.header.get_zooms()
    img.header.set_zooms(tuple(zooms[:3]) + (REPETITION_TIME_S,))
    with atomic_path(path) as tmp:
        nib.save(img, tmp)
