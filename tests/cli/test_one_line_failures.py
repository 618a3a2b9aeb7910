"""One line, exit status 2, nothing half-written: read-only directories, full disks,
missing parents, wrong output kinds, stores without targets or entries, link loops.

Read-only directories are real read-only bind mounts and full disks real small tmpfs
mounts, set up and torn down by each test (tests run as root, where chmod does not stop
writes); a test that cannot mount is skipped with the reason.
"""

from __future__ import annotations

import errno
import os
import re
import shutil
from pathlib import Path

import numpy as np
import pytest
import scipy.sparse as sp
from ranktide.store import write_store
from userfiles import read_only_copy, refused, run_cli, snapshot, tmpfs, write_tiny

NO_MOUNT = "cannot mount here (needs root / CAP_SYS_ADMIN)"


@pytest.fixture(scope="module")
def base(tmp_path_factory) -> Path:
    root = tmp_path_factory.mktemp("ws")
    mtx, lab = write_tiny(root)
    from ranktide.cli.main import main

    assert main(["ingest", str(mtx), "--labels", str(lab), "--out", str(root / "S.zarr"),
                 "--quiet"]) == 0
    assert main(["train", str(root / "S.zarr"), "--loss", "softmax", "--lam", "0.01",
                 "--out", str(root / "R"), "--quiet"]) == 0
    return root



def _commands(out: Path) -> list[tuple[str, list]]:
    return [
        ("split", ["split", "S.zarr", "--out", out / "a.zarr", "--out-holdout",
                   out / "b.zarr", "--quiet"]),
        ("train", ["train", "S.zarr", "--loss", "softmax", "--lam", "0.01", "--out",
                   out / "run", "--quiet"]),
        ("predict", ["predict", "R/model", "S.zarr", "--out", out / "p.csv", "--quiet"]),
        ("report", ["report", "R", "--out", out / "rep", "--quiet"]),
        ("profile", ["profile", "S.zarr", "--passes", "1", "--out", out / "prof", "--quiet"]),
        ("demo", ["demo", "--out", out / "demo", "--quiet"]),
        ("ingest", ["ingest", "x.mtx", "--labels", "x.labels", "--out", out / "s.zarr",
                    "--quiet"]),
    ]


def test_read_only_output_directory(ws, capsys):
    (ws / "ro").mkdir()
    (ws / "ro" / "keep.txt").write_text("mine")
    with read_only_copy(ws / "ro") as ro:
        if ro is None:
            pytest.skip(NO_MOUNT)
        with pytest.raises(OSError) as exc:  # the mount really refuses writes, even to root
            (ro / "probe").write_text("x")
        assert exc.value.errno == errno.EROFS
        before_ws, before_ro = snapshot(ws), snapshot(ro)
        for name, argv in _commands(ro):
            line = refused(capsys, *argv)
            assert re.search(rf"ranktide {name}: error: --out {re.escape(str(ro))}/\S+: "
                             rf"cannot write in {re.escape(str(ro))} \(on a read-only file "
                             r"system\); choose a writable directory", line), line
        # a report's default place is inside the run: a run on a read-only disk
        shutil.copytree(ws / "R", ws / "ro2")
        with read_only_copy(ws / "ro2") as run:
            line = refused(capsys, "report", run, "--quiet")
            assert "report: cannot write in" in line and "read-only file system" in line
        assert snapshot(ro) == before_ro
        before_ws.update({k: v for k, v in snapshot(ws).items() if k.startswith("ro2")})
        assert snapshot(ws) == before_ws


def _fill(mnt: Path, leave: int) -> None:
    """Fill the tmpfs until only about ``leave`` bytes are free."""
    free = shutil.disk_usage(mnt).free
    with open(mnt / "filler", "wb") as fh:
        fh.write(b"\0" * max(0, free - leave))


