"""The cached projections ``X Q`` of a pass, per row block: in memory or in scratch files.

The gradient pass keeps each block's projections (with the block's targets and
weights) for the refinement; when the memory budget cannot hold them it writes
them here, one file of ``.npy`` records per block, and the refinement streams them back.
The pass writes them, so this module owns their file format.
"""

from __future__ import annotations

import os
from collections.abc import Iterator, Sequence
from pathlib import Path
from typing import Any

import numpy as np
import scipy.sparse as sp
from ranktide.errors import ConfigError, StoreError

__all__ = ["take_rows", "MemoryProjections", "ScratchProjections", "write_projection_block",
           "read_projection_block"]


def take_rows(sample: np.ndarray, start: int, XQ: np.ndarray, targets: Any,
              weights: np.ndarray | None) -> tuple[np.ndarray, np.ndarray, Any, Any]:
    """The rows of one block (its first row is ``start``) among ``sample``.

    Parameters
    ----------
    sample : (m,) int64, sorted global row indices
    start : int
    XQ : (n_b, q) array
    targets : the block's class ids, value rows or CSR tag rows
    weights : (n_b,) array or None

    Returns
    -------
    rows : the global indices taken (a copy), and those rows of ``XQ``, ``targets``
    and ``weights`` (copies)
    """
    a, e = np.searchsorted(sample, [start, start + XQ.shape[0]])
    rows = np.array(sample[a:e])
    local = rows - start
    return (rows, XQ[local], targets[local],
            None if weights is None else np.asarray(weights)[local])


class MemoryProjections:
    """Projection blocks held in memory: ``(XQ_b, targets_b, weights_b)`` triples."""

    def __init__(self, blocks: Sequence[tuple[np.ndarray, Any, np.ndarray | None]]) -> None:
        if not blocks:
            raise ConfigError("refine: no projection blocks; the pass kept none")
        self._blocks = list(blocks)

    def __iter__(self) -> Iterator[tuple[np.ndarray, Any, np.ndarray | None]]:
        return iter(self._blocks)

    @property
    def q(self) -> int:
        return int(self._blocks[0][0].shape[1])


class ScratchProjections:
    """Projection blocks written to a scratch directory, one file per block.

    Each file holds ``XQ`` (n_b x q float64), the block's targets (``y``,
    ``Y``, or ``tag_indptr``/``tag_indices``) and optionally ``w``, as
    ``.npy`` records (:func:`write_projection_block`), with no pickle. The
    directory is the caller's (the solver makes one per pass and removes it).
    """

    def __init__(self, directory: str | os.PathLike, k: int) -> None:
        self.dir = Path(directory)
        self.k = int(k)
        self.files: list[Path] = []

    @classmethod
    def from_files(cls, paths: Sequence[str | os.PathLike], k: int) -> ScratchProjections:
        """The blocks that :func:`write_projection_block` wrote, in row order."""
        if not paths:
            raise ConfigError("refine: no scratch projection files; the pass wrote none")
        obj = cls(Path(paths[0]).parent, k)
        obj.files = [Path(p) for p in paths]
        return obj

    def add(self, start: int, XQ: np.ndarray, targets: Any, weights: np.ndarray | None) -> None:
        """Write one block (blocks must be added in row order)."""
        self.files.append(write_projection_block(self.dir, start, XQ, targets, weights))
        self._q = int(XQ.shape[1])

    def __iter__(self) -> Iterator[tuple[np.ndarray, Any, np.ndarray | None]]:
        for path in self.files:
            z = read_projection_block(path)
            XQ = z["XQ"]
            if "y" in z:
                targets: Any = z["y"]
            elif "Y" in z:
                targets = z["Y"]
            else:
                ip, ix = z["tag_indptr"], z["tag_indices"]
                targets = sp.csr_matrix((np.ones(ix.shape[0], np.float32), ix, ip),
                                        shape=(XQ.shape[0], self.k))
            yield XQ, targets, z.get("w")

    def nbytes(self) -> int:
        return int(sum(p.stat().st_size for p in self.files))

    def remove(self) -> None:
        """Delete the scratch files (and the directory when it is left empty)."""
        for p in self.files:
            p.unlink(missing_ok=True)
        self.files = []
        try:
            self.dir.rmdir()
        except OSError:
            pass


def write_projection_block(directory: str | os.PathLike, start: int, XQ: np.ndarray,
                           targets: Any, weights: np.ndarray | None) -> Path:
    """Write one block's projections, targets and weights to ``DIR/xq-START.npy``.

    The file is consecutive ``.npy`` records (the NumPy format, read back with
    :func:`read_projection_block`): the arrays' names, then each array. Scratch
    files are read once or twice within the run that wrote them, so they carry
    no checksum (a zip's CRC cost a few percent of a pass at 600k rows).

    Parameters
    ----------
    directory : path
        The scratch directory (created if missing).
    start : int
        The block's first row (names the file, so files sort in row order).
    XQ : (n_b, q) array
    targets : (n_b,) class ids, (n_b, k) values, or (n_b, k) sparse tags
    weights : (n_b,) raw row weights or None

    Returns
    -------
    Path
    """
    arrays: dict[str, np.ndarray] = {"XQ": np.ascontiguousarray(XQ, dtype=np.float64)}
    if sp.issparse(targets):
        T = sp.csr_matrix(targets)
        arrays["tag_indptr"] = T.indptr.astype(np.int64)
        arrays["tag_indices"] = T.indices.astype(np.int64)
    else:
        t = np.asarray(targets)
        arrays["y" if t.ndim == 1 else "Y"] = t
    if weights is not None:
        arrays["w"] = np.asarray(weights)
    d = Path(directory)
    path = d / f"xq-{int(start):012d}.npy"
    names = np.array(list(arrays))  # fixed-width unicode: no pickle
    try:
        d.mkdir(parents=True, exist_ok=True)
        with open(path, "wb") as fh:
            for a in (names, *arrays.values()):
                np.lib.format.write_array(fh, np.ascontiguousarray(a), allow_pickle=False)
    except OSError as exc:
        raise StoreError(f"{path}: cannot write the refinement's scratch file ({exc}); "
                         "free disk space or point the scratch directory elsewhere") from exc
    return path


def read_projection_block(path: str | os.PathLike) -> dict[str, np.ndarray]:
    """The arrays :func:`write_projection_block` wrote, by name (no pickle)."""
    try:
        with open(path, "rb") as fh:
            names = np.lib.format.read_array(fh, allow_pickle=False)
            return {str(n): np.lib.format.read_array(fh, allow_pickle=False) for n in names}
    except (OSError, ValueError) as exc:
        raise StoreError(f"{path}: cannot read the refinement's scratch file ({exc}); the "
                         "scratch directory was changed during the run; train again") from exc
