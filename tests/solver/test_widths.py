"""A binding memory budget sets how many directions a pass may carry.

When the model, its accumulators and the pass's blocks do not fit beside the
momentum factors and rotation directions, the solver drops momentum factors,
then halves the rotations; a rank the budget cannot hold at all stops with one
line. The plans are the project's own (ranktide.passes.budget); the check here
is that every plan the solver accepts fits the budget it was given, that the
widths never shrink as the budget grows, and that the full widths come back
when the budget is large. Rule of thumb for the sizes: common practice, no source.
"""

from __future__ import annotations

from dataclasses import replace

import numpy as np
import pytest
import scipy.sparse as sp
from ranktide.errors import ConfigError
from ranktide.solver.config import SolverConfig
from ranktide.solver.greedy import GreedySolver


def _solver_at_rank(r: int, depth: int) -> GreedySolver:
    rng = np.random.default_rng(0)
    n, d, k = 6000, 20000, 10
    X = sp.random(n, d, density=8 / d, format="csr", dtype=np.float32, random_state=0)
    y = rng.integers(0, k, n).astype(np.int32)
    cfg = SolverConfig(loss="softmax", lam=0.01, memory="4GB", momentum=depth, seed=0)
    solver = GreedySolver((X, y), cfg)
    st = solver.state
    st.U = np.linalg.qr(rng.standard_normal((solver.d, r)))[0]
    st.s = np.linspace(2.0, 1.0, r)
    st.V = np.linalg.qr(rng.standard_normal((k, r)))[0]
    st.U_prev = np.linalg.qr(rng.standard_normal((solver.d, depth * r)))[0]
    st.U_prev_cols = [r] * depth
    st.memory_floor = 0  # plans on the budget alone (the process's floor is stated apart)
    return solver


def test_widths_shrink_with_the_budget_and_come_back_when_it_grows():
    r, depth = 12, 3
    solver = _solver_at_rank(r, depth)
    cfg = solver.config
    seen = []
    for mb in (1, 2, 3, 4, 6, 8, 12, 16, 24, 32, 48, 64, 128):
        budget = mb * 2**20
        solver.config = replace(cfg, memory=budget)
        rot, dep, plan = solver._widths(6, 6, True)
        seen.append((mb, rot, dep, plan))
        if plan is not None:
            # what the solver accepts fits the budget (its slack included)
            assert plan.peak_bytes <= budget, (mb, plan.breakdown)
            assert 0 <= dep <= depth and 0 <= rot <= r
    widths = [(rot, dep) for _, rot, dep, plan in seen if plan is not None]
    assert widths, "no budget held any width"
    # more budget never means fewer directions (momentum first, then rotations)
    keys = [dep * 1000 + rot for rot, dep in widths]
    assert keys == sorted(keys)
    assert widths[-1] == (r, depth)  # a large budget keeps the configured widths
    assert any(dep < depth for rot, dep in widths)  # and a small one cut some
    assert seen[0][3] is None  # 1 MiB holds nothing at rank 12


def test_a_rank_the_budget_cannot_hold_stops_with_one_line():
    solver = _solver_at_rank(12, 1)
    solver.config = replace(solver.config, memory=2**20)
    solver.state.phase = "fit"
    with pytest.raises(ConfigError) as err:
        solver._run_pass()
    msg = str(err.value)
    assert "\n" not in msg and "at rank 12" in msg and "raise --memory" in msg
