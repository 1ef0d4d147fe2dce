"""Snakemake adapter: forward the rule's input/output/params to glmsteps.jobs.group_permutation.run."""

from glmsteps.jobs.common import run_script
from glmsteps.jobs.group_permutation import run

run_script(run, snakemake)  # noqa: F821 (injected by Snakemake)
