"""One refinement of the outer loop: exact, or on a row sample with the full-gradient correction.

:func:`sample_rows` decides from shapes and the memory budget; :func:`refine_projections`
runs the chosen refinement on the pass's cached projections and, for the
sampled one, checks the full objective at its answer: the answer is kept when
the full objective went down; the sample grows for the next outer iterations
when less than half of the surrogate's predicted decrease carried over. When
the objective did not go down at all the sample grows four-fold and a shorter
step along the sampled answer is tried (:func:`backtrack`, one stream of the
projections per try); only when none of them lowers the objective does the
exact refinement run (from the same warm start). A sample that would hold
half the rows or more means the exact refinement from then on.
"""

from __future__ import annotations

import math
import sys
from dataclasses import replace
from typing import Any

import numpy as np
from ranktide.losses import Loss, get_loss
from ranktide.solver.apg import ApgProgress, svt
from ranktide.solver.refine import refine
from ranktide.solver.refine_common import RefineResult, RefineSettings
from ranktide.solver.refine_sample import (
    draw_sample,
    full_objective,
    gather_rows,
    refine_sampled,
    stack_rows,
)
from ranktide.solver.refine_stream import refine_streamed
from tqdm import tqdm

__all__ = ["DEFAULT_SAMPLE_ROWS", "MIN_SAMPLE_ROWS", "sample_rows", "sample_outcome",
           "refine_projections",
           "refine_kept_sample", "backtrack", "RefineBar"]

#: Most rows of the automatic sample. Each inner step then costs ``m q k`` whatever ``n`` is;
#: see tools/bench_refine.py for the measured trade-off.
DEFAULT_SAMPLE_ROWS = 20_000
#: Fewest rows of the automatic sample (a budget too small for more keeps the exact refinement).
MIN_SAMPLE_ROWS = 2_000
# The automatic sample is used only when the data has at least this many times its rows:
# below that the exact refinement costs little more (common practice, no source).
_MIN_RATIO = 4
# The sample's in-memory refinement may take this fraction of the memory budget.
_BUDGET_SHARE = 0.25
# ... and this fraction of what the budget leaves beside the floor, the model and the
# cached projections (the rest: the refinement's other arrays and the allocator's slack;
# measured 43 MiB above floor + model + projections before a refinement at 600k rows)
_ROOM_SHARE = 0.3


def sample_rows(*, n: int, q: int, k: int, loss: str | Loss, budget: int,
                configured: int | None, grown: int, room: int | None = None) -> int:
    """Rows of the refinement's sample (0: the exact refinement).

    Parameters
    ----------
    n, q, k : int
        Rows, subspace width, outputs.
    loss : str or Loss
        A quadratic loss (``Loss.quadratic``: squared) refines exactly from its
        sufficient statistics (one ``n q (q + k)`` stream, no per-step cost), so
        it samples only when ``configured`` asks.
    budget : int
        Memory budget in bytes: the sample's scores (five ``m x k`` arrays)
        and projections take at most a quarter of it.
    configured : int or None
        ``SolverConfig.refine_sample_rows``: None chooses automatically, 0
        turns sampling off, ``m > 0`` asks for ``m`` rows.
    grown : int
        The size the sample has grown to (``SolverState.refine_sample_rows``;
        0: not grown yet).
    room : int, optional
        Bytes the budget leaves when the refinement starts (less the process
        floor, the model and the projections held in memory): the automatic
        sample takes at most 30% of it, grown or not. None: only ``budget``
        limits it.

    Returns
    -------
    int
    """
    if configured is not None and int(configured) <= 0:
        return 0
    if configured is None:
        if get_loss(loss).quadratic:
            return 0
        share = int(_BUDGET_SHARE * budget)
        if room is not None:
            share = min(share, int(_ROOM_SHARE * max(0, room)))
        fit = share // (8 * (q + 5 * k))
        m = min(DEFAULT_SAMPLE_ROWS, fit)
        if m < MIN_SAMPLE_ROWS or n < _MIN_RATIO * m:
            return 0
        m = max(m, int(grown))
        if room is not None:
            m = min(m, fit)  # grown past what is left: the sample stops growing
    else:
        m = max(int(configured), int(grown))
    return 0 if 2 * m > n else m


