"""The solver's memory planning: the process floor, each pass's plan and widths, and
where the refinement works, from the budget and the data's shapes.

:class:`MemoryPlanning` is a mixin of :class:`ranktide.solver.greedy.GreedySolver`;
it reads the solver's ``config``, ``state``, ``source``, ``d``, ``n``, ``k``,
``dense``, ``dense_hint``, ``plan``, ``_budget``, ``_binding`` and ``_before``
and keeps no state of its own. Everything it decides depends only on the data's
shape, the budget, the floor kept in the state and the widths, so a resumed run
plans alike.
"""

from __future__ import annotations

import numpy as np
import scipy.sparse as sp
from ranktide.losses import get_loss
from ranktide.passes.budget import (
    FLOOR_QUANTUM,
    Plan,
    parse_memory,
    plan_blocks,
    process_floor,
    release_freed_memory,
)
from ranktide.passes.gradient import PassRequest, gradient_pass
from ranktide.passes.kernel_path import CHOOSER
from ranktide.solver.refine import refine
from ranktide.solver.refine_common import RefineSettings
from ranktide.solver.refinement import sample_rows
from ranktide.solver.state import _ARRAYS
from ranktide.solver.subspace import fill
from ranktide.solver.widths import shrink_widths
from ranktide.store.memory_source import as_source

__all__ = ["MemoryPlanning"]

# Share of a binding budget kept free of the plan: allocator slack and short-lived copies
# the plan does not itemize (measured at 600k rows, 1 GB: identical runs peaked 40 MiB
# apart, and up to 2% above the itemized plan at rank 24-34)
_SLACK_SHARE = 0.05


