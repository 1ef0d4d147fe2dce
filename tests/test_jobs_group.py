"""Tests of the group jobs (parametric and permutation) on a small invented study."""

from __future__ import annotations

import json
from pathlib import Path

import mpmath
import nibabel as nib
import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm
import statsmodels.formula.api as smf
from scipy import stats
from snakemake.utils import validate

from glmsteps import clusters, groupdata
from glmsteps.errors import GroupError
from glmsteps.fileio import read_tsv, save_nifti, write_json, write_tsv
from glmsteps.harmonise import harmonise_site_effects
from glmsteps.jobs import group_model as group_job
from glmsteps.jobs import group_permutation as perm_job
from glmsteps.jobs import threshold as threshold_job

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
    # p is two-sided by default and z carries the one-sided tail probability of t
    p_map, z_map = load(out["p"]), load(out["z"])
    # reference: scipy.stats.norm (two-sided p of z) and scipy.stats.t (two-sided p of t on its dof)
    np.testing.assert_allclose(2 * stats.norm.sf(np.abs(z_map[1:5, 1:5, 1:4])), p_map[1:5, 1:5, 1:4], rtol=1e-4)
    dof = np.where(np.isnan(load(inputs["effect"][2])), 6, 7)
    np.testing.assert_allclose(2 * stats.t.sf(np.abs(t_map), dof)[1:5, 1:5, 1:4], p_map[1:5, 1:5, 1:4], rtol=1e-4)
    assert side["tail"] == "two-sided" and side["kind"] == "t" and side["group"]["tail"] == "two-sided"


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
    table = read_tsv(out["clusters"])
    assert list(table.columns) == clusters.cluster_columns(clusters.DEFAULT_SUBPEAKS, clusters.PERMUTATION_COLUMNS)
    assert table.loc[0, "size_voxels"] == 47 and table.loc[0, "p_fwe_extent"] == pytest.approx(1 / 40)
    assert table.loc[0, "volume_mm3"] == pytest.approx(47 * 27.0) and table.loc[0, "peak_stat"] > 0
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
                   permutation={"n_permutations": 30, "seed": 2, "cluster_forming_p": 0.02, "tfce": True})
    perm_job.run(inputs, out, params, {**WILDCARDS, "group_contrast": "pat_gt_ctl"})
    tfce_p = load(out["p_fwe_tfce"])
    assert np.nanmin(tfce_p) >= 1 / 30 and np.isfinite(tfce_p).sum() == 47
    assert json.loads((folder / "clusters.json").read_text())["permutation"]["method"] == "permute"
    with pytest.raises(GroupError, match="n_permutations"):
        perm_job.run(inputs, out, {**params, "permutation": {"n_permutations": 1, "seed": 0}}, WILDCARDS)


# --------------------------------------------------------------------------- tails, exclusions, harmonisation

BLOB = (slice(2, 4), slice(2, 4), slice(1, 3))     # 8 voxels


def write_maps(root: Path, effects: np.ndarray, variances: np.ndarray, sites: list[str],
               extra_sidecar: dict[str, dict] | None = None) -> dict[str, object]:
    """Subject maps (n, *SHAPE) with sidecars and a participants table (invented data)."""
    subjects = [f"{i:02d}" for i in range(1, effects.shape[0] + 1)]
    write_tsv(root / "participants.tsv", pd.DataFrame({"participant_id": [f"sub-{s}" for s in subjects],
                                                       "site": sites}))
    out: dict[str, list[str]] = {"effect": [], "variance": []}
    for k, subject in enumerate(subjects):
        for stat, data in (("effect", effects[k]), ("variance", variances[k])):
            path = root / f"sub-{subject}" / "combined" / "contrast-faces" / f"{stat}.nii.gz"
            save_nifti(path, data, AFFINE)
            side = {"map": {"level": "subject", "subject": subject, "session": None, "task": "demo", "run": None,
                            "contrast": "faces", "stat": stat}, **(extra_sidecar or {}).get(subject, {})}
            write_json(path.with_name(f"{stat}.json"), side)
            out[stat].append(str(path))
    return {**out, "participants": str(root / "participants.tsv")}


