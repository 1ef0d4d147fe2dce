"""Shared fixtures: the toy dataset and one full workflow run, made once per session.

Set ``GLMSTEPS_KEEP_TOY_RUN=DIR`` to write the dataset and the workflow run below DIR
and keep them after the session (CI compares that local run with a SLURM run).
"""

from __future__ import annotations

import os
from pathlib import Path

import pytest

from glmsteps.toystudy import write_toy_study
from workflow_helpers import Workspace, make_workspace


def _kept_folder() -> Path | None:
    kept = os.environ.get("GLMSTEPS_KEEP_TOY_RUN")
    return Path(kept).resolve() if kept else None


@pytest.fixture(scope="session")
def toy_data(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """The invented toy study, written once (fixed seed)."""
    kept = _kept_folder()
    base = kept if kept else tmp_path_factory.mktemp("toy")
    return write_toy_study(base / "data")


@pytest.fixture(scope="session")
def toy_results(tmp_path_factory: pytest.TempPathFactory, toy_data: Path) -> Workspace:
    """The whole workflow run once on the toy study with the default config (--cores 2)."""
    kept = _kept_folder()
    ws = make_workspace(kept / "local" if kept else tmp_path_factory.mktemp("work"), toy_data)
    ws.snakemake("--cores", "2")
    return ws