def sample_outcome(decrease: float, predicted: float, rows: int) -> tuple[float, int]:
    """How a sampled refinement's predicted decrease carried over, and the sample's next size.

    Parameters
    ----------
    decrease : float
        The full objective's decrease at the answer (negative: it went up).
    predicted : float
        The surrogate's predicted decrease (>= 0).
    rows : int
        The sample's rows.

    Returns
    -------
    ratio : float
        ``decrease / predicted`` (1 or 0 when nothing was predicted).
    next_rows : int
        Four times ``rows`` when the objective went up, twice when less than
        half of the prediction carried over, else ``rows``.
    """
    ratio = decrease / predicted if predicted > 0 else (1.0 if decrease >= 0 else 0.0)
    if decrease < 0:
        return float(ratio), 4 * int(rows)
    return float(ratio), (2 if ratio < 0.5 else 1) * int(rows)


#: Step lengths tried along a sampled answer that raised the full objective. Each try is one
#: stream of the projections; the exact refinement it saves costs tens of them (measured at
#: 600k rows: 36 s against 2.3 s for a pass).
_BACKTRACK_STEPS = (0.5, 0.25, 0.125)


def backtrack(blocks: Any, N0: np.ndarray, b0: np.ndarray, answer: RefineResult,
              objective: float, cfg: RefineSettings) -> tuple[RefineResult, float] | None:
    """A shorter step from ``(N0, b0)`` towards ``answer`` that lowers the full objective.

    The corrected surrogate has the full objective's gradient at ``(N0, b0)``
    and the same penalty, so where its answer lowered the surrogate the
    direction towards it is a descent direction of the full objective (the
    directional derivatives agree at the start, and the surrogate's is at most
    its decrease, by convexity): some step ``t`` in (0, 1) lowers the full
    objective. Tries :data:`_BACKTRACK_STEPS` in turn.

    Returns
    -------
    (result, t) or None
        The first step whose full objective is below ``objective``, with its
        factors and full objective; None when none is.
    """
    for t in _BACKTRACK_STEPS:
        N = N0 + t * (answer.N - N0)
        b = b0 + t * (answer.b - b0)
        A, s, B = svt(N, 0.0)  # the factors with positive singular values
        nuc = float(s.sum())
        F = full_objective(blocks, N, b, nuc, cfg)
        if F < objective:
            return replace(answer, N=N, b=b, A=A, s=s, B=B, objective=F,
                           loss=F - cfg.lam * nuc), t
    return None


def _exact(blocks: Any, mode: str, N0: np.ndarray, b0: np.ndarray,
           cfg: RefineSettings) -> RefineResult:
    if mode == "memory":
        parts = list(blocks)
        A = np.concatenate([p[0] for p in parts], axis=0)
        return refine(A, [p[1] for p in parts], [p[2] for p in parts], N0, b0, cfg)
    return refine_streamed(blocks, N0, b0, cfg)


