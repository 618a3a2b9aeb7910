"""``ranktide demo --out DIR`` (issue 13): the new demo is built aside and replaces an
earlier one only once complete; a directory the demo did not make is refused with one
line and exit status 2, never cleared.

No outside reference applies here: these check the project's own contract from the issue
(common practice, no source).
"""

from __future__ import annotations

import json
import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import pytest
from ranktide.atomic import clean_stale_siblings
from ranktide.cli import demo_workflow
from ranktide.errors import InputError
from userfiles import refused, run_cli, snapshot


@pytest.fixture(scope="module")
def base(tmp_path_factory) -> Path:
    """A workspace holding one finished demo, ``d`` (seed 0)."""
    root = tmp_path_factory.mktemp("demo")
    from ranktide.cli.main import main

    old = os.getcwd()
    os.chdir(root)
    try:
        assert main(["demo", "--out", "d", "--quiet"]) == 0
    finally:
        os.chdir(old)
    return root


def _hidden(ws: Path) -> list[str]:
    return sorted(n for n in os.listdir(ws) if n.startswith("."))


def _made(ws: Path) -> dict:
    return json.loads((ws / "d" / "demo.json").read_text())


def test_a_users_folder_is_refused_not_cleared(ws, capsys):
    (ws / "mine").mkdir()
    (ws / "mine" / "notes.txt").write_text("keep me\n")
    (ws / "mine" / "demo.json").write_text('{"my": "own file"}\n')  # not the demo's marker
    before = snapshot(ws)
    line = refused(capsys, "demo", "--out", "mine", "--quiet")
    assert line.startswith("ranktide demo: error: mine: not empty and not an earlier demo"), line
    assert snapshot(ws) == before


def test_a_user_file_inside_an_earlier_demo_is_refused(ws, capsys):
    (ws / "d" / "my-notes.txt").write_text("added by the user\n")
    before = snapshot(ws)
    line = refused(capsys, "demo", "--out", "d", "--quiet")
    assert "d: an earlier demo, but 'my-notes.txt' in it is not the demo's" in line, line
    assert snapshot(ws) == before


def test_overwrite_is_no_way_around_the_refusal(ws, capsys):
    (ws / "mine").mkdir()
    (ws / "mine" / "notes.txt").write_text("keep me\n")
    before = snapshot(ws)
    rc, err = run_cli(capsys, "demo", "--out", "mine", "--overwrite", "--quiet")
    assert rc == 2 and "unrecognized arguments: --overwrite" in err, err
    assert snapshot(ws) == before


def test_a_failed_demo_leaves_the_earlier_one_whole(ws, capsys, monkeypatch):
    def fail(*args, **kwargs):
        raise InputError("invented failure in the evaluate step")

    monkeypatch.setattr(demo_workflow, "evaluate", fail)
    before = snapshot(ws)
    line = refused(capsys, "demo", "--out", "d", "--seed", "1", "--quiet")
    assert "invented failure" in line, line
    assert snapshot(ws) == before  # byte-identical, no temporary sibling left


def test_a_new_demo_replaces_the_earlier_one_and_names_its_own_paths(ws, capsys):
    rc, err = run_cli(capsys, "demo", "--out", "d", "--seed", "1", "--quiet")
    assert rc == 0, err
    made = _made(ws)
    assert made["complete"] and made["seed"] == 1 and made["made_by"] == "ranktide demo"
    assert _hidden(ws) == []
    text = json.dumps(made)
    assert ".d.tmp-" not in text and made["steps"]["split"]["fit"] == str(Path("d/fit.zarr"))
    # the run names its store where it is now (the build-time name is gone)
    config = json.loads((ws / "d" / "run" / "config.json").read_text())
    assert config["store"]["path"] == os.path.realpath(ws / "d" / "fit.zarr")
    for rel in ("run/history.jsonl", "run/report/report.html", "holdout_metrics.json"):
        assert ".d.tmp-" not in (ws / "d" / rel).read_text(), rel
    # the commands the demo suggests next work on what it left
    for argv in (["evaluate", "d/run/model", "d/holdout.zarr"], ["report", "d/run"]):
        rc, err = run_cli(capsys, *argv, "--quiet")
        assert rc == 0, (argv, err)


def _changed(ws: Path, marker: bytes) -> bool:
    """The demo started writing: a temporary sibling, or ``d`` no longer as it was."""
    try:
        return bool(_hidden(ws)) or (ws / "d" / "demo.json").read_bytes() != marker
    except OSError:
        return True


@pytest.mark.parametrize("delay", [0.0, 1.5])
def test_a_killed_demo_leaves_the_old_or_the_new(ws, delay):
    before = snapshot(ws)
    marker = (ws / "d" / "demo.json").read_bytes()
    proc = subprocess.Popen([sys.executable, "-m", "ranktide", "demo", "--out", "d", "--seed",
                             "1", "--quiet"], cwd=ws, stdout=subprocess.DEVNULL,
                            stderr=subprocess.DEVNULL)
    while proc.poll() is None and not _changed(ws, marker):
        time.sleep(0.002)
    try:
        proc.wait(timeout=delay)
    except subprocess.TimeoutExpired:
        proc.send_signal(signal.SIGKILL)
    proc.wait(timeout=300)
    after = snapshot(ws)
    old = {k: v for k, v in before.items() if not k.startswith(".")}
    now = {k: v for k, v in after.items() if not k.startswith(".")}
    if now != old:  # then it is a complete new demo
        made = _made(ws)
        assert made["complete"] and made["seed"] == 1, (proc.returncode, made)
    assert [k for k in after if k.startswith(".")] == [k for k in after
                                                       if k.startswith(".d.")]
    clean_stale_siblings(ws / "d")  # what the next demo does first
    assert _hidden(ws) == []
