"""The greedy solver's refinement after a pass: on the pass's projections, exactly or on a
row sample (checked at once, or by the next pass), and the new factors from its answer.

:class:`OuterRefinement` is a mixin of :class:`ranktide.solver.greedy.GreedySolver`; it
reads the solver's ``config``, ``state``, ``plan``, ``n``, ``d``, ``k``, ``_mode``,
``_rng``, ``_binding``, ``_depth_next``, ``progress`` and ``refine_progress`` and the
memory planning's methods (:class:`ranktide.solver.memory_plan.MemoryPlanning`).
"""

from __future__ import annotations

import time
from typing import Any

import numpy as np
from ranktide.kernels.svd import qr_tall, svd
from ranktide.passes.budget import release_freed_memory
from ranktide.passes.projections import MemoryProjections, ScratchProjections
from ranktide.solver.deferred_check import hold_unchecked
from ranktide.solver.refine_common import RefineSettings
from ranktide.solver.refine_sample import draw_sample
from ranktide.solver.refinement import RefineBar, refine_kept_sample, refine_projections

__all__ = ["OuterRefinement"]

# The refinement also stops once the decrease of F over its last check interval is at
# most this fraction of its whole decrease (``RefineSettings.stall``): the outer
# loop gains nothing from a subproblem solved past its subspace's worth. Measured on the
# planted softmax problem of tools/bench_solver.py: relative suboptimality 1e-4 reached
# (n = 5000, d = 2000, k = 50) after 40 passes / 13.4 s with the inner certificate alone,
# 40 / 12.4 s with 0.01, 39 / 11.4 s with 0.2 and 35 / 7.7 s with 0.5; at n = d = 20000,
# k = 200 the objective after 30 passes was 3.75281 (122 s) with the certificate alone,
# 3.75228 (87 s) with 0.2 and 3.74986 (74 s) with 0.5. On the smaller problem a cap of 10
# inner steps did as well as 0.5 and a cap of 5 stalled the outer loop.
_INNER_STALL = 0.5


