"""A sampled refinement checked by the next pass (``SolverConfig.refine_check = "next_pass"``).

When the projections of every row do not fit in memory beside the
refinement's scores, checking a sampled refinement's answer at once needs the
projections of all ``n`` rows (in memory or in scratch files) and one more
stream of ``n q k`` work: about the dense work of a pass. The next pass
computes the full objective at the new model anyway, so the check can wait
for it: the state keeps the objective before the refinement and the decrease
the sample predicted, and :func:`check_last_refinement` compares them with
the pass's objective. An answer that raised the objective grows the sample
four-fold and makes the rest of this ``lam`` check at once (the exact
safeguards of :func:`ranktide.solver.refinement.refine_projections`); one
that kept less than half of its predicted decrease doubles the sample.
"""

from __future__ import annotations

from typing import Any

from ranktide.solver.refinement import sample_outcome

__all__ = ["hold_unchecked", "check_last_refinement", "clear_unchecked"]


def hold_unchecked(st: Any, objective_before: float, predicted: float, rows: int) -> None:
    """Keep in the state what the next pass checks (a :class:`SolverState`)."""
    st.unchecked_from = float(objective_before)
    st.unchecked_predicted = float(predicted)
    st.unchecked_rows = int(rows)


def clear_unchecked(st: Any) -> None:
    """Forget a pending check (a new ``lam`` changes the objective it would compare)."""
    st.unchecked_from, st.unchecked_predicted, st.unchecked_rows = None, None, 0


def check_last_refinement(st: Any, objective: float) -> dict:
    """Check the last refinement against this pass's full ``objective``.

    Parameters
    ----------
    st : SolverState
        With ``unchecked_from`` set (nothing is checked when it is None).
    objective : float
        The full objective this pass measured at the refined model.

    Returns
    -------
    dict
        ``refine_check_before`` (the objective before the refinement),
        ``refine_check_ratio`` (decrease over prediction),
        ``refine_check_decrease``, and ``refine_check_rose`` when the objective
        went up; empty when nothing was pending. The sample grows by the rule of
        :func:`ranktide.solver.refinement.sample_outcome`.
    """
    if st.unchecked_from is None:
        return {}
    before, predicted, rows = st.unchecked_from, st.unchecked_predicted or 0.0, st.unchecked_rows
    clear_unchecked(st)
    decrease = before - float(objective)
    ratio, grown = sample_outcome(decrease, predicted, rows)
    st.refine_sample_rows = max(int(st.refine_sample_rows), grown)
    rec: dict = {"refine_check_before": float(before), "refine_check_ratio": ratio,
                 "refine_check_decrease": float(decrease)}
    if decrease < 0:
        rec["refine_check_rose"] = True
        st.check_at_once = True
    return rec
