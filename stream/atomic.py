"""Atomic file and directory writes, and pickle-free array files.

A write that matters goes to a temporary sibling, is flushed and fsynced, and
is renamed over the final name; a failure removes the temporary and leaves the
final name untouched.
"""

from __future__ import annotations

import contextlib
import json
import os
import shutil
import uuid
from collections.abc import Iterator, Mapping
from pathlib import Path
from typing import Any

import numpy as np
from ranktide.errors import ModelError, OutputExistsError

__all__ = [
    "temp_sibling",
    "fsync_dir",
    "fsync_tree",
    "atomic_write_bytes",
    "atomic_write_json",
    "atomic_dir",
    "save_npz",
    "load_npz",
    "remove_path",
]


def temp_sibling(path: str | os.PathLike, tag: str = "tmp") -> Path:
    """Return an unused temporary path next to ``path`` (same file system)."""
    p = Path(path)
    return p.with_name(f".{p.name}.{tag}-{uuid.uuid4().hex[:10]}")


def fsync_dir(path: str | os.PathLike) -> None:
    """Flush a directory entry to disk (so a rename inside it is durable)."""
    try:
        fd = os.open(os.fspath(path), os.O_RDONLY)
    except OSError:
        return
    try:
        os.fsync(fd)
    except OSError:
        pass
    finally:
        os.close(fd)


def fsync_tree(path: str | os.PathLike) -> None:
    """Fsync every file and directory below ``path`` (a file is fsynced alone)."""
    p = Path(path)
    if p.is_file():
        with open(p, "rb+") as fh:
            os.fsync(fh.fileno())
        return
    for root, _dirs, files in os.walk(p):
        for name in files:
            with open(os.path.join(root, name), "rb+") as fh:
                os.fsync(fh.fileno())
        fsync_dir(root)


def remove_path(path: str | os.PathLike) -> None:
    """Remove a file or directory tree if it exists."""
    p = Path(path)
    if p.is_dir() and not p.is_symlink():
        shutil.rmtree(p, ignore_errors=True)
    else:
        with contextlib.suppress(FileNotFoundError):
            p.unlink()


def atomic_write_bytes(path: str | os.PathLike, data: bytes) -> None:
    """Write ``data`` to ``path`` atomically (temp + fsync + rename)."""
    p = Path(path)
    tmp = temp_sibling(p)
    try:
        with open(tmp, "wb") as fh:
            fh.write(data)
            fh.flush()
            os.fsync(fh.fileno())
        os.replace(tmp, p)
    except BaseException:
        remove_path(tmp)
        raise
    fsync_dir(p.parent)


def atomic_write_json(path: str | os.PathLike, obj: Any) -> None:
    """Write ``obj`` as indented JSON to ``path`` atomically."""
    atomic_write_bytes(path, (json.dumps(obj, indent=2, sort_keys=True) + "\n").encode())


@contextlib.contextmanager
def atomic_dir(final: str | os.PathLike, *, overwrite: bool = False) -> Iterator[Path]:
    """Build a directory (or single file) under a temporary name, then rename it.

    Parameters
    ----------
    final : path
        The name the result should have once complete.
    overwrite : bool
        Replace an existing ``final``; otherwise an existing one is an error
        and is left untouched.

    Yields
    ------
    Path
        The temporary sibling to write into. The caller creates it (as a
        directory or a file). On a clean exit it is fsynced and renamed to
        ``final``; on an exception it is removed.
    """
    fin = Path(final)
    if fin.exists() and not overwrite:
        raise OutputExistsError(f"{fin}: already exists; pass --overwrite to replace it")
    tmp = temp_sibling(fin)
    try:
        yield tmp
        if tmp.exists():
            fsync_tree(tmp)
        old = None
        if fin.exists():
            old = temp_sibling(fin, "old")
            os.replace(fin, old)
        os.replace(tmp, fin)
        if old is not None:
            remove_path(old)
        fsync_dir(fin.parent)
    except BaseException:
        remove_path(tmp)
        raise


def save_npz(path: str | os.PathLike, arrays: Mapping[str, np.ndarray]) -> None:
    """Save numeric arrays to ``path`` (``.npz``, uncompressed) atomically.

    Object arrays are refused: nothing ranktide writes needs pickle.
    """
    for name, arr in arrays.items():
        if np.asarray(arr).dtype.hasobject:
            raise TypeError(f"array {name!r} has dtype object; ranktide never writes pickled data")
    p = Path(path)
    tmp = temp_sibling(p)
    try:
        with open(tmp, "wb") as fh:
            np.savez(fh, **{k: np.asarray(v) for k, v in arrays.items()})
            fh.flush()
            os.fsync(fh.fileno())
        os.replace(tmp, p)
    except BaseException:
        remove_path(tmp)
        raise
    fsync_dir(p.parent)


def load_npz(
    path: str | os.PathLike, *, error: type[Exception] = ModelError
) -> dict[str, np.ndarray]:
    """Load every array of an ``.npz`` file without pickle.

    Raises ``error`` (a ranktide error) with a one-line message when the file
    is missing, is not a valid ``.npz``, or holds an object array.
    """
    p = Path(path)
    if not p.is_file():
        raise error(f"{p}: file not found")
    with open(p, "rb") as fh:
        magic = fh.read(4)
    if magic[:2] != b"PK":
        raise error(f"{p}: not a readable .npz file (no zip header); re-create it")
    try:
        with np.load(p, allow_pickle=False) as z:
            return {k: z[k] for k in z.files}
    except ValueError as exc:
        if "pickle" in str(exc).lower() or "object" in str(exc).lower():
            raise error(
                f"{p}: holds an object (pickled) array, which ranktide refuses to load; "
                "re-create it with numeric arrays only"
            ) from None
        raise error(f"{p}: not a readable .npz file ({exc}); re-create it") from None
    except (OSError, EOFError, KeyError) as exc:
        raise error(f"{p}: not a readable .npz file ({exc}); re-create it") from None
    except Exception as exc:  # zipfile.BadZipFile and friends
        raise error(f"{p}: not a readable .npz file ({type(exc).__name__}); re-create it") from None
