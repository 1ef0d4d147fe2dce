"""Snakemake adapter: forward the rule's input/output/params to glmsteps.jobs.report.run."""

from glmsteps.jobs.common import run_script
from glmsteps.jobs.report import run

run_script(run, snakemake)  # noqa: F821 (injected by Snakemake)
