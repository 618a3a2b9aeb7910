"""Ingest round trips against scipy's Matrix Market reader and writer.

Reference library: ``scipy.io.mmwrite`` / ``scipy.io.mmread`` (and scipy.sparse
COO -> CSR, which sums duplicates) decide what every store must hold.
"""

from __future__ import annotations

import io
from pathlib import Path

import numpy as np
import pytest
import scipy.io
import scipy.sparse as sp
from ranktide.errors import InputError
from ranktide.ingest.build import ingest
from ranktide.ingest.mmio import iter_entries, read_header
from ranktide.kernels import parse as kp
from ranktide.store import open_store


def read_all(path):
    """The whole store as (CSR float32, targets, weights), for comparisons."""
    with open_store(path) as st:
        blocks = list(st.blocks(block_bytes=4096))
        shape = st.shape
        kind = st.target_kind
        names = st.output_names
    if not blocks:
        return sp.csr_matrix(shape, dtype=np.float32), None, None, kind, names
    X = sp.vstack([b.X for b in blocks]).tocsr()
    t = None
    if kind == "classes" or kind == "values":
        t = np.concatenate([b.targets for b in blocks])
    elif kind == "tags":
        t = sp.vstack([b.targets for b in blocks]).tocsr()
    w = np.concatenate([b.weights for b in blocks]) if blocks[0].weights is not None else None
    return X, t, w, kind, names


def same_csr(X, ref):
    """Exact equality of two sparse matrices after the float32 cast of the store."""
    ref = sp.csr_matrix(ref)
    ref.sum_duplicates()
    assert X.shape == ref.shape
    R = sp.csr_matrix(ref, dtype=np.float32)
    R.sum_duplicates()
    R.eliminate_zeros()
    Y = X.copy()
    Y.eliminate_zeros()
    assert (Y != R).nnz == 0
    assert np.all(np.diff(X.indptr) >= 0)


def write_mm_lines(path, rows1, cols1, vals, shape, *, field="real", header_comments=()):
    """Matrix Market file with entries in the given order (1-based indices)."""
    with open(path, "w") as fh:
        fh.write(f"%%MatrixMarket matrix coordinate {field} general\n")
        for c in header_comments:
            fh.write(f"%{c}\n")
        fh.write(f"{shape[0]} {shape[1]} {len(rows1)}\n")
        for i in range(len(rows1)):
            v = "" if field == "pattern" else f" {vals[i]!r}"
            fh.write(f"{rows1[i]} {cols1[i]}{v}\n")


@pytest.mark.parametrize("seed", [0, 1])
@pytest.mark.parametrize("shape,density", [((60, 35), 0.1), ((1, 1), 1.0), ((7, 300), 0.02)])
def test_real_round_trip_matches_mmread(tmp_path, seed, shape, density):
    A = sp.random(*shape, density=density, random_state=seed, format="csr")
    A.data = A.data * 200 - 100
    src = tmp_path / "a.mtx"
    scipy.io.mmwrite(src, A, comment="invented test matrix\nsecond comment line",
                     symmetry="general")
    s = ingest(src, tmp_path / "a.zarr")
    X, *_ = read_all(tmp_path / "a.zarr")
    same_csr(X, scipy.io.mmread(src))  # reference: scipy's own reader
    assert s.n_rows == shape[0] and s.n_cols == shape[1] and s.nnz == A.nnz


def test_pattern_and_integer_fields(tmp_path):
    A = sp.random(40, 25, density=0.15, random_state=3, format="csr")
    P = A.copy()
    P.data[:] = 1
    scipy.io.mmwrite(tmp_path / "p.mtx", P, field="pattern", symmetry="general")
    ingest(tmp_path / "p.mtx", tmp_path / "p.zarr")
    X, *_ = read_all(tmp_path / "p.zarr")
    same_csr(X, scipy.io.mmread(tmp_path / "p.mtx"))  # scipy reads pattern as ones
    K = A.copy()
    K.data = np.round(K.data * 1000 - 500)
    scipy.io.mmwrite(tmp_path / "k.mtx", K, field="integer", symmetry="general")
    ingest(tmp_path / "k.mtx", tmp_path / "k.zarr", backend="hdf5")
    X, *_ = read_all(tmp_path / "k.zarr")
    same_csr(X, scipy.io.mmread(tmp_path / "k.mtx"))


