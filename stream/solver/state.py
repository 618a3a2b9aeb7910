"""What the greedy solver carries from one outer iteration to the next, and its result.

:class:`SolverState` is everything the next pass depends on (factors, power and
expansion blocks, lam_max products, counters, the generator's state); a
checkpoint saves it (arrays as ``.npy``, the rest as JSON) and a resumed run
continues from it exactly. :class:`SolverResult` is one value of lam's outcome.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np
from ranktide.errors import CheckpointError
from ranktide.jsondata import json_data
from ranktide.solver.subspace import KrylovUnion

__all__ = ["SolverState", "SolverResult", "PHASES", "STATE_VERSION", "generator_from"]

PHASES = ("lam_max", "fit", "certify", "done")
STATE_VERSION = 3
#: Versions :meth:`SolverState.from_checkpoint` reads (1 has no ``U_prev``: no momentum yet;
#: 1 and 2 have no lam_max products and no floor: a resumed run keeps their fixed blocks).
_READABLE_VERSIONS = (1, 2, 3)

_ARRAYS = ("U", "s", "V", "b", "Omega", "Psi", "U_prev", "K_R", "K_GR", "K_L", "K_GtL")
#: arrays older state versions lack (filled with empty ones)
_OPTIONAL = {1: ("U_prev", "K_R", "K_GR", "K_L", "K_GtL"), 2: ("K_R", "K_GR", "K_L", "K_GtL"),
             3: ()}
_SCALARS = ("lam", "lam_max", "phase", "passes", "step_passes", "outer_iterations",
            "seconds", "sigma1", "sigma1_prev", "path_index", "intercept_ready",
            "lam_max_settle", "lam_max_settled", "U_prev_cols", "cert_passes", "last_rel_gap",
            "objective", "status", "refine_sample_rows", "memory_floor", "gap", "rel_gap",
            "unchecked_from", "unchecked_predicted", "unchecked_rows", "check_at_once")


@dataclass
class SolverState:
    """Everything the next outer iteration needs (see :meth:`to_checkpoint`).

    Attributes
    ----------
    U : ndarray (d, r)
    s : ndarray (r,)
    V : ndarray (k, r)
    b : ndarray (k,)
    Omega : ndarray (k, p)
        Power block (orthogonal to ``V`` before each pass).
    Psi : ndarray (d, p')
        Expansion block (orthogonalized against ``U`` before each pass).
    U_prev : ndarray (d, sum(U_prev_cols))
        The left factors before the last refinements, newest first, side by
        side (the momentum directions come from them; ``d x 0`` before the
        first refinement).
    K_R, K_GR, K_L, K_GtL : ndarray (k, c), (d, c), (d, c'), (k, c')
        The ``lam_max`` phase's power products of ``G(0, b0)`` kept across
        passes (:class:`ranktide.solver.subspace.KrylovUnion`); empty outside it.
    rng_state : dict
        ``numpy.random.Generator.bit_generator.state`` of the solver's generator.
    lam, lam_max : float or None
    phase : {"lam_max", "fit", "certify", "done"}
    passes : int
        Passes over the data so far (all phases, all path steps).
    step_passes : int
        Passes spent on the current ``lam``.
    outer_iterations : int
        Refinements done.
    seconds : float
        Wall-clock seconds spent so far (carried across resumes).
    sigma1, sigma1_prev : float or None
        The last two ``sigma_1`` estimates.
    path_index : int
        Position on a regularization path (0 without a path).
    intercept_ready : bool
        ``b`` already is the best intercept alone (set after the first pass).
    lam_max_settle : int
        Passes at ``b0`` in the lam_max phase.
    U_prev_cols : list of int
        Columns of each factor in ``U_prev``.
    lam_max_settled : bool
        ``lam_max`` is the settled ``sigma_1`` at ``W = 0``; False when an
        explicit ``lam`` let fitting start as soon as the lower bound passed it
        (``lam_max`` is then that lower bound).
    cert_passes : int
        Extra certificate passes spent on the current model.
    last_rel_gap : float or None
        The last relative gap estimate (ties the inner tolerance to it).
    objective : float or None
        The objective of the current model (after the last refinement).
    gap, rel_gap : float or None
        A bound (an estimate: ``sigma_1`` is a lower bound) on ``F - F*`` of the
        current model, and that over ``F``: the last pass's gap less what the
        refinement after it gained (the refinement only lowers ``F``).
    memory_floor : int or None
        The process floor the memory plans leave aside (bytes), measured before
        the first pass and kept so a resumed run plans the same blocks.
    status : str
        ``"running"`` or the final status.
    refine_sample_rows : int
        The size the refinement's sample has grown to (0: not grown).
    unchecked_from : float or None
        The full objective before the last refinement when that refinement's
        answer is not checked yet (``SolverConfig.refine_check = "next_pass"``):
        the next pass checks it; None when the current objective is known.
        ``objective``, ``gap`` and ``rel_gap`` are then the sample's predictions.
    unchecked_predicted : float or None
        The decrease that refinement's sample predicted.
    unchecked_rows : int
        Rows of that refinement's sample.
    check_at_once : bool
        An unchecked refinement raised the objective at this lam: the rest of
        it checks each refinement at once.
    """

    U: np.ndarray
    s: np.ndarray
    V: np.ndarray
    b: np.ndarray
    Omega: np.ndarray
    Psi: np.ndarray
    rng_state: dict
    U_prev: np.ndarray | None = None
    K_R: np.ndarray | None = None
    K_GR: np.ndarray | None = None
    K_L: np.ndarray | None = None
    K_GtL: np.ndarray | None = None
    lam: float | None = None
    lam_max: float | None = None
    phase: str = "lam_max"
    passes: int = 0
    step_passes: int = 0
    outer_iterations: int = 0
    seconds: float = 0.0
    sigma1: float | None = None
    sigma1_prev: float | None = None
    path_index: int = 0
    intercept_ready: bool = False
    lam_max_settle: int = 0
    lam_max_settled: bool = True
    U_prev_cols: list | None = None
    cert_passes: int = 0
    last_rel_gap: float | None = None
    objective: float | None = None
    status: str = "running"
    refine_sample_rows: int = 0
    memory_floor: int | None = None
    gap: float | None = None
    rel_gap: float | None = None
    unchecked_from: float | None = None
    unchecked_predicted: float | None = None
    unchecked_rows: int = 0
    check_at_once: bool = False

    def __post_init__(self) -> None:
        d, k = self.U.shape[0], self.V.shape[0]
        if self.U_prev is None:
            self.U_prev = np.zeros((d, 0))
        for name, rows in (("K_R", k), ("K_GR", d), ("K_L", d), ("K_GtL", k)):
            if getattr(self, name) is None:
                setattr(self, name, np.zeros((rows, 0)))
        if self.U_prev_cols is None:  # one factor (or none)
            self.U_prev_cols = [int(self.U_prev.shape[1])] if self.U_prev.shape[1] else []
        self.U_prev_cols = [int(c) for c in self.U_prev_cols]

    def krylov(self) -> KrylovUnion:
        """The ``lam_max`` phase's products as a :class:`KrylovUnion` (shares the arrays)."""
        return KrylovUnion(self.K_R, self.K_GR, self.K_L, self.K_GtL)

    def set_krylov(self, kry: KrylovUnion | None) -> None:
        """Keep ``kry``'s products (None: drop them, the phase is over)."""
        d, k = self.U.shape[0], self.V.shape[0]
        if kry is None:
            kry = KrylovUnion.empty(d, k)
        self.K_R, self.K_GR, self.K_L, self.K_GtL = kry.R, kry.GR, kry.L, kry.GtL

    def momentum_factors(self) -> list[np.ndarray]:
        """The previous left factors in ``U_prev``, newest first."""
        edges = np.cumsum([0, *self.U_prev_cols])
        return [self.U_prev[:, a:b] for a, b in zip(edges[:-1], edges[1:], strict=True)]

    @property
    def rank(self) -> int:
        return int(self.s.shape[0])

    def to_checkpoint(self) -> tuple[dict[str, np.ndarray], dict]:
        """Arrays and JSON-able metadata that :meth:`from_checkpoint` restores exactly."""
        # keep each array's memory order (C or Fortran): BLAS rounds differently by layout,
        # and an exact resume needs the same products as the uninterrupted run (np.save keeps it)
        arrays = {name: np.asarray(getattr(self, name), dtype=np.float64) for name in _ARRAYS}
        meta = {name: json_data(getattr(self, name)) for name in _SCALARS}
        meta["rng_state"] = json_data(self.rng_state)
        meta["state_version"] = STATE_VERSION
        return arrays, meta

    @classmethod
    def from_checkpoint(cls, arrays: dict[str, np.ndarray], meta: dict) -> SolverState:
        """Rebuild a state written by :meth:`to_checkpoint`."""
        version = meta.get("state_version")
        optional = _OPTIONAL.get(version, ())
        missing = [n for n in _ARRAYS if n not in arrays and n not in optional]
        if missing:
            raise CheckpointError(f"solver checkpoint: arrays {', '.join(missing)} missing; "
                                  "the checkpoint is damaged, resume from an older one")
        if version not in _READABLE_VERSIONS:
            raise CheckpointError(f"solver checkpoint: state version {meta.get('state_version')!r}"
                                  f" is not {STATE_VERSION}; resume it with the ranktide that "
                                  "wrote it")
        if meta.get("phase") not in PHASES or not isinstance(meta.get("rng_state"), dict):
            raise CheckpointError("solver checkpoint: phase or rng_state unreadable; the "
                                  "checkpoint is damaged, resume from an older one")
        kw = {n: np.array(arrays[n], dtype=np.float64) for n in _ARRAYS if n in arrays}
        kw.update({n: meta.get(n) for n in _SCALARS if n in meta})
        kw["rng_state"] = meta["rng_state"]
        return cls(**kw)


def generator_from(state: dict) -> np.random.Generator:
    """The generator whose ``bit_generator.state`` is ``state`` (a checkpoint's JSON)."""
    bg = getattr(np.random, state["bit_generator"])()
    bg.state = state
    gen = np.random.Generator(bg)
    return gen


@dataclass(frozen=True)
class SolverResult:
    """Outcome of :meth:`GreedySolver.run` (one value of ``lam``)."""

    U: np.ndarray
    s: np.ndarray
    V: np.ndarray
    b: np.ndarray
    lam: float
    lam_max: float | None
    lam_max_settled: bool
    objective: float
    gap: float
    rel_gap: float
    sigma1: float
    status: str
    message: str
    passes: int
    seconds: float
    history: list = field(default_factory=list)

    @property
    def rank(self) -> int:
        return int(self.s.shape[0])

    @property
    def sigma_ratio(self) -> float:
        return self.sigma1 / self.lam if self.lam else math.inf