def refine_projections(
    blocks: Any,
    mode: str,
    N0: np.ndarray,
    b0: np.ndarray,
    cfg: RefineSettings,
    *,
    rows: int,
    n: int,
    rng: np.random.Generator,
    objective: float,
    full_grad_N: np.ndarray,
    full_grad_b: np.ndarray,
) -> tuple[RefineResult, dict]:
    """Refine on the pass's projections, exactly (``rows == 0``) or on a sample.

    Parameters
    ----------
    blocks : re-iterable of (XQ_b, targets_b, weights_b)
        :class:`ranktide.passes.projections.MemoryProjections` or
        :class:`ranktide.passes.projections.ScratchProjections`, in row order.
    mode : {"memory", "blocks", "scratch"}
        Where the exact refinement works (``"memory"``: on the concatenated
        projections and the scores of its iterates; otherwise streamed).
    N0, b0 : (q, k), (k,) arrays
        The current model in the basis ``Q``.
    cfg : RefineSettings
        The loss, ``lam`` and the loop's settings
        (:class:`ranktide.solver.refine_common.RefineSettings`).
    rows : int
        Sample rows (from :func:`sample_rows`); 0 for the exact refinement.
    n : int
        Rows of the data.
    rng : numpy.random.Generator
        Draws the sample (the solver's generator, so a resumed run draws the same).
    objective : float
        The full objective at ``(N0, b0)`` (the pass's).
    full_grad_N : (q, k) array
        ``Q^T G`` at ``(N0, b0)``, i.e. ``[Gt_U, Gt_Psi]^T`` of the pass.
    full_grad_b : (k,) array

    Returns
    -------
    result : RefineResult
        With the full objective (and loss) at its answer.
    info : dict
        ``refine_sample_rows`` (0: exact), and for a sample ``refine_sample_ratio``
        (full decrease / predicted), ``refine_backtrack`` (the shorter step kept,
        when the full answer raised the objective), ``refine_fallback`` (the
        exact refinement replaced it) and ``refine_sample_next`` (the size to
        use next).
    """
    if rows <= 0:
        return _exact(blocks, mode, N0, b0, cfg), {"refine_sample_rows": 0}
    idx = draw_sample(n, rows, rng)
    XQ, T, W = gather_rows(blocks, idx)
    out = refine_sampled(XQ, T, W, N0, b0, full_grad_N, full_grad_b, cfg)
    res = out.result
    nuc = float(res.s.sum())
    F = full_objective(blocks, res.N, res.b, nuc, cfg)
    decrease = objective - F
    ratio, grown = sample_outcome(decrease, out.predicted, rows)
    info = {"refine_sample_rows": rows, "refine_sample_ratio": ratio,
            "refine_fallback": False, "refine_sample_next": grown}
    if decrease >= 0:
        return replace(res, objective=F, loss=F - cfg.lam * nuc), info
    shorter = backtrack(blocks, N0, b0, res, objective, cfg)
    if shorter is not None:
        info["refine_backtrack"] = shorter[1]
        return shorter[0], info
    info["refine_fallback"] = True
    exact = _exact(blocks, mode, N0, b0, cfg)
    return replace(exact, iterations=exact.iterations + res.iterations), info


def refine_kept_sample(parts: list, N0: np.ndarray, b0: np.ndarray, cfg: RefineSettings, *,
                       objective: float, full_grad_N: np.ndarray,
                       full_grad_b: np.ndarray) -> tuple[RefineResult, float]:
    """The sampled refinement on the rows a pass kept, its answer not checked here.

    For ``SolverConfig.refine_check = "next_pass"`` (:mod:`ranktide.solver.deferred_check`):
    the next pass measures the full objective at the answer.

    Parameters
    ----------
    parts : list of (XQ_j, targets_j, weights_j)
        The sample's rows, in row order (the pass's kept projections).
    N0, b0, cfg, objective, full_grad_N, full_grad_b
        As in :func:`refine_projections`.

    Returns
    -------
    result : RefineResult
        The answer; ``objective`` and ``loss`` are the predicted full ones
        (``objective`` less the surrogate's decrease).
    predicted : float
        The decrease the surrogate predicts (>= 0).
    """
    XQ, T, W = stack_rows([p[0] for p in parts], [p[1] for p in parts], [p[2] for p in parts])
    out = refine_sampled(XQ, T, W, N0, b0, full_grad_N, full_grad_b, cfg)
    F = float(objective) - out.predicted
    nuc = float(out.result.s.sum())
    return replace(out.result, objective=F, loss=F - cfg.lam * nuc), out.predicted


class RefineBar:
    """A progress line for a long refinement on a terminal (the passes' bar style).

    Shows the inner step, the objective, the relative gap estimate and the
    estimated seconds left (:class:`ranktide.solver.apg.ApgProgress`); drawn
    only when ``enabled``, stderr is a terminal, and the refinement lasts more
    than half a second.
    """

    def __init__(self, enabled: bool, pass_index: int) -> None:
        self.bar = None
        stream = sys.stderr
        if enabled and hasattr(stream, "isatty") and stream.isatty():
            self.bar = tqdm(total=None, unit="step", desc=f"refine after pass {pass_index}",
                            file=stream, delay=0.5, dynamic_ncols=True, leave=False)

    def update(self, p: ApgProgress) -> None:
        if self.bar is None:
            return
        gap = f"{p.gap:.1e}" if math.isfinite(p.gap) else "-"
        self.bar.set_postfix_str(f"F {p.objective:.6g}  gap {gap}  ETA {p.eta:.0f}s",
                                 refresh=False)
        self.bar.update(p.step - self.bar.n)

    def close(self) -> None:
        if self.bar is not None:
            self.bar.close()
