"""Step entry points: one module per workflow step.

Each module exposes one function ``run(inputs, outputs, params, wildcards,
threads)`` that reads its inputs, calls the pure numerical modules, and
writes its outputs atomically with provenance sidecars. The Snakemake scripts
in ``scripts/`` only forward ``snakemake.input`` etc. to these functions via
:func:`glmsteps.jobs.common.run_script`.
"""
