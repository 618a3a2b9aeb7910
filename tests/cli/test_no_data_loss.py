"""Nothing a user owns is destroyed (issue 13, data loss).

Every command refuses an output that is, contains or lies inside one of its inputs,
whatever the flags; ``--overwrite`` replaces the old output only once the new one is
complete; a train that fails its checks leaves no run directory; resuming a finished
run keeps its certificate. Each case compares a snapshot of the user's files (hidden
entries included) before and after.

No outside reference applies here: these check the project's own contract from the issue
(common practice, no source).
"""

from __future__ import annotations

import json
import os
import re
import subprocess
import sys
from pathlib import Path

import pytest
from ranktide.atomic import clean_stale_siblings, exchange_paths, replace_with, temp_sibling
from ranktide.errors import OutputExistsError
from ranktide.runs.rundir import RunDir
from userfiles import refused, run_cli, snapshot, write_tiny


@pytest.fixture(scope="module")
def base(tmp_path_factory) -> Path:
    """A workspace: source files, store S.zarr, validation V.zarr, a finished run R."""
    root = tmp_path_factory.mktemp("ws")
    mtx, lab = write_tiny(root)
    vm, vl = write_tiny(root, seed=1, name="v")
    from ranktide.cli.main import main

    assert main(["ingest", str(mtx), "--labels", str(lab), "--out", str(root / "S.zarr"),
                 "--quiet"]) == 0
    assert main(["ingest", str(vm), "--labels", str(vl), "--out", str(root / "V.zarr"),
                 "--quiet"]) == 0
    assert main(["train", str(root / "S.zarr"), "--loss", "softmax", "--lam", "0.01",
                 "--out", str(root / "R"), "--quiet"]) == 0
    return root



TRAIN = ("train", "S.zarr", "--loss", "softmax", "--lam", "0.01", "--quiet")


def _in(ws: Path, args: tuple) -> list[str]:
    return [str(a) for a in args]  # relative to the working directory ws


@pytest.mark.parametrize("argv, match", [
    (TRAIN + ("--out", "S.zarr", "--overwrite"), r"--out .*S\.zarr: is the same path as the "
     r"training store"),
    (TRAIN + ("--out", "S.zarr/sub", "--overwrite"), r"lies inside the training store"),
    (TRAIN + ("--out", ".", "--overwrite"), r"contains the training store"),
    (("train", "S.zarr", "--loss", "softmax", "--path-steps", "2", "--valid", "V.zarr",
      "--out", "V.zarr", "--overwrite", "--quiet"), r"same path as --valid"),
    (("predict", "R/model", "S.zarr", "--out", "S.zarr", "--overwrite", "--quiet"),
     r"same path as the store"),
    (("predict", "R/model", "S.zarr", "--out", "R/model", "--overwrite", "--quiet"),
     r"same path as the model"),
    (("predict", "R/model", "S.zarr", "--out", "R/model/p.csv", "--overwrite", "--quiet"),
     r"lies inside the model"),
    (("ingest", "x.mtx", "--labels", "x.labels", "--out", "x.labels", "--overwrite",
      "--quiet"), r"same path as --labels"),
    (("ingest", "x.mtx", "--out", "x.mtx", "--overwrite", "--quiet"),
     r"same path as the source"),
    (("split", "S.zarr", "--out", "S.zarr", "--out-holdout", "H.zarr", "--overwrite"),
     r"same path as the input store"),
    (("split", "S.zarr", "--out", "T.zarr", "--out-holdout", "S.zarr/h", "--overwrite"),
     r"lies inside the input store"),
    (("report", "R", "--out", "R/model"), r"same path as the run's model"),
    (("report", "R", "--out", "R/checkpoints/x"), r"lies inside the run's checkpoints"),
    (("profile", "S.zarr", "--out", "S.zarr/prof", "--quiet"), r"lies inside the store"),
])
def test_output_over_an_input_is_refused_and_nothing_changes(ws, capsys, argv, match):
    before = snapshot(ws)
    line = refused(capsys, *_in(ws, argv))
    assert re.search(match, line), line
    assert snapshot(ws) == before


def test_a_symlink_to_the_store_is_the_store(ws, capsys):
    os.symlink(ws / "S.zarr", ws / "alias.zarr")
    before = snapshot(ws)
    line = refused(capsys, *_in(ws, TRAIN), "--out", ws / "alias.zarr", "--overwrite")
    assert "is the same path as the training store" in line
    line = refused(capsys, "predict", ws / "R/model", ws / "alias.zarr", "--out",
                   ws / "S.zarr", "--overwrite", "--quiet")
    assert "same path as the store" in line
    assert snapshot(ws) == before


PATH = ("train", "S.zarr", "--loss", "softmax", "--path-steps", "2", "--quiet")


@pytest.mark.parametrize("argv, match", [
    (TRAIN + ("--block-rows", "0"), r"--block-rows 0: must be"),
    (PATH + ("--valid", "x.mtx"), r"x\.mtx: not a ranktide store"),
    (PATH + ("--valid", "nothere.zarr"), r"nothere\.zarr: input file not found"),
    (("train", "V.zarr", "--loss", "squared", "--lam", "0.1", "--quiet"),
     r"holds targets of kind 'classes' but loss 'squared'"),
])
def test_failed_checks_leave_no_run_directory(ws, capsys, argv, match):
    before = snapshot(ws)
    line = refused(capsys, *_in(ws, argv), "--out", ws / "new")
    assert re.search(match, line), line
    assert snapshot(ws) == before  # no run directory, no temporary sibling


