"""Atomic file and directory writes, and pickle-free array files.

A write that matters goes to a temporary sibling, is flushed and fsynced, and
is renamed over the final name; a failure removes the temporary and leaves the
final name untouched. An existing output is replaced by exchanging the two
directory entries in one step (Linux ``renameat2(RENAME_EXCHANGE)``), so a
kill at any moment leaves the complete old or the complete new output; where
the exchange is unavailable the old one is renamed aside first and the next
run restores it if the process died between the two renames
(:func:`clean_stale_siblings`).

Temporary siblings are named ``.NAME.TAG-PID-HEX``: a sibling whose process
is gone is stale and is removed by the next command writing ``NAME``.
"""

from __future__ import annotations

import contextlib
import ctypes
import errno
import json
import os
import re
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
    "exchange_paths",
    "replace_with",
    "replace_together",
    "stale_siblings",
    "clean_stale_siblings",
    "user_path",
]

#: ``.NAME.TAG-PID-HEX`` (and ``.NAME.TAG-HEX`` written by earlier versions)
_SIBLING_RE = re.compile(r"^(?P<tag>[a-z]+)-(?:(?P<pid>\d+)-)?(?P<hex>[0-9a-f]{8,10})$")

_AT_FDCWD = -100
_RENAME_EXCHANGE = 2
try:  # glibc >= 2.28 exports renameat2; elsewhere the fallback below is used
    _renameat2 = ctypes.CDLL(None, use_errno=True).renameat2
    _renameat2.argtypes = [ctypes.c_int, ctypes.c_char_p, ctypes.c_int, ctypes.c_char_p,
                           ctypes.c_uint]
    _renameat2.restype = ctypes.c_int
except (AttributeError, OSError):
    _renameat2 = None


def temp_sibling(path: str | os.PathLike, tag: str = "tmp") -> Path:
    """Return an unused temporary path next to ``path`` (same file system).

    The name carries this process's id, so a later run can tell a sibling
    left by a killed process (stale) from one being written right now.
    """
    p = Path(path)
    return p.with_name(f".{p.name}.{tag}-{os.getpid()}-{uuid.uuid4().hex[:10]}")


_SIBLING_IN_PATH = re.compile(
    r"(^|[/\s(])\.([^/\s]+)\.[a-z]+-\d+-[0-9a-f]{10}(?=[/\s:;,)]|$)")


def user_path(path: str | os.PathLike) -> str:
    """``path`` with every temporary sibling named as the output it becomes.

    ``d/.out.zarr.tmp-123-0a1b2c3d4e/c.json`` -> ``d/out.zarr/c.json``: what
    the user asked for, for messages.
    """
    return _SIBLING_IN_PATH.sub(r"\1\2", os.fspath(path))


def _alive(pid: int) -> bool:
    if pid == os.getpid():
        return True
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:  # someone else's live process
        return True
    return True


def stale_siblings(path: str | os.PathLike) -> list[Path]:
    """Temporary siblings of ``path`` left by processes that no longer run."""
    p = Path(path)
    parent = p.parent if str(p.parent) else Path(".")
    prefix = f".{p.name}."
    found = []
    try:
        entries = list(parent.iterdir())
    except OSError:
        return []
    for entry in entries:
        if not entry.name.startswith(prefix):
            continue
        m = _SIBLING_RE.match(entry.name[len(prefix):])
        if m is None:
            continue
        pid = m.group("pid")
        if pid is None or not _alive(int(pid)):
            found.append(entry)
    return sorted(found)


def clean_stale_siblings(path: str | os.PathLike) -> list[str]:
    """Remove stale temporary siblings of ``path``; return their names.

    When ``path`` itself is missing and a stale ``old`` sibling exists (a
    replacement by rename-aside was killed between its two renames), the old
    output is renamed back first, so the user gets back what they had.
    """
    p = Path(path)
    stale = stale_siblings(p)
    if not os.path.lexists(p):
        olds = [s for s in stale if _SIBLING_RE.match(s.name[len(p.name) + 2:]).group("tag")
                == "old"]
        if olds:
            newest = max(olds, key=lambda s: s.lstat().st_mtime)
            os.rename(newest, p)
            stale.remove(newest)
    for s in stale:
        remove_path(s)
    if stale:
        fsync_dir(p.parent if str(p.parent) else ".")
    return [s.name for s in stale]


