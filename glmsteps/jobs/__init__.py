"""Step entry points: one module per workflow step, named as its rule and as the step in sidecars.

``validate_events``, ``select_confounds``, ``build_design``, ``fit``, ``combine_runs``
(rules ``combine_runs`` and ``combine_runs_f``), ``group_model``, ``group_permutation``,
``index``, ``report``; ``contrast`` serves the rules ``contrast_t`` and ``contrast_f``,
``threshold`` the rules ``threshold_run``, ``threshold_subject`` and ``threshold_group``.

Each module exposes one function ``run(inputs, outputs, params, wildcards,
threads)`` that reads its inputs, calls the pure numerical modules, and
writes its outputs atomically with provenance sidecars. The Snakemake scripts
in ``scripts/`` only forward ``snakemake.input`` etc. to these functions via
:func:`glmsteps.jobs.common.run_script`.
"""