def test_empty_rows_and_columns(tmp_path):
    A = sp.lil_matrix((12, 9))
    A[0, 8] = 1.5
    A[5, 0] = -2.0
    A[5, 3] = 7.0
    A[10, 8] = 0.25  # rows 1-4, 6-9, 11 and columns 1, 2, 4-7 are empty
    scipy.io.mmwrite(tmp_path / "e.mtx", A.tocsr(), symmetry="general")
    s = ingest(tmp_path / "e.mtx", tmp_path / "e.zarr")
    X, *_ = read_all(tmp_path / "e.zarr")
    same_csr(X, scipy.io.mmread(tmp_path / "e.mtx"))
    assert s.empty_rows == 12 - 3
    # no entries at all
    scipy.io.mmwrite(tmp_path / "z.mtx", sp.csr_matrix((4, 3)), symmetry="general")
    s = ingest(tmp_path / "z.mtx", tmp_path / "z.zarr")
    X, *_ = read_all(tmp_path / "z.zarr")
    assert X.shape == (4, 3) and X.nnz == 0 and s.empty_rows == 4


@pytest.mark.parametrize("memory", ["64MB", 1 << 16])
def test_shuffled_order_uses_buckets(tmp_path, memory):
    # a 64 KiB budget gives 16K-entry buckets: several of them, re-split when too big
    rng = np.random.default_rng(5)
    A = sp.random(3000, 50, density=0.2, random_state=5, format="coo")
    perm = rng.permutation(A.nnz)
    src = tmp_path / "s.mtx"
    write_mm_lines(src, A.row[perm] + 1, A.col[perm] + 1, A.data[perm].tolist(), A.shape,
                   header_comments=["shuffled"])
    s = ingest(src, tmp_path / "s.zarr", memory=memory)
    X, *_ = read_all(tmp_path / "s.zarr")
    same_csr(X, scipy.io.mmread(src))  # scipy reads entries in any order
    assert not s.sorted_input and s.buckets >= 1
    if memory != "64MB":
        assert s.buckets > 1
    assert not [p for p in tmp_path.iterdir() if "scratch" in p.name]


def test_late_out_of_order_entry_restarts_in_buckets(tmp_path):
    # sorted for many chunks, then one entry goes back to row 1
    A = sp.random(4000, 30, density=0.2, random_state=6, format="csr").tocoo()
    r, c, v = A.row + 1, A.col + 1, A.data.tolist()
    keep = ~((r == 1) & (c == 1))
    v = [x for x, k in zip(v, keep, strict=True) if k] + [0.5]
    r, c = list(r[keep]) + [1], list(c[keep]) + [1]
    src = tmp_path / "late.mtx"
    write_mm_lines(src, r, c, v, A.shape)
    s = ingest(src, tmp_path / "late.zarr", memory=1 << 20)  # 64 KiB chunks: many of them
    X, *_ = read_all(tmp_path / "late.zarr")
    same_csr(X, scipy.io.mmread(src))
    assert not s.sorted_input


def test_sorted_multi_chunk_streams(tmp_path):
    A = sp.random(5000, 40, density=0.1, random_state=7, format="csr")
    src = tmp_path / "m.mtx"
    coo = A.tocoo()
    write_mm_lines(src, coo.row + 1, coo.col + 1, coo.data.tolist(), A.shape)
    assert src.stat().st_size > 4 * 65536
    s = ingest(src, tmp_path / "m.zarr", memory=1 << 20)
    X, *_ = read_all(tmp_path / "m.zarr")
    same_csr(X, scipy.io.mmread(src))
    assert s.sorted_input and s.buckets == 0


@pytest.mark.parametrize("one_based", [False, True])
def test_triplets_any_order_with_comments(tmp_path, one_based):
    rng = np.random.default_rng(8)
    n = 500
    r = rng.integers(0, 40, n)
    c = rng.integers(0, 17, n)
    v = rng.standard_normal(n)
    r[0], c[0] = 39, 16  # fix the shape to 40 x 17
    base = 1 if one_based else 0
    lines = ["# invented triplets", ""]
    for i in range(n):
        note = "  # note" if i % 50 == 0 else ""
        lines.append(f"{r[i] + base}\t{c[i] + base}  {float(v[i])!r}{note}")
    (tmp_path / "t.txt").write_text("\n".join(lines))  # no final newline
    s = ingest(tmp_path / "t.txt", tmp_path / "t.zarr", one_based=one_based)
    X, *_ = read_all(tmp_path / "t.zarr")
    ref = sp.coo_matrix((v, (r, c)), shape=(40, 17)).tocsr()  # scipy sums duplicates
    same_csr(X, ref)
    assert s.duplicates_summed == n - ref.nnz


