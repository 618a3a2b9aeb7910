"""The one block planner against a plain row-by-row greedy reference.

Reference: the definition itself, written as the obvious Python loop over rows
(start a block at row a, add rows while the decoded bytes stay within the budget
and the row cap is not reached; a row larger than the budget is a block alone).
"""

from __future__ import annotations

import numpy as np
import pytest
import scipy.sparse as sp
from ranktide.errors import ConfigError
from ranktide.store import open_store, write_store
from ranktide.store.blocking import cut_ranges
from ranktide.store.memory_source import MemorySource


def _greedy(indptr: np.ndarray, rows: int | None, budget: int, per_entry: int):
    n = indptr.size - 1
    cost = indptr * per_entry + 8 * np.arange(n + 1)
    cap = rows if rows is not None else n
    out, a = [], 0
    while a < n:
        b = a + 1
        while b < n and b + 1 - a <= cap and cost[b + 1] - cost[a] <= budget:
            b += 1
        out.append((a, b))
        a = b
    return out


def _pieces(indptr: np.ndarray, size: int):
    n = indptr.size - 1
    for p0 in range(0, n, size):
        yield p0, indptr[p0 : min(n, p0 + size) + 1]


@pytest.mark.parametrize("seed", range(12))
def test_cuts_match_the_greedy_definition_for_any_piece_size(seed):
    rng = np.random.default_rng(seed)
    n = int(rng.integers(1, 300))
    counts = rng.integers(0, 40, size=n)
    counts[rng.integers(0, n)] = 400  # one row larger than most budgets
    indptr = np.concatenate([[0], np.cumsum(counts)]).astype(np.int64)
    budget = int(rng.integers(50, 4000))
    rows = None if seed % 3 == 0 else int(rng.integers(1, 50))
    want = _greedy(indptr, rows, budget, 8)
    for size in (1, 2, 7, 64, n):
        got = cut_ranges(_pieces(indptr, size), n, rows=rows, block_bytes=budget,
                         bytes_per_entry=8, default_bytes=1)
        assert got == want, (size, rows, budget)


def test_rows_only_and_errors():
    indptr = np.arange(11, dtype=np.int64) * 3
    assert cut_ranges([(0, indptr)], 10, rows=4, default_bytes=1) == [(0, 4), (4, 8), (8, 10)]
    assert cut_ranges([(0, indptr[:1])], 0, rows=4, default_bytes=1) == []
    with pytest.raises(ConfigError, match="block rows = 0"):
        cut_ranges([(0, indptr)], 10, rows=0, default_bytes=1)
    with pytest.raises(ConfigError, match="block bytes = 0"):
        cut_ranges([(0, indptr)], 10, block_bytes=0, default_bytes=1)


def test_store_and_memory_source_cut_the_same_blocks(tmp_path, monkeypatch):
    import ranktide.store.format as fmt

    monkeypatch.setattr(fmt, "_INDPTR_PIECE", 16)  # many pieces on the store side
    rng = np.random.default_rng(3)
    X = sp.random(500, 40, density=0.1, format="csr", random_state=rng, dtype=np.float32)
    with write_store(tmp_path / "s.zarr", X) as st:
        mem = MemorySource(X)
        for kw in ({"block_bytes": 600}, {"block_bytes": 6000}, {"rows": 33}):
            assert st.block_ranges(**kw) == mem.block_ranges(**kw), kw
    with open_store(tmp_path / "s.zarr") as st:
        assert st.block_ranges(block_bytes=10**9) == [(0, 500)]
