"""glmsteps: task-fMRI GLM analysis as a cached, auditable workflow.

The package is the numerical library behind the Snakemake rules in ``rules/``.
It never imports snakemake; every stage is a plain function over arrays and
tables, and file I/O lives in separate modules (see DEVELOPERS.md).
"""

__version__ = "0.1.0"