def blob_study(root: Path, amplitude: float, n: int = 12, seed: int = 3) -> dict[str, object]:
    rng = np.random.default_rng(seed)
    mask = np.zeros(SHAPE, dtype=bool)
    mask[1:5, 1:5, 0:4] = True
    effects = np.where(mask, rng.normal(0, 1.0, size=(n, *SHAPE)), np.nan)
    effects[(slice(None), *BLOB)] += amplitude
    variances = np.where(mask, rng.uniform(0.05, 0.2, size=(n, *SHAPE)), np.nan)
    return write_maps(root, effects, variances, list(np.repeat(["a", "b"], n // 2)))


def one_sample(**changes: object) -> dict[str, object]:
    return model(design="one_sample", covariates=[], site_as_covariate=False,
                 contrast={"name": "mean", "weights": {"mean": 1}}, **changes)


def threshold_outputs(folder: Path) -> dict[str, str]:
    return {"thresholded": str(folder / "thresholded.nii.gz"), "mask": str(folder / "mask.nii.gz"),
            "clusters": str(folder / "clusters.tsv"), "figure": str(folder / "slices.png")}


def perm_outputs(folder: Path) -> dict[str, str]:
    return {k: str(folder / f"{k}.nii.gz") for k in ("p_fwe", "p_fwe_cluster", "p_fwe_tfce")} | {
        "clusters": str(folder / "permutation_clusters.tsv")}


def test_planted_negative_group_effect_survives_fdr_and_permutation_fwe(tmp_path: Path) -> None:
    inputs = blob_study(tmp_path, amplitude=-2.5)
    wildcards = {**WILDCARDS, "group_contrast": "mean"}
    group = tmp_path / "group"
    group_job.run(inputs, outputs_in(group), one_sample(), wildcards)
    assert np.all(load(str(group / "t.nii.gz"))[BLOB] < 0)
    underlay = tmp_path / "underlay.nii.gz"
    save_nifti(underlay, np.ones(SHAPE), AFFINE)
    kept = {}
    for tail in ("two-sided", "negative", "positive"):
        folder = tmp_path / f"threshold-{tail}"
        threshold_job.run({"z": str(group / "z.nii.gz"), "p": str(group / "p.nii.gz"), "underlay": str(underlay)},
                          threshold_outputs(folder), {"name": "q", "method": "fdr", "q": 0.05, "tail": tail},
                          {"threshold": "q"})
        kept[tail] = np.asarray(nib.load(folder / "mask.nii.gz").dataobj).astype(bool)
    # the planted voxels survive FDR two-sided and negative, never positive (on main the group p map was
    # P(T > t), about 1 for these voxels, so nothing survived)
    assert kept["two-sided"][BLOB].all() and kept["negative"][BLOB].all()
    assert not kept["positive"][BLOB].any()
    side = json.loads((tmp_path / "threshold-positive" / "mask.json").read_text())
    assert "from z for the positive tail" in side["p_source"]
    p_fwe = {}
    for tail in ("two-sided", "negative", "positive"):
        folder = tmp_path / f"perm-{tail}"
        params = one_sample(tail=tail, permutation={"n_permutations": 200, "seed": 4, "cluster_forming_p": 0.01})
        perm_job.run(inputs, perm_outputs(folder), params, wildcards)
        p_fwe[tail] = load(str(folder / "p_fwe.nii.gz"))
    assert p_fwe["two-sided"][BLOB].max() <= 0.05 and p_fwe["negative"][BLOB].max() <= 0.05
    assert p_fwe["positive"][BLOB].min() > 0.5
    table = read_tsv(str(tmp_path / "perm-two-sided" / "permutation_clusters.tsv"))
    assert table.loc[0, "peak_stat"] < 0 and table.loc[0, "p_fwe_extent"] <= 0.05


def test_excluded_and_skipped_subjects_are_dropped_and_recorded(tmp_path: Path) -> None:
    inputs = make_study(tmp_path)
    flags = {"07": {"excluded": True, "reason": "every run excluded upstream (too many censored volumes)"},
             "08": {"skipped": True, "reason": "contrast not estimable in any run"}}
    for path in [*inputs["effect"], *inputs["variance"]]:
        side = Path(path).with_suffix("").with_suffix(".json")
        record = json.loads(side.read_text())
        subject = record["map"]["subject"]
        if subject in flags:
            record.update(flags[subject])
            write_json(side, record)
            save_nifti(path, np.full(SHAPE, np.nan), AFFINE)     # the subject level writes all-NaN maps
    out = outputs_in(tmp_path / "g")
    group_job.run(inputs, out, model(mask_fraction=0.9), WILDCARDS)
    side = json.loads((tmp_path / "g" / "t.json").read_text())
    reasons = {e["subject"]: e["reason"] for e in side["group"]["excluded_subjects"]}
    assert set(reasons) == {"05", "07", "08", "99"}
    assert "excluded" in reasons["07"] and "censored" in reasons["07"]
    assert "skipped" in reasons["08"] and "not estimable" in reasons["08"]
    assert side["group"]["n_subjects"] == 9 and "07" not in side["group"]["subjects"]
    qc = json.loads(Path(out["site_qc"]).read_text())
    assert qc["summary"]["n_subjects_excluded"] == 4 and qc["summary"]["n_subjects_kept"] == 9
    assert {e["subject"] for e in qc["summary"]["excluded_subjects"]} == set(reasons)
    assert np.isfinite(load(out["t"])[2, 2, 2])
    folder = tmp_path / "perm"
    perm_job.run(inputs, perm_outputs(folder), model(permutation={"n_permutations": 20, "seed": 0}), WILDCARDS)
    assert json.loads((folder / "p_fwe.json").read_text())["group"]["n_excluded"] == 4


def test_no_subject_left_is_a_group_error(tmp_path: Path) -> None:
    inputs = make_study(tmp_path, n=6)
    for path in [*inputs["effect"], *inputs["variance"]]:
        side = Path(path).with_suffix("").with_suffix(".json")
        write_json(side, {**json.loads(side.read_text()), "excluded": True, "reason": "all runs censored"})
    with pytest.raises(GroupError, match="no subject is left.*all runs censored"):
        group_job.run(inputs, outputs_in(tmp_path / "g"), one_sample(), {**WILDCARDS, "group_contrast": "mean"})
    assert not (tmp_path / "g").exists()


def test_harmonised_mixed_job_matches_statsmodels_wls(tmp_path: Path) -> None:
    from statsmodels.stats.meta_analysis import combine_effects

    rng = np.random.default_rng(8)
    n, gain = 12, 1.7
    sites = list(np.repeat(["a", "b"], n // 2))
    scale = np.where(np.array(sites) == "b", gain, 1.0)[:, None, None, None]      # site b's scanner: 1.7x gain
    mask = np.zeros(SHAPE, dtype=bool)
    mask[1:5, 1:5, 0:4] = True
    v_true = rng.uniform(0.05, 0.3, size=(n, *SHAPE))
    effects = np.where(mask, scale * (0.4 + rng.normal(0, 0.4, (n, *SHAPE)) + rng.normal(size=v_true.shape)
                                      * np.sqrt(v_true)), np.nan)
    variances = np.where(mask, scale**2 * v_true, np.nan)
    inputs = write_maps(tmp_path, effects, variances, sites)
    out = outputs_in(tmp_path / "g")
    group_job.run(inputs, out, one_sample(estimation="mixed_dl", harmonise_sites=True),
                  {**WILDCARDS, "group_contrast": "mean"})
    # reference: harmonise the effects as stored (float32), take each site's affine slope from two of its
    # subjects, rescale the variances by its square; then statsmodels 0.15 combine_effects for the
    # DerSimonian-Laird tau^2 (which it leaves negative: DerSimonian & Laird 1986, eq. 8 truncate it at 0)
    # and statsmodels WLS with weights 1/(V* + tau^2) and an estimated scale (the Hartung-Knapp variance)
    Y = np.stack([load(p)[mask] for p in inputs["effect"]])
    V = np.stack([load(p)[mask] for p in inputs["variance"]])
    harmonised = harmonise_site_effects(Y, sites).adjusted
    labels = np.array(sites)
    slope = np.empty_like(Y)
    for site in ("a", "b"):
        rows = np.flatnonzero(labels == site)
        slope[rows] = (harmonised[rows[0]] - harmonised[rows[1]]) / (Y[rows[0]] - Y[rows[1]])
    effect_map, variance_map = load(out["effect"])[mask], load(out["variance"])[mask]
    for v in range(0, Y.shape[1], 7):
        v_star = V[:, v] * slope[:, v] ** 2
        tau2 = max(0.0, combine_effects(harmonised[:, v], v_star, method_re="dl").tau2)
        wls = sm.WLS(harmonised[:, v], np.ones(n), weights=1.0 / (v_star + tau2)).fit()
        assert effect_map[v] == pytest.approx(wls.params[0], rel=1e-5)
        assert variance_map[v] == pytest.approx(wls.bse[0] ** 2, rel=1e-5)
    qc = json.loads(Path(out["site_qc"]).read_text())
    assert "rescaled" in qc["sites"]["variances"]


def test_reml_job_records_convergence(tmp_path: Path) -> None:
    inputs = make_study(tmp_path)
    out = outputs_in(tmp_path / "g")
    group_job.run(inputs, out, model(estimation="mixed_reml", mask_fraction=0.9), WILDCARDS)
    side = json.loads((tmp_path / "g" / "t.json").read_text())
    assert side["group"]["reml"]["voxels_not_converged"] == 0 and side["group"]["reml"]["not_converged_ijk"] == []
    assert "Hartung-Knapp" in side["group"]["inference"]


# --------------------------------------------------------------------------- settings vs the schema

SCHEMA = Path(__file__).resolve().parents[1] / "config" / "schema.yaml"


def _schema() -> dict:
    import yaml

    return yaml.safe_load(SCHEMA.read_text())


def _minimal_config(model_settings: dict) -> dict:
    return {"inputs": {"root": ".", "bold": "b", "events": "e", "confounds": "c", "mask": "m"},
            "contrasts": {"faces": {"weights": {"faces": 1}}},
            "group_models": {"m": {"design": "one_sample", "group_contrasts": {"mean": {"mean": 1}},
                                   **model_settings}}}


def test_error_and_warning_hints_name_settings_the_schema_accepts(tmp_path: Path) -> None:
    import re

    hints: list[str] = []
    inputs = make_study(tmp_path)
    no_site = make_study(tmp_path / "nosite")
    table = read_tsv(no_site["participants"]).drop(columns=["site"])
    write_tsv(no_site["participants"], table)
    group_job.run(no_site, outputs_in(tmp_path / "g1"), one_sample(), {**WILDCARDS, "group_contrast": "mean"})
    hints += json.loads((tmp_path / "g1" / "t.json").read_text())["warnings"]      # warnings, as recorded
    for params, data in (({**one_sample(), "site_as_covariate": True}, no_site),
                         (one_sample(harmonise_sites=True), no_site),
                         (one_sample(harmonise_sites=True, site_column=None), inputs)):
        with pytest.raises(GroupError) as info:
            group_job.run(data, outputs_in(tmp_path / "g2"), params, {**WILDCARDS, "group_contrast": "mean"})
        hints.append(str(info.value))
    confounded = make_study(tmp_path / "conf")
    table = read_tsv(confounded["participants"])
    table["site"] = np.where(table["group"] == "pat", "a", "b")
    write_tsv(confounded["participants"], table)
    with pytest.raises(GroupError) as info:
        group_job.run(confounded, outputs_in(tmp_path / "g3"),
                      model(design="two_sample", covariates=[], group_column="group",
                            contrast={"name": "d", "weights": {"group[pat]": 1, "group[ctl]": -1}}),
                      {**WILDCARDS, "group_contrast": "d"})
    hints.append(str(info.value))
    suggested = [m.groups() for h in hints for m in re.finditer(r"set (\w+): (null|true|false)", h)]
    assert {key for key, _ in suggested} == {"site_column", "harmonise_sites", "site_as_covariate"}
    for key, value in suggested:
        # reference: config/schema.yaml itself, through the validator the workflow uses (Snakemake's)
        validate(_minimal_config({key: {"null": None, "true": True, "false": False}[value]}), str(SCHEMA))


@pytest.mark.filterwarnings("ignore::glmsteps.errors.GlmstepsWarning")
def test_group_fit_does_not_depend_on_the_chunk_size(tmp_path: Path) -> None:
    inputs = make_study(tmp_path)
    data = groupdata.load_group_data(inputs, model(estimation="mixed_reml", mask_fraction=0.9), WILDCARDS)
    whole = groupdata.fit_group_chunks(data, chunk_voxels=10_000)
    for chunk in (5, 17):
        parts = groupdata.fit_group_chunks(data, chunk_voxels=chunk)
        # equal to rounding (vectorised sums run in another order) and to REML's tolerance (1e-10)
        for key in ("effect", "variance", "t", "dof", "between_variance"):
            np.testing.assert_allclose(getattr(parts, key), getattr(whole, key), rtol=1e-9, atol=1e-12)


def test_site_qc_keeps_its_sites_when_run_as_a_workflow_job(tmp_path: Path) -> None:
    """site_qc.png's sidecar name is site_qc.json itself: the site numbers must survive the job's sidecars."""
    from types import SimpleNamespace

    from glmsteps.jobs.common import run_script

    inputs = make_study(tmp_path)
    out = outputs_in(tmp_path / "g")
    out["site_figure"] = str(tmp_path / "g" / "site_qc.png")       # the workflow's names (rules/group.smk)
    run_script(group_job.run, SimpleNamespace(input=inputs, output=out, params=model(mask_fraction=0.9),
                                              wildcards=WILDCARDS, log=[], threads=1))
    qc = json.loads(Path(out["site_qc"]).read_text())
    assert [r["n_subjects"] for r in qc["sites"]["as_entered"]] == [4, 3, 4]
    assert "site_qc.png" in qc["provenance"]["output_sha256"]
