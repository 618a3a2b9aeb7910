"""The refinement's scratch files give back exactly what the pass wrote.

Reference: the arrays themselves (numpy's ``array_equal``, dtype and layout
included) and scipy.sparse for the tag matrix; the file is NumPy's own ``.npy``
record format (numpy.lib.format), read with pickles refused.
"""

from __future__ import annotations

import numpy as np
import pytest
import scipy.sparse as sp
from ranktide.errors import StoreError
from ranktide.passes.projections import (
    ScratchProjections,
    read_projection_block,
    write_projection_block,
)


@pytest.mark.parametrize("kind", ["classes", "values", "tags"])
@pytest.mark.parametrize("weighted", [False, True])
def test_scratch_blocks_round_trip(tmp_path, kind, weighted):
    rng = np.random.default_rng(3)
    k, src = 5, ScratchProjections(tmp_path / "scratch", 5)
    blocks = []
    for start, n in ((0, 7), (7, 11)):
        XQ = rng.standard_normal((n, 4))
        if kind == "classes":
            T = rng.integers(0, k, n).astype(np.int32)
        elif kind == "values":
            T = rng.standard_normal((n, k)).astype(np.float32)
        else:
            T = sp.random(n, k, density=0.4, format="csr", random_state=start, dtype=np.float32)
            T.data[:] = 1.0
        w = rng.random(n).astype(np.float32) if weighted else None
        src.add(start, XQ, T, w)
        blocks.append((XQ, T, w))
    got = list(src)
    assert len(got) == 2
    for (XQ, T, w), (XQ2, T2, w2) in zip(blocks, got, strict=True):
        assert XQ2.dtype == np.float64 and np.array_equal(XQ2, XQ)
        if kind == "tags":
            assert (T2 != T).nnz == 0 and T2.shape == T.shape
        else:
            assert T2.dtype == T.dtype and np.array_equal(T2, T)
        assert (w2 is None) if w is None else np.array_equal(w2, w)
    src.remove()
    assert not (tmp_path / "scratch").exists()


def test_a_damaged_scratch_file_is_one_clear_error(tmp_path):
    path = write_projection_block(tmp_path, 0, np.ones((3, 2)), np.zeros(3, np.int32), None)
    path.write_bytes(path.read_bytes()[:40])
    with pytest.raises(StoreError, match="scratch file"):
        read_projection_block(path)
    obj = tmp_path / "obj.npy"
    with open(obj, "wb") as fh:  # a record whose header says object dtype is never unpickled
        np.lib.format.write_array(fh, np.array(["XQ"]))
        np.lib.format.write_array_header_2_0(
            fh, {"descr": "|O", "fortran_order": False, "shape": (1,)})
        fh.write(b"\x00" * 16)
    with pytest.raises(StoreError, match="scratch file"):
        read_projection_block(obj)
