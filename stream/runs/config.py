"""One frozen training configuration, validated once.

:class:`TrainConfig` holds every setting of a training run that a user chooses
(the loss, the penalty or path, budgets, tolerance, seed, planner and solver
sizes, checkpoint cadence). It is checked once, when it is made, with one
message per problem; :func:`ranktide.runs.train.train` builds one from its
keywords, and a resumed run loads the one its run directory saved, applies the
changes a resume may make (:data:`RESUME_MUTABLE`), and trains on.

Data (the training source, validation data given in memory) and callbacks are
not settings: they are passed beside the configuration.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import asdict, dataclass, fields, replace
from typing import Any

import numpy as np
from ranktide.errors import CheckpointError, ConfigError
from ranktide.losses import get_loss
from ranktide.solver.penalty import check_lam

__all__ = ["TrainConfig", "RESUME_MUTABLE", "PATH_FLOOR", "PATH_EXTEND", "PATH_TOL"]

#: default smallest requested path value, as a share of lam_max
PATH_FLOOR = 0.05
#: default cap on the values a path may add past its requested end while validation improves
PATH_EXTEND = 5
#: default relative gap of the path's values before the chosen one is finished to ``tol``:
#: validation picks among them, and on the package-index data the validation accuracy of a
#: value at 1e-3 and at 1e-4 agreed to the fourth digit while the last decade cost half of
#: each value's passes (tools/bench_real.py)
PATH_TOL = 1e-3

#: settings a resumed run may change (budgets, tolerance, cadence, backend, and how it
#: reports); every other setting must stay as saved
RESUME_MUTABLE: frozenset[str] = frozenset(
    {"max_passes", "max_seconds", "tol", "checkpoint_seconds", "checkpoint_passes", "backend",
     "quiet", "json", "progress", "verbose"}
)


def _whole(value: Any) -> bool:
    return not isinstance(value, bool) and isinstance(value, (int, float)) and int(value) == value


@dataclass(frozen=True)
class TrainConfig:
    """Every user setting of a training run (see :func:`ranktide.runs.train.train`).

    Attributes
    ----------
    loss : {"softmax", "squared", "multilabel"}
    lam, lam_scale, path_steps : exactly one of them
        The penalty, the penalty as a share of lam_max, or the number of values
        of a regularization path (which needs ``valid``).
    path_floor : float in (0, 1)
        Smallest requested path value as a share of lam_max.
    path_extend : int >= 0
        How many values a path may add past its requested end while validation
        still improves.
    path_tol : float in (0, 1) or None
        Relative gap to which each path value is solved (never below ``tol``);
        the chosen value is then finished to ``tol``. None: every value to
        ``tol`` (runs saved before this setting existed).
    refit_with_valid : bool
        Fit the path's choice again on the training and validation rows.
    valid : str or None
        Path of the validation store (in-memory validation data is passed to
        ``train`` beside the configuration; then this is None).
    has_valid : bool
        Whether validation data is given at all (a path needs it).
    tol : float in (0, 1)
    max_passes : int >= 1
    max_seconds : float > 0 or None
    memory : int, str or None
    seed : int
    block_rows : int >= 1 or None
    backend : str
    class_weight : "balanced", a file path, a list of k weights, or None (softmax only)
    dense_gradient : bool or None
    power_size, expand_size : int >= 1
    checkpoint_seconds : float > 0 or None
    checkpoint_passes : int >= 1 or None
    """

    loss: str
    lam: float | None = None
    lam_scale: float | None = None
    path_steps: int | None = None
    path_floor: float = PATH_FLOOR
    path_extend: int = PATH_EXTEND
    path_tol: float | None = PATH_TOL
    refit_with_valid: bool = False
    valid: str | None = None
    has_valid: bool = False
    tol: float = 1e-4
    max_passes: int = 100
    max_seconds: float | None = None
    memory: int | str | None = None
    seed: int = 0
    block_rows: int | None = None
    backend: str = "serial"
    class_weight: Any = None
    dense_gradient: bool | None = None
    power_size: int = 6
    expand_size: int = 6
    checkpoint_seconds: float | None = 60.0
    checkpoint_passes: int | None = None

    def __post_init__(self) -> None:
        cw = self.class_weight
        if cw is not None and not isinstance(cw, str):
            if hasattr(cw, "__fspath__"):
                object.__setattr__(self, "class_weight", str(cw.__fspath__()))
            else:  # an array of k weights: kept as a tuple, so configurations compare
                object.__setattr__(self, "class_weight", tuple(float(v) for v in cw))
        self._validate()

    # ------------------------------------------------------------ the validator
    def _validate(self) -> None:
        loss = get_loss(self.loss)
        given = [n for n in ("lam", "lam_scale", "path_steps") if getattr(self, n) is not None]
        if len(given) != 1:
            raise ConfigError("train: give exactly one of lam, lam_scale and path_steps "
                              f"(got {', '.join(given) or 'none'})")
        check_lam(self.lam, self.lam_scale)
        if self.path_steps is not None:
            self._validate_path()
        elif self.refit_with_valid:
            raise ConfigError("--refit-with-valid refits a path's choice; add --path-steps N "
                              "--valid STORE, or drop it")
        # budgets and cadence are named as the command line spells them (a resume changes them)
        if not (isinstance(self.tol, (int, float)) and 0 < self.tol < 1):
            raise ConfigError(f"--tol {self.tol}: must lie in (0, 1)")
        self._positive_whole("--max-passes", self.max_passes)
        self._positive_whole("power_size", self.power_size)
        self._positive_whole("expand_size", self.expand_size)
        if self.block_rows is not None:
            self._positive_whole("--block-rows", self.block_rows)
        if self.max_seconds is not None and not (isinstance(self.max_seconds, (int, float))
                                                 and self.max_seconds > 0):
            raise ConfigError(f"--max-seconds {self.max_seconds}: must be > 0")
        if self.checkpoint_seconds is not None and not (
                isinstance(self.checkpoint_seconds, (int, float)) and self.checkpoint_seconds > 0):
            raise ConfigError(f"--checkpoint-seconds {self.checkpoint_seconds}: must be > 0")
        if self.checkpoint_passes is not None:
            self._positive_whole("--checkpoint-passes", self.checkpoint_passes)
        if self.class_weight is not None and not loss.class_weights_ok:
            raise ConfigError(f"train: class weights apply to the softmax loss only, not "
                              f"{self.loss!r}; drop --class-weight")
        if not _whole(self.seed):
            raise ConfigError(f"train: seed = {self.seed!r}; give a whole number")

    def _validate_path(self) -> None:
        if not _whole(self.path_steps) or int(self.path_steps) < 2:
            raise ConfigError(f"train: path_steps = {self.path_steps!r}; give the number of lam "
                              "values (>= 2)")
        if not self.has_valid:
            raise ConfigError("train: a regularization path needs validation data; "
                              "pass valid= (--valid STORE)")
        if not (isinstance(self.path_floor, (int, float)) and 0 < self.path_floor < 1):
            raise ConfigError(f"train: path_floor = {self.path_floor!r}; it must lie in "
                              "(0, 1)")
        if not _whole(self.path_extend) or self.path_extend < 0:
            raise ConfigError(f"train: path_extend = {self.path_extend!r}; give a whole number "
                              ">= 0")
        if self.path_tol is not None and not (isinstance(self.path_tol, (int, float))
                                              and 0 < self.path_tol < 1):
            raise ConfigError(f"--path-tol {self.path_tol}: must lie in (0, 1)")

    @staticmethod
    def _positive_whole(name: str, value: Any) -> None:
        if not _whole(value) or int(value) < 1:
            raise ConfigError(f"{name} {value}: must be >= 1 (a whole number)")

    # ------------------------------------------------------------ saving and resuming
    def settings(self) -> dict[str, Any]:
        """The configuration as the JSON object a run directory saves."""
        out = asdict(self)
        if isinstance(out["class_weight"], tuple):
            out["class_weight"] = list(out["class_weight"])
        return out

    @classmethod
    def from_settings(cls, settings: Mapping[str, Any]) -> TrainConfig:
        """The configuration a run directory saved (unknown keys are ignored).

        The class weights a run resolved (from ``"balanced"`` or a file) are saved
        as ``class_weights``; a resumed run uses those, not the file again.
        """
        names = {f.name for f in fields(cls)}
        # run directories of earlier versions used other names for three settings
        renamed = {"lam_frac": "lam_scale", "path_min_frac": "path_floor", "path": "path_steps"}
        settings = {renamed.get(k, k): v for k, v in settings.items()}
        kw = {k: v for k, v in settings.items() if k in names}
        if settings.get("class_weights") is not None:  # the weights the run resolved
            kw["class_weight"] = list(settings["class_weights"])
        kw.setdefault("has_valid", settings.get("valid") is not None)
        kw.setdefault("path_extend", 0)  # runs saved before paths could extend do not
        kw.setdefault("path_tol", None)  # nor solve their values to a looser tolerance
        return cls(**kw)

    def with_changes(self, changes: Mapping[str, Any], *, run: str = "run") -> TrainConfig:
        """This configuration with the settings a resume may change replaced.

        Raises
        ------
        CheckpointError
            A setting outside :data:`RESUME_MUTABLE` (each named).
        ConfigError
            A new value out of range (the validator's message).
        """
        bad = sorted(set(changes) - RESUME_MUTABLE)
        if bad:
            raise CheckpointError(
                f"{run}: {', '.join(bad)} cannot change on resume; only "
                f"{', '.join(sorted(RESUME_MUTABLE))} may (start a new run otherwise)"
            )
        names = {f.name for f in fields(self)}  # how a run reports is not a setting here
        return replace(self, **{k: v for k, v in changes.items() if k in names})

    def train_kwargs(self) -> dict[str, Any]:
        """The keywords of :func:`ranktide.runs.train.train` that this configuration sets."""
        kw = asdict(self)
        kw.pop("has_valid")
        if isinstance(kw["class_weight"], tuple):
            kw["class_weight"] = np.asarray(kw["class_weight"], dtype=np.float64)
        return kw