def test_npz_csr_and_coo(tmp_path):
    A = sp.random(30, 20, density=0.2, random_state=9, format="csr")
    sp.save_npz(tmp_path / "a.npz", A)
    ingest(tmp_path / "a.npz", tmp_path / "a.zarr")
    X, *_ = read_all(tmp_path / "a.zarr")
    same_csr(X, sp.load_npz(tmp_path / "a.npz"))
    C = sp.coo_matrix(([1.0, 2.0, 3.0], ([0, 0, 2], [1, 1, 0])), shape=(3, 2))
    sp.save_npz(tmp_path / "c.npz", C, compressed=False)
    s = ingest(tmp_path / "c.npz", tmp_path / "c.zarr")
    X, *_ = read_all(tmp_path / "c.zarr")
    same_csr(X, C)  # scipy's COO->CSR sums the two (0, 1) entries
    assert s.duplicates_summed == 1


def test_duplicates_sum_or_error(tmp_path):
    src = tmp_path / "d.mtx"
    write_mm_lines(src, [1, 2, 2, 3, 2], [1, 2, 2, 1, 2], [1.0, 0.5, 0.25, 4.0, 1.0], (3, 2))
    s = ingest(src, tmp_path / "d.zarr")
    X, *_ = read_all(tmp_path / "d.zarr")
    ref = sp.coo_matrix(([1.0, 0.5, 0.25, 4.0, 1.0], ([0, 1, 1, 2, 1], [0, 1, 1, 0, 1])))
    same_csr(X, ref)
    assert s.duplicates_summed == 2 and X[1, 1] == pytest.approx(1.75)
    with pytest.raises(InputError, match=r"d\.mtx: entry \(row 2, column 2\) appears more than"):
        ingest(src, tmp_path / "e.zarr", duplicates="error")
    assert not (tmp_path / "e.zarr").exists()


def test_parser_rounds_17_digit_values_exactly(tmp_path):
    # reference: Python's float(), correctly rounded (David Gay's algorithm)
    rng = np.random.default_rng(10)
    x = rng.standard_normal(20000) * 10.0 ** rng.integers(-300, 300, 20000)
    toks = [f"{v:.17g}" for v in x] + [f"{v:.15g}" for v in x[:5000]] + [
        "1e22", "1e23", "9007199254740993", "0.1", "-0.0", "123456789012345678901234567890",
        "4.9406564584124654e-324", "2.2250738585072014e-308", "1.7976931348623157e308",
        ".5", "5.", "+3e+2", "0.000000000000000000000000000001",
    ]
    src = tmp_path / "f.mtx"
    with open(src, "w") as fh:
        fh.write(f"%%MatrixMarket matrix coordinate real general\n1 1 {len(toks)}\n")
        fh.writelines(f"1 1 {t}\n" for t in toks)
    got = np.concatenate([ch.vals.copy() for ch in iter_entries(read_header(src))])
    ref = np.array([float(t) for t in toks])
    assert np.array_equal(got, ref)
    assert np.array_equal(np.signbit(got), np.signbit(ref))


def test_kernel_fast_path_values():
    # exactly representable decimals: reference is float() again
    text = b"0 0 0.5\n1 2 -12.75\n3 4 1e3\n5 6 7\n"
    buf = np.frombuffer(bytearray(text), dtype=np.uint8)
    cap = 8
    out = [np.zeros(cap, np.int64), np.zeros(cap, np.int64), np.zeros(cap)]
    fb = [np.zeros(cap, np.int64) for _ in range(3)]
    st = np.zeros(8, np.int64)
    kp.parse_numeric_lines(buf, 0, len(buf), 2, True, False, ord("#"), *out, *fb, st)
    assert st[kp.ST_ENTRIES] == 4 and st[kp.ST_FALLBACK] == 0
    assert out[0][:4].tolist() == [0, 1, 3, 5] and out[1][:4].tolist() == [0, 2, 4, 6]
    assert out[2][:4].tolist() == [float("0.5"), float("-12.75"), float("1e3"), 7.0]


