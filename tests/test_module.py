"""Reuse as a Snakemake module (issue 7): a user's own Snakefile imports our rules.

The user's workflow runs two subjects of the toy study from another folder; its maps must
have the same lineage hashes as the main run's (hashes do not depend on absolute paths).
"""

from __future__ import annotations

import os
import subprocess
import sys

import pytest
import yaml

from glmsteps.fileio import read_json
from glmsteps.provenance import sidecar_path
from workflow_helpers import REPO, default_config

pytestmark = [pytest.mark.workflow, pytest.mark.slow]

USER_SNAKEFILE = """\
configfile: "my_config.yaml"


module glm:
    snakefile:
        "{snakefile}"
    config:
        config


use rule * from glm as glm_*


rule all:
    input:
        rules.glm_all.input,
    default_target: True
"""


def test_user_snakefile_imports_the_rules(tmp_path, toy_data, toy_results):
    user = tmp_path / "someone" / "else"
    user.mkdir(parents=True)
    (user / "Snakefile").write_text(USER_SNAKEFILE.format(snakefile=REPO / "Snakefile"))
    config = default_config()
    config["inputs"]["root"] = str(toy_data)
    config["inputs"]["subjects"] = ["01", "05"]
    config["group_models"] = {}
    config["output_dir"] = "glm_out"
    (user / "my_config.yaml").write_text(yaml.safe_dump(config))
    env = dict(os.environ, PYTHONPATH=str(REPO) + os.pathsep + os.environ.get("PYTHONPATH", ""))
    proc = subprocess.run([sys.executable, "-m", "snakemake", "--cores", "2"], cwd=user, env=env,
                          capture_output=True, text=True, timeout=1800)
    assert proc.returncode == 0, proc.stderr[-4000:]
    assert "glm_fit" in proc.stderr + proc.stdout
    for rel in ["sub-01/task-beacon_run-1/contrast-tap/z.nii.gz", "sub-05/combined/contrast-horn/z.nii.gz",
                "sub-05/task-beacon_run-2/fit.h5"]:
        mine = read_json(sidecar_path(user / "glm_out" / rel))
        theirs = read_json(sidecar_path(toy_results.results / rel))
        assert mine["lineage_hash"] == theirs["lineage_hash"], rel
        assert mine["params_hash"] == theirs["params_hash"], rel