@pytest.mark.parametrize("leave", [0, 8192])
def test_disk_full_in_the_middle_of_a_write(ws, capsys, leave):
    """ingest, predict and train on a full tmpfs: one line, nothing left but the filler."""
    with tmpfs("512k") as mnt:
        if mnt is None:
            pytest.skip(NO_MOUNT)
        _fill(mnt, leave)
        before_ws = snapshot(ws)
        cases = [
            ["ingest", "x.mtx", "--labels", "x.labels", "--out", mnt / "s.zarr", "--quiet"],
            ["predict", "R/model", "S.zarr", "--out", mnt / "p.npy", "--quiet"],
            ["predict", "R/model", "S.zarr", "--out", mnt / "p.zarr", "--quiet"],
            ["train", "S.zarr", "--loss", "softmax", "--lam", "0.01", "--checkpoint-passes",
             "1", "--out", mnt / "run", "--quiet"],
        ]
        for argv in cases:
            rc, err = run_cli(capsys, *argv)
            if rc == 0:  # it fitted in what was left: then it is complete, and goes
                out = Path(argv[argv.index("--out") + 1])
                assert run_cli(capsys, "inspect", out)[0] == 0 if argv[0] == "ingest" \
                    else out.exists()
                shutil.rmtree(out) if out.is_dir() else out.unlink()
                continue
            lines = err.strip("\n").split("\n")
            assert rc == 2 and len(lines) == 1, err
            assert re.search(r"No space left on device|could not write a checkpoint|"
                             r"the store needs about", lines[0]), lines[0]
            assert str(mnt) in lines[0], lines[0]  # it names the output
            assert ".tmp-" not in lines[0] and ".run-" not in lines[0], lines[0]
            assert sorted(os.listdir(mnt)) == ["filler"], lines[0]
        assert snapshot(ws) == before_ws


def test_missing_parent_is_refused_by_every_command(ws, capsys):
    before = snapshot(ws)
    for name, argv in _commands(Path("nodir")):
        line = refused(capsys, *argv)
        assert re.search(rf"ranktide {name}: error: --out nodir/\S+: the parent directory "
                         r"nodir does not exist; create it first \(mkdir -p nodir\)", line), line
    assert snapshot(ws) == before


def test_report_to_a_plain_file(ws, capsys):
    (ws / "notes.txt").write_text("mine")
    before = snapshot(ws)
    line = refused(capsys, "report", "R", "--out", "notes.txt")
    assert "--out notes.txt: is a file, not a directory" in line
    assert snapshot(ws) == before


def test_profile_on_a_store_without_targets(ws, capsys):
    X = sp.random(20, 6, density=0.3, format="csr", random_state=0, dtype=np.float32)
    write_store(ws / "bare.zarr", X).close()
    before = snapshot(ws)
    line = refused(capsys, "profile", "bare.zarr", "--passes", "1", "--quiet")
    assert "bare.zarr: the store has no targets" in line
    assert snapshot(ws) == before


def test_train_on_a_store_with_no_entries(ws, capsys):
    X = sp.csr_matrix((5, 4), dtype=np.float32)
    write_store(ws / "empty.zarr", X, np.array([0, 1, 0, 1, 0], np.int32),
                kind="classes").close()
    before = snapshot(ws)
    line = refused(capsys, "train", "empty.zarr", "--loss", "softmax", "--lam", "0.1",
                   "--out", "run", "--quiet")
    assert "empty.zarr: the store has no entries (every row is empty)" in line
    assert snapshot(ws) == before


@pytest.mark.parametrize("argv, match", [
    (["ingest", "loop.mtx", "--out", "o.zarr"], r"loop\.mtx: the source is a symbolic-link "
     r"loop"),
    (["ingest", "x.mtx", "--labels", "loop.mtx", "--out", "o.zarr"],
     r"loop\.mtx: the --labels file is a symbolic-link loop"),
    (["train", "loop.mtx", "--loss", "softmax", "--lam", "0.1", "--out", "run"],
     r"loop\.mtx: the training store is a symbolic-link loop"),
    (["inspect", "loop.mtx"], r"loop\.mtx: the store path is a symbolic-link loop"),
    (["predict", "loop.mtx", "S.zarr", "--out", "p.csv"],
     r"loop\.mtx: the model is a symbolic-link loop"),
    (["split", "loop.mtx", "--out", "a.zarr", "--out-holdout", "b.zarr"],
     r"loop\.mtx: the store path is a symbolic-link loop"),
])
def test_symlink_loop_as_a_source(ws, capsys, argv, match):
    os.symlink("loop.mtx", ws / "loop.mtx")  # points at itself
    before = snapshot(ws)
    line = refused(capsys, *argv, "--quiet")
    assert re.search(match, line), line
    assert snapshot(ws) == before
