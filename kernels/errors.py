"""Errors raised by the kernels' argument checks.

The kernels import nothing from the package above them, so their checks raise
these classes; the orchestration layer's own input and configuration errors
subclass them, and the command line turns either into one line and exit
status 2.
"""

from __future__ import annotations


class KernelError(ValueError):
    """Base class of the kernels' argument errors."""


class KernelInputError(KernelError):
    """An array handed to a kernel has the wrong shape, dtype or contents."""


class KernelConfigError(KernelError):
    """A kernel setting (sizes, counts, tolerances) is out of range."""
