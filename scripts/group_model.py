"""Snakemake adapter: forward the rule's input/output/params to glmsteps.jobs.group_model.run."""

from glmsteps.jobs.common import run_script
from glmsteps.jobs.group_model import run

run_script(run, snakemake)  # noqa: F821 (injected by Snakemake)
