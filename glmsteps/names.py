"""Design column, basis and config names, in one place (standard library only: cheap for the workflow start).

Column conventions (DEVELOPERS.md): a condition's main column is named as the
condition; its other response columns are ``<condition>__latency`` (a shift of
the response in time), ``<condition>__width`` (a wider or narrower response)
and ``<condition>__fir<kk>``; parametric modulators ``<condition>__x_<column>``;
the slow-signal (drift) basis ``slow_<kk>``; confounds keep their names, their
expansions add ``_diff`` / ``_sq``; censoring columns ``spike_<vvvv>``; one
``intercept``. In an F contrast row, ``<condition>__all`` stands for every
response column of the condition.
"""

import re

#: Basis label (and column suffix after ``__``) of the latency column: the temporal derivative.
LATENCY_BASIS = "latency"
#: Basis label (and column suffix after ``__``) of the width column: the dispersion derivative.
WIDTH_BASIS = "width"
#: Prefix of the FIR basis labels (``fir00``, ``fir01``, ...).
FIR_PREFIX = "fir"
#: Separator between a condition and its column's basis (``tap__latency``).
BASIS_SEPARATOR = "__"
#: Infix of a parametric modulator column (``tap__x_rating``).
MODULATOR_INFIX = "__x_"
#: Prefix of the slow-signal (drift) columns: ``slow_01``, ``slow_02``, ...
SLOW_PREFIX = "slow_"
#: Prefix of the one-hot censoring columns (``spike_0046``).
SPIKE_PREFIX = "spike_"
#: Suffixes of the expanded confound columns.
DIFF_SUFFIX = "_diff"
SQUARE_SUFFIX = "_sq"
#: The column of ones.
INTERCEPT = "intercept"
#: F contrast key suffix selecting every response column of a condition.
ALL_SUFFIX = "__all"


#: Characters a contrast, threshold, group model or group contrast name may hold: each becomes a
#: folder name (``contrast-<name>``, ...) and a Snakemake wildcard value.
_FOLDER_NAME = re.compile(r"[A-Za-z0-9][A-Za-z0-9_]*")


def is_folder_name(name: object) -> bool:
    """Whether a config name can be a folder name: a string of letters, digits and underscores
    starting with a letter or digit (YAML may make a key a number, which is not)."""
    return isinstance(name, str) and _FOLDER_NAME.fullmatch(name) is not None
