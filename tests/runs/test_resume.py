"""Exact resume after kills, signals, damaged checkpoints and write errors.

Data: the first rows of scikit-learn's ``load_digits`` (shipped with the
package), as a softmax problem. The reference is an uninterrupted run with the
same settings and seed; every interrupted-and-resumed run must end with the
same model (objective to 1e-10 relative, same rank and singular values, same
total passes). Exit statuses follow the POSIX shell convention 128 + signum
(SIGINT 2 -> 130, SIGTERM 15 -> 143); usage/input errors exit 2 (DESIGN §9).

Faults are injected in subprocesses by a small driver that wraps the real
command line: it pauses (touches a file, then sleeps) inside the n-th pass,
at the start of the n-th refinement, or fails the n-th checkpoint write with
ENOSPC; pauses inside a checkpoint write use the writer's own test hook
(``RANKTIDE_TEST_PAUSE_IN_CHECKPOINT``). The test then sends SIGKILL there.
"""

from __future__ import annotations

import json
import os
import shutil
import signal
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pytest
import scipy.sparse as sp
from ranktide.cli.main import main
from ranktide.errors import ModelError

REPO = Path(__file__).resolve().parents[2]
N_ROWS = 400
# tol 1e-8 on 400 rows: the problem takes ~34 passes, room for eleven kills at one or two
# passes each after every resume (on 200 rows it converged in 21 once the softmax
# conjugate was formed without a log per entry, whose rounding had held the gap near 2e-8,
# and the run could end before a kill)
SETTINGS = [
    "--loss", "softmax", "--lam-scale", "0.05", "--tol", "1e-8", "--seed", "3",
    "--block-rows", "50", "--checkpoint-passes", "1", "--quiet",
]  # fmt: skip

DRIVER = r"""
import errno, functools, os, sys, time
from pathlib import Path

kind = os.environ.get("RT_KIND", "")
at = int(os.environ.get("RT_AT", "0"))


def pause(name):
    Path(os.environ["RT_PAUSE_FILE"]).write_text(name)
    time.sleep(60)


if sys.argv[1] == "train":  # the matrix-free path (power blocks, random refills)
    import ranktide.runs.train as T
    T.train = functools.partial(T.train, dense_gradient=False)
if kind == "refine":
    import ranktide.solver.refinement as S
    real_refine, calls = S.refine, [0]

    def refine(*a, **k):
        calls[0] += 1
        if calls[0] == at:
            pause("refine")
        return real_refine(*a, **k)

    S.refine = refine
if kind in ("pass", "slow"):
    # "pass": pause (until killed) in block 2 of the at-th pass; "slow": blocks 2.. of
    # the at-th pass take a second each, so a signal lands inside one of them
    import ranktide.passes.gradient as G
    real_run_pass, calls = G.run_pass, [0]

    def on_block(seen):
        if kind == "pass" and seen == 2:
            pause("pass")
        elif kind == "slow" and seen >= 2:
            Path(os.environ["RT_PAUSE_FILE"]).write_text(str(seen))
            time.sleep(1.0)

    def run_pass(source, block_fn, combine, **kw):
        calls[0] += 1
        if calls[0] != at:
            return real_run_pass(source, block_fn, combine, **kw)
        seen = [0]

        def fn(block, state):
            seen[0] += 1
            on_block(seen[0])
            return block_fn(block, state)

        return real_run_pass(source, fn, combine, **kw)

    G.run_pass = run_pass
if kind == "enospc":
    import ranktide.runs.checkpoint as C
    real_save, calls = C.save_npz, [0]

    def save_npz(path, arrays):
        calls[0] += 1
        if calls[0] == at:
            raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC))
        return real_save(path, arrays)

    C.save_npz = save_npz
from ranktide.cli.main import main
sys.exit(main(sys.argv[1:]))
"""


