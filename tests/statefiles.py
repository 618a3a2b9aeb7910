"""Test helper: a solver state through the files a checkpoint writes (npz without pickle,
and JSON), read back."""

from __future__ import annotations

import json
from pathlib import Path

from ranktide.atomic import load_npz, save_npz
from ranktide.solver.state import SolverState


def through_files(state: SolverState, where: Path) -> SolverState:
    """``state`` saved as ``where/state.npz`` + ``where/state.json`` and loaded again."""
    arrays, meta = state.to_checkpoint()
    save_npz(where / "state.npz", arrays)
    (where / "state.json").write_text(json.dumps(meta))
    return SolverState.from_checkpoint(load_npz(where / "state.npz"),
                                       json.loads((where / "state.json").read_text()))
