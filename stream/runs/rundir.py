"""The run directory: configuration, history, checkpoints and the final model.

Layout::

    RUN/
      config.json      format + version, the training settings, the store's path
                       and fingerprint, when and by which version it was created
      history.jsonl    one JSON object per pass (objective, gap, sigma_1, rank, ...)
      checkpoints/     see :mod:`ranktide.runs.checkpoint`
      model/           the final model (written by the trainer)

A new run is built under a temporary sibling (``.RUN.run-PID-HEX``) and gets
its name only once there is something to resume: at its first checkpoint
(:meth:`RunDir.publish`). A run replacing an older one (``--overwrite``) keeps
the temporary name until it is complete (:meth:`RunDir.complete`), when the
two are exchanged in one step; until then the old run is untouched. A run
that fails before it has a name is removed (:meth:`RunDir.discard`).

Resume rules: the store must have the fingerprint recorded in ``config.json``
and every setting must be unchanged except those in :data:`RESUME_MUTABLE`
(budgets, tolerance, checkpoint cadence, output verbosity).
"""

from __future__ import annotations

import datetime as _dt
import json
import os
from collections.abc import Callable, Mapping
from pathlib import Path
from typing import Any

import numpy as np
from ranktide import __version__
from ranktide.atomic import (
    atomic_write_bytes,
    atomic_write_json,
    fsync_dir,
    remove_path,
    replace_with,
    temp_sibling,
)
from ranktide.errors import CheckpointError, ConfigError, OutputExistsError
from ranktide.runs.checkpoint import CheckpointManager, CheckpointSchedule, canonical_json
from ranktide.runs.config import RESUME_MUTABLE
from ranktide.signals import StopFlag

__all__ = [
    "RUN_FORMAT",
    "RUN_VERSION",
    "RESUME_MUTABLE",
    "RunDir",
    "RunRecorder",
    "check_resume_compatible",
    "check_format_version",
    "read_history_file",
]

RUN_FORMAT = "ranktide-run"
RUN_VERSION = 1


def _show(value: Any) -> str:
    text = canonical_json(value)
    return text if len(text) <= 40 else text[:37] + "..."


def check_format_version(config: Mapping[str, Any], *, path: str | os.PathLike) -> None:
    """Refuse a run directory of another format or a newer format version.

    Raises
    ------
    CheckpointError
        One line naming ``path`` and what to do.
    """
    if config.get("format") != RUN_FORMAT:
        raise CheckpointError(
            f"{path}: not a ranktide run directory (format {config.get('format')!r})"
        )
    version = config.get("format_version")
    if not isinstance(version, int) or version < 1:
        raise CheckpointError(
            f"{path}: format_version {version!r} is not valid; the file is damaged"
        )
    if version > RUN_VERSION:
        raise CheckpointError(
            f"{path}: run format version {version} is newer than this ranktide supports "
            f"({RUN_VERSION}); upgrade ranktide to resume it"
        )


def check_resume_compatible(
    saved_config: Mapping[str, Any],
    new_config: Mapping[str, Any],
    fingerprint: str,
    *,
    run: str | os.PathLike = "run",
) -> None:
    """Check that a run can be resumed with ``new_config`` on a store.

    Parameters
    ----------
    saved_config : mapping
        The run's ``config.json`` content (with ``settings`` and ``store``).
    new_config : mapping
        The settings the resumed run would use (a plain settings mapping, or
        a config document with a ``settings`` key).
    fingerprint : str
        The fingerprint of the store the resumed run would read.
    run : path
        The run directory, for the message.

    Raises
    ------
    CheckpointError
        When the format version is newer, the store fingerprint differs, or
        any setting outside :data:`RESUME_MUTABLE` differs (each such key is
        named with its saved and new value).
    """
    check_format_version(saved_config, path=Path(run) / "config.json")
    saved_fp = (saved_config.get("store") or {}).get("fingerprint")
    if saved_fp != fingerprint:
        raise CheckpointError(
            f"{run}: the store's fingerprint {str(fingerprint)[:16]} differs from the run's "
            f"{str(saved_fp)[:16]}; resume only with the store the run was trained on"
        )
    old = dict(saved_config.get("settings") or {})
    inner = new_config.get("settings")
    new = dict(inner if isinstance(inner, Mapping) else new_config)
    diffs = []
    for key in sorted(set(old) | set(new)):
        if key in RESUME_MUTABLE:
            continue
        if key not in new:
            diffs.append(f"{key} (saved {_show(old[key])}, now missing)")
        elif key not in old:
            diffs.append(f"{key} (not in the run, now {_show(new[key])})")
        elif canonical_json(old[key]) != canonical_json(new[key]):
            diffs.append(f"{key} (saved {_show(old[key])}, now {_show(new[key])})")
    if diffs:
        raise CheckpointError(
            f"{run}: settings differ from the run's: {', '.join(diffs)}; only "
            f"{', '.join(sorted(RESUME_MUTABLE))} may change on resume (start a new run otherwise)"
        )