# ---------------------------------------------------------------- fixtures
@pytest.fixture(scope="module")
def work(tmp_path_factory):
    from ranktide.runs.train import train
    from ranktide.store import write_store
    from sklearn.datasets import load_digits

    root = tmp_path_factory.mktemp("resume")
    X, y = load_digits(return_X_y=True)  # scikit-learn's shipped digits data
    X = sp.csr_matrix((X[:N_ROWS] / 16.0).astype(np.float32))
    y = y[:N_ROWS].astype(np.int32)
    write_store(root / "s.zarr", X, y, kind="classes").close()
    write_store(root / "other.zarr", X[::-1].tocsr(), y[::-1].copy(), kind="classes").close()
    (root / "driver.py").write_text(DRIVER)
    ref = train(
        str(root / "s.zarr"), loss="softmax", lam_scale=0.05, tol=1e-8, seed=3, block_rows=50,
        dense_gradient=False, out=root / "ref", checkpoint_passes=1,
    )  # fmt: skip
    assert ref.status == "converged"
    return root, ref


def _driver(work_root: Path, args: list[str], **env: str) -> subprocess.Popen:
    full_env = dict(os.environ, **env)
    return subprocess.Popen(
        [sys.executable, str(work_root / "driver.py"), *args],
        cwd=REPO, env=full_env, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True,
    )  # fmt: skip


def _train_args(root: Path, run: Path, *extra: str) -> list[str]:
    return ["train", str(root / "s.zarr"), *SETTINGS, "--out", str(run), *extra]


def _history_lines(run: Path) -> int:
    try:
        return sum(1 for line in (run / "history.jsonl").read_text().splitlines() if line)
    except FileNotFoundError:
        return 0


def _checkpointed_history(run: Path) -> int:
    try:
        latest = (run / "checkpoints" / "newest.txt").read_text().strip()
        meta = json.loads((run / "checkpoints" / latest / "meta.json").read_text())
        return int(meta["meta"]["history_len"])
    except (FileNotFoundError, KeyError, ValueError):
        return 0


def _wait(proc: subprocess.Popen, ready, what: str, timeout: float = 120.0) -> bool:
    """Wait until ``ready()``; False if the process ended first."""
    deadline = time.monotonic() + timeout
    while not ready():
        if proc.poll() is not None:
            return False
        if time.monotonic() > deadline:
            proc.kill()
            proc.wait()
            pytest.fail(f"timed out waiting for {what}")
        time.sleep(0.02)
    return True


def _final_model(run: Path):
    from ranktide.model import load_model

    return load_model(run / "model")


def _assert_same_model(run: Path, ref) -> None:
    model = _final_model(run)
    history = [h for h in map(json.loads, (run / "history.jsonl").read_text().splitlines())]
    passes = [h["pass"] for h in history if h.get("kind") == "pass"]
    # every pass logged once, in order, as in the uninterrupted run
    assert passes == [h["pass"] for h in ref.history]
    assert model.s.shape == ref.model.s.shape  # same rank
    np.testing.assert_allclose(model.s, ref.model.s, rtol=1e-10, atol=0)
    np.testing.assert_allclose(model.b, ref.model.b, rtol=1e-10, atol=1e-12)
    W = model.U @ (model.s[:, None] * model.V.T)
    W_ref = ref.model.U @ (ref.model.s[:, None] * ref.model.V.T)
    np.testing.assert_allclose(W, W_ref, rtol=0, atol=1e-10 * np.abs(W_ref).max())
    obj = float(model.meta["objective"])
    assert abs(obj - ref.objective) <= 1e-10 * abs(ref.objective)
    assert int(model.meta["passes"]) == ref.passes


