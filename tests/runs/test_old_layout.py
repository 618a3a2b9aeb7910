"""Run directories written by earlier versions (ckpt-NNNNNNNN + LATEST) still resume."""

from __future__ import annotations

import numpy as np
import pytest
import scipy.sparse as sp
from ranktide.runs.checkpoint import CheckpointManager, CheckpointWarning
from ranktide.runs.resume import resume
from ranktide.runs.train import train
from ranktide.store import write_store


def _to_old_layout(run):
    """Rename the checkpoints as earlier versions named them."""
    ck = run / "checkpoints"
    pointer = (ck / "newest.txt").read_text().strip()
    for d in ck.glob("save-*"):
        d.rename(ck / d.name.replace("save-", "ckpt-"))
    (ck / "newest.txt").unlink()
    (ck / "LATEST").write_text(pointer.replace("save-", "ckpt-") + "\n")


def test_manager_reads_an_old_layout_and_moves_it_to_the_new_names(tmp_path):
    mgr = CheckpointManager(tmp_path)
    for i in range(1, 4):
        mgr.save({"x": np.full(3, float(i))}, {"i": i})
    _to_old_layout(tmp_path)
    names = sorted(p.name for p in (tmp_path / "checkpoints").iterdir())
    assert names == ["LATEST", "ckpt-00000002", "ckpt-00000003"]
    fresh = CheckpointManager(tmp_path)
    arrays, meta, path = fresh.load_latest()
    assert meta == {"i": 3} and path.name == "ckpt-00000003"
    # a damaged newest old checkpoint falls back to the older one
    (path / "state.npz").write_bytes(b"broken")
    with pytest.warns(CheckpointWarning, match="ckpt-00000003 is not usable"):
        _a, meta, path = CheckpointManager(tmp_path).load_latest()
    assert meta == {"i": 2} and path.name == "ckpt-00000002"
    CheckpointManager(tmp_path).save({"x": np.zeros(1)}, {"i": 4})
    names = sorted(p.name for p in (tmp_path / "checkpoints").iterdir())
    # the count goes on under the new names; the old pointer is gone
    assert "save-00000004" in names and "LATEST" not in names and "newest.txt" in names
    assert (tmp_path / "checkpoints" / "newest.txt").read_text().strip() == "save-00000004"


def test_an_old_layout_run_resumes_to_the_uninterrupted_model(tmp_path):
    rng = np.random.default_rng(4)
    X = sp.random(300, 30, density=0.2, format="csr", random_state=4, dtype=np.float32)
    y = rng.integers(0, 4, 300).astype(np.int32)
    write_store(tmp_path / "s.zarr", X, y).close()
    kw = {"loss": "softmax", "lam_scale": 0.1, "tol": 1e-6, "seed": 2, "block_rows": 100,
          "dense_gradient": False, "checkpoint_passes": 1}
    full = train(str(tmp_path / "s.zarr"), out=tmp_path / "full", **kw)
    part = train(str(tmp_path / "s.zarr"), out=tmp_path / "old", max_passes=4,
                 **{k: v for k, v in kw.items()})
    assert part.passes < full.passes
    _to_old_layout(tmp_path / "old")
    res = resume(tmp_path / "old", max_passes=100)
    assert res.status == full.status and res.passes == full.passes
    np.testing.assert_allclose(res.model.s, full.model.s, rtol=1e-10, atol=0)
    assert abs(res.objective - full.objective) <= 1e-10 * abs(full.objective)
    names = {p.name for p in (tmp_path / "old" / "checkpoints").iterdir()}
    assert "newest.txt" in names and "LATEST" not in names
