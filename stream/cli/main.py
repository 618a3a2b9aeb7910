"""The ``ranktide`` command: one entry point, one module per subcommand.

Each subcommand lives in ``stream/commands/<name>.py`` and provides

* ``HELP``: a one-line summary;
* ``EXAMPLE``: one example invocation, shown at the end of ``--help``;
* ``configure(parser)``: adds its arguments to an ``argparse`` parser;
* ``run(args) -> int``: does the work and returns the exit status.

A :class:`~ranktide.errors.RanktideError` escaping ``run`` is printed as one
line on stderr and the command exits with status 2.
"""

from __future__ import annotations

import argparse
import errno
import importlib
import os
import sys
from collections.abc import Sequence

from ranktide import __version__
from ranktide.atomic import user_path
from ranktide.errors import KernelError, RanktideError

COMMANDS: tuple[str, ...] = (
    "ingest",
    "inspect",
    "split",
    "train",
    "resume",
    "evaluate",
    "predict",
    "profile",
    "report",
    "demo",
)


class _Parser(argparse.ArgumentParser):
    """Argument parser whose usage errors are one line and exit status 2."""

    def error(self, message: str) -> None:  # type: ignore[override]
        words = self.prog.split()
        who = "ranktide" if len(words) < 2 else f"ranktide {words[-1]}"
        self.exit(2, f"{who}: {message} (see --help)\n")


#: what to do after an operating-system error, by errno
_OS_HINTS: dict[int, str] = {
    errno.ENOSPC: "the disk is full: free space or write to another file system; nothing "
                  "half-written was kept",
    errno.EDQUOT: "the disk quota is exceeded: free space or write elsewhere",
    errno.EROFS: "the file system is read-only: choose a writable directory",
    errno.EACCES: "permission denied: choose a directory you can write to",
    errno.EPERM: "not permitted: choose a directory you can write to",
    errno.ENOENT: "check the path",
    errno.ENOTDIR: "a part of the path is a file, not a directory: check the path",
    errno.EISDIR: "it is a directory; give a file",
    errno.ELOOP: "a symbolic-link loop: point the link at a real file",
    errno.ENAMETOOLONG: "use a shorter path",
}


def os_error_line(exc: OSError, output: str | None = None) -> str:
    """One line for an operating-system error: the path, the reason, what to do.

    Without a file name in the error (some libraries drop it) the command's
    output is named.
    """
    name = exc.filename if exc.filename is not None else output
    where = user_path(name) if name is not None else "ranktide"
    reason = exc.strerror or (os.strerror(exc.errno) if exc.errno else type(exc).__name__)
    hint = _OS_HINTS.get(exc.errno or 0, "fix the problem and run the command again")
    return f"{where}: {reason}; {hint}"


def _load(name: str):
    return importlib.import_module(f"ranktide.cli.{name}")


def build_parser() -> argparse.ArgumentParser:
    """Return the top-level parser with every available subcommand."""
    parser = _Parser(
        prog="ranktide",
        description="Out-of-core trace-norm regularized linear models for large sparse data.",
    )
    parser.add_argument("--version", action="version", version=f"ranktide {__version__}")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND", parser_class=_Parser)
    for name in COMMANDS:
        try:
            mod = _load(name)
        except ModuleNotFoundError as exc:
            if exc.name != f"ranktide.cli.{name}":
                raise
            continue
        p = sub.add_parser(
            name,
            help=mod.HELP,
            description=mod.HELP,
            epilog=f"example:\n  {mod.EXAMPLE}",
            formatter_class=argparse.RawDescriptionHelpFormatter,
        )
        mod.configure(p)
        p.set_defaults(_run=mod.run)
    return parser


def main(argv: Sequence[str] | None = None) -> int:
    """Run the command line; return the exit status."""
    parser = build_parser()
    args = parser.parse_args(argv)
    if not getattr(args, "_run", None):
        parser.print_help()
        return 2
    try:
        return int(args._run(args) or 0)
    except (RanktideError, KernelError) as exc:
        msg = str(exc).splitlines()[0] if str(exc) else type(exc).__name__
        msg = user_path(msg)  # name the outputs, not their temporary siblings
        print(f"ranktide {args.command}: error: {msg}", file=sys.stderr)
        return 2
    except MemoryError:
        print(f"ranktide {args.command}: error: out of memory; give a smaller --memory budget "
              "(or --block-rows) so the command plans within it, or free memory",
              file=sys.stderr)
        return 2
    except KeyboardInterrupt:
        print(f"ranktide {args.command}: interrupted", file=sys.stderr)
        return 130
    except BrokenPipeError:
        # the reader of stdout went away (e.g. `| head`): stop quietly, as shell tools do
        devnull = os.open(os.devnull, os.O_WRONLY)
        os.dup2(devnull, sys.stdout.fileno())
        return 141
    except OSError as exc:
        line = os_error_line(exc, getattr(args, "out", None))
        print(f"ranktide {args.command}: error: {line}", file=sys.stderr)
        return 2


if __name__ == "__main__":
    sys.exit(main())
