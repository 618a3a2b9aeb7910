"""The greedy low-rank solver: one gradient pass per outer iteration.

Model ``W = U diag(s) V^T`` (U d x r, V k x r orthonormal, s > 0) plus the
intercept ``b``. Each outer iteration (DESIGN section 7):

1. orthogonalize the expansion block ``Psi`` against ``U`` and the power block
   ``Omega`` against ``V`` (rank-revealing: dependent columns are dropped and
   refilled with fresh random ones from the seeded generator);
2. run ONE :func:`ranktide.passes.gradient.gradient_pass` at the current model,
   keeping the projections ``X [U, Psi]``;
3. bound ``sigma_1(G)`` from below by Rayleigh-Ritz on ``G [V, Omega]`` and
   ``[U, Psi]^T G`` (both with orthonormal bases), and form the gap estimate
   ``<G, W> + lam ||W||_* + (F / lam) max(0, sigma_1 - lam)`` (DESIGN section 2);
4. stop (after certifying sigma_1 with up to a few extra power passes), or
   refine on ``X Q`` with ``Q = [U, Psi]`` (:func:`ranktide.solver.refine.refine`) and
   compress by the SVD of the refined coefficients;
5. next ``Psi`` = top left singular directions of ``(I - U U^T) G [V, Omega]``
   (rotations of the current atoms and new atoms), next ``Omega`` = top
   directions of ``(I - V V^T) G^T Psi`` (two-sided subspace iteration, warm
   started across passes).

``lam_max = sigma_1(G(0, b0))`` comes from the first passes at ``W = 0`` (at most
``lam_max_passes``, default 3, the intercept's pass included): the Rayleigh-Ritz
value over the union of every rank-0 pass's power products
(:class:`ranktide.solver.subspace.KrylovUnion`, a block Krylov space grown across
passes; the first pass, at ``b = 0``, still gives exact products of ``G(0, b0)`` on
the directions orthogonal to ``link(b0) - link(0)``, since the two gradients
differ by a rank-one term ``m (link(b0) - link(0))^T``). When it has not settled
by then, fitting starts at ``lam_scale`` times the lower bound, the record and
the result say so, and the bound keeps growing (lam with it) while the model is
still ``W = 0``. The memory plan is redone before every pass, for the budget
left above the process floor (measured once, kept in the state so a resumed
run plans, and reads, the same blocks). When
the dense ``d x k`` gradient's three arrays (compensated sum, compensation,
block buffer; :mod:`kernels.compensated`) fit a third of the memory budget, the
pass also accumulates ``G`` and every sigma_1 and new direction comes from an in-memory
SVD instead (same optimum, fewer passes).
"""

from __future__ import annotations

import contextlib
import math
import os
import shutil
import time
from collections.abc import Callable
from dataclasses import fields
from typing import Any

import numpy as np
from ranktide.errors import CheckpointError, ConfigError
from ranktide.losses import get_loss, intercept_from_sums
from ranktide.passes.budget import (
    cgroup_limit,
    format_bytes,
    peak_resident,
    release_freed_memory,
)
from ranktide.passes.columns import used_columns
from ranktide.passes.engine import PassProfile
from ranktide.passes.gradient import PassRequest, gradient_pass
from ranktide.signals import StopRequested
from ranktide.solver.certificate import dual_gap, gap_estimate
from ranktide.solver.config import SolverConfig
from ranktide.solver.deferred_check import (
    check_last_refinement,
    clear_unchecked,
)
from ranktide.solver.memory_plan import MemoryPlanning
from ranktide.solver.outer_refine import OuterRefinement
from ranktide.solver.refine import _blas_one_thread
from ranktide.solver.state import (
    SolverResult,
    SolverState,
    generator_from,
)
from ranktide.solver.subspace import (
    dense_top_pairs,
    fill,
    momentum_directions,
    next_blocks,
    sigma1_lower_bound,
    top_left,
)
from ranktide.solver.widths import min_block_rows
from ranktide.store.column_view import ColumnView, expand_rows
from ranktide.store.memory_source import as_source

__all__ = ["GreedySolver"]


