"""Report tables: tolerant cluster-table columns, rounding, site tables, contrast text; the file cache."""

from __future__ import annotations

import pandas as pd
import pytest

from glmsteps.report import tables
from glmsteps.report.cache import FileCache, cache_key

# the two cluster-table formats the workflow writes today (headers as in the files)
THRESHOLD_TABLE = pd.DataFrame({
    "cluster_id": [1, 2], "size_voxels": [153, 1], "volume_mm3": [9792.0, 64.0],
    "peak_stat": [6.7057204246521, 3.008234739303589], "peak_x_mm": [-22.0, 6.0], "peak_y_mm": [-18.04, -10.0],
    "peak_z_mm": [26.0, -18.0], "centre_x_mm": [-23.2, 6.0], "centre_y_mm": [-17.1, -10.0],
    "centre_z_mm": [22.2, -18.0]})
PERMUTATION_TABLE = pd.DataFrame({
    "cluster": [1, 2], "n_voxels": [152, 1], "mass": [2462.0, 5.36], "peak_t": [39.758, 5.3556],
    "peak_i": [6, 14], "peak_j": [11, 10], "peak_k": [15, 11], "peak_x_mm": [-22.0, 10.0],
    "peak_y_mm": [-18.0, -22.0], "peak_z_mm": [26.0, 10.0], "p_fwe_extent": [0.002, 0.82],
    "p_fwe_mass": [0.002, 0.552]})


def test_threshold_cluster_table_columns_and_rounding():
    t = tables.cluster_table(THRESHOLD_TABLE, "clusters")
    assert t.columns == ("cluster", "peak x (mm)", "peak y (mm)", "peak z (mm)", "size (voxels)", "volume (mm\u00b3)",
                         "peak statistic")
    # 0.1 mm for coordinates, 3 significant digits for statistics (issue 21)
    assert t.rows[0] == ("1", "-22.0", "-18.0", "26.0", "153", "9792", "6.71")
    # the centre columns are not taken for the peak
    assert "centre" not in " ".join(t.columns)


def test_permutation_cluster_table_finds_fwe_p():
    t = tables.cluster_table(PERMUTATION_TABLE, "permutation clusters")
    assert "FWE p (extent)" in t.columns and "FWE p (mass)" in t.columns and "size (voxels)" in t.columns
    row = dict(zip(t.columns, t.rows[1]))
    assert row["FWE p (extent)"] == "0.820" and row["peak x (mm)"] == "10.0" and row["peak t"] == "5.36"


@pytest.mark.parametrize("renamed", [{"peak_x_mm": "x_mm", "peak_y_mm": "y_mm", "peak_z_mm": "z_mm"},
                                     {"size_voxels": "extent_voxels", "cluster_id": "cluster"},
                                     {"peak_stat": "peak_z"}])
def test_cluster_columns_found_under_other_names(renamed):
    t = tables.cluster_table(THRESHOLD_TABLE.rename(columns=renamed), "clusters")
    assert {"peak x (mm)", "size (voxels)", "cluster"} <= set(t.columns)
    assert any(c.startswith("peak ") and "mm" not in c for c in t.columns)


def test_empty_and_long_cluster_tables():
    empty = tables.cluster_table(THRESHOLD_TABLE.iloc[:0], "clusters")
    assert empty.rows == () and "no cluster" in empty.caption
    long = pd.concat([THRESHOLD_TABLE] * 20, ignore_index=True)
    t = tables.cluster_table(long, "clusters", max_rows=25)
    assert len(t.rows) == 25 and "15 smaller" in t.caption


def test_number_formatting():
    assert tables.format_number(0.00012345) == "0.000123"
    assert tables.format_number(1.5e-7) == "1.50e-07"
    assert tables.format_number(None) == "n/a"
    assert tables.format_mm("n/a") == "n/a"
    assert tables.format_int(3.0) == "3"


def test_site_table_before_and_after():
    sites = {"as_entered": [{"site": "north", "n": 4, "mean": 0.51234}, {"site": "south", "n": 4, "mean": 0.3}],
             "harmonised": [{"site": "north", "n": 4, "mean": 0.4}, {"site": "south", "n": 4, "mean": 0.41}]}
    t = tables.site_table(sites)
    assert t is not None and t.columns == ("data", "site", "n", "mean")
    assert t.rows[0] == ("as entered", "north", "4", "0.512")
    assert t.rows[-1][0] == "after harmonisation"
    assert "harmonisation" in t.caption
    assert tables.site_table({}) is None


def test_weights_text():
    assert tables.weights_text({"weights": {"tap": 1, "flash": -1}}) == "tap - flash"
    assert tables.weights_text({"weights": {"tap": 2, "flash": -0.5}}) == "2 tap - 0.5 flash"
    assert tables.weights_text({"weights": {"tap": -1}}) == "-tap"


# ---------------------------------------------------------------- the file cache
def test_cache_draws_once_and_prunes(tmp_path):
    draws = []

    def draw(path):
        draws.append(path.name)
        path.write_bytes(b"png")

    cache = FileCache(tmp_path / "figures")
    key = cache_key("mosaic", {"lineage": "aa"})
    cache.figure(f"m-{key}.png", draw)
    cache.figure(f"m-{key}.png", draw)
    assert len(draws) == 1 and cache.drawn == [f"m-{key}.png"] and cache.reused == [f"m-{key}.png"]
    # a new run: the same figure is reused, an old one no page uses is removed
    (tmp_path / "figures" / "stale.png").write_bytes(b"old")
    again = FileCache(tmp_path / "figures")
    again.figure(f"m-{key}.png", draw)
    assert len(draws) == 1
    assert again.prune() == ["stale.png"]
    assert (tmp_path / "figures" / f"m-{key}.png").is_file()


def test_cache_keys_follow_content():
    assert cache_key("mosaic", {"a": 1, "b": 2}) == cache_key("mosaic", {"b": 2, "a": 1})
    assert cache_key("mosaic", {"a": 1}) != cache_key("qc", {"a": 1})


def test_cache_copy_and_text(tmp_path):
    src = tmp_path / "design.png"
    src.write_bytes(b"\x89PNG...")
    cache = FileCache(tmp_path / "c")
    copied = cache.copy("design-1.png", src)
    assert copied.read_bytes() == src.read_bytes() and cache.copied == ["design-1.png"]
    path, text = cache.text("a.txt", lambda: "chain")
    path2, text2 = cache.text("a.txt", lambda: "other")
    assert text == text2 == "chain" and path == path2
    meta_calls = []

    def draw(p):
        meta_calls.append(1)
        p.write_bytes(b"x")
        return {"vmin": 3.1}

    _, meta = cache.figure_with_meta("m.png", draw)
    _, meta2 = cache.figure_with_meta("m.png", draw)
    assert meta == meta2 == {"vmin": 3.1} and len(meta_calls) == 1
