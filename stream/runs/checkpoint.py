"""Atomic, checksummed checkpoints in a run directory.

A checkpoint is a directory ``checkpoints/save-<counter>`` (8 digits) holding

* ``state.npz`` -- every array of the solver state (written with
  :func:`ranktide.atomic.save_npz`, never pickled);
* ``meta.json`` -- the format name and version, the counter, the sha256 and
  size of ``state.npz``, the caller's metadata and a sha256 of the JSON body
  itself, so a flipped byte anywhere in either file is detected on load.

Writing goes to a temporary sibling directory whose files are fsynced, which
is then renamed into place; only after that is the pointer file
``newest.txt`` replaced atomically. A crash at any moment therefore leaves
``newest.txt`` naming a complete checkpoint (the new or the previous one).
The checkpoint it named before the new one is kept as a fallback and every
older one is removed.

Loading follows ``newest.txt``, verifies both checksums and falls back, with
a warning, to the previous checkpoint when the latest is damaged.

Run directories written by earlier versions name their checkpoints
``ckpt-<counter>`` with the pointer file ``LATEST``; they are read the same
way (the counter orders both spellings), and the first new checkpoint
written into such a directory continues the count under the new names.
"""

from __future__ import annotations

import datetime as _dt
import errno
import hashlib
import json
import os
import re
import time
import warnings
from collections.abc import Mapping
from pathlib import Path
from typing import Any

import numpy as np
from ranktide.atomic import (
    atomic_write_bytes,
    fsync_dir,
    fsync_tree,
    load_npz,
    remove_path,
    save_npz,
)
from ranktide.errors import CheckpointError

__all__ = [
    "CHECKPOINT_FORMAT",
    "CHECKPOINT_VERSION",
    "CheckpointManager",
    "CheckpointWarning",
    "CheckpointSchedule",
    "canonical_json",
]

CHECKPOINT_FORMAT = "ranktide-checkpoint"
CHECKPOINT_VERSION = 1
POINTER_NAME = "newest.txt"
#: the pointer file of run directories written by earlier versions (read, never written)
OLD_POINTER_NAME = "LATEST"
#: the directory prefix of new checkpoints; earlier versions wrote ``ckpt-``
DIR_PREFIX = "save-"
STATE_NAME = "state.npz"
META_NAME = "meta.json"
_DIR_RE = re.compile(r"^(?:save|ckpt)-(\d{8})$")
_TMP_RE = re.compile(r"^\.(?:save|ckpt)-(\d{8})\.")

# Test-only hooks (read at call time): make the writer touch a file and pause
# at a chosen stage of a chosen save, so a test can kill the process there.
_ENV_PAUSE_FILE = "RANKTIDE_TEST_PAUSE_IN_CHECKPOINT"
_ENV_PAUSE_SAVE = "RANKTIDE_TEST_PAUSE_SAVE"
_ENV_PAUSE_STAGE = "RANKTIDE_TEST_PAUSE_STAGE"
_PAUSE_SECONDS = 60.0


def _counter(path: Path) -> int:
    """The counter in a checkpoint directory's name (either spelling)."""
    return int(_DIR_RE.match(path.name).group(1))


class CheckpointWarning(RuntimeWarning):
    """A damaged checkpoint was skipped in favour of an older one."""


def _json_default(obj: Any) -> Any:
    if isinstance(obj, np.generic):
        return obj.item()
    if isinstance(obj, Path):
        return os.fspath(obj)
    if isinstance(obj, np.ndarray):
        raise TypeError("numpy arrays belong in the checkpoint's arrays, not in its metadata")
    raise TypeError(f"{type(obj).__name__} is not JSON serializable")


def canonical_json(obj: Any) -> str:
    """Return the canonical JSON text of ``obj`` (sorted keys, no spaces).

    Python floats round-trip exactly through their JSON repr, so metadata
    restored from a checkpoint is bit-identical to what was saved.
    """
    return json.dumps(obj, sort_keys=True, separators=(",", ":"), default=_json_default)


def _sha256_file(path: Path) -> tuple[str, int]:
    h = hashlib.sha256()
    size = 0
    with open(path, "rb") as fh:
        while True:
            chunk = fh.read(1 << 20)
            if not chunk:
                break
            h.update(chunk)
            size += len(chunk)
    return h.hexdigest(), size


