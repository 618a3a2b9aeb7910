"""Graceful stop on SIGINT / SIGTERM.

:func:`stop_on_signals` installs handlers that only set a flag; the pass
engine checks it after every block and the refinement after every step (the
unfinished outer iteration is abandoned, see :class:`StopRequested`), the
trainer then writes a checkpoint and the command exits with 128 + the signal number
(130 for SIGINT, 143 for SIGTERM). A second signal while stopping raises
:class:`KeyboardInterrupt` so a stuck run can still be aborted; checkpoint
writes are atomic, so even that leaves a valid run directory.
"""

from __future__ import annotations

import contextlib
import signal
import threading
from collections.abc import Iterator, Sequence

__all__ = ["StopFlag", "StopRequested", "stop_on_signals", "interrupted_message"]


class StopRequested(Exception):
    """Raised inside a pass or a refinement when its stop check fires.

    The pass engine raises it at a block boundary (the current block finished,
    later ones abandoned); the solver catches it, puts its state back to where
    it was before the interrupted outer iteration and ends the run with status
    ``"interrupted"``, so a checkpoint written then resumes exactly.
    """


class StopFlag:
    """A stop request set by a signal handler (or by :meth:`request`).

    Truthy once a stop was requested. ``signum`` is the signal that asked for
    it and ``exit_code`` the conventional exit status (128 + signum).
    """

    def __init__(self) -> None:
        self.signum: int | None = None
        self._event = threading.Event()

    def request(self, signum: int = signal.SIGINT) -> None:
        """Ask the run to stop at the next block or pass boundary."""
        if self.signum is None:
            self.signum = int(signum)
        self._event.set()

    @property
    def requested(self) -> bool:
        return self._event.is_set()

    def __bool__(self) -> bool:
        return self._event.is_set()

    def __call__(self) -> bool:
        """Allow passing the flag where a ``should_stop()`` callable is expected."""
        return self._event.is_set()

    @property
    def exit_code(self) -> int:
        return 128 + int(self.signum) if self.signum is not None else 0

    @property
    def signal_name(self) -> str:
        if self.signum is None:
            return ""
        try:
            return signal.Signals(self.signum).name
        except ValueError:
            return f"signal {self.signum}"


def interrupted_message(run_dir: str) -> str:
    """The line printed after an interrupted run has written its checkpoint."""
    return f"ranktide: interrupted; resume with: ranktide resume {run_dir}"


@contextlib.contextmanager
def stop_on_signals(
    signals: Sequence[int] = (signal.SIGINT, signal.SIGTERM),
    *,
    flag: StopFlag | None = None,
) -> Iterator[StopFlag]:
    """Install flag-setting handlers for ``signals`` for the duration of a block.

    Parameters
    ----------
    signals : sequence of int
        The signals to catch.
    flag : StopFlag, optional
        An existing flag to set (a new one by default).

    Yields
    ------
    StopFlag
        Set when one of the signals arrives. Outside the main thread no
        handler can be installed and the flag is only set by ``request``.
    """
    stop = flag if flag is not None else StopFlag()
    if threading.current_thread() is not threading.main_thread():
        yield stop
        return

    def _handler(signum, _frame):
        if stop.requested:
            raise KeyboardInterrupt
        stop.request(signum)

    previous = {}
    try:
        for sig in signals:
            previous[sig] = signal.signal(sig, _handler)
        yield stop
    finally:
        for sig, old in previous.items():
            signal.signal(sig, old)
