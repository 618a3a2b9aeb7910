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
import importlib
import sys
from collections.abc import Sequence

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
        self.exit(2, f"ranktide {self.prog.split()[-1]}: {message} (see --help)\n")


def _load(name: str):
    return importlib.import_module(f"ranktide.cli.{name}")


def build_parser() -> argparse.ArgumentParser:
    """Return the top-level parser with every available subcommand."""
    parser = _Parser(
        prog="ranktide",
        description="Out-of-core trace-norm regularized linear models for large sparse data.",
    )
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
        print(f"ranktide {args.command}: error: {msg}", file=sys.stderr)
        return 2
    except KeyboardInterrupt:
        print(f"ranktide {args.command}: interrupted", file=sys.stderr)
        return 130
    except BrokenPipeError:
        # the reader of stdout went away (e.g. `| head`): stop quietly, as shell tools do
        import os

        devnull = os.open(os.devnull, os.O_WRONLY)
        os.dup2(devnull, sys.stdout.fileno())
        return 141


if __name__ == "__main__":
    sys.exit(main())
