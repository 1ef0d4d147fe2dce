"""Shared fixtures: the toy dataset and one full workflow run, made once per session."""

from __future__ import annotations

from pathlib import Path

import pytest

from glmsteps.toystudy import write_toy_study
from workflow_helpers import Workspace, make_workspace


@pytest.fixture(scope="session")
def toy_data(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """The invented toy study, written once (fixed seed)."""
    return write_toy_study(tmp_path_factory.mktemp("toy") / "data")


@pytest.fixture(scope="session")
def toy_results(tmp_path_factory: pytest.TempPathFactory, toy_data: Path) -> Workspace:
    """The whole workflow run once on the toy study with the default config."""
    ws = make_workspace(tmp_path_factory.mktemp("work"), toy_data)
    ws.snakemake("--cores", "2")
    return ws