class OuterRefinement:
    """The refinement of the greedy solver's outer iteration (see the module docstring)."""

    def _kept_sample(self, q: int, held: int, plan):
        """The rows the pass keeps for a refinement checked by the next pass, drawn now
        from the solver's generator, and the plan that holds them; ``(plan, None)`` when
        the refinement is checked at once (``refine_check``, an objective that rose at
        this lam, or no room for a sample)."""
        cfg, st = self.config, self.state
        if cfg.refine_check != "next_pass" or st.check_at_once:
            return plan, None
        rows, kept_plan = self._sample_plan(q, held)
        if not rows:
            return plan, None
        sample = draw_sample(self.n, rows, self._rng)
        st.rng_state = self._rng.bit_generator.state
        return kept_plan, sample

    def _inner_tol(self, rel_gap: float) -> float:
        # loose early, tight late: a tenth of the current relative gap, never above 1e-2
        # nor below a twentieth of the outer tolerance. Measured (softmax, n = 400-1000,
        # d = 60-200, k = 8-30, tol 1e-6): a hundredth of the gap took the same number of
        # passes (+-2) but 1.6-1.8x more inner steps, so a tenth is the faster choice.
        return float(min(1e-2, max(0.1 * rel_gap, 0.05 * self.config.tol)))

    def _refine(self, req, res, rel_gap: float) -> dict:
        st = self.state
        r_old = req.U.shape[1]
        q = r_old + req.Psi.shape[1]
        proj = res.projections
        N0 = np.zeros((q, self.k))
        N0[:r_old] = req.s[:, None] * req.V.T
        t0 = time.perf_counter()
        # W != 0 from here: the lam_max products are spent, and their room (counted three
        # times in the pass's plan) goes to the refinement's sample
        spent = self._krylov_bytes()
        st.set_krylov(None)
        if self._binding:
            release_freed_memory()  # the pass's blocks are gone: give their pages back
        mode = "sample" if self._mode == "sample" else self._refine_mode(q)
        out, sample_info = self._run_refinement(req, res, proj, mode, N0, rel_gap, spent)
        secs = time.perf_counter() - t0
        if isinstance(proj, list):
            # the n x q projections are spent: free them before the d x q work below (at 600k
            # rows they were alive through it, the peak's last 16 MiB over the budget)
            proj.clear()
        depth = self._depth_next
        keep = st.momentum_factors()[: depth - 1] if depth > 1 else []
        st.U_prev = np.hstack([req.U, *keep]) if depth else np.zeros((self.d, 0))
        st.U_prev_cols = [req.U.shape[1], *(f.shape[1] for f in keep)] if depth else []
        # Q A with Q = [U, Psi], without a d x q copy of Q
        U_new = req.U @ out.A[:r_old] + req.Psi @ out.A[r_old:]
        # re-orthonormalize against rounding of the product Q A
        Uq, Ur = qr_tall(U_new, overwrite=True)
        del U_new
        uu, ss, vvt = svd(Ur * out.s)
        st.U = Uq @ uu
        del Uq
        st.s = ss
        st.V = out.B @ vvt.T
        keep = st.s > 0
        st.U, st.s, st.V = st.U[:, keep], st.s[keep], st.V[:, keep]
        st.b = out.b
        st.objective = out.objective
        st.outer_iterations += 1
        new = np.sum(out.A[r_old:] ** 2, axis=0) > 0.5 if out.A.shape[1] else np.zeros(0, bool)
        return {"refine_iterations": out.iterations, "refine_seconds": secs, "refine_mode": mode,
                "refine_converged": out.converged, "refine_gap": out.gap_estimate,
                "atoms_added": int(np.sum(new)),
                "atoms_sv": [float(x) for x in out.s[new]],
                "objective_after": out.objective, **sample_info}

    def _run_refinement(self, req, res, proj, mode: str, N0: np.ndarray, rel_gap: float,
                        spent: int = 0):
        """Exact or sampled refinement (:mod:`ranktide.solver.refinement`) on the projections
        (``spent``: bytes the plan held that are free again)."""
        cfg, st = self.config, self.state
        q = N0.shape[0]
        blocks: Any = None
        if mode == "scratch":
            blocks = ScratchProjections.from_files([p.path for p in proj], self.k)
        elif mode != "sample":
            blocks = MemoryProjections([(p.XQ, p.targets, p.weights) for p in proj])
        rows = self._sample_rows(q, self._refine_room(self.plan, spent)) if mode != "sample" \
            else 0
        bar = RefineBar(self.progress, st.passes)
        hook = self.refine_progress

        def progress(p: Any) -> None:
            bar.update(p)
            if hook is not None:
                hook(p)

        settings = RefineSettings(
            loss=cfg.loss, lam=st.lam, tol=self._inner_tol(rel_gap), max_iter=cfg.inner_max_iter,
            stall=_INNER_STALL, class_weights=cfg.class_weights, should_stop=self._should_stop,
            progress=progress)
        if mode == "sample":  # the pass kept the sample's rows; the next pass checks
            try:
                out, predicted = refine_kept_sample(
                    [(p.XQ, p.targets, p.weights) for p in proj], N0, req.b, settings,
                    objective=float(st.objective),
                    full_grad_N=np.hstack([res.Gt_U, res.Gt_Psi]).T, full_grad_b=res.grad_b)
            finally:
                bar.close()
            m = sum(int(p.XQ.shape[0]) for p in proj)
            hold_unchecked(st, float(st.objective), predicted, m)
            return out, {"refine_sample_rows": m, "refine_checked": False,
                         "refine_predicted": predicted}
        try:
            out, info = refine_projections(
                blocks, mode, N0, req.b, settings, rows=rows, n=self.n, rng=self._rng,
                objective=float(st.objective), full_grad_N=np.hstack([res.Gt_U, res.Gt_Psi]).T,
                full_grad_b=res.grad_b)
        finally:
            bar.close()
            if mode == "scratch":
                blocks.remove()
        if rows:  # the sample's draws move the generator: keep its position for a resume
            st.rng_state = self._rng.bit_generator.state
            st.refine_sample_rows = int(info["refine_sample_next"])
        return out, info
