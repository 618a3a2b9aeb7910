"""Resources are computed from shapes and checked before they are used (issue 13).

A Matrix Market header is a promise: its declared size is compared with the free space
of the target file system (a real small tmpfs, mounted by the test).
Stale temporary siblings of a killed ingest are removed by the next one.
``train``, ``inspect`` and ``profile`` refuse a store whose shapes need more memory than
the budget, at once, naming the need, the budget and what to change.
"""

from __future__ import annotations

import os
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
import scipy.sparse as sp
from ranktide.store import write_store
from userfiles import BANNER, hidden_siblings, refused, run_cli, snapshot, tmpfs, write_tiny


def test_header_larger_than_the_disk_is_refused_before_writing(capsys):
    with tmpfs("2m") as mnt:
        if mnt is None:
            pytest.skip("cannot mount a tmpfs here (needs root / CAP_SYS_ADMIN)")
        src = mnt / "big.mtx"
        src.write_text(BANNER + "2000000000 5 1\n1 1 1.0\n")  # 2e9 rows declared, 69 bytes
        before = snapshot(mnt)
        line = refused(capsys, "ingest", src, "--out", mnt / "b.zarr", "--quiet")
        # 8 bytes per row pointer (int64) x (2e9 + 1) + one entry = 16.0 GB (decimal)
        assert "declares 2000000000 rows and 1 entries: the store needs about 16.0 GB" in line
        assert f"the file system of {mnt} has" in line and "MB free" in line
        assert snapshot(mnt) == before


KILL_AT_COMMIT = """
import os, signal, sys
import ranktide.store.writer as W
def commit(self):
    os.kill(os.getpid(), signal.SIGKILL)  # killed with its temporary store complete
W.StoreWriter.commit = commit
from ranktide.cli.main import main
sys.exit(main(sys.argv[1:]))
"""


def test_a_killed_ingest_leaves_siblings_the_next_ingest_removes(tmp_path, capsys):
    mtx, lab = write_tiny(tmp_path)
    out = tmp_path / "S.zarr"
    proc = subprocess.run([sys.executable, "-c", KILL_AT_COMMIT, "ingest", str(mtx),
                           "--labels", str(lab), "--out", str(out), "--quiet"],
                          capture_output=True, text=True)
    assert proc.returncode == -9
    left = hidden_siblings(tmp_path)
    assert left and all(n.startswith(".S.zarr.") for n in left)
    assert not out.exists()
    rc, err = run_cli(capsys, "ingest", mtx, "--labels", lab, "--out", out, "--quiet")
    assert rc == 0, err
    assert hidden_siblings(tmp_path) == []
    assert run_cli(capsys, "inspect", out, "--quiet")[0] == 0


@pytest.fixture
def wide(tmp_path) -> Path:
    """4 rows and 2**25 columns (the case of the issue), 4 entries."""
    d = 2**25
    X = sp.csr_matrix((np.ones(4, np.float32), (np.arange(4), np.array([0, 5, d - 1, 7]))),
                      shape=(4, d))
    write_store(tmp_path / "wide.zarr", X, np.array([0, 1, 0, 1], np.int32),
                kind="classes").close()
    return tmp_path / "wide.zarr"


def test_train_refuses_a_shape_over_the_budget_at_once(wide, capsys):
    before = snapshot(wide.parent)
    line = refused(capsys, "train", wide, "--loss", "softmax", "--lam", "0.1", "--memory",
                   "1GB", "--out", wide.parent / "run", "--quiet")
    assert "4 rows x 33554432 columns with 2 outputs need at least" in line
    assert "the memory budget is 1.0 GB: raise --memory, or use fewer columns" in line
    assert snapshot(wide.parent) == before


def test_inspect_and_profile_refuse_a_shape_over_the_budget(wide, capsys):
    line = refused(capsys, "inspect", wide, "--memory", "500MB")
    # three int64 counts per column: 3 * 8 * 2**25 bytes = 805 MB, plus two 64 MiB blocks
    assert "inspecting 33554432 columns needs about 939.5 MB" in line
    assert "memory budget is 500.0 MB; raise --memory" in line
    line = refused(capsys, "profile", wide, "--memory", "500MB", "--quiet")
    assert "need at least" in line and "lower --rank, raise --memory" in line
    assert os.listdir(wide.parent) == ["wide.zarr"]
