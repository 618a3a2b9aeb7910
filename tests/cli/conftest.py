"""Shared fixtures of the command-line tests."""

from __future__ import annotations

import shutil
from pathlib import Path

import pytest


@pytest.fixture
def ws(base, tmp_path, monkeypatch) -> Path:
    """A copy of the module's workspace (its ``base`` fixture), also the working directory:
    commands use relative paths, and each test may break its own copy."""
    dst = tmp_path / "ws"
    shutil.copytree(base, dst, symlinks=True)
    monkeypatch.chdir(dst)
    return dst