def test_labels_names_sorted_and_weights(tmp_path):
    A = sp.random(6, 4, density=0.5, random_state=11, format="csr")
    scipy.io.mmwrite(tmp_path / "a.mtx", A)
    (tmp_path / "a.lab").write_text("zebra\nant\nmoth\nant\nzebra\nbee\n")
    (tmp_path / "a.w").write_text("1\n0.5\n0\n2e0\n# a comment\n3.25\n1\n")
    s = ingest(tmp_path / "a.mtx", tmp_path / "a.zarr", labels=tmp_path / "a.lab",
               weights=tmp_path / "a.w")
    X, t, w, kind, names = read_all(tmp_path / "a.zarr")
    assert kind == "classes" and names == ["ant", "bee", "moth", "zebra"]  # sorted() order
    assert [names[i] for i in t] == ["zebra", "ant", "moth", "ant", "zebra", "bee"]
    assert w.tolist() == [1.0, 0.5, 0.0, 2.0, 3.25, 1.0]
    assert s.target_kind == "classes" and s.n_outputs == 4


def test_integer_labels_are_ids(tmp_path):
    scipy.io.mmwrite(tmp_path / "a.mtx", sp.random(4, 3, density=0.5, random_state=1))
    (tmp_path / "a.lab").write_text("3\n0\n3\n1\n")
    ingest(tmp_path / "a.mtx", tmp_path / "a.zarr", labels=tmp_path / "a.lab")
    _, t, _, _, names = read_all(tmp_path / "a.zarr")
    assert t.tolist() == [3, 0, 3, 1] and names == ["0", "1", "2", "3"]


def test_tags_and_values_and_npy_weights(tmp_path):
    scipy.io.mmwrite(tmp_path / "a.mtx", sp.random(4, 3, density=0.5, random_state=2))
    (tmp_path / "a.tags").write_text("red, blue\n\nblue,green, blue\nred\n")
    ingest(tmp_path / "a.mtx", tmp_path / "t.zarr", tags=tmp_path / "a.tags")
    _, T, _, kind, names = read_all(tmp_path / "t.zarr")
    assert kind == "tags" and names == ["blue", "green", "red"]
    dense = T.toarray()
    assert dense.tolist() == [[1, 0, 1], [0, 0, 0], [1, 1, 0], [0, 0, 1]]
    V = np.arange(8, dtype=np.float64).reshape(4, 2) / 4
    np.save(tmp_path / "v.npy", V)
    np.save(tmp_path / "w.npy", np.array([1.0, 2.0, 0.0, 0.5]))
    ingest(tmp_path / "a.mtx", tmp_path / "v.zarr", values=tmp_path / "v.npy",
           weights=tmp_path / "w.npy", backend="hdf5")
    _, Y, w, kind, _ = read_all(tmp_path / "v.zarr")
    assert kind == "values" and np.array_equal(Y, V.astype(np.float32))
    assert w.tolist() == [1.0, 2.0, 0.0, 0.5]


def test_cli_json_summary(tmp_path, capsys):
    from ranktide.cli.main import main

    A = sp.random(20, 10, density=0.3, random_state=4, format="csr")
    scipy.io.mmwrite(tmp_path / "a.mtx", A)
    assert main(["ingest", str(tmp_path / "a.mtx"), "--out", str(tmp_path / "a.zarr"),
                 "--json", "--codec", "lz4"]) == 0
    import json

    res = json.load(io.StringIO(capsys.readouterr().out))
    assert res["nnz"] == A.nnz and res["n_rows"] == 20 and Path(res["path"]).exists()
    with open_store(tmp_path / "a.zarr") as st:
        assert st.codec == "lz4"


def test_parser_rounds_near_half_way_values(tmp_path):
    # decimal strings within 1e-18 (relative) of the midpoint of two adjacent doubles,
    # the hardest inputs for rounding; reference: Python's float() on the same strings
    from decimal import Decimal, getcontext

    getcontext().prec = 60
    rng = np.random.default_rng(12)
    v = np.abs(rng.standard_normal(20000)) * 10.0 ** rng.integers(-6, 6, 20000)
    nxt = np.nextafter(v, np.inf)
    digits = rng.integers(16, 19, v.size).tolist()
    toks = [format((Decimal(a) + Decimal(b)) / 2, f".{k - 1}e")
            for a, b, k in zip(v.tolist(), nxt.tolist(), digits, strict=True)]
    src = tmp_path / "h.txt"
    src.write_text("".join(f"0 0 {t}\n" for t in toks))
    got = np.concatenate([ch.vals.copy() for ch in iter_entries(read_header(src))])
    assert np.array_equal(got, np.array([float(t) for t in toks]))
