"""Exceptions and warnings a user can cause.

Every user-caused problem raises a subclass of :class:`GlmstepsError` whose
message is a single line: the file, the row or column, what was expected, what
was found, and how to fix it. Scripts print that line and exit non-zero; no
traceback is shown for these (see ``glmsteps.jobs.common.run_job``).
"""

from __future__ import annotations


class GlmstepsError(ValueError):
    """Base class of every user-caused error; the message is one line."""

    def __init__(self, message: str) -> None:
        # A user error must stay on one line so that logs and cluster job
        # reports show it whole.
        super().__init__(" ".join(str(message).split()))


class ConfigError(GlmstepsError):
    """The configuration is invalid or inconsistent."""


class EventsError(GlmstepsError):
    """An events file is malformed."""


class ConfoundsError(GlmstepsError):
    """A confounds table is malformed or a selection does not match it."""


class DesignError(GlmstepsError):
    """The design matrix cannot be built or is rank deficient."""


class DataError(GlmstepsError):
    """An image (BOLD, mask, map) is malformed or does not match the design or grid."""


class ContrastError(GlmstepsError):
    """A contrast is malformed or not estimable."""


class GroupError(GlmstepsError):
    """Group-level inputs (maps, participants table, group design) are inconsistent."""


class ProvenanceError(GlmstepsError):
    """A provenance sidecar is missing or malformed."""


class GlmstepsWarning(UserWarning):
    """A problem the user should know about; recorded in the step's sidecar."""