def _body_digest(body: Mapping[str, Any]) -> str:
    return hashlib.sha256(canonical_json(body).encode()).hexdigest()


def _utc_now() -> str:
    return _dt.datetime.now(_dt.timezone.utc).isoformat(timespec="seconds")


def _test_pause(stage: str, save_index: int, counter: int) -> None:
    """Test hook: touch the pause file and sleep when this save/stage is selected."""
    target = os.environ.get(_ENV_PAUSE_FILE)
    if not target:
        return
    if os.environ.get(_ENV_PAUSE_STAGE, "write") != stage:
        return
    try:
        wanted = int(os.environ.get(_ENV_PAUSE_SAVE, "1"))
    except ValueError:
        wanted = 1
    if wanted != save_index:
        return
    Path(target).write_text(f"{os.getpid()} {stage} {counter}\n")
    deadline = time.monotonic() + _PAUSE_SECONDS
    while time.monotonic() < deadline:
        time.sleep(0.05)


class CheckpointManager:
    """Write and read the checkpoints of one run directory.

    Parameters
    ----------
    run_dir : path
        The run directory; checkpoints live in ``run_dir/checkpoints``.
    keep : int
        How many checkpoints to keep (the newest and the one before it by
        default). At least 1.

    Notes
    -----
    A manager remembers the checkpoint it last loaded or saved: the next save
    keeps that one as the fallback, so a run resumed from the previous
    checkpoint (because the latest was damaged) never prunes the good one.
    """

    def __init__(self, run_dir: str | os.PathLike, *, keep: int = 2) -> None:
        if int(keep) < 1:
            raise CheckpointError(f"{run_dir}: keep={keep} checkpoints; keep at least 1")
        self.run_dir = Path(run_dir)
        self.dir = self.run_dir / "checkpoints"
        self.keep = int(keep)
        self._saves = 0
        self._last: Path | None = None
        self.last_save_seconds = 0.0
        self.total_save_seconds = 0.0

    # ------------------------------------------------------------------ listing
    def checkpoints(self) -> list[Path]:
        """Complete-looking checkpoint directories, oldest first."""
        if not self.dir.is_dir():
            return []
        found = []
        for entry in self.dir.iterdir():
            m = _DIR_RE.match(entry.name)
            if m and entry.is_dir():
                found.append((int(m.group(1)), entry))
        return [p for _c, p in sorted(found)]

    def pointer(self) -> Path | None:
        """The checkpoint directory named by ``newest.txt`` (or an old run's ``LATEST``).

        None when neither pointer file is readable.
        """
        for name in (POINTER_NAME, OLD_POINTER_NAME):
            try:
                text = (self.dir / name).read_text(encoding="ascii").strip()
            except FileNotFoundError:
                continue
            except (OSError, UnicodeDecodeError):
                return None
            return self.dir / text if _DIR_RE.match(text) else None
        return None

    def _next_counter(self) -> int:
        counters = [_counter(p) for p in self.checkpoints()]
        if self.dir.is_dir():
            for entry in self.dir.iterdir():  # temporaries of interrupted writes
                m = _TMP_RE.match(entry.name)
                if m:
                    counters.append(int(m.group(1)))
        return max(counters, default=0) + 1

    # ------------------------------------------------------------------- saving
    def save(self, arrays: Mapping[str, np.ndarray], meta: Mapping[str, Any]) -> Path:
        """Write a new checkpoint and make it the latest.

        Parameters
        ----------
        arrays : mapping of str to ndarray
            Numeric arrays of the state (object arrays are refused).
        meta : mapping
            JSON-serializable metadata (numpy scalars are converted).

        Returns
        -------
        Path
            The new checkpoint directory.

        Raises
        ------
        CheckpointError
            When the checkpoint cannot be written (full disk, permissions,
            object arrays). The temporary directory is removed and the
            previous checkpoint and ``newest.txt`` are left untouched.
        """
        t0 = time.perf_counter()
        self._saves += 1
        for name, arr in arrays.items():
            if np.asarray(arr).dtype.hasobject:
                raise CheckpointError(
                    f"{self.dir}: state array {name!r} has dtype object; checkpoints hold "
                    "numeric arrays only (report this as a bug)"
                )
        try:
            body_meta = json.loads(canonical_json(dict(meta)))
        except (TypeError, ValueError) as exc:
            raise CheckpointError(
                f"{self.dir}: checkpoint metadata is not JSON-serializable ({exc}); "
                "report this as a bug"
            ) from None
        previous = self._last if self._last is not None else self.pointer()
        try:
            self.dir.mkdir(parents=True, exist_ok=True)
            counter = self._next_counter()
            final = self.dir / f"{DIR_PREFIX}{counter:08d}"
            tmp = self.dir / f".{DIR_PREFIX}{counter:08d}.tmp-{os.getpid()}"
            try:
                self._write_tree(tmp, counter, arrays, body_meta)
                os.replace(tmp, final)
            except BaseException:
                remove_path(tmp)
                raise
            fsync_dir(self.dir)
            _test_pause("publish", self._saves, counter)
            atomic_write_bytes(self.dir / POINTER_NAME, f"{final.name}\n".encode("ascii"))
        except OSError as exc:
            reason = os.strerror(exc.errno) if exc.errno else str(exc)
            hint = "free some disk space" if exc.errno == errno.ENOSPC else "fix the problem"
            raise CheckpointError(
                f"{self.dir}: could not write a checkpoint ({reason}); {hint}, then continue "
                f"with: ranktide resume {self.run_dir}"
            ) from None
        self._last = final
        self._prune(final, previous)
        self.last_save_seconds = time.perf_counter() - t0
        self.total_save_seconds += self.last_save_seconds
        return final

    def _write_tree(
        self, tmp: Path, counter: int, arrays: Mapping[str, np.ndarray], meta: dict
    ) -> None:
        tmp.mkdir()
        state = tmp / STATE_NAME
        save_npz(state, arrays)
        digest, size = _sha256_file(state)
        _test_pause("write", self._saves, counter)
        body = {
            "format": CHECKPOINT_FORMAT,
            "format_version": CHECKPOINT_VERSION,
            "counter": counter,
            "created": _utc_now(),
            "files": {STATE_NAME: {"sha256": digest, "bytes": size}},
            "meta": meta,
        }
        doc = dict(body, sha256=_body_digest(body))
        atomic_write_bytes(
            tmp / META_NAME, (json.dumps(doc, indent=1, sort_keys=True) + "\n").encode()
        )
        fsync_tree(tmp)

    def _prune(self, newest: Path, previous: Path | None) -> None:
        keep = {newest.name}
        if previous is not None and self.keep >= 2 and previous.is_dir():
            keep.add(previous.name)
        others = [p for p in reversed(self.checkpoints()) if p.name not in keep]
        # With keep > 2, also keep the newest of the others.
        for p in others[: max(0, self.keep - len(keep))]:
            keep.add(p.name)
        for entry in list(self.dir.iterdir()):
            if entry.name == POINTER_NAME or entry.name in keep:
                continue
            if (_DIR_RE.match(entry.name) or _TMP_RE.match(entry.name)
                    or entry.name == OLD_POINTER_NAME  # superseded by newest.txt
                    or entry.name.startswith((f".{POINTER_NAME}.", f".{OLD_POINTER_NAME}."))):
                remove_path(entry)
        fsync_dir(self.dir)

    # ------------------------------------------------------------------ loading
    def verify(self, path: str | os.PathLike) -> tuple[dict[str, np.ndarray], dict[str, Any]]:
        """Load one checkpoint directory, checking its format and checksums.

        Returns
        -------
        arrays : dict of str to ndarray
        meta : dict
            The metadata given to :meth:`save`.

        Raises
        ------
        CheckpointError
            When the checkpoint is incomplete, damaged, holds an object
            array, or was written by a newer format version.
        """
        p = Path(path)
        meta_path = p / META_NAME
        try:
            doc = json.loads(meta_path.read_bytes())
        except FileNotFoundError:
            raise CheckpointError(f"{meta_path}: missing (incomplete checkpoint)") from None
        except (OSError, ValueError) as exc:
            raise CheckpointError(f"{meta_path}: unreadable ({type(exc).__name__})") from None
        if not isinstance(doc, dict) or doc.get("format") != CHECKPOINT_FORMAT:
            raise CheckpointError(f"{meta_path}: not a ranktide checkpoint")
        stored = doc.pop("sha256", None)
        if stored != _body_digest(doc):
            raise CheckpointError(f"{meta_path}: checksum mismatch (damaged)")
        version = doc.get("format_version")
        if not isinstance(version, int) or version > CHECKPOINT_VERSION:
            raise CheckpointError(
                f"{meta_path}: checkpoint format version {version} is newer than this "
                f"ranktide supports ({CHECKPOINT_VERSION}); upgrade ranktide to resume it"
            )
        entry = doc.get("files", {}).get(STATE_NAME, {})
        state = p / STATE_NAME
        if not state.is_file():
            raise CheckpointError(f"{state}: missing (incomplete checkpoint)")
        digest, size = _sha256_file(state)
        if size != entry.get("bytes") or digest != entry.get("sha256"):
            raise CheckpointError(
                f"{state}: checksum mismatch ({size} bytes, expected {entry.get('bytes')}; damaged)"
            )
        arrays = load_npz(state, error=CheckpointError)
        return arrays, doc.get("meta", {})

    def load_latest(self) -> tuple[dict[str, np.ndarray], dict[str, Any], Path]:
        """Load the newest valid checkpoint.

        Follows ``newest.txt`` (an old run's ``LATEST``); when that checkpoint
        is damaged (or the pointer is unreadable) the next older one is tried, with a
        :class:`CheckpointWarning` naming what was wrong.

        Returns
        -------
        arrays : dict of str to ndarray
        meta : dict
        path : Path
            The checkpoint directory that was loaded.

        Raises
        ------
        CheckpointError
            When no valid checkpoint exists, or one was written by a newer
            format version.
        """
        candidates = self.checkpoints()
        if not candidates:
            raise CheckpointError(
                f"{self.dir}: no checkpoint found; the run cannot be resumed, start it again "
                "with ranktide train"
            )
        ptr = self.pointer()
        if ptr is not None and ptr in candidates:
            # Checkpoints newer than the pointer were never published: ignore them.
            order = [ptr] + [c for c in reversed(candidates) if _counter(c) < _counter(ptr)]
        else:
            warnings.warn(
                f"{self.dir / POINTER_NAME}: missing or damaged; using the newest checkpoint "
                "that verifies",
                CheckpointWarning,
                stacklevel=2,
            )
            order = list(reversed(candidates))
        problems = []
        for i, cand in enumerate(order):
            try:
                arrays, meta = self.verify(cand)
            except CheckpointError as exc:
                if "newer than this ranktide" in str(exc):
                    raise
                problems.append(str(exc))
                nxt = order[i + 1].name if i + 1 < len(order) else None
                if nxt is not None:
                    warnings.warn(
                        f"checkpoint {cand.name} is not usable ({exc}); falling back to {nxt}",
                        CheckpointWarning,
                        stacklevel=2,
                    )
                continue
            self._last = cand
            return arrays, meta, cand
        raise CheckpointError(
            f"{self.dir}: no valid checkpoint ({'; '.join(problems)}); the run cannot be "
            "resumed, start it again with ranktide train"
        )


