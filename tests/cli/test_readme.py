"""The README's session and Python example run as written, after `make demo`.

No outside reference applies: the README itself is the specification checked
(common practice, no source).
"""

from __future__ import annotations

import os
import re
import subprocess
import sys
from pathlib import Path

import pytest

README = Path(__file__).resolve().parents[2] / "README.md"


def _blocks(kind: str) -> list[str]:
    return re.findall(rf"```{kind}\n(.*?)```", README.read_text(encoding="utf-8"), re.S)


def _commands() -> list[str]:
    return [line[2:] for block in _blocks("console") for line in block.splitlines()
            if line.startswith("$ ")]


def test_the_readme_has_a_session_and_an_api_example():
    cmds = _commands()
    assert cmds[0] == ". .venv/bin/activate" and len(cmds) >= 10
    assert all("demo-out/" in c or c.startswith((".", "head")) or "my-" in c for c in cmds)
    assert len(_blocks("python")) == 1


@pytest.mark.slow
def test_readme_session_runs_verbatim_after_make_demo(tmp_path):
    """What a new user does on a fresh clone: `make demo`, then the README's commands."""
    (tmp_path / ".venv").symlink_to(Path(sys.prefix))  # the checkout's .venv
    env = dict(os.environ)
    env.pop("VIRTUAL_ENV", None)
    demo = subprocess.run([str(tmp_path / ".venv" / "bin" / "ranktide"), "demo", "--out",
                           "demo-out", "--quiet"], cwd=tmp_path, env=env, capture_output=True,
                          text=True, timeout=600)  # the Makefile's demo target
    assert demo.returncode == 0, demo.stderr
    script = "set -e\n" + "\n".join(_commands()) + "\n"
    res = subprocess.run(["bash", "-c", script], cwd=tmp_path, env=env, capture_output=True,
                         text=True, timeout=900)
    assert res.returncode == 0, res.stdout[-2000:] + res.stderr[-2000:]
    out = res.stdout
    for landmark in ("chosen model: lam", "run totals:", "exit status 3", "wrote 402 rows",
                     "label_1", "my-train.zarr (1,598 rows)"):
        assert landmark in out, landmark
    assert (tmp_path / "my-path" / "report" / "report.html").is_file()
    assert not (tmp_path / "too-short" / "model").exists()
    # the Python example prints section names (the labels of the demo's catalogue)
    (code,) = _blocks("python")
    py = subprocess.run([str(tmp_path / ".venv" / "bin" / "python"), "-c", code], cwd=tmp_path,
                        env=env, capture_output=True, text=True, timeout=600)
    assert py.returncode == 0, py.stderr[-2000:]
    sections = set((tmp_path / "demo-out" / "data" / "sections.txt").read_text().split())
    last = py.stdout.strip().splitlines()[-1]
    assert any(name in last for name in sections), last
