"""Output-path safety: one check every command runs before it writes anything.

The rules (the README's command tour states them too):

* an output is never an input: it may not be, contain, or lie inside any of
  the command's inputs (store, ``--valid``, model, run, source files),
  whatever the flags; paths are compared after resolving symbolic links;
* an existing output is replaced only with ``--overwrite``, and only once the
  new one is complete (:mod:`ranktide.atomic`);
* the parent directory of an output must exist: ranktide never creates
  missing parents (a typo would otherwise scatter directories);
* the parent must be writable, and an existing output must be of the kind
  the command writes (a directory where a directory goes);
* temporary siblings of the output left by a killed run are removed first.

Each refusal is one line naming the path, what is wrong and what to do.
"""

from __future__ import annotations

import contextlib
import errno
import os
import shutil
from collections.abc import Iterable, Iterator, Mapping
from pathlib import Path

from ranktide.atomic import clean_stale_siblings, fsync_dir, fsync_tree, remove_path, temp_sibling
from ranktide.errors import ConfigError, InputError, OutputExistsError

__all__ = [
    "real_path",
    "check_source",
    "check_not_overlapping",
    "check_output",
    "check_disk_space",
    "format_size",
    "files_into",
]


def format_size(n: float) -> str:
    """``n`` bytes in decimal units (kB, MB, GB, TB), as ``df -H`` prints them."""
    for unit in ("B", "kB", "MB", "GB", "TB"):
        if abs(n) < 1000 or unit == "TB":
            return f"{int(n)} B" if unit == "B" else f"{n:.1f} {unit}"
        n /= 1000
    return f"{n:.1f} TB"  # pragma: no cover


def real_path(path: str | os.PathLike) -> Path:
    """``path`` with every symbolic link resolved (the path need not exist).

    Raises
    ------
    InputError
        When resolving meets a symbolic-link loop.
    """
    try:
        return Path(os.path.realpath(os.fspath(path), strict=False))
    except OSError as exc:  # pragma: no cover - realpath(strict=False) rarely raises
        why = os.strerror(exc.errno or 0)
        raise InputError(f"{path}: cannot resolve the path ({why})") from None


def check_source(path: str | os.PathLike, what: str = "input") -> Path:
    """Check that an input path can be opened: it exists and is no link loop.

    Returns the path unchanged. Raises :class:`InputError` with one line.
    """
    p = Path(path)
    the = what if what.startswith("the ") else f"the {what}"
    if what.startswith("--") and " " not in what:
        the = f"the {what} input"
    try:
        os.stat(p)
    except OSError as exc:
        if exc.errno == errno.ELOOP:
            raise InputError(f"{p}: {the} is a symbolic-link loop; point the link at a "
                             "real file") from None
        if exc.errno == errno.ENOENT:
            if os.path.islink(p):
                raise InputError(f"{p}: {the} is a symbolic link to a missing file "
                                 f"({os.readlink(p)})") from None
            raise InputError(f"{p}: input file not found; check {the} path") from None
        raise InputError(f"{p}: cannot read {the} ({os.strerror(exc.errno or 0)})") from None
    return p


def _inside(a: Path, b: Path) -> bool:
    """True when ``a`` is ``b`` or lies below it."""
    return a == b or b in a.parents


def check_not_overlapping(
    out: str | os.PathLike,
    inputs: Mapping[str, str | os.PathLike | None] | Iterable[tuple[str, str | os.PathLike | None]],
    *,
    option: str = "--out",
    may_lie_inside: Iterable[str] = (),
) -> None:
    """Refuse an output that is, contains, or lies inside any input.

    Parameters
    ----------
    out : path
        The output the command would write.
    inputs : mapping or pairs of (description, path)
        The command's inputs (None entries are skipped), e.g.
        ``{"the store": "data.zarr", "--valid": "v.zarr"}``.
    option : str
        How the output was given, for the message.
    may_lie_inside : descriptions
        Inputs the output may lie strictly inside (``report``'s default
        ``RUN/report``); it still may not be or contain them.

    Raises
    ------
    ConfigError
        One line naming both paths.
    """
    o = real_path(out)
    allowed = set(may_lie_inside)
    items = inputs.items() if isinstance(inputs, Mapping) else inputs
    for what, path in items:
        if path is None:
            continue
        i = real_path(path)
        if o == i:
            raise ConfigError(f"{option} {out}: is the same path as {what} {path}; an output "
                              "never replaces an input (even with --overwrite); choose another "
                              "path")
        if o in i.parents:
            raise ConfigError(f"{option} {out}: contains {what} {path}; writing it would "
                              "destroy that input; choose another path")
        if i in o.parents and what not in allowed:
            raise ConfigError(f"{option} {out}: lies inside {what} {path}; writing there "
                              "would change that input; choose a path outside it")


