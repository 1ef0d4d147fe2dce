"""The output folder is a BIDS derivative dataset: its ``dataset_description.json``.

Reference: the BIDS specification 1.9, "Derived dataset and pipeline description" (from
memory): ``Name`` and ``BIDSVersion`` are required, a derivative dataset has ``DatasetType``
``"derivative"`` and a required ``GeneratedBy`` list whose entries each have a ``Name``
(``Version`` recommended).
"""

from __future__ import annotations

import json
import re
from importlib.metadata import version
from pathlib import Path

import pytest

from glmsteps.jobs import index


def check_description(path: Path) -> None:
    description = json.loads(path.read_text(encoding="utf-8"))
    assert isinstance(description["Name"], str) and description["Name"]
    assert re.fullmatch(r"\d+\.\d+\.\d+", description["BIDSVersion"])
    assert description["DatasetType"] == "derivative"
    (generated,) = description["GeneratedBy"]
    # the version of the installed distribution's metadata, which packaging takes from glmsteps.__version__
    assert generated["Name"] == "glmsteps" and generated["Version"] == version("glmsteps")


def test_index_step_writes_the_description_atomically(tmp_path: Path) -> None:
    outputs = {"index": str(tmp_path / "index.tsv"), "description": str(tmp_path / "dataset_description.json")}
    index.run({"maps": []}, outputs, {}, {})
    check_description(tmp_path / "dataset_description.json")
    assert sorted(p.name for p in tmp_path.iterdir()) == ["dataset_description.json", "index.json", "index.tsv"]


def test_index_step_without_a_description_output_writes_none(tmp_path: Path) -> None:
    index.run({"maps": []}, {"index": str(tmp_path / "index.tsv")}, {}, {})
    assert not (tmp_path / "dataset_description.json").exists()


@pytest.mark.workflow
@pytest.mark.slow
def test_the_results_folder_is_a_derivative_dataset(toy_results) -> None:
    check_description(toy_results.results / "dataset_description.json")
