"""The ``--cluster`` option shared by train, resume, profile, evaluate and predict."""

from __future__ import annotations

import argparse
import contextlib
from collections.abc import Iterator

from ranktide.passes.dask_backend import cluster_client, parse_cluster


def add_cluster_option(parser: argparse.ArgumentParser) -> None:
    """Add ``--cluster local:N | tcp://HOST:PORT`` to a subcommand."""
    parser.add_argument(
        "--cluster", metavar="SPEC", default=None,
        help="run the passes on dask.distributed: local:N starts N single-threaded worker "
             "processes here; tcp://HOST:PORT uses a running scheduler (workers must see the "
             "store at the same path)",
    )


@contextlib.contextmanager
def cluster_backend(args: argparse.Namespace, default: str = "serial") -> Iterator[str]:
    """Yield the pass backend name to use; start/connect the cluster if asked."""
    spec = getattr(args, "cluster", None)
    if not spec:
        yield getattr(args, "backend", None) or default
        return
    with cluster_client(parse_cluster(spec)):
        yield "dask"
