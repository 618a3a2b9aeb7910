"""Checkpoint files, run directories and signal flags (no solver needed).

References: checksums are recomputed with the standard library's ``hashlib``
(FIPS 180-4 SHA-256); array files are read back with ``numpy.load`` itself
(``allow_pickle=False``); the object-array case is produced with ``numpy.savez``,
which pickles object arrays; signal numbers follow POSIX (SIGINT 2, SIGTERM 15)
and the 128 + signum exit status is the shell convention (POSIX sh, "Exit Status").
"""

from __future__ import annotations

import errno
import hashlib
import json
import os
import signal
import subprocess
import sys
import textwrap
import time
from pathlib import Path

import numpy as np
import pytest
import ranktide.runs.checkpoint as ckmod
from ranktide.errors import CheckpointError, ConfigError, OutputExistsError
from ranktide.runs.checkpoint import CheckpointManager, CheckpointSchedule, CheckpointWarning
from ranktide.runs.rundir import RUN_VERSION, RunDir, check_resume_compatible
from ranktide.signals import StopFlag, interrupted_message, stop_on_signals

REPO = Path(__file__).resolve().parents[2]


def _state(seed: int) -> tuple[dict[str, np.ndarray], dict]:
    rng = np.random.default_rng(seed)
    arrays = {
        "U": rng.standard_normal((7, 3)),
        "s": rng.random(3).astype(np.float64),
        "V": rng.standard_normal((5, 3)).astype(np.float32),
        "counts": np.arange(4, dtype=np.int64) * seed,
    }
    bitgen = np.random.default_rng(seed + 1000).bit_generator.state
    meta = {"passes": seed, "objective": float(rng.random()) / 3.0, "rng": bitgen, "path": [1, 2]}
    return arrays, meta


def _flip_byte(path: Path, offset: int) -> None:
    raw = bytearray(path.read_bytes())
    raw[offset % len(raw)] ^= 0x5A
    path.write_bytes(bytes(raw))


def _resign(ckpt: Path, mutate) -> None:
    """Rewrite meta.json after ``mutate(doc)``, with correct checksums (a forged file)."""
    doc = json.loads((ckpt / "meta.json").read_text())
    doc.pop("sha256")
    mutate(doc)
    state = ckpt / "state.npz"
    raw = state.read_bytes()
    doc["files"]["state.npz"] = {"sha256": hashlib.sha256(raw).hexdigest(), "bytes": len(raw)}
    body = json.dumps(doc, sort_keys=True, separators=(",", ":"))
    doc["sha256"] = hashlib.sha256(body.encode()).hexdigest()
    (ckpt / "meta.json").write_text(json.dumps(doc))


def _assert_same(arrays, meta, want_arrays, want_meta):
    assert sorted(arrays) == sorted(want_arrays)
    for k, v in want_arrays.items():
        assert arrays[k].dtype == v.dtype and arrays[k].shape == v.shape
        np.testing.assert_array_equal(arrays[k], v)
    assert meta == want_meta


# ---------------------------------------------------------------- round trip
def test_roundtrip_exact_and_checksums_match_hashlib(tmp_path):
    mgr = CheckpointManager(tmp_path)
    arrays, meta = _state(3)
    path = mgr.save(arrays, meta)
    assert path.name == "save-00000001"
    assert (tmp_path / "checkpoints" / "newest.txt").read_text().strip() == path.name
    # The npz is a plain numpy file (numpy.load, no pickle).
    with np.load(path / "state.npz", allow_pickle=False) as z:
        np.testing.assert_array_equal(z["U"], arrays["U"])
    doc = json.loads((path / "meta.json").read_text())
    raw = (path / "state.npz").read_bytes()
    # hashlib (FIPS 180-4) as the outside reference for the recorded checksum.
    assert doc["files"]["state.npz"]["sha256"] == hashlib.sha256(raw).hexdigest()
    assert doc["files"]["state.npz"]["bytes"] == len(raw)
    got_arrays, got_meta, got_path = CheckpointManager(tmp_path).load_latest()
    assert got_path == path
    _assert_same(got_arrays, got_meta, arrays, meta)
    # floats and the 128-bit PCG64 state survive JSON bit-exactly
    assert got_meta["objective"].hex() == meta["objective"].hex()
    rng = np.random.default_rng()
    rng.bit_generator.state = got_meta["rng"]
    np.testing.assert_array_equal(rng.random(4), np.random.default_rng(1003).random(4))


