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
    from glmsteps.jobs.design import read_confounds

    write_tsv(tmp_path / "c.tsv", pd.DataFrame(index=range(7)))
    assert read_confounds(tmp_path / "c.tsv", 7).shape == (7, 0)
