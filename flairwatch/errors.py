"""The one error hierarchy of flairwatch.

Every error carries a message a user can act on. The CLI maps them to exit codes
(input or stage problems: 1, config or usage: 2); the daemon records them per series.
"""

from __future__ import annotations


class FlairwatchError(Exception):
    """Base class: a problem flairwatch can explain in one line."""


class InputRejected(FlairwatchError):
    """An input file or series cannot be used (corrupt, incomplete, inconsistent geometry...)."""


class StageFailed(FlairwatchError):
    """A processing stage failed on input that was accepted (disk full, model error...)."""

    def __init__(self, message: str, *, transient: bool = False) -> None:
        super().__init__(message)
        self.transient = transient


class ModelInvalid(FlairwatchError):
    """The model file or its manifest is missing, corrupt, or they disagree."""


class ConfigInvalid(FlairwatchError):
    """A config key or command-line option has a bad value."""
