"""Two sources read as one, against scipy's vstack."""

from __future__ import annotations

import numpy as np
import pytest
import scipy.sparse as sp
from ranktide.errors import InputError
from ranktide.store import open_store, write_store
from ranktide.store.concat import ConcatSource
from ranktide.store.memory_source import as_source


def _part(seed, n, d=50):
    rng = np.random.default_rng(seed)
    X = sp.random(n, d, density=0.1, random_state=rng, format="csr", dtype=np.float32)
    y = rng.integers(0, 3, n).astype(np.int32)
    y[:3] = [0, 1, 2]  # every class present: both parts have 3 outputs
    return X, y


def test_joined_blocks_equal_vstack(tmp_path):
    (X1, y1), (X2, y2) = _part(1, 70), _part(2, 45)
    write_store(tmp_path / "a.zarr", X1, y1, kind="classes").close()
    with open_store(tmp_path / "a.zarr") as a:
        both = ConcatSource([a, as_source((X2, y2))], ["a.zarr", "memory"])
        assert both.shape == (115, 50) and both.nnz == X1.nnz + X2.nnz
        blocks = list(both.blocks(rows=20))
        assert all(b.stop <= 70 or b.start >= 70 for b in blocks)  # never across parts
        assert [b.start for b in blocks] == sorted(b.start for b in blocks)
        got = sp.vstack([b.X for b in blocks]).tocsr()
        # Reference: scipy.sparse.vstack of the two matrices.
        assert (got != sp.vstack([X1, X2]).tocsr()).nnz == 0
        np.testing.assert_array_equal(np.concatenate([b.targets for b in blocks]),
                                      np.concatenate([y1, y2]))
        np.testing.assert_array_equal(both.indptr_range(70, 80),
                                      sp.vstack([X1, X2]).tocsr().indptr[70:81])


def test_parts_that_disagree_are_refused():
    (X1, y1), (X2, y2) = _part(1, 30), _part(2, 30, d=40)
    with pytest.raises(InputError, match="valid: 40 columns, train has 50"):
        ConcatSource([as_source((X1, y1)), as_source((X2, y2))], ["train", "valid"])