# ---------------------------------------------------------------- kills
def test_sigkill_at_seeded_moments_then_resume_is_exact(work):
    root, ref = work
    run = root / "killed"
    rng = np.random.default_rng(20261201)
    kinds = ["pass", "refine", "ckpt-write", "ckpt-publish", "timer"]
    plan = [kinds[i] for i in rng.permutation(np.arange(11) % len(kinds))]
    kills = []
    for kind in plan:
        # a run killed before its first checkpoint cannot be resumed: it is started again
        started = any((run / "checkpoints").glob("save-*"))
        args = ["resume", str(run), "--quiet"] if started else _train_args(root, run, "--overwrite")
        at = int(rng.integers(1, 3))
        pause = root / f"paused-{len(kills)}"
        env = {"RT_PAUSE_FILE": str(pause)}
        if kind in ("pass", "refine"):
            env.update(RT_KIND=kind, RT_AT=str(at))
        elif kind.startswith("ckpt"):
            env.update(
                RANKTIDE_TEST_PAUSE_IN_CHECKPOINT=str(pause),
                RANKTIDE_TEST_PAUSE_SAVE=str(at),
                RANKTIDE_TEST_PAUSE_STAGE=kind.split("-")[1],
            )
        base = _checkpointed_history(run)
        proc = _driver(root, args, **env)
        if kind == "timer":
            want = base + at
            ok = _wait(proc, lambda want=want: _history_lines(run) >= want, "history")
            time.sleep(float(rng.uniform(0.0, 0.3)))
        else:
            ok = _wait(proc, pause.exists, f"pause in {kind}")
        if not ok or proc.poll() is not None:
            out, err = proc.communicate()
            assert proc.returncode == 0, err
            break  # the run finished before this moment came
        proc.send_signal(signal.SIGKILL)
        proc.communicate()
        assert proc.returncode == -signal.SIGKILL
        kills.append(kind)
    assert len(kills) >= 10, kills
    assert {"pass", "refine", "ckpt-write", "ckpt-publish"} <= set(kills)
    proc = _driver(root, ["resume", str(run), "--quiet"])
    out, err = proc.communicate(timeout=300)
    assert proc.returncode == 0, err
    _assert_same_model(run, ref)


# ---------------------------------------------------------------- signals
def test_sigterm_and_sigint_checkpoint_and_say_how_to_resume(work):
    root, ref = work
    run = root / "signalled"
    proc = _driver(root, _train_args(root, run))
    assert _wait(proc, lambda: _history_lines(run) >= 3, "3 passes")
    proc.send_signal(signal.SIGTERM)
    out, err = proc.communicate(timeout=120)
    assert proc.returncode == 143, err
    assert f"ranktide: interrupted; resume with: ranktide resume {run}" in err
    assert not (run / "model").exists()  # an interrupted run writes no final model
    n = _checkpointed_history(run)
    assert n == _history_lines(run)  # the stop checkpoint covers every logged pass

    proc = _driver(root, ["resume", str(run), "--quiet"])
    assert _wait(proc, lambda: _history_lines(run) >= n + 2, "2 more passes")
    proc.send_signal(signal.SIGINT)
    out, err = proc.communicate(timeout=120)
    assert proc.returncode == 130, err
    assert "resume with: ranktide resume" in err

    assert main(["resume", str(run), "--quiet"]) == 0
    _assert_same_model(run, ref)


def test_signal_inside_a_pass_abandons_it_at_the_block_boundary(work):
    """SIGTERM while block 2 of pass 4 computes: that block finishes, blocks 3-4 are
    abandoned, the checkpoint holds the state before pass 4 and resume is exact."""
    root, ref = work
    run = root / "midpass"
    pause = root / "midpass-paused"
    t0 = time.monotonic()
    proc = _driver(root, _train_args(root, run), RT_KIND="slow", RT_AT="4",
                   RT_PAUSE_FILE=str(pause))  # fmt: skip
    assert _wait(proc, pause.exists, "block 2 of pass 4")
    proc.send_signal(signal.SIGTERM)
    out, err = proc.communicate(timeout=120)
    assert proc.returncode == 143, err
    assert f"resume with: ranktide resume {run}" in err
    assert pause.read_text() == "2"  # no later block of the pass started
    assert _history_lines(run) == 3  # pass 4 never finished, so it is not logged
    assert _checkpointed_history(run) == 3
    assert time.monotonic() - t0 < 60
    assert main(["resume", str(run), "--quiet"]) == 0
    _assert_same_model(run, ref)


