"""Snakemake adapter: forward the rule's input/output/params to glmsteps.jobs.design_contrasts.run."""

from glmsteps.jobs.common import run_script
from glmsteps.jobs.design_contrasts import run

run_script(run, snakemake)  # noqa: F821 (injected by Snakemake)
