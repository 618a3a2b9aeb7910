"""Rows in the kernels' argument-check messages are the user's rows (issue 13): counted
from 1, the block's first row being ``row_offset + 1``, with the data source named, as
Matrix Market and the ingest messages count them.

The row each message must name is found independently with numpy (``np.searchsorted``
on the CSR row pointers, as scipy.sparse defines them).
"""

from __future__ import annotations

import numpy as np
import pytest
import scipy.sparse as sp
from ranktide.kernels.csc import block_csc
from ranktide.kernels.errors import KernelInputError
from ranktide.kernels.losses import multilabel_residual, softmax_residual
from ranktide.kernels.sparse import csr_matmul_dense, csr_t_matmul_accumulate


def _block(n=30, d=50, seed=0):
    X = sp.random(n, d, density=0.2, format="csr", random_state=seed, dtype=np.float32)
    X.sort_indices()
    return X.indptr.astype(np.int64), X.indices.copy(), X.data.copy()


def test_bad_column_id_names_the_users_row_and_column():
    ip, ix, da = _block()
    q = int(ix.shape[0] // 2)
    ix[q] = 50
    # the row holding stored entry q (0-based) in the CSR layout, counted from 1 after the
    # 200 rows of earlier blocks: scipy's indptr convention
    row = 200 + int(np.searchsorted(ip, q, side="right"))
    want = rf"part-3\.mtx: row {row}: column id 50 \(column 51 of 50\) is outside 0\.\.49"
    with pytest.raises(KernelInputError, match=want):
        csr_matmul_dense(ip, ix, da, np.zeros((50, 2)), np.zeros((30, 2)), where="part-3.mtx",
                         row_offset=200)
    with pytest.raises(KernelInputError, match=want):
        csr_t_matmul_accumulate(ip, ix, da, np.zeros((30, 2)), np.zeros((50, 2)),
                                where="part-3.mtx", row_offset=200)
    with pytest.raises(KernelInputError, match=want):
        block_csc(ip, ix, da, 50, where="part-3.mtx", row_offset=200)


def test_bad_row_pointers_name_the_users_row():
    ip, ix, da = _block()
    ip[-1] = ix.shape[0] + 5  # the block's last row (index 29) ends past the entries
    with pytest.raises(KernelInputError, match=r"s\.zarr: row 30: its row pointers"):
        csr_matmul_dense(ip, ix, da, np.zeros((50, 2)), np.zeros((30, 2)), where="s.zarr")
    with pytest.raises(KernelInputError, match=r"s\.zarr: row 1030: its row pointers"):
        csr_matmul_dense(ip, ix, da, np.zeros((50, 2)), np.zeros((30, 2)), where="s.zarr",
                         row_offset=1000)


def test_bad_class_and_tag_ids_name_the_users_row():
    rng = np.random.default_rng(1)
    Z = rng.standard_normal((10, 4))
    y = np.zeros(10, dtype=np.int32)
    y[0] = 4  # the block's first row: row 501 of the store when the block starts at 500
    with pytest.raises(KernelInputError, match=r"t\.zarr: row 501 has class id 4 outside 0\.\.3"):
        softmax_residual(Z.copy(), y, None, np.zeros(1), np.zeros(4), row_offset=500,
                         where="t.zarr")
    tags = sp.csr_matrix(np.eye(10, 4, dtype=np.float32))
    indices = tags.indices.astype(np.int64)
    indices[-1] = 9  # a tag id of the 4th row (index 3) beyond the 4 tags
    with pytest.raises(KernelInputError, match=r"t\.zarr: row 4 has a tag id outside 0\.\.3"):
        multilabel_residual(Z.copy(), tags.indptr.astype(np.int64), indices, None, np.zeros(1),
                            np.zeros(4), where="t.zarr")
