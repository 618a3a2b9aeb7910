"""The one check of the trace-norm penalty setting, shared by the run and the solver."""

from __future__ import annotations

import math

from ranktide.errors import ConfigError

__all__ = ["check_lam"]


def check_lam(lam: float | None, lam_scale: float | None, where: str = "train") -> None:
    """The one check of the penalty: ``lam > 0`` finite, or ``lam_scale > 0`` finite.

    Raises
    ------
    ConfigError
        Naming the setting and what to give instead.
    """
    if lam is not None and not (isinstance(lam, (int, float)) and not isinstance(lam, bool)
                                and math.isfinite(lam) and lam > 0):
        raise ConfigError(f"{where}: lam = {lam!r}; give a positive number")
    if lam_scale is not None and not (isinstance(lam_scale, (int, float))
                                     and not isinstance(lam_scale, bool)
                                     and math.isfinite(lam_scale) and lam_scale > 0):
        raise ConfigError(f"{where}: lam_scale = {lam_scale!r}; give a positive fraction of "
                          "lam_max")
