"""Shared helpers of the data-safety suites: tiny invented data, running the CLI in
process, snapshots of a user's files, and throw-away mounts (read-only, small tmpfs).

Every snapshot covers hidden entries too, so a temporary sibling left behind shows up.
"""

from __future__ import annotations

import contextlib
import os
import shutil
import subprocess
import tempfile
from collections.abc import Iterator
from pathlib import Path

import numpy as np
from ranktide.cli.main import main

BANNER = "%%MatrixMarket matrix coordinate real general\n"


def write_tiny(dirpath: Path, *, n: int = 40, d: int = 12, k: int = 3, seed: int = 0,
               name: str = "x") -> tuple[Path, Path]:
    """An invented Matrix Market file and a labels file (3 entries per row)."""
    rng = np.random.default_rng(seed)
    lines = [BANNER.rstrip("\n"), f"{n} {d} {3 * n}"]
    for i in range(n):
        for j in sorted(rng.choice(d, 3, replace=False)):
            lines.append(f"{i + 1} {j + 1} {rng.random():.4f}")
    mtx = dirpath / f"{name}.mtx"
    mtx.write_text("\n".join(lines) + "\n")
    lab = dirpath / f"{name}.labels"
    lab.write_text("\n".join(f"c{i % k}" for i in range(n)) + "\n")
    return mtx, lab


def run_cli(capsys, *argv: str) -> tuple[int, str]:
    """Run ``ranktide ARGV`` in process; return (status, stderr)."""
    capsys.readouterr()
    try:
        rc = main([str(a) for a in argv])
    except SystemExit as exc:  # argparse usage errors
        rc = int(exc.code or 0)
    return rc, capsys.readouterr().err


def refused(capsys, *argv: str) -> str:
    """Run a command that must fail: exit status 2 and exactly one stderr line."""
    rc, err = run_cli(capsys, *argv)
    lines = err.strip("\n").split("\n")
    assert rc == 2, (rc, err)
    assert len(lines) == 1, err
    return lines[0]


def snapshot(root: Path) -> dict[str, bytes | None]:
    """Every entry below ``root`` (hidden ones too): file bytes, or None for a directory."""
    out: dict[str, bytes | None] = {}
    for dirpath, dirnames, filenames in os.walk(root):
        rel = os.path.relpath(dirpath, root)
        for d in dirnames:
            out[os.path.normpath(os.path.join(rel, d))] = None
        for f in filenames:
            p = os.path.join(dirpath, f)
            key = os.path.normpath(os.path.join(rel, f))
            out[key] = b"<link>" + os.readlink(p).encode() if os.path.islink(p) else \
                Path(p).read_bytes()
    return out


def hidden_siblings(root: Path) -> list[str]:
    """Temporary siblings (``.NAME.TAG-...``) anywhere directly under ``root``."""
    return sorted(p.name for p in root.iterdir() if p.name.startswith("."))


def _mount(*args: str) -> bool:
    r = subprocess.run(["mount", *args], capture_output=True, text=True)
    return r.returncode == 0


@contextlib.contextmanager
def tmpfs(size: str = "1m", *, read_only: bool = False) -> Iterator[Path | None]:
    """A fresh tmpfs of ``size`` (read-only when asked); None when mounting is impossible."""
    where = Path(tempfile.mkdtemp(prefix="ranktide-mnt-"))
    opts = f"size={size}" + (",ro" if read_only else "")
    if shutil.which("mount") is None or not _mount("-t", "tmpfs", "-o", opts, "tmpfs",
                                                     str(where)):
        where.rmdir()
        yield None
        return
    try:
        yield where
    finally:
        subprocess.run(["umount", "-l", str(where)], capture_output=True)
        with contextlib.suppress(OSError):
            where.rmdir()


@contextlib.contextmanager
def read_only_copy(src: Path) -> Iterator[Path | None]:
    """A read-only bind mount of the directory ``src``; None when mounting is impossible."""
    where = Path(tempfile.mkdtemp(prefix="ranktide-ro-"))
    if shutil.which("mount") is None or not _mount("--bind", str(src), str(where)):
        where.rmdir()
        yield None
        return
    try:
        if not _mount("-o", "remount,bind,ro", str(where)):
            yield None
            return
        yield where
    finally:
        subprocess.run(["umount", "-l", str(where)], capture_output=True)
        with contextlib.suppress(OSError):
            where.rmdir()
