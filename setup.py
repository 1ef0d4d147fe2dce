"""Build hook: the wheel carries the workflow as ``glmsteps/_workflow/``.

The Snakefile, ``rules/``, ``scripts/``, ``config/`` and ``profiles/`` stay at the top of the
clone, where a Snakemake user looks for them (and where an editable install uses them). A
wheel gets a copy of them inside the package, so that ``glmsteps run`` finds the workflow
after a plain ``pip install`` as well (``glmsteps/runner.py: workflow_dir``). Everything
else about the package is in pyproject.toml.
"""

import shutil
from pathlib import Path

from setuptools import setup
from setuptools.command.build_py import build_py

HERE = Path(__file__).resolve().parent
#: The workflow's parts, as glmsteps.runner.WORKFLOW_PARTS (tests/test_runner.py compares them).
WORKFLOW_PARTS = ("Snakefile", "rules", "scripts", "config", "profiles")
PACKAGED_WORKFLOW = Path("glmsteps") / "_workflow"
_NOT_SHIPPED = shutil.ignore_patterns("__pycache__", "*.pyc", ".snakemake")


class BuildWithWorkflow(build_py):
    """``build_py`` that also copies the workflow's files below the built package."""

    def run(self) -> None:
        super().run()
        if getattr(self, "editable_mode", False):
            return  # an editable install runs the clone's own top-level files
        dest = Path(self.build_lib) / PACKAGED_WORKFLOW
        if dest.exists():
            shutil.rmtree(dest)
        dest.mkdir(parents=True)
        for part in WORKFLOW_PARTS:
            source = HERE / part
            if source.is_dir():
                shutil.copytree(source, dest / part, ignore=_NOT_SHIPPED)
            else:
                shutil.copy2(source, dest / part)


setup(cmdclass={"build_py": BuildWithWorkflow})
