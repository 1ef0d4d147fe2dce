"""Atomic writes and table readers."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from glmsteps.fileio import atomic_path, read_numeric_tsv, read_tsv, split_extension, write_tsv


def test_numeric_tsv_reader_matches_pandas(tmp_path):
    rng = np.random.default_rng(0)
    table = pd.DataFrame(rng.normal(size=(30, 4)), columns=["tap", "drift_01", "spike_0007", "intercept"])
    table.iloc[3, 1] = np.nan
    write_tsv(tmp_path / "d.tsv", table)
    names, values = read_numeric_tsv(tmp_path / "d.tsv")
    reference = pd.read_csv(tmp_path / "d.tsv", sep="\t", na_values=["n/a"])  # reference: pandas read_csv
    assert names == list(reference.columns)
    np.testing.assert_array_equal(values, reference.to_numpy())


def test_numeric_tsv_reader_rejects_ragged_rows(tmp_path):
    (tmp_path / "d.tsv").write_text("a\tb\n1\t2\n3\n")
    with pytest.raises(ValueError, match="data row 2"):
        read_numeric_tsv(tmp_path / "d.tsv")


def test_empty_table_reads_as_empty(tmp_path):
    write_tsv(tmp_path / "e.tsv", pd.DataFrame(index=range(5)))
    assert read_tsv(tmp_path / "e.tsv").shape[1] == 0


def test_atomic_path_leaves_nothing_on_error(tmp_path):
    target = tmp_path / "out" / "z.nii.gz"
    with pytest.raises(RuntimeError):
        with atomic_path(target) as tmp:
            assert split_extension(tmp)[1] == ".nii.gz"
            tmp.write_bytes(b"partial")
            raise RuntimeError("interrupted")
    assert not target.exists() and list(target.parent.iterdir()) == []


def test_design_step_reads_a_confounds_table_without_columns(tmp_path):
    """No confound selected and no censoring: the design step still sees one row per volume."""
    from glmsteps.jobs.build_design import read_confounds

    write_tsv(tmp_path / "c.tsv", pd.DataFrame(index=range(7)))
    assert read_confounds(tmp_path / "c.tsv", 7).shape == (7, 0)


def test_statistical_maps_describe_themselves_in_their_nifti_header(tmp_path):
    """Issue 21: intent code and parameters, descrip, qform and sform, no time unit on 3D maps."""
    import nibabel as nib

    from glmsteps.maps import map_description, save_map, statistic_intent

    # an oblique, anisotropic affine (a rotation about z plus 2 x 2.5 x 3.2 mm voxels)
    c, s = np.cos(0.3), np.sin(0.3)
    affine = np.array([[2.0 * c, -2.5 * s, 0.0, -40.0], [2.0 * s, 2.5 * c, 0.0, -60.0],
                       [0.0, 0.0, 3.2, -20.0], [0.0, 0.0, 0.0, 1.0]])
    cases = {"t": ((53.0,), "t test"), "f": ((3.0, 53.0), "f test"), "z": ((), "z score"), "p": ((), "p value")}
    for stat, (parameters, code) in cases.items():
        path = tmp_path / f"{stat}.nii.gz"
        save_map(path, np.arange(4.0), np.array([0, 5, 9, 20]), (3, 4, 2), affine,
                 intent=statistic_intent(stat, 53.0, 3.0), description=map_description(stat, "tap", "run"))
        # reference: nibabel 5 reading the header back (NIfTI-1 intent codes of nifti1.h)
        img = nib.load(path)
        assert img.header.get_intent()[:2] == (code, parameters)
        assert img.header["descrip"].tobytes().rstrip(b"\0").decode() == map_description(stat, "tap", "run")
        assert int(img.header["qform_code"]) == 2 and int(img.header["sform_code"]) == 2
        np.testing.assert_allclose(img.header.get_sform(), affine)
        np.testing.assert_allclose(img.header.get_qform(), affine, atol=1e-5)   # no shear: qform exact
        assert img.header.get_xyzt_units() == ("mm", "unknown")
        data = np.asarray(img.dataobj)
        assert np.isnan(data.ravel()[[1, 2, 3]]).all() and data.ravel()[5] == 1.0   # NaN outside
    assert statistic_intent("f", 53.0, None).code == "none"   # an F map without its numerator dof: no intent