class CheckpointSchedule:
    """Decide when to checkpoint: every ``seconds`` or every ``passes``.

    Parameters
    ----------
    seconds : float or None
        Wall-clock seconds of training between checkpoints (None: never by time).
    passes : int or None
        Passes between checkpoints (None: never by count).
    clock : callable
        Returns seconds (``time.monotonic`` by default; tests pass a fake).
    """

    def __init__(
        self,
        *,
        seconds: float | None = 60.0,
        passes: int | None = None,
        clock=time.monotonic,
    ) -> None:
        if seconds is not None and not seconds > 0:
            raise CheckpointError(f"--checkpoint-seconds {seconds}: must be > 0")
        if passes is not None and int(passes) < 1:
            raise CheckpointError(f"--checkpoint-passes {passes}: must be >= 1")
        self.seconds = None if seconds is None else float(seconds)
        self.passes = None if passes is None else int(passes)
        self._clock = clock
        self.reset()

    def reset(self) -> None:
        """Start counting from now (call after each checkpoint)."""
        self._t0 = self._clock()
        self._n = 0

    def tick(self) -> bool:
        """Count one finished pass; True when a checkpoint is due."""
        self._n += 1
        if self.passes is not None and self._n >= self.passes:
            return True
        return self.seconds is not None and self._clock() - self._t0 >= self.seconds

    def due_by_time(self) -> bool:
        """True when a checkpoint is due by the clock (counts no pass; for use inside one)."""
        return self.seconds is not None and self._clock() - self._t0 >= self.seconds