class GreedySolver(OuterRefinement, MemoryPlanning):
    """Greedy low-rank solver over a store or an in-memory source.

    Parameters
    ----------
    source : Store, store path, CSR tuple or source
        Anything :func:`ranktide.store.memory_source.as_source` accepts.
    config : SolverConfig
    state : SolverState, optional
        Continue from this state (a resumed checkpoint); default a fresh start.
    progress : bool
        Progress bars on passes.
    pass_fn : callable, optional
        ``pass_fn(source, request, **kw) -> PassResult``; default
        :func:`ranktide.passes.gradient.gradient_pass`.
    scratch_dir : path, optional
        Where passes write the cached projections when the memory budget
        cannot hold them (see :meth:`_refine_mode`); default a temporary
        directory.
    stop : callable, optional
        ``stop() -> bool``, checked after every block of a pass and every
        refinement step (e.g. a :class:`ranktide.signals.StopFlag`). When it
        fires, the unfinished outer iteration is abandoned, ``self.state`` is
        put back to where it was before it, and :meth:`run` returns status
        ``"interrupted"``: a checkpoint of that state resumes exactly.

    Notes
    -----
    :meth:`step` runs one outer iteration (one pass) and returns its record;
    :meth:`run` loops until converged, out of budget or stopped by the
    callback. ``self.state`` is everything a checkpoint needs.
    """

    def __init__(self, source: Any, config: SolverConfig, *, state: SolverState | None = None,
                 progress: bool = False, pass_fn: Callable | None = None,
                 stop: Callable[[], bool] | None = None,
                 scratch_dir: str | os.PathLike | None = None) -> None:
        self.config = config
        self.source = as_source(source)
        self.n, self.d = (int(x) for x in self.source.shape)
        self.d_full = self.d
        self.columns: np.ndarray | None = None
        self.k = int(self.source.n_outputs)
        self.progress = progress
        # called with every refinement step's ranktide.solver.apg.ApgProgress (beside the
        # progress bar drawn on a terminal when ``progress``); see state_before_step
        self.refine_progress: Callable[[Any], Any] | None = None
        self._before: dict | None = None
        self.stop = stop
        self._use_columns(state)
        # where the pass writes projections that the budget cannot hold (a fresh
        # temporary directory by default, removed by close())
        self.scratch_root = None if scratch_dir is None else os.fspath(scratch_dir)
        self._own_scratch: str | None = None
        self._pass_scratch: str | None = None  # this iteration's files, removed after it
        self._pass_fn = gradient_pass if pass_fn is None else pass_fn
        self._deadline: float | None = None  # perf_counter time, set by run()
        # the budget binds (given, or a cgroup limit): the kernels load before the floor
        # is measured, freed memory goes back before every pass, and the floor is
        # measured again after the first pass (readers, thread pools and caches exist
        # by then); a quarter of an unconfined machine's RAM leaves room
        self._binding = pass_fn is None and (config.memory is not None
                                             or cgroup_limit() is not None)
        self._mode = "none"
        self._rss_pass = 0  # the resident high-water mark right after the last pass
        self._block_rows: int | None = None  # rows per block of the last pass
        self.state = state if state is not None else self.initial_state()
        self._check_state(self.state)
        self._rng = generator_from(self.state.rng_state)
        self._plan_memory()
        self._history: list[dict] = []
        self._capped: dict[str, int] = {}  # widths the budget cut on the last pass
        self._depth_next = max(0, int(config.momentum))  # momentum factors the refinement keeps

    # ------------------------------------------------------------ set-up
    def _use_columns(self, state: SolverState | None) -> None:
        """Narrow the source to its used columns (``config.used_columns``).

        A resumed state keeps the space it was made in: a state on the full
        feature space (an older run, or data with no empty column) is resumed
        there.
        """
        cfg = self.config
        if not cfg.used_columns or (state is not None and state.Psi.shape[0] == self.d):
            return
        cols = used_columns(self.source, backend=cfg.backend, block_rows=cfg.block_rows,
                            should_stop=self.stop)
        if cols.size < self.d:
            self.columns = cols
            self.source = ColumnView(self.source, cols)
            self.d = int(cols.size)

    def initial_state(self) -> SolverState:
        """A fresh state: ``W = 0``, ``b = 0``, random orthonormal blocks."""
        cfg, d, k = self.config, self.d, self.k
        rng = np.random.default_rng(cfg.seed)
        Omega = fill(np.zeros((k, 0)), np.zeros((k, 0)), cfg.power_size, rng)
        Psi = fill(np.zeros((d, 0)), np.zeros((d, 0)), cfg.expand_size, rng)
        return SolverState(U=np.zeros((d, 0)), s=np.zeros(0), V=np.zeros((k, 0)), b=np.zeros(k),
                           Omega=Omega, Psi=Psi, rng_state=rng.bit_generator.state,
                           lam=cfg.lam)

    def _check_state(self, st: SolverState) -> None:
        r = st.s.shape[0]
        if (st.U.shape != (self.d, r) or st.V.shape != (self.k, r) or st.b.shape != (self.k,)
                or st.Omega.shape[0] != self.k or st.Psi.shape[0] != self.d):
            raise CheckpointError(
                f"solver state: factors U {st.U.shape}, V {st.V.shape}, b {st.b.shape} do not "
                f"fit data with {self.d} features and {self.k} outputs; resume on the same store")

    def _scratch_for_pass(self) -> str:
        import tempfile

        if self.scratch_root is None:
            self._own_scratch = tempfile.mkdtemp(prefix="ranktide-scratch-")
            self.scratch_root = self._own_scratch
        path = os.path.join(self.scratch_root, f"pass-{self.state.passes + 1:06d}")
        shutil.rmtree(path, ignore_errors=True)  # a pass abandoned before a resume
        self._pass_scratch = path
        return path

    # ------------------------------------------------------------ lam handling
    def set_lam(self, lam: float, *, path_index: int | None = None) -> None:
        """Continue with a new ``lam`` (warm start), e.g. the next regularization-path value."""
        if not (math.isfinite(lam) and lam > 0):
            raise ConfigError(f"solver: lam = {lam!r}; it must be a positive number")
        st = self.state
        st.lam = float(lam)
        if st.phase != "lam_max":
            st.phase = "fit"
        st.step_passes = 0
        st.cert_passes = 0
        st.last_rel_gap = None
        st.status = "running"
        st.U_prev = np.zeros((self.d, 0))  # momentum belongs to one lam
        st.U_prev_cols = []
        clear_unchecked(st)  # the objective it would compare was at the old lam
        st.check_at_once = False
        if path_index is not None:
            st.path_index = int(path_index)

    def warm_start(self, U: np.ndarray, s: np.ndarray, V: np.ndarray, b: np.ndarray) -> None:
        """Continue from a model's factors (``U`` on the full feature space), e.g. a
        regularization path's chosen value; call :meth:`set_lam` next."""
        U = np.asarray(U, dtype=np.float64)
        if self.columns is not None:
            U = U[self.columns]
        st = self.state
        st.U, st.s = np.array(U), np.array(s, dtype=np.float64)
        st.V, st.b = np.array(V, dtype=np.float64), np.array(b, dtype=np.float64)
        self._check_state(st)

    def fit_from(self, U: np.ndarray, s: np.ndarray, V: np.ndarray, b: np.ndarray, *,
                 lam: float, lam_max: float) -> None:
        """Start fitting ``lam`` from a model's factors, with no passes at ``W = 0``
        (``lam_max`` known from an earlier fit): a chosen model refitted on more rows."""
        st = self.state
        st.phase, st.status = "fit", "running"
        st.intercept_ready = True
        st.lam_max, st.lam_max_settled = float(lam_max), True
        self.warm_start(U, s, V, b)
        self.set_lam(lam)

    def _lam_after_settle(self) -> float | None:
        cfg, st = self.config, self.state
        if st.lam is not None:
            return st.lam
        if cfg.lam_scale is not None:
            return cfg.lam_scale * st.lam_max
        return None

    # ------------------------------------------------------------ one pass
    def _will_refine_after(self) -> bool:
        """Whether the coming pass may be followed by a refinement (else it keeps no
        projections: at W = 0 before ``lam`` is known there is nothing to refine)."""
        cfg, st = self.config, self.state
        if st.phase != "lam_max":
            return True
        if not st.intercept_ready:
            return False  # the intercept's pass: b changes after it
        if cfg.lam is not None or st.lam is not None:
            return True  # an explicit lam may start fitting on any pass
        return st.lam_max_settle + 2 >= cfg.lam_max_passes  # the phase's last pass

    def _run_pass(self):
        cfg, st = self.config, self.state
        if self._binding:
            release_freed_memory()
        p, pp = cfg.power_size, cfg.expand_size
        if st.phase == "lam_max":  # wider blocks at W = 0 (see lam_max_width)
            p, pp = max(p, cfg.lam_max_width), max(pp, cfg.lam_max_width)
        keep = self._will_refine_after()
        rot, depth, fits = self._widths(max(p, st.Omega.shape[1]), pp, keep)
        if fits is None and self._binding:
            raise ConfigError(
                f"memory budget {format_bytes(self._budget)}: at rank {st.rank} on "
                f"{self.d} features the model, its accumulators and blocks of "
                f"{min_block_rows(self.n)} rows do not fit above the "
                f"process floor {format_bytes(int(st.memory_floor or 0))}, even with no "
                "rotation or momentum directions; raise --memory, or raise lam to keep the "
                "rank lower (the checkpoints so far are kept)")
        self._capped = {}
        # the refinement after this pass keeps at most one factor more than it used, not all
        # the configured ones, so the factors held stay near what the budget takes (under a
        # tight budget the depth still alternates between two values: measured at 12M rows,
        # 1 GB, rank 8, two factors and one on alternate passes)
        self._depth_next = min(max(0, int(cfg.momentum)),
                               depth + 1 if self._binding else max(0, int(cfg.momentum)))
        if depth < min(max(0, int(cfg.momentum)), len(st.U_prev_cols)):
            self._capped["momentum_factors"] = depth
            # the factors left out are dropped from the state: the budget cannot hold them
            st.U_prev = np.ascontiguousarray(st.U_prev[:, :int(sum(st.U_prev_cols[:depth]))])
            st.U_prev_cols = list(st.U_prev_cols[:depth])
        full_rot = st.rank if cfg.rotation_size is None else min(st.rank, cfg.rotation_size)
        if rot < full_rot:
            self._capped["rotations"] = rot
        st.Psi = fill(st.Psi, st.U, pp, self._rng, cap=rot + pp)
        st.Omega = fill(st.Omega, st.V, p, self._rng)
        for U_old in st.momentum_factors()[:depth]:
            st.Psi = np.hstack([st.Psi, momentum_directions(U_old, np.hstack([st.U, st.Psi]))])
        # keep the generator's position in the state, so a checkpoint resumes the same draws
        st.rng_state = self._rng.bit_generator.state
        # re-plan for this pass: its widths, the arrays held beside the model (momentum
        # factors, the lam_max products) and the floor; all kept in the state
        held = self._held_bytes(depth)
        q = st.rank + st.Psi.shape[1]
        plan = self._plan(rank=st.rank, omega=st.Omega.shape[1], psi=st.Psi.shape[1],
                          keep=keep, dense=self.dense, extra=held)
        mode = self._refine_mode(q, plan) if keep else "none"
        sample = None
        if keep:  # a sampled refinement keeps its rows only, checked by the next pass
            plan, sample = self._kept_sample(q, held, plan)
            mode = "sample" if sample is not None else mode
        if mode == "scratch":  # the projections go to disk: the blocks get their room
            plan = self._plan(rank=st.rank, omega=st.Omega.shape[1], psi=st.Psi.shape[1],
                              keep=False, dense=self.dense, extra=held)
        self.plan = plan
        self._mode = mode
        req = PassRequest(loss=cfg.loss, U=st.U, s=st.s, V=st.V, b=st.b, Omega=st.Omega,
                          Psi=st.Psi, class_weights=cfg.class_weights, keep_projections=keep,
                          dense_gradient=self.dense, dual_scale=self._dual_scale(),
                          projections_dir=self._scratch_for_pass() if mode == "scratch" else None,
                          sample_rows=sample)
        prof = PassProfile()
        rows = cfg.block_rows
        if rows is None and cfg.block_bytes is None:
            rows = self._pass_block_rows(
                plan, depth=depth, keep=mode in ("memory", "blocks"),
                kept=0 if sample is None else self._kept_bytes(len(sample), q))
            if mode == "blocks":
                rows = min(rows, self._refine_block_rows(plan, q))
        self._block_rows = rows
        res = self._pass_fn(self.source, req, backend=cfg.backend, block_rows=rows,
                            block_bytes=cfg.block_bytes, profile=prof, progress=self.progress,
                            should_stop=self._should_stop)
        self._rss_pass = peak_resident()  # the high-water mark before the after-pass work
        if self._binding:
            # the pass's blocks are gone: hand their pages back before the d-row work
            # that follows (Ritz steps, next blocks, the refinement's set-up) allocates
            release_freed_memory()
        st.passes += 1
        st.step_passes += 1
        return req, res, prof

    def _sigma1(self, req, res) -> float:
        if res.G is not None:
            return float(dense_top_pairs(res.G, 1)[1][0])
        Gt_Q = np.hstack([res.Gt_U, res.Gt_Psi])
        return sigma1_lower_bound(res.G_VO, Gt_Q)

    def _intercept_from_pass(self, res) -> np.ndarray:
        """The best intercept alone, in closed form from ``grad_b`` at ``W = 0``.

        At ``W = 0`` every row scores ``b``, so ``grad_b`` gives the weighted
        target means exactly: softmax ``softmax(b) - grad_b`` (class-weighted
        frequencies), squared ``b - grad_b``, multilabel ``sigmoid(b) - grad_b``;
        :func:`ranktide.losses.intercept_from_sums` turns them into ``b0``.
        """
        loss = get_loss(self.config.loss)
        mean = loss.mean_at(self.state.b) - res.grad_b
        # frequencies are clipped at 0; values are not
        return intercept_from_sums(loss, 1.0, np.clip(mean, 0.0, None)
                                   if loss.has_probabilities else mean)

    def _next_blocks(self, req, res) -> None:
        """Next ``Psi`` and ``Omega`` from this pass's products (before the refinement):
        :func:`ranktide.solver.subspace.next_blocks`, or on the dense path the same
        split (rotations, new atoms) from the top pairs of the projected gradient."""
        cfg, st = self.config, self.state
        U_old, V_old, r = req.U, req.V, req.rank
        n_rot = r if cfg.rotation_size is None else min(r, cfg.rotation_size)
        if res.G is not None:
            G = res.G
            Gc = G - U_old @ (U_old.T @ G)
            rot = Gc @ V_old
            Gc = Gc - rot @ V_old.T
            u, sv, vr = dense_top_pairs(Gc, max(cfg.power_size, cfg.expand_size), warm=st.Omega)
            new = u[:, : cfg.expand_size] * sv[: cfg.expand_size]
            st.Omega = vr[:, : cfg.power_size]
            st.Psi = np.hstack([top_left(rot, n_rot), top_left(new, cfg.expand_size)])
        else:
            st.Psi, st.Omega = next_blocks(U=U_old, V=V_old, G_VO=res.G_VO, Gt_Psi=res.Gt_Psi,
                                           expand=req.Psi.shape[1] if req.rank == 0
                                           else cfg.expand_size, n_rotations=n_rot)

    def _dual_scale(self) -> float:
        """``c0 = min(1, lam / sigma_1)`` from the last pass: where this pass sums the
        conjugates for the duality gap (0 before a fit, which skips them)."""
        st = self.state
        if st.phase == "lam_max" or st.lam is None or not st.sigma1:
            return 0.0
        return float(min(1.0, st.lam / st.sigma1))

    def state_before_step(self) -> SolverState | None:
        """The state before the outer iteration in progress (None between iterations).

        A checkpoint of it resumes exactly: the resumed run redoes that
        iteration's pass and refinement. A callback run during a long
        refinement (``refine_progress``) may write it to keep a checkpoint
        schedule; the refinement's own iterates are not resumable (the scores
        it keeps and the pass's projections are not in a checkpoint).
        """
        if self._before is None:
            return None
        return SolverState(**self._before)

    # ------------------------------------------------------------ one iteration
    def step(self) -> dict:
        """One outer iteration: one pass, then certify, settle or refine. Returns its record.

        BLAS runs on one thread meanwhile: every dense product and factorization here is
        thin (d x q, k x q); measured on the shared 2-core machine, an SVD of a 2000 x 50
        gradient took 1.8 s with OpenBLAS's thread pool against the kernels' threads.
        """
        # the iteration replaces the state's arrays (never writes into them), so a
        # shallow copy is the state as it was before it
        st = self.state
        before = {f.name: getattr(st, f.name) for f in fields(st)}
        self._before = before
        t0 = time.perf_counter()
        try:
            with _blas_one_thread():
                rec = self._step()
            if self._binding and st.passes == 1:
                self._floor_after_first_pass(rec)
            return rec
        except StopRequested:
            for name, value in before.items():
                setattr(st, name, value)
            st.seconds += time.perf_counter() - t0  # spent; the work is redone on resume
            self._rng = generator_from(st.rng_state)
            raise
        finally:
            self._before = None
            if self._pass_scratch is not None:
                shutil.rmtree(self._pass_scratch, ignore_errors=True)
                self._pass_scratch = None

    def _step(self) -> dict:
        cfg, st = self.config, self.state
        if st.phase == "done":
            raise ConfigError("solver: already finished; call set_lam to continue")
        t0 = time.perf_counter()
        phase_in = st.phase
        req, res, prof = self._run_pass()
        rec: dict[str, Any] = {"pass": st.passes, "phase": phase_in, "rank_before": req.rank,
                               "omega_cols": int(req.Omega.shape[1]),
                               "psi_cols": int(req.Psi.shape[1])}
        if self._capped:  # the budget held fewer rotations / momentum factors than set
            rec["widths_capped"] = dict(self._capped)
        sigma1 = self._sigma1(req, res)
        if self._at_b0(req):
            sigma1 = self._krylov_estimate(req, res, sigma1, rec)
        st.sigma1_prev, st.sigma1 = st.sigma1, sigma1
        self._next_blocks(req, res)
        if st.phase == "lam_max":
            done = self._lam_max_step(req, res, sigma1, rec)
            if not done:
                self._finish_record(rec, res, prof, t0, refine_info=None)
                return rec
        F = res.loss + st.lam * float(np.sum(req.s))
        checked = check_last_refinement(st, F)
        rec.update(checked)
        # the refinement the pass checked ran after the previous pass (lag 1)
        stalled = bool(checked) and self._stalled(checked["refine_check_before"], F, lag=1)
        gap_fw = gap_estimate(inner=res.inner, nuclear=float(np.sum(req.s)), objective=F,
                              lam=st.lam, sigma1=sigma1)
        gap_du = dual_gap(objective=F, conjugate=res.conjugate, scale=req.dual_scale,
                          lam=st.lam, sigma1=sigma1)
        gap = min(gap_fw, gap_du)  # both bound F - F*: keep the tighter
        rel = gap / F if F > 0 else 0.0
        st.objective, st.gap, st.rel_gap = F, gap, rel
        # the inner tolerance follows the conditional-gradient bound (measured with it)
        st.last_rel_gap = gap_fw / F if F > 0 else 0.0
        rec.update(objective_pass=F, gap_estimate=gap, rel_gap=rel, gap_cg=gap_fw,
                   gap_dual=gap_du if math.isfinite(gap_du) else None,
                   dual_scale=req.dual_scale, sigma_ratio=sigma1 / st.lam, lam=st.lam)
        info = None
        converged = rel <= cfg.tol
        if converged and self._certified(phase_in, sigma1):
            st.phase = "done"
            st.status = "converged"
        elif converged and st.cert_passes < cfg.certificate_passes:
            st.phase = "certify"
            st.cert_passes += 1
        elif converged:
            st.phase = "done"
            st.status = "converged"
        else:
            st.phase = "fit"
            st.cert_passes = 0
            if stalled:  # the refinement the pass checked gained at most stall_tol
                st.phase = "done"
                st.status = "stalled"
            elif req.keep_projections:
                info = self._refine(req, res, st.last_rel_gap)
                # the refinement only lowers F: the pass's gap less the decrease bounds
                # the refined model's (the model this iteration leaves, and writes); for an
                # answer checked by the next pass, the sample's predicted decrease
                st.gap = max(0.0, gap - (F - info["objective_after"]))
                st.rel_gap = st.gap / info["objective_after"] if info["objective_after"] > 0 \
                    else 0.0
                info.update(gap_after=st.gap, rel_gap_after=st.rel_gap)
                if info.get("refine_checked", True) and self._stalled(F, info["objective_after"]):
                    st.phase = "done"
                    st.status = "stalled"
            # else: lam_max settled on a pass that kept no projections; the next fits
        self._finish_record(rec, res, prof, t0, refine_info=info)
        return rec

    def _stalled(self, F: float, F_after: float, *, lag: int = 0) -> bool:
        """A refinement lowered ``F`` by at most ``stall_tol`` of it, and not by going up
        (not the refinement after the first pass at this lam, whose decrease reflects the
        lam change; ``lag``: the refinement ran that many passes ago)."""
        tol = self.config.stall_tol
        return (tol is not None and self.state.step_passes - lag >= 2 and F > 0
                and 0.0 <= F - F_after <= tol * F)

    def _at_b0(self, req) -> bool:
        """The pass's gradient is ``G(0, b0)``: no atoms and no refinement yet, intercept set
        (or the intercept's own pass, whose products are partly ``G(0, b0)``'s)."""
        st = self.state
        return (not self.dense and req.rank == 0 and st.outer_iterations == 0
                and (st.phase == "lam_max" or st.intercept_ready))

    def _krylov_estimate(self, req, res, sigma1: float, rec: dict) -> float:
        """The Rayleigh-Ritz lower bound of ``sigma_1(G(0, b0))`` over every pass so far.

        On the intercept's pass (at ``b``, not yet ``b0``) only the right products on
        directions orthogonal to ``delta = link(b0) - link(b)`` are ``G(0, b0)``'s: at
        ``W = 0`` every residual row is ``omega_i (link(b) - y_i)``, so ``G(0, b0) -
        G(0, b) = m delta^T`` with ``m = X^T omega / sum(omega)``.
        """
        cfg, st = self.config, self.state
        kry = st.krylov()
        cap = 2 * max(cfg.power_size, cfg.expand_size, cfg.lam_max_width)
        if not st.intercept_ready:
            b0 = self._intercept_from_pass(res)
            delta = get_loss(cfg.loss).mean_at(b0) - get_loss(cfg.loss).mean_at(req.b)
            coef = req.Omega.T @ delta
            if float(np.linalg.norm(coef)) > 1e-14 * max(float(np.linalg.norm(delta)), 1e-300):
                N = np.linalg.svd(coef[None, :])[2][1:].T  # null space of coef^T
            else:
                N = np.eye(req.Omega.shape[1])
            est = kry.add(right=req.Omega @ N, g_right=res.G_VO @ N, cap=cap)
        else:
            est = kry.add(right=req.Omega, g_right=res.G_VO, left=req.Psi,
                          gt_left=res.Gt_Psi, cap=cap)
            est = max(est, sigma1)
        st.set_krylov(kry)
        rec["krylov_cols"] = int(kry.R.shape[1] + kry.L.shape[1])
        if (st.phase != "lam_max" and st.lam_max is not None and est > st.lam_max
                and (cfg.lam is not None or cfg.lam_scale is not None)):
            # still W = 0 at b0: the bound grew, and lam_max (and a lam_scale lam) with it;
            # not on a regularization path, whose grid was set from the first value
            st.lam_max = est
            if cfg.lam is None:
                st.lam = cfg.lam_scale * est
            rec["lam_max_raised"] = est
        return est

    def _certified(self, phase_in: str, sigma1: float) -> bool:
        """sigma_1 is trusted: exact (dense path) or settled over consecutive passes."""
        if self.dense:
            return True
        st = self.state
        if phase_in != "certify" or st.sigma1_prev is None:
            return False
        return abs(sigma1 - st.sigma1_prev) <= self.config.certificate_rtol * max(sigma1, 1e-300)

    def _lam_max_step(self, req, res, sigma1: float, rec: dict) -> bool:
        """Settle sigma_1 at ``W = 0``; True when ``lam`` is now set and fitting may start."""
        cfg, st = self.config, self.state
        if not st.intercept_ready:
            st.b = self._intercept_from_pass(res)
            st.intercept_ready = True
            st.objective = None  # f(0, b0) is known after the next pass
            if self.dense:
                st.sigma1 = None
            rec.update(lam_max_estimate=st.sigma1)
            return False
        st.objective = res.loss  # W = 0: F = f(0, b0)
        st.lam_max_settle += 1
        prev = st.sigma1_prev
        change = abs(sigma1 - prev) / max(sigma1, 1e-300) if prev is not None else math.inf
        settled = self.dense or change <= cfg.lam_max_rtol
        rec.update(lam_max_estimate=sigma1, lam_max_change=change if prev is not None else None)
        # an explicit lam below the lower bound sigma1 <= lam_max: W = 0 is not optimal
        # (DESIGN section 2), so fitting may start without settling lam_max exactly
        early = not settled and cfg.lam is not None and sigma1 > cfg.lam
        last = st.lam_max_settle + 1 >= cfg.lam_max_passes  # + 1: the intercept's pass
        if not settled and not early and not last:
            return False
        st.lam_max = sigma1
        st.lam_max_settled = bool(settled)
        if not settled and not early:
            rec["lam_max_note"] = (
                f"lam_max not settled after {st.lam_max_settle + 1} passes at W = 0 (last change "
                f"{change:.1e} > {cfg.lam_max_rtol:g}): fitting from the lower bound "
                f"{sigma1:.6g}; lam_max_passes sets how many passes it may take")
        lam = self._lam_after_settle()
        if lam is None:  # caller sets lam (regularization path) after lam_max is known
            st.phase = "fit"
            st.status = "lam_max"
            return False
        st.lam = float(lam)
        st.phase = "fit"
        st.step_passes = 1
        return True

    def _finish_record(self, rec, res, prof, t0, *, refine_info) -> None:
        st = self.state
        secs = time.perf_counter() - t0
        st.seconds += secs
        tot = prof.totals() if prof is not None and prof.records else {}
        wall = float(tot.get("wall_s", 0.0)) or secs
        nbytes = int(tot.get("bytes_decoded", 0))
        if refine_info:
            rec.update(refine_info)
            rec["objective"] = refine_info["objective_after"]
        else:
            rec["objective"] = rec.get("objective_pass", res.loss)
        rec.update(loss=res.loss, grad_b_norm=float(np.abs(res.grad_b).max()),
                   sigma1=st.sigma1, lam_max=st.lam_max, rank=st.rank, seconds=st.seconds,
                   pass_seconds=wall, bytes_read=nbytes,
                   blocks=int(prof.passes[-1]["n_blocks"]) if prof is not None and prof.passes
                   else None,
                   mb_per_s=(nbytes / 2**20) / wall if wall > 0 else 0.0,
                   phase_after=st.phase, path_index=st.path_index,
                   dense_gradient=self.dense, rss_peak=peak_resident(),
                   rss_after_pass=self._rss_pass, block_rows=self._block_rows)
        rec.setdefault("atoms_added", 0)
        self._history.append(rec)

    # ------------------------------------------------------------ loop
    def _should_stop(self) -> bool:
        """The caller's stop flag, or the deadline of :meth:`run` (``max_seconds``)."""
        if self.stop is not None and self.stop():
            return True
        return self._deadline is not None and time.perf_counter() >= self._deadline

    def run(self, callback: Callable[[dict], Any] | None = None) -> SolverResult:
        """Iterate until converged, out of budget, or the callback asks to stop.

        Parameters
        ----------
        callback : callable, optional
            Called with each pass's record; returning True or ``"stop"`` stops.
        """
        cfg, st = self.config, self.state
        t_start = time.perf_counter()
        self._deadline = None if cfg.max_seconds is None else t_start + cfg.max_seconds
        status = None
        self._history = []
        try:
            while True:
                if st.phase == "done":
                    status = st.status
                    break
                if st.step_passes >= cfg.max_passes:
                    status = "max_passes"
                    break
                if self._deadline is not None and time.perf_counter() >= self._deadline:
                    status = "max_seconds"
                    break
                if self.stop is not None and self.stop():
                    status = "interrupted"
                    break
                try:
                    rec = self.step()
                except StopRequested:
                    # the caller's flag wins; otherwise the deadline cut the pass short
                    status = "interrupted" if self.stop is not None and self.stop() \
                        else "max_seconds"
                    break
                if st.status == "lam_max":
                    status = "lam_max"
                    break
                if callback is not None:
                    answer = callback(rec)
                    if answer is True or answer == "stop":
                        status = "callback"
                        break
        finally:
            self._deadline = None
        return self._result(status)

    def _result(self, status: str) -> SolverResult:
        st = self.state
        if status != "converged" and st.phase != "done":
            st.status = status
        gap = float(st.gap) if st.gap is not None else math.nan
        rel = float(st.rel_gap) if st.rel_gap is not None else math.nan
        lam = st.lam if st.lam is not None else math.nan
        at_zero = st.phase == "lam_max"
        messages = {
            "converged": f"relative gap estimate {rel:.2e} <= tol {self.config.tol:g}",
            "stalled": f"the last pass lowered the objective by at most "
                       f"{self.config.stall_tol or 0:g} of it; relative gap estimate {rel:.2e}",
            "max_passes": f"stopped after {st.step_passes} passes (max_passes); relative gap "
                          f"estimate {rel:.2e}",
            "max_seconds": f"stopped at the time budget; relative gap estimate {rel:.2e}",
            "callback": "stopped by the callback",
            "interrupted": "interrupted; the unfinished pass was abandoned",
            "lam_max": f"lam_max = {st.lam_max:.6g} found; set lam to fit"
            if st.lam_max else "lam_max phase",
        }
        message = messages.get(status, status)
        if st.unchecked_from is not None and status not in ("converged", "lam_max"):
            message += ("; the objective and gap include the last refinement's predicted "
                        "decrease (its sample's), which no pass has checked yet")
        if at_zero and status in ("max_passes", "max_seconds", "callback", "interrupted"):
            message = (f"stopped after {st.passes} passes at W = 0, still settling lam_max: "
                       "nothing fitted yet (the model is the intercept alone)")
        elif not st.lam_max_settled and st.lam_max is not None and self.config.lam is None:
            message += (f"; lam_max {st.lam_max:.6g} is a lower bound (not settled in "
                        f"{self.config.lam_max_passes} passes at W = 0)")
        return SolverResult(
            U=expand_rows(st.U, self.columns, self.d_full), s=st.s, V=st.V, b=st.b, lam=lam,
            lam_max=st.lam_max,
            lam_max_settled=bool(st.lam_max_settled),
            objective=float(st.objective) if st.objective is not None else math.nan,
            gap=gap, rel_gap=rel, sigma1=float(st.sigma1) if st.sigma1 is not None else math.nan,
            status=status, message=message, passes=st.passes,
            seconds=st.seconds, history=list(self._history))

    def remove_scratch(self) -> None:
        """Delete the temporary scratch directory this solver made (if any)."""
        if self._own_scratch is not None:
            shutil.rmtree(self._own_scratch, ignore_errors=True)
            self._own_scratch = None
            self.scratch_root = None
        elif self.scratch_root is not None:
            with contextlib.suppress(OSError):
                os.rmdir(self.scratch_root)  # the caller's directory, if left empty

    def close(self) -> None:
        closer = getattr(self.source, "close", None)
        if closer is not None:
            closer()
        self.remove_scratch()