def test_numpy_scalars_in_meta_are_converted(tmp_path):
    mgr = CheckpointManager(tmp_path)
    mgr.save({"a": np.zeros(2)}, {"n": np.int64(5), "x": np.float32(0.5)})
    _a, meta, _p = mgr.load_latest()
    assert meta == {"n": 5, "x": 0.5}
    with pytest.raises(CheckpointError, match="not JSON-serializable"):
        mgr.save({"a": np.zeros(2)}, {"bad": np.zeros(3)})


def test_keeps_last_two(tmp_path):
    mgr = CheckpointManager(tmp_path)
    for i in range(1, 5):
        mgr.save(*_state(i))
    names = sorted(p.name for p in (tmp_path / "checkpoints").iterdir())
    assert names == ["newest.txt", "save-00000003", "save-00000004"]
    arrays, meta, path = mgr.load_latest()
    _assert_same(arrays, meta, *_state(4))


# ---------------------------------------------------------------- corruption
@pytest.mark.parametrize(
    "damage",
    ["flip_state", "truncate_state", "flip_meta", "delete_meta", "empty_state"],
)
def test_damaged_latest_falls_back_with_warning(tmp_path, damage):
    mgr = CheckpointManager(tmp_path)
    mgr.save(*_state(1))
    latest = mgr.save(*_state(2))
    state, meta = latest / "state.npz", latest / "meta.json"
    if damage == "flip_state":
        _flip_byte(state, state.stat().st_size // 2)
    elif damage == "truncate_state":
        state.write_bytes(state.read_bytes()[: state.stat().st_size // 3])
    elif damage == "flip_meta":
        text = meta.read_text()
        pos = text.index('"passes": 2') + len('"passes": ')
        meta.write_text(text[:pos] + "7" + text[pos + 1 :])  # still valid JSON
    elif damage == "delete_meta":
        meta.unlink()
    else:
        state.write_bytes(b"")
    fresh = CheckpointManager(tmp_path)
    with pytest.warns(
        CheckpointWarning, match=r"save-00000002 is not usable .*falling back to save-00000001"
    ):
        arrays, got_meta, path = fresh.load_latest()
    assert path.name == "save-00000001"
    _assert_same(arrays, got_meta, *_state(1))
    # The next save keeps the good fallback and drops the damaged one.
    fresh.save(*_state(5))
    names = sorted(p.name for p in (tmp_path / "checkpoints").iterdir())
    assert names == ["newest.txt", "save-00000001", "save-00000003"]


def test_no_valid_checkpoint_is_one_line_error(tmp_path):
    mgr = CheckpointManager(tmp_path)
    a = mgr.save(*_state(1))
    b = mgr.save(*_state(2))
    _flip_byte(a / "state.npz", 100)
    _flip_byte(b / "state.npz", 200)
    with (
        pytest.warns(CheckpointWarning),
        pytest.raises(CheckpointError, match="no valid checkpoint") as ei,
    ):
        CheckpointManager(tmp_path).load_latest()
    assert "\n" not in str(ei.value) and "start it again" in str(ei.value)


def test_no_checkpoint_at_all(tmp_path):
    with pytest.raises(CheckpointError, match="no checkpoint found"):
        CheckpointManager(tmp_path).load_latest()


def test_damaged_pointer_uses_newest_that_verifies(tmp_path):
    mgr = CheckpointManager(tmp_path)
    mgr.save(*_state(1))
    mgr.save(*_state(2))
    (tmp_path / "checkpoints" / "newest.txt").write_bytes(b"save-0000\xff")
    with pytest.warns(CheckpointWarning, match="newest.txt: missing or damaged"):
        arrays, meta, path = CheckpointManager(tmp_path).load_latest()
    _assert_same(arrays, meta, *_state(2))


def test_object_array_refused(tmp_path):
    mgr = CheckpointManager(tmp_path)
    with pytest.raises(CheckpointError, match="dtype object"):
        mgr.save({"x": np.array([{"a": 1}], dtype=object)}, {})
    assert not (tmp_path / "checkpoints").exists() or not list((tmp_path / "checkpoints").iterdir())
    path = mgr.save(*_state(1))
    # numpy.savez pickles an object array: forge such a checkpoint with valid checksums.
    np.savez(path / "state.npz", x=np.array([{"a": 1}, None], dtype=object))
    _resign(path, lambda doc: None)
    with pytest.raises(CheckpointError, match="object \\(pickled\\) array"):
        CheckpointManager(tmp_path).load_latest()


def test_newer_format_version_refused(tmp_path):
    mgr = CheckpointManager(tmp_path)
    mgr.save(*_state(1))
    path = mgr.save(*_state(2))
    _resign(path, lambda doc: doc.update(format_version=ckmod.CHECKPOINT_VERSION + 1))
    with pytest.raises(CheckpointError, match="newer than this ranktide supports.*upgrade"):
        CheckpointManager(tmp_path).load_latest()


# ---------------------------------------------------------------- write errors
def _enospc(*_a, **_k):
    raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC))


@pytest.mark.parametrize("target", ["save_npz", "atomic_write_bytes"])
def test_disk_full_keeps_previous(tmp_path, monkeypatch, target):
    mgr = CheckpointManager(tmp_path)
    mgr.save(*_state(1))
    before = sorted(p.name for p in (tmp_path / "checkpoints").iterdir())
    monkeypatch.setattr(ckmod, target, _enospc)
    with pytest.raises(
        CheckpointError, match="No space left on device.*free some disk space"
    ) as ei:
        mgr.save(*_state(2))
    assert "\n" not in str(ei.value) and "ranktide resume" in str(ei.value)
    monkeypatch.undo()
    after = sorted(p.name for p in (tmp_path / "checkpoints").iterdir())
    assert after == before  # no temporary left, newest.txt untouched
    arrays, meta, _p = CheckpointManager(tmp_path).load_latest()
    _assert_same(arrays, meta, *_state(1))


def test_pointer_write_failure_after_rename(tmp_path, monkeypatch):
    mgr = CheckpointManager(tmp_path)
    mgr.save(*_state(1))
    real = ckmod.atomic_write_bytes

    def failing(path, data):
        if Path(path).name == "newest.txt":
            _enospc()
        return real(path, data)

    monkeypatch.setattr(ckmod, "atomic_write_bytes", failing)
    with pytest.raises(CheckpointError, match="No space left"):
        mgr.save(*_state(2))
    monkeypatch.undo()
    # save-2 is complete but unpublished: newest.txt still names save-1 and wins.
    fresh = CheckpointManager(tmp_path)
    arrays, meta, path = fresh.load_latest()
    assert path.name == "save-00000001"
    _assert_same(arrays, meta, *_state(1))
    fresh.save(*_state(3))
    names = sorted(p.name for p in (tmp_path / "checkpoints").iterdir())
    assert names == ["newest.txt", "save-00000001", "save-00000003"]


# ---------------------------------------------------------------- kill mid-write
_WRITER = textwrap.dedent(
    """
    import sys
    import numpy as np
    from ranktide.runs.checkpoint import CheckpointManager
    mgr = CheckpointManager(sys.argv[1])
    for i in (1, 2):
        rng = np.random.default_rng(i)
        mgr.save({"x": rng.standard_normal(50_000)}, {"i": i})
    """
)


@pytest.mark.parametrize("stage", ["write", "publish"])
def test_sigkill_inside_checkpoint_write(tmp_path, stage):
    pause = tmp_path / "paused"
    env = dict(
        os.environ,
        RANKTIDE_TEST_PAUSE_IN_CHECKPOINT=str(pause),
        RANKTIDE_TEST_PAUSE_SAVE="2",
        RANKTIDE_TEST_PAUSE_STAGE=stage,
    )
    run = tmp_path / "run"
    proc = subprocess.Popen([sys.executable, "-c", _WRITER, str(run)], cwd=REPO, env=env)
    try:
        deadline = time.monotonic() + 30
        while not pause.exists():
            assert proc.poll() is None, "writer exited before reaching the pause point"
            assert time.monotonic() < deadline, "writer never reached the pause point"
            time.sleep(0.02)
        proc.send_signal(signal.SIGKILL)
    finally:
        proc.wait(timeout=30)
    assert proc.returncode == -signal.SIGKILL
    mgr = CheckpointManager(run)
    arrays, meta, path = mgr.load_latest()
    assert meta == {"i": 1} and path.name == "save-00000001"
    np.testing.assert_array_equal(arrays["x"], np.random.default_rng(1).standard_normal(50_000))
    leftovers = {p.name for p in (run / "checkpoints").iterdir()} - {"newest.txt", "save-00000001"}
    assert leftovers  # the kill left a temporary (write) or an unpublished directory (publish)
    mgr.save({"x": np.zeros(1)}, {"i": 3})
    names = sorted(p.name for p in (run / "checkpoints").iterdir())
    assert names == ["newest.txt", "save-00000001", "save-00000003"]


# ---------------------------------------------------------------- schedule
def test_schedule_by_passes_and_seconds():
    now = [0.0]
    sched = CheckpointSchedule(seconds=10.0, passes=3, clock=lambda: now[0])
    assert [sched.tick(), sched.tick(), sched.tick()] == [False, False, True]
    sched.reset()
    now[0] = 9.9
    assert not sched.tick()
    now[0] = 10.0
    assert sched.tick()
    only_time = CheckpointSchedule(seconds=None, passes=None)
    assert not any(only_time.tick() for _ in range(100))
    with pytest.raises(CheckpointError, match="--checkpoint-passes 0: must be >= 1"):
        CheckpointSchedule(passes=0)
    with pytest.raises(CheckpointError, match="--checkpoint-seconds -1"):
        CheckpointSchedule(seconds=-1)


# ---------------------------------------------------------------- run directory
def _run(tmp_path, **settings):
    base = {"loss": "softmax", "lam": 0.1, "seed": 7, "max_passes": 20, "tol": 1e-6}
    base.update(settings)
    run = RunDir.create(
        tmp_path / "run", settings=base, store_path=tmp_path / "s.zarr", fingerprint="ab" * 32
    )
    run.publish()  # a new run takes its name at its first checkpoint; here at once
    return run


def test_rundir_layout_and_reopen(tmp_path):
    run = _run(tmp_path)
    assert run.config_path.is_file() and run.checkpoints_dir.is_dir() and run.history_path.is_file()
    again = RunDir.open(run.path)
    assert again.settings["lam"] == 0.1 and again.fingerprint == "ab" * 32
    assert again.store_path == str((tmp_path / "s.zarr").resolve())
    with pytest.raises(OutputExistsError, match="already exists.*ranktide resume"):
        _run(tmp_path)
    with pytest.raises(CheckpointError, match="config.json: missing"):
        RunDir.open(tmp_path)


def test_history_append_truncate_and_torn_line(tmp_path):
    run = _run(tmp_path)
    for i in range(5):
        run.append_history({"pass": i + 1, "objective": 1.0 / (i + 1)})
    with open(run.history_path, "a") as fh:
        fh.write('{"pass": 6, "obj')  # a write torn by a kill
    recs = run.read_history()
    assert [r["pass"] for r in recs] == [1, 2, 3, 4, 5]
    run.truncate_history(3)
    assert [json.loads(line)["pass"] for line in run.history_path.read_text().splitlines()] == [
        1,
        2,
        3,
    ]


def test_resume_compatibility_names_each_key(tmp_path):
    run = _run(tmp_path)
    new = dict(run.settings, lam=0.2, seed=8, max_passes=50, tol=1e-9)
    with pytest.raises(
        CheckpointError, match=r"lam \(saved 0.1, now 0.2\), seed \(saved 7, now 8\)"
    ) as ei:
        check_resume_compatible(run.config, new, "ab" * 32, run=run.path)
    msg = str(ei.value)
    assert "max_passes (" not in msg and "tol (" not in msg and "\n" not in msg
    # budgets and tolerance alone may change
    check_resume_compatible(run.config, dict(run.settings, max_passes=99, tol=1e-3), "ab" * 32)
    with pytest.raises(CheckpointError, match="fingerprint .* differs"):
        check_resume_compatible(run.config, run.settings, "cd" * 32)
    with pytest.raises(CheckpointError, match=r"rank_cap \(not in the run, now 5\)"):
        check_resume_compatible(run.config, dict(run.settings, rank_cap=5), "ab" * 32)
    newer = dict(run.config, format_version=RUN_VERSION + 1)
    with pytest.raises(CheckpointError, match="newer than this ranktide supports"):
        check_resume_compatible(newer, run.settings, "ab" * 32)


def test_update_settings_only_mutable(tmp_path):
    run = _run(tmp_path)
    run.update_settings({"max_passes": 40})
    assert RunDir.open(run.path).settings["max_passes"] == 40
    with pytest.raises(ConfigError, match="lam cannot change on resume"):
        run.update_settings({"lam": 1.0})


# ---------------------------------------------------------------- signals
@pytest.mark.parametrize(("sig", "code"), [(signal.SIGINT, 130), (signal.SIGTERM, 143)])
def test_stop_flag_from_signal(sig, code):
    before = signal.getsignal(sig)
    with stop_on_signals() as stop:
        assert not stop
        os.kill(os.getpid(), sig)
        for _ in range(100):  # the handler runs at the next bytecode boundary
            if stop:
                break
            time.sleep(0.01)
        assert stop and stop() and stop.exit_code == code
        with pytest.raises(KeyboardInterrupt):  # a second signal aborts
            os.kill(os.getpid(), sig)
            time.sleep(0.5)
    assert signal.getsignal(sig) is before
    assert interrupted_message("RUN") == "ranktide: interrupted; resume with: ranktide resume RUN"


def test_stop_flag_request():
    flag = StopFlag()
    assert not flag and flag.exit_code == 0
    flag.request(signal.SIGTERM)
    flag.request(signal.SIGINT)  # the first reason is kept
    assert flag.signal_name == "SIGTERM" and flag.exit_code == 143


# ---------------------------------------------------------------- recorder
class _FakeState:
    def __init__(self):
        self.passes = 0

    def to_checkpoint(self):
        return {"x": np.full(3, float(self.passes))}, {"passes": self.passes}


def test_recorder_cadence_step_end_and_stop(tmp_path):
    from ranktide.runs.rundir import RunRecorder

    run = _run(tmp_path)
    now = [0.0]
    sched = CheckpointSchedule(seconds=60.0, passes=None, clock=lambda: now[0])
    stop = StopFlag()
    ctx = {"step": 0}
    rec = RunRecorder(
        run,
        schedule=sched,
        stop=stop,
        context=lambda: ({"best": np.full(2, ctx["step"] * 1.5)}, dict(ctx)),
    )
    state = _FakeState()
    for i in range(1, 7):
        state.passes = i
        ctx["step"] = i
        run.append_history({"pass": i})
        now[0] += 25.0  # 25 s per pass: a checkpoint every third pass (75 s >= 60 s)
        if i == 4:
            stop.request(signal.SIGTERM)
        if rec.after_pass(state, step_done=(i == 2)):
            break
    # pass 2 ends a path step, 3 is not due yet (25 s after pass 2), 4 is the stop
    assert i == 4 and rec.checkpoints_written == 2
    arrays, meta, _p = run.checkpoints.load_latest()
    assert meta["solver"] == {"passes": 4} and meta["history_len"] == 4
    assert meta["context"] == {"step": 4} and meta["settings"] == run.settings
    solver_arrays, ctx_arrays = RunRecorder.split(arrays)
    np.testing.assert_array_equal(solver_arrays["x"], np.full(3, 4.0))
    np.testing.assert_array_equal(ctx_arrays["best"], np.full(2, 6.0))
    assert [r["pass"] for r in run.read_history()] == [1, 2, 3, 4]
    # without a stop, 60 s of passes trigger a checkpoint by time alone
    stop2 = CheckpointSchedule(seconds=60.0, clock=lambda: now[0])
    rec2 = RunRecorder(run, schedule=stop2)
    now[0] += 59.0
    assert not rec2.after_pass(state) and rec2.checkpoints_written == 0
    now[0] += 1.0
    assert not rec2.after_pass(state) and rec2.checkpoints_written == 1


def test_resume_rejects_bad_budgets_before_touching_the_run(tmp_path):
    from ranktide.runs.resume import resume

    run = _run(tmp_path)
    before = run.config_path.read_text()
    for kw, msg in [
        ({"tol": 2.0}, "--tol 2.0: must lie in"),
        ({"max_passes": 0}, "--max-passes 0: must be >= 1"),
        ({"max_seconds": -1.0}, "--max-seconds -1.0: must be > 0"),
        ({"checkpoint_passes": 0}, "--checkpoint-passes 0: must be >= 1"),
    ]:
        with pytest.raises((ConfigError, CheckpointError), match=msg):
            resume(run.path, **kw)
    assert run.config_path.read_text() == before
