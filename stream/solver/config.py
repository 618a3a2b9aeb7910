"""Settings of the greedy solver (:class:`SolverConfig`), validated when made."""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np
from ranktide.errors import ConfigError
from ranktide.losses import get_loss
from ranktide.solver.penalty import check_lam

__all__ = ["SolverConfig", "REFINE_CHECKS"]

#: How a sampled refinement is checked (see ``SolverConfig.refine_check``).
REFINE_CHECKS = ("next_pass", "at_once")


@dataclass(frozen=True)
class SolverConfig:
    """Settings of :class:`GreedySolver` (keyword-only, documented defaults).

    Attributes
    ----------
    loss : str
        A name in :data:`ranktide.losses.LOSS_NAMES`.
    lam : float, optional
        Trace-norm penalty. Exactly one of ``lam`` and ``lam_scale`` (or neither,
        when a caller such as the regularization path sets ``lam`` later).
    lam_scale : float, optional
        ``lam = lam_scale * lam_max``, with ``0 < lam_scale``.
    tol : float
        Stop when the relative gap estimate ``gap / F <= tol`` (default 1e-4).
    max_passes : int
        Passes allowed for one value of ``lam`` (default 100); the passes at
        ``W = 0`` that find ``lam_max`` have their own budget, ``lam_max_passes``.
    max_seconds : float, optional
        Wall-clock budget of one :meth:`GreedySolver.run` (default none),
        honoured within a pass: the deadline joins the ``stop`` callable, so a
        pass or refinement it cuts short is abandoned (the model stays the one
        before it) and the run ends with status ``"max_seconds"``.
    power_size : int
        Columns ``p`` of the power block ``Omega`` (default 6).
    expand_size : int
        ``p'``: the expansion block ``Psi`` takes up to ``p'`` new-atom
        directions plus the rotation directions (see ``rotation_size``) (default 6).
    seed : int
        Seed of the random starting blocks (``numpy.random.default_rng``).
    memory : int or str, optional
        Memory budget (bytes or a size such as ``"4GB"``); default a quarter of RAM.
    block_rows, block_bytes : int, optional
        Row block bounds of every pass.
    backend : str
        Pass backend (``"serial"`` or ``"threads"``).
    class_weights : ndarray (k,), optional
        Softmax class weights (row weight ``w_i c_{y_i}``).
    dense_gradient : bool, optional
        None (default): use the dense-gradient path when its three ``d x k``
        float64 arrays fit a third of the budget; True forces it, False forbids it.
    lam_max_passes : int
        Most passes at ``W = 0`` before fitting starts, the intercept's pass
        included (default 3). When ``sigma_1`` has not settled by then, fitting
        starts at the lower bound (``lam_max_settled`` False, said in the
        record's ``lam_max_note`` and the result's message). With an explicit
        ``lam`` the fit starts as soon as the lower bound exceeds ``lam``.
        Why not more: from a random start no power or Krylov method pins
        ``sigma_1`` to 1e-3 in a few products when the spectrum is flat
        (simulated with this scheme on d = 2000, k = 200, eight top values within
        1% over a bulk up to 0.9 sigma_1: 10% low after 3 passes, 1% after 6),
        and every pass at ``W = 0`` is a full pass of compute with nothing
        fitted; a lam a few percent below ``lam_scale lam_max`` is still a point
        of the path, solved exactly for the lam it records.
    lam_max_rtol : float
        ``sigma_1`` has settled when its relative change between two passes is
        below this (default 1e-3). The tolerance ``lam_scale`` needs: lam is then
        within about 0.1% of ``lam_scale lam_max``, and since ``dF*/dlam =
        ||W*||_* <= f(0, b0) / lam``, the optimal objective moves by at most
        about ``1e-3 f(0, b0)``: below what a user picking ``lam_scale`` (or a
        path grid) resolves.
    lam_max_width : int
        Columns of ``Omega`` and of ``Psi`` on the passes at ``W = 0`` before the
        fit starts (default 12; at least ``power_size`` and ``expand_size``); the
        union of their products keeps ``2 lam_max_width`` Ritz vectors a side.
        Measured (squared loss, n = 3000, d = 150, k = 60, four top values within
        1.5%, bulk at 0.6 sigma_1, three seeds): ``lam_max`` after 3 passes 3.0-3.6%
        low with 6 columns, 0.66-0.98% with 12 (keeping 6 or 12 Ritz vectors a
        side instead of twice the width: 4-5.5% and 0.8-2%). The pass's dense work
        at ``W = 0`` grows with the width (``n k (p + p')``) beside the loss's own
        ``n k``; the kept products are ``2 x 2 lam_max_width`` d- and k-vectors.
    certificate_passes : int
        Most extra power passes on the final model (default 5).
    certificate_rtol : float
        The final ``sigma_1`` has settled below this relative change (1e-4).
    inner_max_iter : int
        Most proximal steps of one refinement (default 400).
    momentum : int
        How many previous left factors give momentum directions to ``Psi``
        (default 3; 0 turns them off): for each, the part outside ``[U, Psi]``
        (and the directions already added). The refinement then also searches
        along the directions the subspace moved in over the last passes, as a
        block Krylov or locally optimal iteration keeps its recent directions.
        Measured on the planted softmax problem (n = 5000, d = 2000, k = 50,
        0.1 lam_max, rank 41), passes to 1e-4 / 1e-6 relative suboptimality:
        none 36 / 64, one factor 25 / 42, two 21 / 33, three 18 / 28, four 18 / 26.
    rotation_size : int, optional
        Most rotation directions ``(I - U U^T) G V`` in ``Psi`` (default None: all
        ``r``). Measured on a planted softmax problem (n = 1500, d = 500, k = 30,
        rank 19 at 0.1 lam_max): all rotations reached a relative gap of 1e-3 in 39
        passes and 1e-4 in 51, a cap of ``p'`` = 6 needed 51 passes for 1e-3 and had
        not reached 1e-4 after 67; with many atoms a cap starves their rotations.
    refine_sample_rows : int, optional
        Rows of the refinement's random sample (the gradient-corrected
        subsampled refinement, :mod:`ranktide.solver.refine_sample`): None
        (default) chooses from the shapes and the budget
        (:func:`ranktide.solver.refinement.sample_rows`: up to 20000 rows when the
        data has at least four times as many, softmax and multilabel), 0 always
        refines exactly, ``m > 0`` samples ``m`` rows whenever the data has more
        than ``2 m``. The sample grows when its steps stop carrying over.
    refine_check : {"next_pass", "at_once"}
        How a sampled refinement (``refine_sample_rows``) is checked against
        the full objective. ``"next_pass"`` (default): the pass keeps only the
        sample's rows of
        the projections (nothing goes to scratch), the refinement's answer is
        taken, and the next pass, which computes the full objective anyway,
        checks it; an answer that raised the objective grows the sample
        four-fold and makes the rest of this lam check at once. ``"at_once"``:
        the pass keeps every row's projections (in memory or in scratch files)
        and the objective at the answer is computed from them right away (one
        more stream of ``n q k`` work, and shorter steps or the exact
        refinement when it went up). Measured at 12 M rows, 500 classes, 1 GB:
        the at-once check took 14-24 s per refinement, about a pass of dense
        work, and writing the projections 5-15 s per pass; the sample's
        predicted decrease carried over at a ratio of 0.987-0.995.
    stall_tol : float, optional
        Also stop (status ``"stalled"``) once an outer iteration after the
        first at this lam lowers the objective by at most this share of it
        (default None: only the gap stops the run). The regularization path
        uses it for the values it only compares: the gap estimate of a
        nearly solved value can take many passes to certify what the
        objective already shows (package-index data, lam = 0.006 lam_max:
        the objective was within 3e-4 of its final value 19 passes before the
        gap estimate reached 1e-3).
    used_columns : bool
        Solve on the columns that hold entries only (default False; ``train``
        turns it on for the serial and threads backends). One read of the
        column ids before the first pass; when some columns are empty the
        solver works in the narrower space (:mod:`ranktide.store.column_view`)
        and its result is put back on the full feature space. Same optimum:
        an empty column adds nothing to the loss and its row of ``W`` is zero
        at the optimum.
    """

    loss: str
    lam: float | None = None
    lam_scale: float | None = None
    tol: float = 1e-4
    max_passes: int = 100
    max_seconds: float | None = None
    power_size: int = 6
    expand_size: int = 6
    seed: int = 0
    memory: int | str | None = None
    block_rows: int | None = None
    block_bytes: int | None = None
    backend: str = "serial"
    class_weights: Any = None
    dense_gradient: bool | None = None
    lam_max_passes: int = 3
    lam_max_rtol: float = 1e-3
    lam_max_width: int = 12
    certificate_passes: int = 5
    certificate_rtol: float = 1e-4
    inner_max_iter: int = 400
    momentum: int = 3
    rotation_size: int | None = None
    refine_sample_rows: int | None = None
    refine_check: str = "next_pass"
    used_columns: bool = False
    stall_tol: float | None = None

    def __post_init__(self) -> None:
        get_loss(self.loss)
        if self.lam is not None and self.lam_scale is not None:
            raise ConfigError("solver: give lam or lam_scale, not both")
        check_lam(self.lam, self.lam_scale, "solver")
        if not (0 < self.tol < 1):
            raise ConfigError(f"solver: tol = {self.tol!r}; it must lie in (0, 1)")
        if self.stall_tol is not None and not (0 < self.stall_tol < 1):
            raise ConfigError(f"solver: stall_tol = {self.stall_tol!r}; it must lie in (0, 1)")
        for name in ("max_passes", "power_size", "expand_size", "inner_max_iter",
                     "lam_max_width"):
            if int(getattr(self, name)) < 1:
                raise ConfigError(f"solver: {name} = {getattr(self, name)!r}; it must be >= 1")
        if int(self.lam_max_passes) < 2:
            raise ConfigError(f"solver: lam_max_passes = {self.lam_max_passes!r}; it must be >= 2 "
                              "(the intercept's pass and one at the intercept)")
        if self.refine_sample_rows is not None and int(self.refine_sample_rows) < 0:
            raise ConfigError(f"solver: refine_sample_rows = {self.refine_sample_rows!r}; it "
                              "must be >= 0 (0: exact refinement)")
        if self.refine_check not in REFINE_CHECKS:
            raise ConfigError(f"solver: refine_check = {self.refine_check!r}; use one of "
                              f"{', '.join(REFINE_CHECKS)}")
        if int(self.certificate_passes) < 0:
            raise ConfigError("solver: certificate_passes must be >= 0")
        if self.max_seconds is not None and not self.max_seconds > 0:
            raise ConfigError(f"solver: max_seconds = {self.max_seconds!r}; it must be > 0")
        if self.class_weights is not None:
            if not get_loss(self.loss).class_weights_ok:
                raise ConfigError("solver: class weights apply to the softmax loss only")
            cw = np.asarray(self.class_weights, dtype=np.float64).reshape(-1)
            if not np.all(np.isfinite(cw)) or np.any(cw < 0) or not np.any(cw > 0):
                raise ConfigError("solver: class weights must be finite, >= 0, not all 0")
            object.__setattr__(self, "class_weights", cw)