@pytest.mark.parametrize("where", ["block", "refine"])
def test_stop_inside_a_pass_or_a_refinement_restores_the_state(work, monkeypatch, where):
    """In process: a stop request during a block (of pass 5), or during the third
    refinement, leaves the solver state as it was before that outer iteration (that is
    what is checkpointed), and resuming reaches the uninterrupted model."""
    import ranktide.passes.gradient as G
    import ranktide.solver.refinement as S
    from ranktide.runs.resume import resume
    from ranktide.runs.train import train
    from ranktide.signals import StopFlag

    root, ref = work
    flag, passes, refines = StopFlag(), [0], [0]
    real_run_pass, real_refine = G.run_pass, S.refine

    def run_pass(source, block_fn, combine, **k):
        passes[0] += 1
        if where != "block" or passes[0] != 5:
            return real_run_pass(source, block_fn, combine, **k)

        def fn(block, state):
            if block.start == 50:
                flag.request(signal.SIGINT)
            return block_fn(block, state)

        return real_run_pass(source, fn, combine, **k)

    def refine(*a, **k):
        refines[0] += 1
        if where == "refine" and refines[0] == 3:
            flag.request(signal.SIGINT)
        return real_refine(*a, **k)

    monkeypatch.setattr(G, "run_pass", run_pass)
    monkeypatch.setattr(S, "refine", refine)
    run = root / f"stopped-{where}"
    part = train(str(root / "s.zarr"), out=run, stop=flag, loss="softmax", lam_scale=0.05,
                 tol=1e-8, seed=3, block_rows=50, dense_gradient=False, checkpoint_passes=1)
    monkeypatch.undo()
    assert part.status == "interrupted"
    logged = _history_lines(run)
    refined = [h["pass"] for h in ref.history if "refine_iterations" in h]
    assert logged == (4 if where == "block" else refined[2] - 1)
    assert _checkpointed_history(run) == logged
    # the checkpointed state is the one after the last logged pass
    ck = run / "checkpoints" / (run / "checkpoints" / "newest.txt").read_text().strip()
    meta = json.loads((ck / "meta.json").read_text())
    assert meta["meta"]["solver"]["passes"] == ref.history[logged - 1]["pass"]
    res = resume(run)
    assert res.status == "converged"
    _assert_same_model(run, ref)


# ---------------------------------------------------------------- damage
@pytest.fixture(scope="module")
def partial_run(work):
    """A run stopped by its pass budget after 12 passes (checkpoint every pass)."""
    root, _ref = work
    run = root / "partial"
    proc = _driver(root, _train_args(root, run, "--max-passes", "12"))
    out, err = proc.communicate(timeout=300)
    assert proc.returncode == 0, err
    assert "max_passes" in out
    return run


def _copy(run: Path, name: str) -> Path:
    dst = run.parent / name
    shutil.copytree(run, dst)
    return dst


def _latest(run: Path) -> Path:
    return run / "checkpoints" / (run / "checkpoints" / "newest.txt").read_text().strip()