class RunDir:
    """One run directory (see the module docstring for the layout).

    Use :meth:`create` for a new run and :meth:`open` for an existing one.
    """

    def __init__(self, path: str | os.PathLike, config: dict[str, Any], *,
                 final: str | os.PathLike | None = None, replaces: bool = False) -> None:
        self.path = Path(path)
        self.config = config
        self.checkpoints = CheckpointManager(self.path)
        self._history_len: int | None = None
        #: the name the run gets (None: it already has it)
        self.final: Path | None = None if final is None else Path(final)
        #: it replaces an older run at ``final`` (swapped in only when complete)
        self.replaces = bool(replaces)

    # ----------------------------------------------------------------- naming
    @property
    def published(self) -> bool:
        """The run has its final name."""
        return self.final is None

    def _move_to(self, final: Path) -> None:
        self.path = final
        ck = self.checkpoints
        ck.run_dir, ck.dir = final, final / "checkpoints"
        if ck._last is not None:
            ck._last = ck.dir / ck._last.name
        self.final = None

    def publish(self) -> None:
        """Give a new run its name (after its first checkpoint); no-op otherwise.

        A run replacing an older one waits for :meth:`complete`.
        """
        if self.final is None or self.replaces:
            return
        fin = self.final
        if fin.is_dir() and not fin.is_symlink() and not any(fin.iterdir()):
            fin.rmdir()  # an empty directory given as the run counts as absent
        if os.path.lexists(fin):
            raise OutputExistsError(
                f"{fin}: appeared while the run was being built; the new run is kept at "
                f"{self.path}"
            )
        os.rename(self.path, fin)
        fsync_dir(fin.parent)
        self._move_to(fin)

    def complete(self) -> None:
        """The run is finished: give it its name, replacing an older run in one step."""
        if self.final is None:
            return
        if self.replaces:
            replace_with(self.path, self.final)
            self._move_to(self.final)
        else:
            self.publish()

    def discard(self) -> None:
        """Remove a run that never got its name (failed or abandoned); no-op otherwise."""
        if self.final is not None:
            remove_path(self.path)

    # --------------------------------------------------------------- locations
    @property
    def config_path(self) -> Path:
        return self.path / "config.json"

    @property
    def history_path(self) -> Path:
        return self.path / "history.jsonl"

    @property
    def model_dir(self) -> Path:
        return self.path / "model"

    @property
    def checkpoints_dir(self) -> Path:
        return self.path / "checkpoints"

    @property
    def settings(self) -> dict[str, Any]:
        return dict(self.config.get("settings") or {})

    @property
    def store_path(self) -> str | None:
        return (self.config.get("store") or {}).get("path")

    @property
    def fingerprint(self) -> str | None:
        return (self.config.get("store") or {}).get("fingerprint")

    # ------------------------------------------------------------ construction
    @classmethod
    def create(
        cls,
        path: str | os.PathLike,
        *,
        settings: Mapping[str, Any],
        store_path: str | os.PathLike | None,
        fingerprint: str,
        overwrite: bool = False,
    ) -> RunDir:
        """Create a new run directory with its ``config.json``, under a temporary name.

        The run gets the name ``path`` at its first checkpoint
        (:meth:`publish`), or, when it replaces an existing run, once it is
        complete (:meth:`complete`); :meth:`discard` removes it before then.

        Raises
        ------
        OutputExistsError
            When ``path`` already holds something and ``overwrite`` is false.
        """
        p = Path(path)
        occupied = os.path.lexists(p) and (not p.is_dir() or any(p.iterdir()))
        if occupied and not overwrite:
            raise OutputExistsError(
                f"{p}: already exists; pass --overwrite to replace it, or continue it with "
                f"ranktide resume {p}"
            )
        try:
            settings_doc = json.loads(canonical_json(dict(settings)))
        except (TypeError, ValueError) as exc:
            raise ConfigError(f"{p}: settings are not JSON-serializable ({exc})") from None
        config = {
            "format": RUN_FORMAT,
            "format_version": RUN_VERSION,
            "created": _dt.datetime.now(_dt.timezone.utc).isoformat(timespec="seconds"),
            "created_by": f"ranktide {__version__}",
            "settings": settings_doc,
            "store": {
                "path": None if store_path is None else os.fspath(Path(store_path).resolve()),
                "fingerprint": fingerprint,
            },
        }
        stage = temp_sibling(p, "run")
        try:
            stage.mkdir()
            (stage / "checkpoints").mkdir()
            atomic_write_json(stage / "config.json", config)
            atomic_write_bytes(stage / "history.jsonl", b"")
            fsync_dir(stage)
        except BaseException:
            remove_path(stage)
            raise
        return cls(stage, config, final=p, replaces=occupied)

    @classmethod
    def open(cls, path: str | os.PathLike) -> RunDir:
        """Open an existing run directory and check its format version.

        Raises
        ------
        CheckpointError
            When ``path`` is not a run directory, its ``config.json`` is
            unreadable, or it was written by a newer format version.
        """
        p = Path(path)
        cfg = p / "config.json"
        if not p.is_dir():
            raise CheckpointError(f"{p}: not a directory; give the run directory written by train")
        try:
            config = json.loads(cfg.read_text())
        except FileNotFoundError:
            raise CheckpointError(f"{cfg}: missing; {p} is not a ranktide run directory") from None
        except (OSError, ValueError) as exc:
            raise CheckpointError(
                f"{cfg}: unreadable ({type(exc).__name__}); the run is damaged"
            ) from None
        if not isinstance(config, dict):
            raise CheckpointError(f"{cfg}: not a JSON object; the run is damaged")
        check_format_version(config, path=cfg)
        return cls(p, config)

    def update_settings(self, changes: Mapping[str, Any]) -> None:
        """Record new values of resume-mutable settings in ``config.json``.

        Raises
        ------
        ConfigError
            When a key outside :data:`RESUME_MUTABLE` is given.
        """
        bad = sorted(set(changes) - RESUME_MUTABLE)
        if bad:
            raise ConfigError(f"{self.path}: settings {', '.join(bad)} cannot change on resume")
        settings = self.settings
        settings.update(json.loads(canonical_json(dict(changes))))
        self.config = dict(self.config, settings=settings)
        atomic_write_json(self.config_path, self.config)

    # ----------------------------------------------------------------- history
    @property
    def history_len(self) -> int:
        """Number of complete records in ``history.jsonl``."""
        if self._history_len is None:
            self._history_len = len(self.read_history())
        return self._history_len

    def append_history(self, record: Mapping[str, Any]) -> None:
        """Append one JSON line to ``history.jsonl`` (flushed and fsynced)."""
        line = canonical_json(dict(record)) + "\n"
        n = self.history_len
        with open(self.history_path, "a", encoding="utf-8") as fh:
            fh.write(line)
            fh.flush()
            os.fsync(fh.fileno())
        self._history_len = n + 1

    def read_history(self) -> list[dict[str, Any]]:
        """Every complete record of ``history.jsonl`` (see :func:`read_history_file`)."""
        return read_history_file(self.history_path)

    def truncate_history(self, n_records: int) -> None:
        """Keep the first ``n_records`` records (those a checkpoint accounts for).

        A run killed after its last checkpoint may have logged passes that the
        resumed run will do again; they are dropped so each pass appears once.
        """
        kept = self.read_history()[: max(0, int(n_records))]
        data = "".join(canonical_json(r) + "\n" for r in kept).encode()
        atomic_write_bytes(self.history_path, data)
        self._history_len = len(kept)


