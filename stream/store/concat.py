"""Two or more sources read as one: their rows one after the other.

Used to fit a chosen model on the training and the validation rows together
(:func:`ranktide.runs.train.train` with ``refit_with_valid``). The parts must
agree on the column count, the target kind, the outputs and their names, and
on whether rows carry weights.
"""

from __future__ import annotations

from dataclasses import replace
from typing import Any

import numpy as np
from ranktide.errors import InputError

__all__ = ["ConcatSource"]


class ConcatSource:
    """The rows of ``parts`` in order, as one read-only source.

    Parameters
    ----------
    parts : sequence of sources
        Stores or in-memory sources (``shape``, ``block_ranges``, ``read_block``).
    names : sequence of str
        How each part is named in error messages (its path or a label).

    Notes
    -----
    A block never spans two parts: ``block_ranges`` is the concatenation of
    each part's own ranges, shifted by the rows before it.
    """

    def __init__(self, parts: list, names: list[str]) -> None:
        first = parts[0]
        for part, name in zip(parts[1:], names[1:], strict=True):
            for what in ("target_kind", "n_outputs", "has_weights"):
                if getattr(part, what) != getattr(first, what):
                    raise InputError(
                        f"{name}: {what} {getattr(part, what)!r} differs from {names[0]}'s "
                        f"{getattr(first, what)!r}; both must hold the same kind of targets")
            if int(part.shape[1]) != int(first.shape[1]):
                raise InputError(f"{name}: {part.shape[1]} columns, {names[0]} has "
                                 f"{first.shape[1]}; use the same feature space")
            if _names(part) != _names(first):
                raise InputError(f"{name}: its output names differ from {names[0]}'s; "
                                 "ingest both with the same class or tag list")
        self.parts = list(parts)
        self._starts = np.cumsum([0] + [int(p.shape[0]) for p in parts])

    # -- the read-side contract -------------------------------------------
    @property
    def shape(self) -> tuple[int, int]:
        return (int(self._starts[-1]), int(self.parts[0].shape[1]))

    @property
    def n_rows(self) -> int:
        return self.shape[0]

    @property
    def n_cols(self) -> int:
        return self.shape[1]

    @property
    def nnz(self) -> int:
        return int(sum(int(p.nnz) for p in self.parts))

    @property
    def target_kind(self) -> str | None:
        return self.parts[0].target_kind

    @property
    def n_outputs(self) -> int:
        return int(self.parts[0].n_outputs)

    @property
    def has_weights(self) -> bool:
        return bool(self.parts[0].has_weights)

    @property
    def output_names(self) -> list[str] | None:
        return _names(self.parts[0])

    @property
    def attrs(self) -> dict:
        return {"n_rows": self.shape[0], "n_cols": self.shape[1], "nnz": self.nnz,
                "target_kind": self.target_kind, "n_outputs": self.n_outputs}

    def indptr_range(self, a: int, b: int) -> np.ndarray:
        """``indptr[a:b+1]`` of the joined rows (int64; ``a:b`` inside one part)."""
        i, off = self._part(a, b)
        ptr = self.parts[i].indptr_range(a - off, b - off)
        before = sum(int(p.nnz) for p in self.parts[:i])
        return ptr + before

    def block_ranges(self, *, rows: int | None = None,
                     block_bytes: int | None = None) -> list[tuple[int, int]]:
        out = []
        for p, off in zip(self.parts, self._starts[:-1], strict=False):
            out += [(int(a + off), int(b + off))
                    for a, b in p.block_ranges(rows=rows, block_bytes=block_bytes)]
        return out

    def read_block(self, start: int, stop: int) -> Any:
        i, off = self._part(start, stop)
        block = self.parts[i].read_block(start - off, stop - off)
        return replace(block, start=int(start), stop=int(stop))

    def blocks(self, *, rows: int | None = None, block_bytes: int | None = None):
        for a, b in self.block_ranges(rows=rows, block_bytes=block_bytes):
            yield self.read_block(a, b)

    def close(self) -> None:
        """The parts belong to the caller: nothing to release."""

    def _part(self, a: int, b: int) -> tuple[int, int]:
        i = int(np.searchsorted(self._starts, a, side="right")) - 1
        if not (0 <= i < len(self.parts)) or b > self._starts[i + 1] or a >= b:
            raise InputError(f"joined rows: block [{a}, {b}) is not inside one part "
                             f"(parts start at {self._starts.tolist()})")
        return i, int(self._starts[i])


def _names(src: Any) -> list[str] | None:
    names = getattr(src, "output_names", None)
    return list(names) if names else None