def _flip(path: Path) -> None:
    raw = bytearray(path.read_bytes())
    raw[len(raw) // 2] ^= 0xFF
    path.write_bytes(bytes(raw))


def test_flipped_byte_falls_back_and_budget_can_grow(work, partial_run, capsys):
    root, ref = work
    run = _copy(partial_run, "flipped")
    _flip(_latest(run) / "state.npz")
    assert main(["resume", str(run), "--max-passes", "100", "--quiet"]) == 0
    err = capsys.readouterr().err
    assert "warning: checkpoint save-" in err and "falling back to save-" in err
    _assert_same_model(run, ref)


def test_truncated_latest_falls_back(work, partial_run, capsys):
    root, ref = work
    run = _copy(partial_run, "truncated")
    state = _latest(run) / "state.npz"
    state.write_bytes(state.read_bytes()[:100])
    assert main(["resume", str(run), "--max-passes", "100", "--quiet"]) == 0
    assert "falling back" in capsys.readouterr().err
    _assert_same_model(run, ref)
    # ... and a model whose .npz holds a pickled object array is refused
    np.savez(run / "model" / "factors.npz", U=np.array([{"x": 1}], dtype=object))
    with pytest.raises(ModelError, match="object"):
        _final_model(run)


def test_no_valid_checkpoint_is_exit_2(partial_run, capsys):
    run = _copy(partial_run, "ruined")
    for ckpt in (run / "checkpoints").glob("save-*"):
        _flip(ckpt / "state.npz")
    assert main(["resume", str(run), "--quiet"]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert err[-1].startswith("ranktide resume: error: ") and "no valid checkpoint" in err[-1]


def test_refuses_other_store_changed_setting_newer_format(work, partial_run, capsys):
    root, _ref = work
    run = _copy(partial_run, "refused")
    before = sorted(p.name for p in (run / "checkpoints").iterdir())
    assert main(["resume", str(run), "--store", str(root / "other.zarr")]) == 2
    assert "fingerprint" in capsys.readouterr().err

    cfg_path = run / "config.json"
    original = cfg_path.read_text()
    cfg = json.loads(original)
    cfg["settings"]["lam_scale"] = 0.5
    cfg["settings"]["seed"] = 4
    cfg_path.write_text(json.dumps(cfg))
    assert main(["resume", str(run)]) == 2
    line = capsys.readouterr().err.strip()
    assert "lam_scale (saved 0.05, now 0.5)" in line and "seed (saved 3, now 4)" in line
    assert "\n" not in line

    cfg = json.loads(original)
    cfg["format_version"] = 99
    cfg_path.write_text(json.dumps(cfg))
    assert main(["resume", str(run)]) == 2
    assert "newer than this ranktide supports" in capsys.readouterr().err
    # nothing was touched by the refused attempts
    assert sorted(p.name for p in (run / "checkpoints").iterdir()) == before


# ---------------------------------------------------------------- write errors
def test_disk_full_during_checkpoint_stops_cleanly(work):
    root, _ref = work
    run = root / "diskfull"
    proc = _driver(root, _train_args(root, run), RT_KIND="enospc", RT_AT="4")
    out, err = proc.communicate(timeout=300)
    assert proc.returncode == 2, err
    lines = err.strip().splitlines()
    assert len(lines) == 1 and "No space left on device" in lines[0]
    assert "ranktide resume" in lines[0]
    assert _latest(run).name == "save-00000003"  # the three written before stay valid
    assert not any(p.name.startswith(".save-") for p in (run / "checkpoints").iterdir())
    from ranktide.runs.checkpoint import CheckpointManager

    _arrays, meta, path = CheckpointManager(run).load_latest()  # verifies the checksums
    assert path.name == "save-00000003" and meta["solver"]["passes"] == 3


# ---------------------------------------------------------------- regularization path
def test_path_stopped_at_each_kind_of_moment_resumes_exactly(work):
    """A path run stopped (stop flag) inside the lam_max phase, inside a value and at a
    value's end resumes to the uninterrupted path: same points, same best model."""
    from ranktide.runs.resume import resume
    from ranktide.runs.train import train
    from ranktide.signals import StopFlag
    from ranktide.store import write_store
    from sklearn.datasets import load_digits

    root, _ref = work
    X, y = load_digits(return_X_y=True)  # rows after the training rows, for validation
    Xv = sp.csr_matrix((X[N_ROWS : N_ROWS + 100] / 16.0).astype(np.float32))
    write_store(root / "valid.zarr", Xv, y[N_ROWS : N_ROWS + 100].astype(np.int32),
                kind="classes").close()  # fmt: skip
    kw = {
        "loss": "softmax", "path_steps": 3, "path_floor": 0.1, "valid": str(root / "valid.zarr"),
        "tol": 1e-5, "seed": 5, "block_rows": 50, "dense_gradient": False,
        "checkpoint_passes": 1,
    }  # fmt: skip
    full = train(str(root / "s.zarr"), out=root / "path-ref", **kw)
    assert len(full.path) >= 2
    step_end = sum(p.passes for p in full.path[:1]) + (
        full.passes - sum(p.passes for p in full.path)
    )
    for cut in (1, step_end + 1):  # inside the lam_max phase; inside the second value
        flag = StopFlag()
        seen = [0]

        def cb(rec, flag=flag, seen=seen, cut=cut):
            seen[0] += 1
            if seen[0] == cut:
                flag.request(signal.SIGTERM)

        run = root / f"path-{cut}"
        part = train(str(root / "s.zarr"), out=run, stop=flag, callback=cb, **kw)
        assert part.status == "interrupted"
        res = resume(run)
        assert [p.lam for p in res.path] == [p.lam for p in full.path]
        assert [p.passes for p in res.path] == [p.passes for p in full.path]
        assert [p.score for p in res.path] == [p.score for p in full.path]
        assert res.best_index == full.best_index and res.passes == full.passes
        np.testing.assert_allclose(res.model.s, full.model.s, rtol=1e-10, atol=0)
        assert abs(res.objective - full.objective) <= 1e-10 * abs(full.objective)
