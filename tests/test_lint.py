"""`snakemake --lint` on the workflow: only the finding we keep on purpose is left.

The one kept finding is "Specify a conda environment or container for each rule": the whole
workflow runs in the one environment that holds glmsteps (DEVELOPERS.md, Packaging the workflow).
"""

from __future__ import annotations

import re

import pytest

from workflow_helpers import make_workspace

KEPT = "Specify a conda environment or container for each rule."


@pytest.mark.slow
@pytest.mark.workflow
def test_lint_reports_only_the_kept_finding(tmp_path, toy_data):
    ws = make_workspace(tmp_path / "work", toy_data)
    proc = ws.snakemake("--lint", check=False)
    text = proc.stdout + proc.stderr
    findings = [m.group(1).strip() for m in re.finditer(r"^\s*\* (.+?):?$", text, flags=re.M)]
    rules = re.findall(r"^Lints for rule (\w+)", text, flags=re.M)
    assert findings, text[-3000:]                   # the linter ran and reported (the kept finding)
    assert set(findings) == {KEPT}, sorted(set(findings) - {KEPT})
    assert len(findings) == len(rules)              # one per rule, nothing else
    assert "Lints for snakefile" not in text, text[-3000:]
