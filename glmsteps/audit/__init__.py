"""Audit and diff of provenance chains.

Every glmsteps output carries a provenance record (see :mod:`glmsteps.provenance`)
naming the step that made it, that step's settings and the content and lineage
hashes of the files it read. Following the records of those files backwards
gives the chain of steps from an output to the raw inputs.

This module holds

* pure functions over records and chains: :func:`build_chain` (records -> a
  dataclass tree, given a record loader), :func:`render_text`,
  :func:`chain_to_dict` / :func:`chain_from_dict`, :func:`verify_chain` (given
  a function returning a file's current sha256), :func:`diff_chains`,
  :func:`describe_params`;
* a small disk layer (:func:`find_root`, :func:`load_record_from_disk`,
  :func:`current_sha256`, :func:`load_chain`) used by ``glmsteps audit`` and
  ``glmsteps diff`` (:mod:`glmsteps.cli`).

Recorded input paths are relative to the folder the workflow ran in (the
Snakemake working folder) when they lay below it, absolute otherwise; the
disk layer resolves them against a *root* folder.

The package's modules, one per section: :mod:`.chain`, :mod:`.settings_text`,
:mod:`.render`, :mod:`.verify`, :mod:`.diff`, :mod:`.disk`; every name is re-exported here.
"""

from __future__ import annotations

from ..provenance import hash_file  # noqa: F401  (glmsteps.cli hashes the audited map through it)

from .chain import (  # noqa: F401
    Chain, CheckStatus, ContentHasher, FileNode, InputKind, NOT_SET, RecordLoader,
    SHORT_HASH_LENGTH, StepNode, _file_node, _require, _step_key, build_chain, iter_steps,
    raw_inputs, record_issues, short_hash,
)
from .settings_text import (  # noqa: F401
    _setting_order, describe_params, flatten_params, format_value, setting_label,
)
from .render import (  # noqa: F401
    StepSummary, _step_header, _step_to_dict, chain_from_dict, chain_to_dict, render_json,
    render_summary, render_text, summarise_steps,
)
from .verify import (  # noqa: F401
    Check, render_checks, verify_chain,
)
from .diff import (  # noqa: F401
    ChainDiff, InputDifference, SettingDifference, StructureDifference, _same_value, _where,
    diff_chains, diff_to_dict, render_diff_text,
)
from .disk import (  # noqa: F401
    _recorded_paths, current_sha256, find_root, load_chain, load_record_from_disk, resolve_recorded,
)
