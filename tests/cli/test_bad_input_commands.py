"""A bad-input suite per command (ingest has its own: tests/cli/test_bad_input.py).

Each case: exit status 2, one line on stderr matching ``match``, no temporary sibling
left, and every file that existed before (inputs and earlier outputs) byte-identical.
The data-loss, resource, one-line and input-text cases of issue 13 live beside this
file (test_no_data_loss.py, test_resources_up_front.py, test_one_line_failures.py,
tests/ingest/test_input_text.py).
"""

from __future__ import annotations

import re
from pathlib import Path

import numpy as np
import pytest
import scipy.sparse as sp
from ranktide.store import write_store
from userfiles import refused, snapshot, write_tiny


@pytest.fixture(scope="module")
def base(tmp_path_factory) -> Path:
    """S.zarr (40 x 12, 3 classes), W.zarr (other columns), B.zarr (no targets), run R,
    earlier outputs P.csv, T.zarr, H.zarr, a plain file and a directory."""
    root = tmp_path_factory.mktemp("ws")
    mtx, lab = write_tiny(root)
    from ranktide.cli.main import main

    def ok(*argv):
        assert main([str(a) for a in argv] + ["--quiet"]) == 0, argv

    ok("ingest", mtx, "--labels", lab, "--out", root / "S.zarr")
    ok("train", root / "S.zarr", "--loss", "softmax", "--lam", "0.01", "--out", root / "R")
    ok("predict", root / "R/model", root / "S.zarr", "--out", root / "P.csv")
    ok("split", root / "S.zarr", "--out", root / "T.zarr", "--out-holdout", root / "H.zarr")
    X = sp.random(10, 5, density=0.4, format="csr", random_state=0, dtype=np.float32)
    write_store(root / "W.zarr", X, np.arange(10, dtype=np.int32) % 3, kind="classes").close()
    write_store(root / "B.zarr", X).close()
    (root / "note.txt").write_text("mine")
    (root / "adir").mkdir()
    return root



TRAIN = ["train", "S.zarr", "--loss", "softmax", "--quiet"]

CASES = {
    "inspect": [
        (["inspect", "nothere.zarr"], r"nothere\.zarr: no such store"),
        (["inspect", "note.txt"], r"note\.txt: not a ranktide store"),
        (["inspect", "S.zarr", "--memory", "lots"], r"memory size 'lots': not understood"),
    ],
    "split": [
        (["split", "S.zarr", "--holdout", "1.5", "--out", "a.zarr", "--out-holdout", "b.zarr"],
         r"holdout=1\.5: must be a fraction strictly between 0 and 1"),
        (["split", "S.zarr", "--out", "a.zarr", "--out-holdout", "a.zarr"],
         r"the train and holdout outputs must differ"),
        (["split", "S.zarr", "--out", "T.zarr", "--out-holdout", "b.zarr"],
         r"T\.zarr: already exists; pass --overwrite to replace it"),
        (["split", "S.zarr", "--out", "a.zarr", "--out-holdout", "a.zarr/h.zarr"],
         r"--out-holdout a\.zarr/h\.zarr: lies inside the train output"),
    ],
    "train": [
        (TRAIN + ["--lam", "0.01", "--out", "R"],
         r"R: already exists; pass --overwrite to replace it, or continue it with "
         r"ranktide resume R"),
        (TRAIN + ["--path-steps", "2", "--valid", "W.zarr", "--out", "new"],
         r"--valid W\.zarr: has 5 columns but the training store has 12"),
        (TRAIN + ["--path-steps", "2", "--valid", "B.zarr", "--out", "new"],
         r"--valid B\.zarr: holds targets of kind None"),
        (TRAIN + ["--lam", "0.01", "--tol", "2", "--out", "new"], r"--tol 2\.0: must lie in"),
        (TRAIN + ["--lam", "0.01", "--out", "note.txt", "--overwrite"],
         r"--out note\.txt: is a file, not a directory"),
        (TRAIN + ["--lam", "0.01", "--class-weight", "nothere.txt", "--out", "new"],
         r"nothere\.txt: input file not found"),
    ],
    "resume": [
        (["resume", "adir"], r"adir/config\.json: missing; adir is not a ranktide run"),
        (["resume", "nothere"], r"nothere: not a directory"),
        (["resume", "R", "--tol", "2"], r"--tol 2\.0: must lie in \(0, 1\)"),
    ],
    "evaluate": [
        (["evaluate", "nothere", "S.zarr"], r"nothere: no such model directory"),
        (["evaluate", "R/model", "B.zarr"], r"B\.zarr: 5 feature columns but the model has 12"),
        (["evaluate", "R/model", "S.zarr", "--top", "0"], r"--top 0: must be at least 1"),
    ],
    "predict": [
        (["predict", "R/model", "S.zarr", "--out", "P.csv"],
         r"P\.csv: already exists; pass --overwrite to replace it"),
        (["predict", "R/model", "S.zarr", "--out", "adir", "--overwrite"],
         r"--out adir: is a directory, not a file"),
        (["predict", "R/model", "S.zarr", "--out", "x.csv", "--top", "0"],
         r"--top 0: must be at least 1"),
        (["predict", "R/model", "W.zarr", "--out", "x.csv"],
         r"W\.zarr: 5 feature columns but the model has 12"),
    ],
    "profile": [
        (["profile", "S.zarr", "--out", "note.txt"],
         r"--out note\.txt: is a file, not a directory"),
        (["profile", "B.zarr"], r"B\.zarr: the store has no targets"),
        (["profile", "S.zarr", "--block-rows", "0"], r"--block-rows 0: must be at least 1"),
    ],
    "report": [
        (["report", "adir"], r"adir: neither config\.json nor history\.jsonl found"),
        (["report", "R", "--out", "note.txt"], r"--out note\.txt: is a file, not a directory"),
    ],
    "demo": [
        (["demo", "--out", "note.txt"], r"--out note\.txt: is a file, not a directory"),
    ],
}


@pytest.mark.parametrize("argv, match", [pytest.param(a, m, id=f"{c}-{i}")
                                         for c, cases in CASES.items()
                                         for i, (a, m) in enumerate(cases)])
def test_bad_input(ws, capsys, argv, match):
    before = snapshot(ws)
    line = refused(capsys, *argv, *([] if "--quiet" in argv else ["--quiet"]))
    assert line.startswith(f"ranktide {argv[0]}: error: "), line
    assert re.search(match, line), line
    assert snapshot(ws) == before  # nothing made, nothing changed, no temporary sibling