def test_all_zero_weights_leave_no_run_directory(ws, capsys):
    n = 40
    (ws / "w.txt").write_text("0\n" * n)
    assert run_cli(capsys, "ingest", ws / "x.mtx", "--labels", ws / "x.labels", "--weights",
                   ws / "w.txt", "--out", ws / "W.zarr", "--quiet")[0] == 0
    before = snapshot(ws)
    refused(capsys, "train", ws / "W.zarr", "--loss", "softmax", "--lam", "0.01", "--out",
            ws / "new", "--quiet")
    assert snapshot(ws) == before
    # the retry after fixing the input is not told "already exists ... or resume"
    assert run_cli(capsys, *_in(ws, TRAIN), "--out", ws / "new")[0] == 0
    assert (ws / "new" / "model" / "model.json").is_file()


def test_overwrite_that_fails_keeps_the_old_run(ws, capsys):
    before = snapshot(ws)
    refused(capsys, *_in(ws, TRAIN), "--out", ws / "R", "--overwrite", "--block-rows", "0")
    assert snapshot(ws) == before
    # a loss that does not match the store is found before anything is made
    refused(capsys, "train", ws / "S.zarr", "--loss", "squared", "--lam", "0.1", "--out",
            ws / "R", "--overwrite", "--quiet")
    assert snapshot(ws) == before


def test_overwrite_replaces_a_run_only_when_complete(ws, capsys):
    old = (ws / "R" / "model" / "model.json").read_bytes()
    rc, _ = run_cli(capsys, *_in(ws, TRAIN), "--out", ws / "R", "--overwrite", "--lam",
                    "0.02")
    assert rc == 0
    assert (ws / "R" / "model" / "model.json").read_bytes() != old
    assert not [p for p in ws.iterdir() if p.name.startswith(".")]


def test_rundir_staged_until_checkpoint_or_complete(tmp_path):
    settings = {"loss": "softmax", "lam": 0.1}
    fresh = RunDir.create(tmp_path / "a", settings=settings, store_path=None, fingerprint="f")
    assert not (tmp_path / "a").exists() and fresh.path.name.startswith(".a.run-")
    fresh.publish()
    assert fresh.path == tmp_path / "a" and (tmp_path / "a" / "config.json").is_file()
    with pytest.raises(OutputExistsError, match="ranktide resume"):
        RunDir.create(tmp_path / "a", settings=settings, store_path=None, fingerprint="f")
    before = snapshot(tmp_path / "a")
    repl = RunDir.create(tmp_path / "a", settings=dict(settings, lam=0.2), store_path=None,
                         fingerprint="f", overwrite=True)
    repl.publish()  # a replacement does not take the name at its first checkpoint
    assert snapshot(tmp_path / "a") == before
    repl.complete()
    assert json.loads((tmp_path / "a" / "config.json").read_text())["settings"]["lam"] == 0.2
    assert sorted(p.name for p in tmp_path.iterdir()) == ["a"]
    gone = RunDir.create(tmp_path / "b", settings=settings, store_path=None, fingerprint="f")
    gone.discard()
    assert sorted(p.name for p in tmp_path.iterdir()) == ["a"]


def test_resume_of_a_converged_run_keeps_its_certificate(ws, capsys):
    model = ws / "R" / "model" / "model.json"
    before = model.read_bytes()
    assert json.loads(before)["gap"] is not None
    assert run_cli(capsys, "resume", ws / "R")[0] == 0
    assert model.read_bytes() == before


def test_resume_of_a_converged_run_prints_its_gap(ws, capsys):
    capsys.readouterr()
    from ranktide.cli.main import main

    assert main(["resume", str(ws / "R")]) == 0
    out = capsys.readouterr().out
    assert "gap estimate nan" not in out and "gap estimate -" not in out
    assert "already finished" in out


def _dead_pid() -> int:
    p = subprocess.Popen([sys.executable, "-c", "pass"])
    p.wait()
    return p.pid


def test_replace_with_exchanges_in_one_step(tmp_path):
    (tmp_path / "out").mkdir()
    (tmp_path / "out" / "old.txt").write_text("old")
    tmp = temp_sibling(tmp_path / "out")
    tmp.mkdir()
    (tmp / "new.txt").write_text("new")
    replace_with(tmp, tmp_path / "out")
    assert [p.name for p in tmp_path.iterdir()] == ["out"]
    assert [p.name for p in (tmp_path / "out").iterdir()] == ["new.txt"]
    # renameat2(RENAME_EXCHANGE) swaps a file and a directory too (Linux man page rename(2))
    (tmp_path / "f").write_text("f")
    if exchange_paths(tmp_path / "f", tmp_path / "out"):
        assert (tmp_path / "f").is_dir() and (tmp_path / "out").read_text() == "f"


def test_stale_siblings_of_a_killed_run_are_cleaned_and_old_restored(tmp_path):
    pid = _dead_pid()
    out = tmp_path / "out.zarr"
    # killed between the two renames of the fallback: out missing, its old copy aside
    old = tmp_path / f".out.zarr.old-{pid}-0123456789"
    old.mkdir()
    (old / "a").write_text("old")
    new = tmp_path / f".out.zarr.tmp-{pid}-abcdef0123"
    new.mkdir()
    mine = tmp_path / f".out.zarr.tmp-{os.getpid()}-abcdef0123"  # a live writer's: kept
    mine.mkdir()
    removed = clean_stale_siblings(out)
    assert (out / "a").read_text() == "old"
    assert removed == [new.name]
    assert mine.exists()
