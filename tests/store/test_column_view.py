"""The used-columns view of a source against scipy's own column selection."""

from __future__ import annotations

import numpy as np
import scipy.sparse as sp
from ranktide.passes.columns import used_columns
from ranktide.store import open_store, write_store
from ranktide.store.column_view import ColumnView, expand_rows
from ranktide.store.memory_source import as_source


def _data(seed=0):
    rng = np.random.default_rng(seed)
    X = sp.random(120, 300, density=0.01, random_state=rng, format="csr", dtype=np.float32)
    y = rng.integers(0, 4, 120).astype(np.int32)
    return X, y


def test_used_columns_match_numpy_unique_on_memory_and_store(tmp_path):
    X, y = _data()
    # Reference: numpy.unique of the CSR column ids.
    want = np.unique(X.indices)
    assert want.size < X.shape[1]  # the data leaves columns empty
    np.testing.assert_array_equal(used_columns(as_source((X, y)), block_rows=17), want)
    with write_store(tmp_path / "s.zarr", X, y, kind="classes") as st:
        pass
    with open_store(tmp_path / "s.zarr") as st:
        np.testing.assert_array_equal(used_columns(st, block_rows=25), want)


def test_view_blocks_equal_scipy_column_selection(tmp_path):
    X, y = _data(1)
    cols = np.unique(X.indices)
    write_store(tmp_path / "s.zarr", X, y, kind="classes").close()
    with open_store(tmp_path / "s.zarr") as st:
        view = ColumnView(st, cols)
        assert view.shape == (X.shape[0], cols.size)
        assert view.n_outputs == st.n_outputs and view.target_kind == "classes"
        got = sp.vstack([b.X for b in view.blocks(rows=31)]).tocsr()
        # Reference: scipy's fancy column indexing X[:, cols].
        ref = X[:, cols].tocsr()
        ref.sort_indices()
        assert (got != ref).nnz == 0
        np.testing.assert_array_equal(np.concatenate([b.targets for b in view.blocks(rows=31)]),
                                      y)


def test_expand_rows_puts_rows_back():
    M = np.arange(6.0).reshape(3, 2)
    out = expand_rows(M, np.array([1, 4, 5]), 7)
    ref = np.zeros((7, 2))
    ref[[1, 4, 5]] = M  # numpy fancy assignment
    np.testing.assert_array_equal(out, ref)
    assert expand_rows(M, None, 3) is M
