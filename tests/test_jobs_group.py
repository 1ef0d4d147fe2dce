"""Tests of the group jobs (parametric and permutation) on a small invented study."""

from __future__ import annotations

import json
from pathlib import Path

import mpmath
import nibabel as nib
import numpy as np
import pandas as pd
import pytest
import statsmodels.formula.api as smf

from glmsteps.errors import GroupError
from glmsteps.fileio import read_tsv, save_nifti, write_json, write_tsv
from glmsteps.jobs import group as group_job
from glmsteps.jobs import group_permutation as perm_job

SHAPE = (6, 6, 5)
AFFINE = np.diag([3.0, 3.0, 3.0, 1.0])
OUTPUTS = ("effect", "variance", "t", "z", "p")


def make_study(root: Path, n: int = 12, seed: int = 0, bad_grid: str | None = None,
               planted: float = 0.0) -> dict[str, object]:
    """12 subjects on 3 sites; sub-05 lacks its age, sub-99 lacks maps (invented data)."""
    rng = np.random.default_rng(seed)
    subjects = [f"{i:02d}" for i in range(1, n + 1)]
    table = pd.DataFrame({
        "participant_id": [f"sub-{s}" for s in subjects] + ["sub-99"],
        "site": list(np.repeat(["a", "b", "c"], n // 3)) + ["a"],
        "age": list(rng.uniform(20, 60, n)) + [30.0],
        "group": list(np.tile(["ctl", "pat"], n // 2)) + ["ctl"],
    })
    table.loc[4, "age"] = np.nan
    write_tsv(root / "participants.tsv", table)
    mask = np.zeros(SHAPE, dtype=bool)
    mask[1:5, 1:5, 1:4] = True
    effects, variances = [], []
    for k, subject in enumerate(subjects):
        shape = (7, 6, 5) if subject == bad_grid else SHAPE
        e = np.full(shape, np.nan)
        e[:SHAPE[0], :, :][mask] = (0.3 + planted + 0.02 * (table.loc[k, "age"] if k != 4 else 40.0)
                                    + {"a": 0.0, "b": 0.5, "c": -0.3}[table.loc[k, "site"]]
                                    + rng.normal(0, 0.5, mask.sum()))
        if subject == "03":
            e[1, 1, 1] = np.nan  # one subject misses one voxel
        v = np.where(np.isfinite(e), rng.uniform(0.05, 0.3, shape), np.nan)
        paths = []
        for stat, data in (("effect", e), ("variance", v)):
            path = root / f"sub-{subject}" / "combined" / "contrast-faces" / f"{stat}.nii.gz"
            save_nifti(path, data, AFFINE)
            write_json(path.with_name(f"{stat}.json"), {"map": {
                "level": "subject", "subject": subject, "session": None, "task": "demo", "run": None,
                "contrast": "faces", "stat": stat}})
            paths.append(str(path))
        effects.append(paths[0])
        variances.append(paths[1])
    return {"effect": effects, "variance": variances, "participants": str(root / "participants.tsv")}


def outputs_in(folder: Path) -> dict[str, str]:
    out = {k: str(folder / f"{k}.nii.gz") for k in OUTPUTS}
    out["site_qc"] = str(folder / "site_qc.json")
    out["site_figure"] = str(folder / "sites.png")
    return out


def model(**changes: object) -> dict[str, object]:
    params: dict[str, object] = {"design": "regression", "group_column": None, "pair_column": None,
                                 "covariates": ["age"], "site_column": "site", "site_as_covariate": True,
                                 "estimation": "ols", "harmonise_sites": False, "mask_fraction": 1.0,
                                 "contrast": {"name": "age_effect", "weights": {"age": 1}}}
    params.update(changes)
    return params


WILDCARDS = {"model": "ages", "contrast": "faces", "group_contrast": "age_effect"}


def load(path: str) -> np.ndarray:
    return np.asarray(nib.load(path).dataobj, dtype=np.float64)


def test_group_job_matches_statsmodels_and_records_exclusions(tmp_path: Path) -> None:
    inputs = make_study(tmp_path)
    out = outputs_in(tmp_path / "group")
    group_job.run(inputs, out, model(mask_fraction=0.9), WILDCARDS)
    t_map, effect_map = load(out["t"]), load(out["effect"])
    table = read_tsv(inputs["participants"]).iloc[:12].drop(index=4)
    effects = np.stack([load(p) for i, p in enumerate(inputs["effect"]) if i != 4])
    for voxel in [(1, 1, 1), (2, 3, 2), (4, 4, 3)]:
        frame = table.assign(y=effects[(slice(None), *voxel)]).dropna(subset=["y"])
        # reference: statsmodels OLS formula on the subjects present at the voxel
        res = smf.ols("y ~ age + C(site)", data=frame).fit()
        assert t_map[voxel] == pytest.approx(res.tvalues["age"], rel=1e-4)
        assert effect_map[voxel] == pytest.approx(res.params["age"], rel=1e-4)
    assert np.isnan(t_map[0, 0, 0])
    side = json.loads((tmp_path / "group" / "t.json").read_text())
    assert side["map"] == {"level": "group", "subject": None, "session": None, "task": "demo", "run": None,
                           "contrast": "faces.age_effect", "stat": "t"}
    reasons = {e["subject"]: e["reason"] for e in side["group"]["excluded_subjects"]}
    assert set(reasons) == {"05", "99"} and "age" in reasons["05"]
    assert any("sub-99" in w for w in side["warnings"])
    assert side["group"]["design_columns"] == ["mean", "age", "site[b]", "site[c]"]
    assert side["group"]["dof_min"] == 6 and side["group"]["dof_max"] == 7
    qc = json.loads(Path(out["site_qc"]).read_text())
    assert [r["n_subjects"] for r in qc["sites"]["as_entered"]] == [4, 3, 4]  # sub-05 (site b) lacks its age
    assert Path(out["site_figure"]).stat().st_size > 0
    # p and z agree with each other (one-sided upper tail)
    p_map, z_map = load(out["p"]), load(out["z"])
    from scipy import stats  # reference: scipy.stats.norm
    np.testing.assert_allclose(stats.norm.sf(z_map[1:5, 1:5, 1:4]), p_map[1:5, 1:5, 1:4], rtol=1e-4)


def test_group_job_mixed_harmonised(tmp_path: Path) -> None:
    inputs = make_study(tmp_path)
    out = outputs_in(tmp_path / "g")
    params = model(estimation="mixed_reml", harmonise_sites=True, design="one_sample", covariates=[],
                   contrast={"name": "mean", "weights": {"mean": 1}})
    group_job.run(inputs, out, params, {**WILDCARDS, "group_contrast": "mean"})
    side = json.loads((tmp_path / "g" / "effect.json").read_text())
    assert side["group"]["site_harmonisation"].startswith("empirical-Bayes site harmonisation")
    assert side["group"]["estimation"] == "mixed_reml" and side["group"]["dof_min"] == 9  # 12 subjects - mean - 2 site columns
    qc = json.loads(Path(out["site_qc"]).read_text())
    after = [r["mean_effect"] for r in qc["sites"]["harmonised"]]
    before = [r["mean_effect"] for r in qc["sites"]["as_entered"]]
    assert np.ptp(after) < 0.5 * np.ptp(before)  # planted site shifts 0.8 apart are mostly removed
    # voxel (1, 1, 1) misses one subject: harmonisation needs complete data, so it is outside the mask
    assert np.isnan(load(out["t"])[1, 1, 1]) and np.isfinite(load(out["t"])[2, 2, 2])


def test_grid_mismatch_is_a_group_error_and_writes_nothing(tmp_path: Path) -> None:
    inputs = make_study(tmp_path, bad_grid="07")
    with pytest.raises(GroupError, match=r"different grids.*'07'"):
        group_job.run(inputs, outputs_in(tmp_path / "none"), model(), WILDCARDS)
    assert not (tmp_path / "none").exists()
    with pytest.raises(GroupError, match="not in the group design"):
        group_job.run(make_study(tmp_path / "s2"), outputs_in(tmp_path / "none"),
                      model(contrast={"name": "age_effect", "weights": {"height": 1}}), WILDCARDS)
    assert not (tmp_path / "none").exists()


def test_permutation_job_outputs(tmp_path: Path) -> None:
    inputs = make_study(tmp_path, planted=1.5)
    folder = tmp_path / "perm"
    out = {"p_fwe": str(folder / "p_fwe.nii.gz"), "p_fwe_cluster": str(folder / "p_fwe_cluster.nii.gz"),
           "clusters": str(folder / "clusters.tsv"), "p_fwe_tfce": str(folder / "p_fwe_tfce.nii.gz")}
    params = model(design="one_sample", covariates=[], contrast={"name": "mean", "weights": {"mean": 1}},
                   permutation={"n_permutations": 40, "seed": 1, "cluster_forming_p": 0.01, "tfce": False})
    perm_job.run(inputs, out, params, {**WILDCARDS, "group_contrast": "mean"})
    p = load(out["p_fwe"])
    inside = np.isfinite(p)
    assert inside.sum() == 4 * 4 * 3 - 1  # the voxel sub-03 lacks is not tested
    assert p[inside].min() == pytest.approx(1 / 40) and np.all(p[inside] >= 1 / 40)
    assert np.all(np.isnan(load(out["p_fwe_tfce"])))
    assert "all NaN" in json.loads((folder / "p_fwe_tfce.json").read_text())["note"]
    clusters = read_tsv(out["clusters"])
    assert list(clusters.columns) == list(perm_job.CLUSTER_COLUMNS)
    assert clusters.loc[0, "n_voxels"] == 47 and clusters.loc[0, "p_fwe_extent"] == pytest.approx(1 / 40)
    side = json.loads((folder / "p_fwe.json").read_text())
    assert side["permutation"]["method"] == "sign_flip" and side["map"]["stat"] == "p_fwe"
    cluster_p = load(out["p_fwe_cluster"])
    assert np.nanmax(cluster_p) <= 1.0 and cluster_p[2, 2, 2] == pytest.approx(1 / 40)


def test_permutation_job_two_sample_with_tfce(tmp_path: Path) -> None:
    inputs = make_study(tmp_path)
    folder = tmp_path / "perm2"
    out = {"p_fwe": str(folder / "p_fwe.nii.gz"), "p_fwe_cluster": str(folder / "p_fwe_cluster.nii.gz"),
           "clusters": str(folder / "clusters.tsv"), "p_fwe_tfce": str(folder / "p_fwe_tfce.nii.gz")}
    params = model(design="two_sample", group_column="group", covariates=["age"],
                   contrast={"name": "pat_gt_ctl", "weights": {"group[pat]": 1, "group[ctl]": -1}},
                   permutation={"n_permutations": 30, "seed": 2, "cluster_forming_z": 2.3, "tfce": True})
    perm_job.run(inputs, out, params, {**WILDCARDS, "group_contrast": "pat_gt_ctl"})
    tfce_p = load(out["p_fwe_tfce"])
    assert np.nanmin(tfce_p) >= 1 / 30 and np.isfinite(tfce_p).sum() == 47
    assert json.loads((folder / "clusters.json").read_text())["permutation"]["method"] == "permute"
    with pytest.raises(GroupError, match="n_permutations"):
        perm_job.run(inputs, out, {**params, "permutation": {"n_permutations": 1, "seed": 0}}, WILDCARDS)


@pytest.mark.parametrize("t, dof", [(0.7, 5.0), (-2.0, 12.0), (9.0, 20.0), (60.0, 8.0), (1e30, 20.0), (-1e30, 3.0)])
def test_t_to_p_z_far_tail_against_mpmath(t: float, dof: float) -> None:
    p, z = group_job.t_to_p_z(np.array([t]), np.array([dof]))
    mpmath.mp.dps = 60
    # reference: mpmath, P(T >= t) = I_{d/(d+t^2)}(d/2, 1/2) / 2 (Abramowitz & Stegun 26.7.1)
    x = mpmath.mpf(dof) / (dof + mpmath.mpf(t) ** 2)
    tail = mpmath.betainc(dof / 2, 0.5, 0, x, regularized=True) / 2
    upper = tail if t > 0 else 1 - tail
    log_tail = mpmath.log(tail)   # solve on the far side, then use the symmetry of z
    z_far = mpmath.findroot(lambda zz: mpmath.log(mpmath.erfc(zz / mpmath.sqrt(2)) / 2) - log_tail,
                            mpmath.sqrt(-2 * log_tail) + 0.1)
    z_ref = z_far if t > 0 else -z_far
    assert float(p[0]) == pytest.approx(float(upper), rel=1e-8, abs=1e-300)
    assert float(z[0]) == pytest.approx(float(z_ref), rel=1e-6)