def check_output(
    out: str | os.PathLike,
    inputs: Mapping[str, str | os.PathLike | None] | None = None,
    *,
    overwrite: bool = False,
    kind: str = "any",
    option: str = "--out",
    may_lie_inside: Iterable[str] = (),
    replace_empty_dir: bool = False,
    exists_hint: str = "",
) -> Path:
    """The shared output check; run it before reading or allocating anything big.

    Parameters
    ----------
    out : path
    inputs : mapping of description to path, optional
        See :func:`check_not_overlapping`.
    overwrite : bool
        ``--overwrite`` was given.
    kind : {"dir", "file", "any"}
        What the command writes at ``out``: an existing output of the other
        kind is refused even with ``--overwrite``.
    option : str
        How the output was given (``--out``, ``--out-holdout``), for messages.
    may_lie_inside : descriptions
        See :func:`check_not_overlapping`.
    replace_empty_dir : bool
        An existing empty directory counts as absent (run directories).
    exists_hint : str
        Added to the "already exists" message (e.g. how to continue a run).

    Returns
    -------
    Path
        ``out`` as a Path.

    Raises
    ------
    ConfigError, OutputExistsError
        One line naming the path, the problem and what to do.
    """
    o = Path(out)
    if str(out) == "":
        raise ConfigError(f"{option}: empty path; give a file or directory name")
    check_not_overlapping(o, inputs or {}, option=option, may_lie_inside=may_lie_inside)
    parent = o.parent if str(o.parent) else Path(".")
    if not os.path.isdir(parent):
        what = "is not a directory" if os.path.lexists(parent) else "does not exist"
        raise ConfigError(f"{option} {o}: the parent directory {parent} {what}; create it "
                          f"first (mkdir -p {parent}): ranktide does not create parents")
    if not os.access(parent, os.W_OK | os.X_OK):
        why = "on a read-only file system" if _read_only(parent) else "not writable (permission)"
        raise ConfigError(f"{option} {o}: cannot write in {parent} ({why}); choose a writable "
                          "directory")
    clean_stale_siblings(o)
    exists = os.path.lexists(o)
    if exists and replace_empty_dir and o.is_dir() and not o.is_symlink() and not any(
            o.iterdir()):
        exists = False
    if exists and o.is_dir() and not os.access(o, os.W_OK | os.X_OK):
        why = "on a read-only file system" if _read_only(o) else "not writable (permission)"
        raise ConfigError(f"{option} {o}: cannot write in it ({why}); choose a writable "
                          "directory")
    if exists:
        if kind == "dir" and not o.is_dir():
            raise ConfigError(f"{option} {o}: is a file, not a directory; this command writes a "
                              "directory there: choose another path")
        if kind == "file" and o.is_dir():
            raise ConfigError(f"{option} {o}: is a directory, not a file; choose a file name")
        if not overwrite:
            raise OutputExistsError(f"{o}: already exists; pass --overwrite to replace "
                                    f"it{exists_hint}")
    return o


def _read_only(path: Path) -> bool:
    try:
        return bool(os.statvfs(path).f_flag & os.ST_RDONLY)
    except OSError:  # pragma: no cover
        return False


def check_disk_space(target: str | os.PathLike, need: int, *, what: str, fix: str) -> None:
    """Refuse when the file system holding ``target`` has less than ``need`` bytes free.

    Parameters
    ----------
    target : path
        The output (its parent is measured when it does not exist yet).
    need : int
        Bytes the command will write there.
    what : str
        What needs the space, for the message (e.g. "the header of x.mtx
        declares 2000000000 rows: the store needs").
    fix : str
        What to do instead.

    Raises
    ------
    InputError
        ``<target>: <what> about N; the file system of <dir> has M free; <fix>``.
    """
    t = Path(target)
    where = t if t.is_dir() else (t.parent if str(t.parent) else Path("."))
    try:
        free = shutil.disk_usage(where).free
    except OSError:
        return
    if need > free:
        raise InputError(f"{t}: {what} about {format_size(need)}; the file system of {where} "
                         f"has {format_size(free)} free; {fix}")


@contextlib.contextmanager
def files_into(out: str | os.PathLike) -> Iterator[Path]:
    """Write a set of files into the directory ``out`` all at the end.

    Yields a temporary sibling directory to write into. On success, a new
    ``out`` is that directory renamed; into an existing ``out`` each file is
    moved (``os.replace``, one complete file at a time) and nothing else in
    ``out`` is touched. On an error the temporary directory is removed and
    ``out`` is as it was.
    """
    o = Path(out)
    tmp = temp_sibling(o)
    tmp.mkdir()
    try:
        yield tmp
        fsync_tree(tmp)
        if not os.path.lexists(o):
            os.rename(tmp, o)
        else:
            for f in sorted(tmp.iterdir()):
                os.replace(f, o / f.name)
            fsync_dir(o)
        fsync_dir(o.parent if str(o.parent) else ".")
    finally:
        remove_path(tmp)
