"""The one check of the trace-norm penalty setting, shared by the run and the solver."""

from __future__ import annotations

import math

from ranktide.errors import ConfigError

__all__ = ["check_lam"]


def check_lam(lam: float | None, lam_frac: float | None, where: str = "train") -> None:
    """The one check of the penalty: ``lam > 0`` finite, or ``lam_frac > 0`` finite.

    Raises
    ------
    ConfigError
        Naming the setting and what to give instead.
    """
    if lam is not None and not (isinstance(lam, (int, float)) and not isinstance(lam, bool)
                                and math.isfinite(lam) and lam > 0):
        raise ConfigError(f"{where}: lam = {lam!r}; give a positive number")
    if lam_frac is not None and not (isinstance(lam_frac, (int, float))
                                     and not isinstance(lam_frac, bool)
                                     and math.isfinite(lam_frac) and lam_frac > 0):
        raise ConfigError(f"{where}: lam_frac = {lam_frac!r}; give a positive fraction of lam_max")