class MemoryPlanning:
    """Memory planning of the greedy solver (see the module docstring)."""

    def _plan_memory(self) -> None:
        """The first plan: the process floor (measured once, then kept in the state)
        and the choice of the dense-gradient path, which holds for the whole run."""
        st, cfg = self.state, self.config
        if st.memory_floor is None:
            st.memory_floor = 0  # the dense choice without the floor: it can only shrink
            self.dense_hint = bool(self._plan(rank=st.rank, omega=cfg.power_size,
                                              psi=st.rank + cfg.expand_size, keep=True,
                                              dense=cfg.dense_gradient).dense_gradient)
            # the kernels load before the floor is measured when the budget binds (given,
            # or a cgroup limit); a quarter of an unconfined machine's RAM leaves room
            if self._binding:
                self._warm_kernels()
            st.memory_floor = int(process_floor())
        self.plan = self._plan(rank=st.rank, omega=cfg.power_size,
                               psi=st.rank + cfg.expand_size, keep=True,
                               dense=cfg.dense_gradient)
        self.dense = bool(self.plan.dense_gradient)
        self._budget = int(self.plan.budget)

    def _warm_kernels(self) -> None:
        """Load (or compile) the kernels of a pass, on both sparse paths, and of a
        refinement, on a tiny invented problem of the same kind, so that the floor
        measured next holds them (measured: the resident set grows by ~125 MiB when
        the cached kernels load on the first pass). The tiny problem's width is not
        the data's, so the kernel-path chooser's timings are untouched."""
        cfg, k = self.config, self.k
        n, d = 8, 6
        rng = np.random.default_rng(0)
        X = sp.random(n, d, density=0.5, format="csr", dtype=np.float32, random_state=0)
        X.sort_indices()
        y = get_loss(cfg.loss).random_targets(rng, n, k)
        w = np.ones(n, np.float32) if getattr(self.source, "has_weights", False) else None
        tiny = as_source((X, y, w) if w is not None else (X, y), n_outputs=k)
        U = np.linalg.qr(rng.standard_normal((d, 1)))[0]
        V = np.linalg.qr(rng.standard_normal((k, 1)))[0]
        Omega = fill(np.zeros((k, 0)), V, min(2, max(k - 1, 1)), rng)
        Psi = fill(np.zeros((d, 0)), U, 2, rng)
        req = PassRequest(loss=cfg.loss, U=U, s=np.ones(1), V=V, b=np.zeros(k), Omega=Omega,
                          Psi=Psi, class_weights=cfg.class_weights, keep_projections=True,
                          dense_gradient=self.dense_hint, dual_scale=0.5)
        res = None
        for path in ("csc", "csr"):
            with CHOOSER.forced(path):
                res = gradient_pass(tiny, req, backend=cfg.backend)
        proj = res.projections
        A = np.concatenate([p_.XQ for p_ in proj], axis=0)
        N0 = np.zeros((A.shape[1], k))
        N0[0] = V[:, 0]
        refine(A, [p_.targets for p_ in proj], [p_.weights for p_ in proj], N0, np.zeros(k),
               RefineSettings(loss=cfg.loss, lam=0.1, tol=1e-3, max_iter=3,
                              class_weights=cfg.class_weights))

    def _floor_after_first_pass(self, rec: dict) -> None:
        """Measure the floor again once a pass has run (the store's readers, thread pools
        and caches now exist): the resident set after freed memory went back, less the
        state's arrays. Kept in the state before any checkpoint, so a resume plans alike.
        Measured: 8-16 MiB above the floor taken before the first pass."""
        st = self.state
        release_freed_memory()
        held = sum(int(np.asarray(getattr(st, n)).nbytes) for n in _ARRAYS)
        floor = process_floor() - held
        floor -= floor % FLOOR_QUANTUM
        if floor > int(st.memory_floor or 0):
            st.memory_floor = int(floor)
        rec["memory_floor"] = int(st.memory_floor)

    def _plan(self, *, rank: int, omega: int, psi: int, keep: bool, dense: bool | None,
              extra: int = 0) -> Plan:
        cfg = self.config
        budget = parse_memory(cfg.memory)  # None: the default budget
        slack = int(_SLACK_SHARE * budget) if self._binding else 0
        return plan_blocks(self.source, budget=budget, rank=rank, omega_cols=omega,
                           psi_cols=psi, keep_projections=keep, dense_gradient=dense,
                           backend=cfg.backend, floor=int(self.state.memory_floor or 0),
                           extra_bytes=extra + slack)

    def _refine_mode(self, q: int, plan: Plan | None = None) -> str:
        """Where the refinement works, from what the budget leaves.

        The refinement runs after the pass, when its blocks are gone: what is
        left is the budget less the process floor and the model, accumulators
        and held arrays of the plan. ``"memory"``: the projections, their
        concatenated copy and the n x k scores of its iterates fit (the
        fastest); ``"blocks"``: the n x q projections fit but not the scores, so
        the refinement streams over the projection blocks in memory;
        ``"scratch"``: the pass writes the projections to scratch files and the
        refinement streams them from disk (:mod:`ranktide.solver.refine_stream`).
        The choice depends only on the data's shape, the budget, the floor kept
        in the state and the widths, so a resumed run makes the same one.
        """
        plan = self.plan if plan is None else plan
        n, k = self.n, self.k
        if not plan.projections_fit:
            return "scratch"
        left = plan.work_bytes - plan.breakdown.get("model", 0) \
            - plan.breakdown.get("accumulators", 0) - plan.breakdown.get("dense_gradient", 0)
        # the projections and their concatenated copy (2 q), and six n x k arrays of the
        # in-memory refinement (scores of two iterates, residual, probabilities and their
        # temporaries): measured 957 MiB of a 954 MiB budget with five counted
        if 8 * n * (2 * q + 6 * k) <= left:
            return "memory"
        # the streamed refinement's per-block temporaries (about 3 x rows x (k + q)) take
        # the room the pass's blocks leave; but projections held in memory that crowd out
        # the row sample leave only the exact refinement, tens of streams over all n rows
        # (measured at 600k rows: 35 s against 0.8 s sampled): they go to scratch instead
        model = plan.breakdown.get("model", 0)
        if (self._sample_rows(q, plan.work_bytes - model - 8 * n * q) == 0
                and self._sample_rows(q, plan.work_bytes - model)):
            return "scratch"
        return "blocks"

    def _krylov_bytes(self, copies: int = 3) -> int:
        """Bytes of ``copies`` copies of the lam_max products (the plan of the step's peak
        holds three, see :meth:`_held_bytes`); free again once the first refinement starts."""
        st = self.state
        return copies * 8 * (st.K_R.size + st.K_GR.size + st.K_L.size + st.K_GtL.size)

    def _refine_room(self, plan: Plan, spent: int = 0) -> int:
        """Bytes the budget leaves the refinement under ``plan`` once the pass's blocks and
        accumulators are gone: less the model and the projections kept in memory, plus
        ``spent`` bytes the plan held that are free again."""
        return (plan.work_bytes - plan.breakdown.get("model", 0)
                - plan.breakdown.get("projections", 0) + int(spent))

    def _sample_plan(self, q: int, held: int) -> tuple[int, Plan | None]:
        """Rows of a sample the pass keeps for a refinement checked by the next pass
        (0: no room), and the pass's plan holding them: no projections beside the
        sample's, whose rows, and targets (at most ``k`` values a row), count as held."""
        st = self.state
        lean = self._plan(rank=st.rank, omega=st.Omega.shape[1], psi=st.Psi.shape[1],
                          keep=False, dense=self.dense, extra=held)
        rows = self._sample_rows(q, self._refine_room(lean, self._krylov_bytes()))
        if not rows:
            return 0, None
        kept = self._kept_bytes(rows, q)
        return rows, self._plan(rank=st.rank, omega=st.Omega.shape[1], psi=st.Psi.shape[1],
                                keep=False, dense=self.dense, extra=held + kept)

    def _kept_bytes(self, rows: int, q: int) -> int:
        """Bytes of a kept row sample: its projections, targets (at most ``k`` values a
        row) and weights."""
        return 8 * int(rows) * (q + self.k + 2)

    def _sample_rows(self, q: int, room: int) -> int:
        """Rows of the refinement's sample when ``room`` bytes are left to it
        (:func:`ranktide.solver.refinement.sample_rows`)."""
        cfg = self.config
        return sample_rows(n=self.n, q=q, k=self.k, loss=cfg.loss, budget=self._budget,
                           configured=cfg.refine_sample_rows,
                           grown=self.state.refine_sample_rows, room=room)

    def _refine_block_rows(self, plan: Plan, q: int) -> int:
        """Most rows per block for the refinement streamed over in-memory projection
        blocks: its per-block temporaries (about five n_b x (k + q) float64 arrays:
        scores of two iterates, probabilities, residual, products) must fit beside the
        projections. Measured (600k rows, k = 500, q = 46, 17597-row blocks): the
        refinement added 300 MiB to the resident set, 4.3 x n_b x k x 8 bytes."""
        left = plan.work_bytes - sum(v for name, v in plan.breakdown.items()
                                     if name not in ("blocks", "partials"))
        return max(128, int(left // (5 * 8 * (self.k + q))))

    def _held_bytes(self, depth: int, *, during: bool = False) -> int:
        """Arrays held beside the model by a pass that uses ``depth`` momentum factors.

        ``during=False``: at the step's peak after the pass (its blocks gone), when the
        lam_max products count three times (kept, their union with the pass's new
        products, the Ritz step's rotated copies) and the state as it was before the
        step (kept for a rollback) sits beside its replacements. ``during=True``: while
        the pass reads blocks, when the products are held once and the old state's
        arrays cost only where the step already replaced them (``Psi``, ``Omega``, a
        narrowed ``U_prev``). Measured at 12 M rows, 2^18 features, 1 GB: planning the
        blocks for the after-pass peak cut them to a third of their rows on the last
        pass at ``W = 0`` (35 columns of lam_max products), which then took 35-40 s
        against 19-22 s for the passes before it.
        """
        st = self.state
        held = (8 * self.d * int(sum(st.U_prev_cols[:depth]))
                + self._krylov_bytes(1 if during else 3))
        before = (self._before or {}).values()
        if during:
            now = {id(getattr(st, name)) for name in _ARRAYS}
            before = [v for v in before if id(v) not in now]
        held += sum(int(getattr(v, "nbytes", 0)) for v in before)
        return held

    def _pass_block_rows(self, plan: Plan, *, depth: int, keep: bool, kept: int = 0) -> int:
        """Rows per block of this pass: planned for what is held while it reads blocks
        (:meth:`_held_bytes` with ``during=True``, and ``kept`` bytes of a kept row
        sample). ``plan`` (for the after-pass peak) has already shown that the rest fits
        once the blocks are gone, so the larger of the two block sizes holds."""
        st = self.state
        during = self._plan(rank=st.rank, omega=st.Omega.shape[1], psi=st.Psi.shape[1],
                            keep=keep, dense=self.dense,
                            extra=self._held_bytes(depth, during=True) + kept)
        return max(int(plan.block_rows), int(during.block_rows))

    def _widths(self, p: int, pp: int, keep: bool) -> tuple[int, int, Plan | None]:
        """Rotations and momentum factors this pass can hold in a binding budget
        (:func:`ranktide.solver.widths.shrink_widths`; the configured ones when the
        budget does not bind, with no plan)."""
        cfg, st = self.config, self.state
        rot = st.rank if cfg.rotation_size is None else min(st.rank, cfg.rotation_size)
        depth = min(max(0, int(cfg.momentum)), len(st.U_prev_cols))
        if not self._binding:
            return rot, depth, None
        return shrink_widths(
            lambda psi, dep: self._plan(rank=st.rank, omega=p, psi=psi, keep=keep,
                                        dense=self.dense, extra=self._held_bytes(dep)),
            d=self.d, n=self.n, rank=st.rank, rotations=rot, expand=pp,
            momentum_cols=st.U_prev_cols, depth=depth, keep=keep)
