"""Error types raised by ranktide.

Every error a user can cause is a :class:`RanktideError`, a subclass of
:class:`ValueError`. Its message is one line that names the file, the row or
entry, what is wrong and what to do. The command line prints the message and
exits with status 2.
"""

from __future__ import annotations

from ranktide.kernels.errors import KernelConfigError, KernelError, KernelInputError

__all__ = [
    "CheckpointError", "ConfigError", "InputError", "KernelError", "ModelError",
    "OutputExistsError", "RanktideError", "StoreError",
]


class RanktideError(ValueError):
    """Base class of every user-facing ranktide error."""


class InputError(RanktideError, KernelInputError):
    """A source file (matrix, targets, weights) is malformed."""


class StoreError(RanktideError):
    """A path is not a store, is of a newer format, or is damaged."""


class ConfigError(RanktideError, KernelConfigError):
    """An option or setting is invalid or inconsistent."""


class ModelError(RanktideError):
    """A model directory is missing, malformed or does not match the data."""


class CheckpointError(RanktideError):
    """No usable checkpoint, or a checkpoint that does not match the run."""


class OutputExistsError(RanktideError, FileExistsError):
    """An output path exists and ``--overwrite`` was not given."""