def exchange_paths(a: str | os.PathLike, b: str | os.PathLike) -> bool:
    """Swap two existing directory entries in one atomic step.

    Returns False where the system cannot (no ``renameat2``, or a file
    system without ``RENAME_EXCHANGE``); the caller then falls back.
    """
    if _renameat2 is None:
        return False
    rc = _renameat2(_AT_FDCWD, os.fsencode(os.fspath(a)), _AT_FDCWD,
                    os.fsencode(os.fspath(b)), _RENAME_EXCHANGE)
    if rc == 0:
        return True
    err = ctypes.get_errno()
    if err in (errno.EINVAL, errno.ENOSYS, errno.EOPNOTSUPP):
        return False
    raise OSError(err, os.strerror(err), os.fspath(a))


def replace_with(tmp: str | os.PathLike, final: str | os.PathLike) -> None:
    """Put the complete ``tmp`` at ``final``, replacing what is there.

    The old ``final`` stays whole until the new one has its name: the two are
    exchanged in one step, then the old one (now at ``tmp``) is removed.
    Without the exchange the old one is renamed aside, the new one renamed
    in, and the old one removed; a kill between the two renames is repaired
    by :func:`clean_stale_siblings` on the next run.
    """
    replace_together([(tmp, final)])


def _put_in_place(tmp: Path, fin: Path) -> Path | None:
    """Give ``tmp`` the name ``fin``; return where the old ``fin`` now is (None: none)."""
    if not os.path.lexists(fin):
        os.rename(tmp, fin)
        return None
    if exchange_paths(tmp, fin):
        return tmp
    old = temp_sibling(fin, "old")
    os.rename(fin, old)
    os.rename(tmp, fin)
    return old


def _put_back(tmp: Path, fin: Path, old: Path | None) -> None:
    """Undo :func:`_put_in_place`: the new one back at ``tmp``, the old one at ``fin``."""
    if old is None:
        os.rename(fin, tmp)
    elif old == tmp:
        exchange_paths(tmp, fin)
    else:
        os.rename(fin, tmp)
        os.rename(old, fin)


def replace_together(pairs: list[tuple[str | os.PathLike, str | os.PathLike]]) -> None:
    """Put several complete temporaries at their final names, one right after another.

    Every old output is kept until every new one has its name, and only
    then removed; an error on the way puts back the ones already replaced,
    so the outputs are all old or all new.

    A kill cannot be undone that way: POSIX changes one directory entry (or,
    with ``renameat2(RENAME_EXCHANGE)``, exchanges two entries) per call,
    and no call replaces two names by two other files at once, so between
    the first and the last rename some outputs are new and some old. The
    window holds only renames (everything is built and fsynced before);
    callers whose outputs belong together mark them with a shared id that
    their readers check (:func:`ranktide.store.split.split_store`).

    Parameters
    ----------
    pairs : list of (tmp, final)
        Each complete temporary sibling and the name it should have.
    """
    done: list[tuple[Path, Path, Path | None]] = []
    try:
        for tmp, final in pairs:
            tmp_p, fin = Path(tmp), Path(final)
            done.append((tmp_p, fin, _put_in_place(tmp_p, fin)))
    except BaseException:
        for tmp_p, fin, old in reversed(done):
            _put_back(tmp_p, fin, old)
        raise
    for _tmp, _fin, old in done:
        if old is not None:
            remove_path(old)
    for parent in dict.fromkeys(fin.parent if str(fin.parent) else Path(".")
                                for _t, fin, _o in done):
        fsync_dir(parent)


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
    clean_stale_siblings(fin)
    if fin.exists() and not overwrite:
        raise OutputExistsError(f"{fin}: already exists; pass --overwrite to replace it")
    tmp = temp_sibling(fin)
    try:
        yield tmp
        if tmp.exists():
            fsync_tree(tmp)
        replace_with(tmp, fin)
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