class RunRecorder:
    """The trainer's per-pass checkpoint hook: cadence, path-step ends, stop requests.

    Parameters
    ----------
    run : RunDir
        Where to write (its history is appended by the trainer).
    schedule : CheckpointSchedule
        When a checkpoint is due (by seconds and/or passes).
    stop : StopFlag or None
        Checked after every pass; when set, a checkpoint is written and
        :meth:`after_pass` returns True (stop now).
    context : callable, optional
        ``context() -> (arrays, meta)``: the trainer's own state beside the
        solver's (regularization-path position, best model so far, planner
        decisions). Its arrays are stored under ``ctx/<name>``.

    Notes
    -----
    A checkpoint's metadata is ``{"solver": <state meta>, "context": <context
    meta>, "history_len": n, "settings": <run settings>}``: ``history_len``
    lets a resumed run drop the history lines logged after the checkpoint,
    ``settings`` lets resume detect a ``config.json`` edited by hand.
    """

    CONTEXT_PREFIX = "ctx/"

    def __init__(
        self,
        run: RunDir,
        *,
        schedule: CheckpointSchedule,
        stop: StopFlag | None = None,
        context: Callable[[], tuple[dict[str, np.ndarray], dict[str, Any]]] | None = None,
    ) -> None:
        self.run = run
        self.schedule = schedule
        self.stop = stop
        self.context = context
        self.checkpoints_written = 0
        self.last_checkpoint: Path | None = None

    @property
    def checkpoint_seconds(self) -> float:
        """Seconds spent writing checkpoints so far."""
        return self.run.checkpoints.total_save_seconds

    @property
    def stopping(self) -> bool:
        return bool(self.stop)

    def checkpoint(self, state: Any) -> Path:
        """Write a checkpoint of ``state`` (anything with ``to_checkpoint()``) now."""
        arrays, meta = state.to_checkpoint()
        arrays = dict(arrays)
        ctx_meta: dict[str, Any] = {}
        if self.context is not None:
            ctx_arrays, ctx_meta = self.context()
            arrays.update({self.CONTEXT_PREFIX + k: v for k, v in ctx_arrays.items()})
        doc = {
            "solver": meta,
            "context": ctx_meta,
            "history_len": self.run.history_len,
            "settings": self.run.settings,
        }
        try:
            path = self.run.checkpoints.save(arrays, doc)
        except CheckpointError as exc:
            if self.run.final is None:
                raise
            # nothing to resume yet: the run never got its name and is removed
            reason = str(exc).split("(", 1)[-1].split(")", 1)[0]
            fin = self.run.final
            what = (f"it was discarded and the old {fin} is unchanged" if self.run.replaces
                    else "nothing was kept")
            raise CheckpointError(f"{fin}: could not write a checkpoint of the new run "
                                  f"({reason}); {what}: free some disk space and train "
                                  "again") from None
        self.run.publish()  # a new run gets its name once there is something to resume
        path = self.run.checkpoints.dir / path.name
        self.schedule.reset()
        self.checkpoints_written += 1
        self.last_checkpoint = path
        return path

    def after_pass(self, state: Any, *, step_done: bool = False) -> bool:
        """Count a finished pass; checkpoint when due; True when the run must stop.

        Parameters
        ----------
        state : object with ``to_checkpoint() -> (arrays, meta)``
            The solver state after the pass.
        step_done : bool
            The pass ended a regularization-path step or the run (always
            checkpointed).
        """
        due = self.schedule.tick()
        stopping = bool(self.stop)
        if due or step_done or stopping:
            self.checkpoint(state)
        return stopping

    def during_step(self, state: Any | None) -> bool:
        """Checkpoint ``state`` when one is due by the clock, from inside an outer iteration.

        Called from a long refinement (``GreedySolver.refine_progress``) with the
        state before the iteration in progress (``GreedySolver.state_before_step``):
        resuming it redoes that iteration, so the resume stays exact while the
        checkpoint schedule is kept. True when a checkpoint was written.
        """
        if state is None or not self.schedule.due_by_time():
            return False
        self.checkpoint(state)
        return True

    @classmethod
    def split(
        cls, arrays: Mapping[str, np.ndarray]
    ) -> tuple[dict[str, np.ndarray], dict[str, np.ndarray]]:
        """Split loaded checkpoint arrays into (solver arrays, context arrays)."""
        solver, ctx = {}, {}
        for k, v in arrays.items():
            if k.startswith(cls.CONTEXT_PREFIX):
                ctx[k[len(cls.CONTEXT_PREFIX) :]] = v
            else:
                solver[k] = v
        return solver, ctx


def read_history_file(path: str | os.PathLike) -> list[dict[str, Any]]:
    """Every complete record of a run's ``history.jsonl``.

    Records are appended one line at a time, so only the last line can be torn
    (a kill in the middle of a write): it is skipped. A line that is not a JSON
    object anywhere else means the file was damaged or edited; the records
    before it are returned (a resumed run rewrites the file from its checkpoint).
    A missing file has no records.
    """
    p = Path(path)
    try:
        text = p.read_text(encoding="utf-8")
    except FileNotFoundError:
        return []
    except OSError as exc:
        raise CheckpointError(f"{p}: unreadable ({exc.strerror}); check permissions") from None
    records = []
    for line in text.splitlines():
        try:
            rec = json.loads(line)
        except ValueError:
            break
        if not isinstance(rec, dict):
            break
        records.append(rec)
    return records
