"""The checkpoint schedule kept inside a long refinement, and an exact resume from it.

A checkpoint due while a refinement runs holds the solver state before the outer
iteration in progress (GreedySolver.state_before_step); resuming it redoes that
iteration. Reference: the uninterrupted run on the same store (scikit-learn's
shipped digits data), which the resumed run must reproduce bit for bit.
"""

from __future__ import annotations

import signal

import numpy as np
import pytest
import scipy.sparse as sp
from ranktide.runs.resume import resume
from ranktide.runs.rundir import RunRecorder
from ranktide.runs.train import train
from ranktide.signals import StopFlag
from ranktide.store import write_store
from sklearn.datasets import load_digits

SETTINGS = dict(loss="softmax", lam_scale=0.05, tol=1e-6, seed=3, block_rows=50,
                dense_gradient=False)


@pytest.fixture(scope="module")
def store(tmp_path_factory):
    root = tmp_path_factory.mktemp("ckpt-refine")
    X, y = load_digits(return_X_y=True)  # scikit-learn's shipped digits data
    X = sp.csr_matrix((X[:200] / 16.0).astype(np.float32))
    write_store(root / "s.zarr", X, y[:200].astype(np.int32), kind="classes").close()
    return root


def test_checkpoints_due_inside_a_refinement_and_an_exact_resume(store, monkeypatch):
    ref = train(str(store / "s.zarr"), **SETTINGS)
    flag, written = StopFlag(), []
    real = RunRecorder.during_step

    def spy(self, state):
        ok = real(self, state)
        if ok:
            written.append((state.passes, self.run.history_len))
            if state.passes >= 6:
                flag.request(signal.SIGINT)  # stop inside this refinement
        return ok

    monkeypatch.setattr(RunRecorder, "during_step", spy)
    run = store / "run"
    # every refinement step finds a checkpoint due (the clock schedule is a nanosecond)
    part = train(str(store / "s.zarr"), out=run, stop=flag, checkpoint_seconds=1e-9,
                 **SETTINGS)
    monkeypatch.undo()
    assert part.status == "interrupted"
    assert written, "no checkpoint was written inside a refinement"
    # each holds the state after the passes already logged (the iteration in progress
    # is redone on resume)
    assert all(passes == logged for passes, logged in written)
    res = resume(run)
    assert res.status == "converged"
    # the resumed run reproduces the uninterrupted one exactly
    assert res.passes == ref.passes
    np.testing.assert_array_equal(res.model.s, ref.model.s)
    np.testing.assert_array_equal(res.model.b, ref.model.b)
    assert res.objective == ref.objective
