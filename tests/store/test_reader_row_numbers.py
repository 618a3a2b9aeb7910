"""The reader names rows as the user counts them (issue 13): a store whose row pointers
decrease is refused naming the row, counted from 1, inside a piece of the pointers and
across the edge between two pieces.

The store is damaged on purpose with zarr's own API (the row pointers rewritten, their
checksums recomputed so that only the pointer check can object). No outside reference
applies beyond scipy's CSR convention (row i spans indptr[i]..indptr[i+1]).
"""

from __future__ import annotations

from unittest import mock

import numpy as np
import pytest
import ranktide.store.format as fmt
import scipy.sparse as sp
import zarr
from ranktide.errors import StoreError
from ranktide.store import open_store, write_store
from ranktide.store._zarr import ATTRS_KEY
from ranktide.store.checksums import segment_checksum


def _damaged(tmp_path, at: int, value: int):
    """A 20-row store whose indptr[at] is set to ``value``, checksums kept consistent."""
    X = sp.random(20, 6, density=0.5, format="csr", random_state=0, dtype=np.float32)
    path = tmp_path / "s.zarr"
    write_store(path, X, codec="none").close()
    group = zarr.open_group(str(path), mode="r+")
    ip = group["indptr"][:]
    ip[at] = value
    group["indptr"][:] = ip
    attrs = dict(group.attrs[ATTRS_KEY])
    seg = int(attrs["arrays"]["indptr"]["segment_rows"])
    attrs["checksums"]["indptr"] = [segment_checksum(ip[i:i + seg])
                                    for i in range(0, ip.shape[0], seg)]
    group.attrs[ATTRS_KEY] = attrs
    return path, X


@pytest.mark.parametrize("piece", [1 << 20, 4])
def test_decreasing_row_pointers_name_the_row(tmp_path, piece):
    # indptr[7] raised past indptr[8]: row index 7 (scipy's CSR: indptr[7]..indptr[8]) ends
    # before it starts, which is row 8 counted from 1; with pieces of 4 pointers, that
    # decrease lies on the edge between the pieces [4, 8) and [8, 12)
    probe = sp.random(20, 6, density=0.5, format="csr", random_state=0, dtype=np.float32)
    path, _ = _damaged(tmp_path, 7, int(probe.indptr[8]) + 3)
    with mock.patch.object(fmt, "_INDPTR_PIECE", piece), open_store(path) as s, \
            pytest.raises(StoreError, match=r"s\.zarr: indptr decreases at row 8 \(it ends "
                                            r"before it starts\)"):
        s.verify()


def test_row_pointers_not_starting_at_zero(tmp_path):
    path, _ = _damaged(tmp_path, 0, 1)
    with open_store(path) as s, pytest.raises(StoreError, match=r"indptr starts at 1, not 0"):
        s.verify()
