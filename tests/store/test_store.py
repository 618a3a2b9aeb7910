"""Tests of the store (stream/store.py and its two backends).

References: scipy.sparse is the reference for every matrix round trip (the
blocks stacked with ``scipy.sparse.vstack`` must equal the input CSR exactly);
numpy for dense targets; zarr's and h5py's own readers for the direct chunk
decoders; the CRC-32 check value of b"123456789" (0xCBF43926) is the standard
published check value of CRC-32/ISO-HDLC (Williams, "A painless guide to CRC
error detection algorithms", 1993; quoted from memory).
"""

from __future__ import annotations

import json
import os
from contextlib import contextmanager
from pathlib import Path
from unittest import mock

import h5py
import numpy as np
import pytest
import scipy.sparse as sp
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from ranktide import atomic as atomic_mod
from ranktide.errors import ConfigError, InputError, OutputExistsError, StoreError
from ranktide.store import create_store, open_store, write_store
from ranktide.store import format as store_mod
from ranktide.store.checksums import SegmentHasher, segment_checksum

# The conformance class runs its property test once per backend subclass; each
# subclass only fixes ``backend``, so running it from two executors is intended.
HSETTINGS = settings(
    max_examples=25,
    deadline=None,
    suppress_health_check=[
        HealthCheck.function_scoped_fixture,
        HealthCheck.too_slow,
        HealthCheck.differing_executors,
    ],
)


@pytest.fixture(autouse=True)
def _no_fsync(monkeypatch):
    """Skip fsync in these tests: they check content and naming, not durability,
    and on a busy disk hundreds of tiny fsyncs dominate the run time."""
    monkeypatch.setattr(atomic_mod, "fsync_tree", lambda path: None)
    monkeypatch.setattr(atomic_mod, "fsync_dir", lambda path: None)


@contextmanager
def small_chunks(n: int):
    """Store chunks (= checksum segments) of ``n`` elements, to cross many chunk edges."""
    with mock.patch.object(store_mod, "CHUNK_ELEMENTS", n):
        yield


def random_csr(rng: np.random.Generator, n: int, d: int, density: float) -> sp.csr_matrix:
    X = sp.random(n, d, density=density, format="csr", random_state=rng, dtype=np.float64)
    X.data = rng.standard_normal(X.nnz)
    return X.astype(np.float32)


def stack_blocks(blocks, n_cols: int) -> sp.csr_matrix:
    mats = [b.X for b in blocks]
    if not mats:
        return sp.csr_matrix((0, n_cols), dtype=np.float32)
    return sp.vstack(mats, format="csr")


def assert_same_csr(A: sp.csr_matrix, B: sp.csr_matrix) -> None:
    # scipy reference: canonical CSR arrays must match element for element
    A, B = sp.csr_matrix(A), sp.csr_matrix(B)
    assert A.shape == B.shape
    np.testing.assert_array_equal(A.indptr, B.indptr)
    np.testing.assert_array_equal(A.indices, B.indices)
    np.testing.assert_array_equal(A.data, B.data)


@st.composite
def csr_matrices(draw):
    """Random sparse matrices: 1x1, zero nnz, empty rows and empty columns included."""
    n = draw(st.integers(0, 60))
    d = draw(st.integers(1, 40))
    density = draw(st.sampled_from([0.0, 0.02, 0.2, 0.6]))
    seed = draw(st.integers(0, 2**31 - 1))
    rng = np.random.default_rng(seed)
    X = random_csr(rng, n, d, density)
    if n and draw(st.booleans()):
        X = X.tolil()
        X[rng.integers(0, n)] = 0  # force an empty row
        X = X.tocsr()
        X.eliminate_zeros()
    return X, seed


class StoreContract:
    """Conformance tests every backend must pass (subclassed per backend)."""

    backend = ""
    suffix = ""

    def path(self, tmp_path: Path, name: str = "s") -> Path:
        return tmp_path / f"{name}{self.suffix}"

    # --------------------------------------------------------------- helpers per backend
    def flip_byte(self, path: Path, array: str, segment: int) -> None:
        raise NotImplementedError

    def edit_attrs(self, path: Path, change) -> None:
        raise NotImplementedError

    # --------------------------------------------------------------- round trips
    @HSETTINGS
    @given(
        mat=csr_matrices(),
        chunk=st.sampled_from([7, 32, 256]),
        budget=st.one_of(
            st.tuples(st.just("rows"), st.integers(1, 70)),
            st.tuples(st.just("bytes"), st.integers(1, 4000)),
        ),
        codec=st.sampled_from(["zstd", "lz4", "none"]),
    )
    def test_blocks_give_back_the_matrix(self, tmp_path_factory, mat, chunk, budget, codec):
        X, seed = mat
        rng = np.random.default_rng(seed + 1)
        n = X.shape[0]
        y = rng.integers(0, 5, n)
        w = rng.random(n).astype(np.float32)
        path = self.path(tmp_path_factory.mktemp("rt"))
        with small_chunks(chunk):
            s = write_store(path, X, y, weights=w, backend=self.backend, codec=codec)
        with s:
            assert s.backend == self.backend and s.shape == X.shape and s.nnz == X.nnz
            kw = {"rows": budget[1]} if budget[0] == "rows" else {"block_bytes": budget[1]}
            blocks = list(s.blocks(**kw))
            # scipy reference: vstack of the blocks equals the input exactly
            assert_same_csr(stack_blocks(blocks, X.shape[1]), X)
            got_y = np.concatenate([b.targets for b in blocks]) if blocks else np.zeros(0)
            got_w = np.concatenate([b.weights for b in blocks]) if blocks else np.zeros(0)
            np.testing.assert_array_equal(got_y, y)
            np.testing.assert_array_equal(got_w, w)
            for b in blocks:
                assert b.X.shape == (b.stop - b.start, X.shape[1])
                assert b.X.dtype == np.float32 and b.targets.dtype == np.int32
            s.verify()

    def test_each_chunk_is_decoded_once_in_a_sequential_pass(self, tmp_path):
        rng = np.random.default_rng(3)
        X = random_csr(rng, 300, 50, 0.1)
        y = rng.integers(0, 4, 300)
        with small_chunks(32):
            s = write_store(self.path(tmp_path), X, y, backend=self.backend)
        with s:
            blocks = list(s.blocks(block_bytes=500))
            assert len(blocks) > 10
            total = sum(b.io["bytes_decoded"] for b in blocks)
            # layout arithmetic (DESIGN §4 dtypes): int64 indptr, int32 ids, float32 data,
            # int32 classes -- the tail-chunk cache means no chunk is decoded twice
            assert total == (301 * 8) + X.nnz * (4 + 4) + 300 * 4
            for b in blocks:
                assert set(b.io) == {"read_s", "decode_s", "bytes_disk", "bytes_decoded"}
                assert b.io["read_s"] >= 0 and b.io["decode_s"] >= 0

    def test_block_buffers_are_recycled_only_when_dropped(self, tmp_path):
        rng = np.random.default_rng(14)
        X = random_csr(rng, 400, 50, 0.2)
        with small_chunks(32):
            s = write_store(self.path(tmp_path), X, backend=self.backend)
        with s:
            ranges = s.block_ranges(block_bytes=1500)
            kept = s.read_block(*ranges[0])
            later = [s.read_block(a, b) for a, b in ranges[1:4]]
            # scipy reference: a block still held is never overwritten by later reads
            assert_same_csr(kept.X, X[ranges[0][0] : ranges[0][1]])
            for blk, (a, b) in zip(later, ranges[1:4], strict=True):
                assert_same_csr(blk.X, X[a:b])
            first_data = later[-1].X.data

            def span(a):
                lo = a.__array_interface__["data"][0]
                return lo, lo + a.nbytes

            held = span(first_data)
            del kept, later, blk
            # address spans only: holding the spare buffers would keep them busy
            spare = [span(b) for b in s._readers["data"]._spare]
            again = s.read_block(*ranges[4])
            assert_same_csr(again.X, X[ranges[4][0] : ranges[4][1]])
            start = span(again.X.data)[0]
            inside = [lo <= start < hi for lo, hi in spare]
            assert any(inside)  # a free buffer was recycled
            assert not held[0] <= start < held[1]  # not the one still held

    def test_random_access_blocks(self, tmp_path):
        rng = np.random.default_rng(4)
        X = random_csr(rng, 200, 30, 0.2)
        with small_chunks(16):
            s = write_store(self.path(tmp_path), X, backend=self.backend)
        with s:
            for a, b in [(150, 200), (0, 7), (99, 100), (40, 40), (13, 180), (0, 200)]:
                blk = s.read_block(a, b)
                assert_same_csr(blk.X, X[a:b])  # scipy row slicing as reference
                assert blk.targets is None and blk.weights is None
            np.testing.assert_array_equal(s.indptr_range(10, 20), X.indptr[10:21])
            with pytest.raises(ConfigError, match=r"row range \[5, 201\) is outside 0..200"):
                s.read_block(5, 201)

    def test_values_and_tags_targets(self, tmp_path):
        rng = np.random.default_rng(5)
        X = random_csr(rng, 80, 20, 0.3)
        V = rng.standard_normal((80, 3)).astype(np.float32)
        T = sp.random(80, 7, density=0.3, format="csr", random_state=rng)
        T.data[:] = 1.0
        names = [f"out{i}" for i in range(3)]
        with small_chunks(8):
            sv = write_store(self.path(tmp_path, "v"), X, V, names=names, backend=self.backend)
            st_ = write_store(self.path(tmp_path, "t"), X, T, backend=self.backend)
        with sv, st_:
            assert sv.target_kind == "values" and sv.n_outputs == 3 and sv.output_names == names
            got = np.concatenate([b.targets for b in sv.blocks(rows=9)])
            np.testing.assert_array_equal(got, V)  # numpy reference
            assert st_.target_kind == "tags" and st_.n_outputs == 7
            tags = sp.vstack([b.targets for b in st_.blocks(block_bytes=300)], format="csr")
            assert_same_csr(tags, T.astype(np.float32))  # scipy reference

    def test_wide_matrix_uses_int64_column_ids(self, tmp_path):
        d = 2**31 + 5
        X = sp.csr_matrix(
            (np.ones(3, np.float32), np.array([0, 7, d - 1]), np.array([0, 2, 3])), shape=(2, d)
        )
        with write_store(self.path(tmp_path), X, backend=self.backend) as s:
            assert s.attrs["arrays"]["indices"]["dtype"] == "int64"
            blk = s.read_block(0, 2)
            np.testing.assert_array_equal(blk.X.indices, [0, 7, d - 1])

    # --------------------------------------------------------------- damage
    @pytest.mark.parametrize("codec", ["none", "zstd"])
    def test_corrupted_segment_is_named(self, tmp_path, codec):
        rng = np.random.default_rng(6)
        X = random_csr(rng, 40, 30, 0.2)
        path = self.path(tmp_path)
        with small_chunks(16):
            write_store(path, X, backend=self.backend, codec=codec).close()
        self.flip_byte(path, "data", 2)
        with open_store(path) as s, pytest.raises(StoreError, match=r"'data' segment 2\b"):
            list(s.blocks(rows=5))
        # segment 2 of 16-element chunks holds elements 33..48, counted from 1 (issue 13)
        with (
            open_store(path, verify=False) as s,
            pytest.raises(StoreError, match=r"'data' segment 2 \(elements 33\.\.48\) fails"),
        ):
            s.verify()

    @pytest.mark.parametrize("codec", ["zstd", "lz4", "none"])
    def test_threaded_decoding_path(self, tmp_path, codec):
        # force the thread-pool decoding path (normally for reads >= 1 MiB)
        import ranktide.store._hdf5 as h5mod
        import ranktide.store._zarr as zmod

        rng = np.random.default_rng(13)
        X = random_csr(rng, 120, 40, 0.3)
        y = rng.integers(0, 4, 120)
        path = self.path(tmp_path)
        with small_chunks(32):
            write_store(path, X, y, backend=self.backend, codec=codec).close()
        with (
            mock.patch.object(zmod, "_POOL_MIN_BYTES", 0),
            mock.patch.object(h5mod, "_POOL_MIN_BYTES", 0),
        ):
            with open_store(path) as s:
                blocks = list(s.blocks(block_bytes=900))
                assert_same_csr(stack_blocks(blocks, 40), X)  # scipy reference
                assert s._readers["data"].verified.all()  # checked on the decoding threads
            self.flip_byte(path, "indices", 3)
            with open_store(path) as s, pytest.raises(StoreError, match=r"'indices' segment 3\b"):
                s.read_block(0, 120)

    def test_corruption_unchecked_when_verify_is_off(self, tmp_path):
        rng = np.random.default_rng(7)
        X = random_csr(rng, 40, 30, 0.2)
        path = self.path(tmp_path)
        with small_chunks(16):
            write_store(path, X, backend=self.backend, codec="none").close()
        self.flip_byte(path, "data", 1)
        with open_store(path, verify=False) as s:
            got = stack_blocks(list(s.blocks()), 30)
        assert got.shape == X.shape and not np.array_equal(got.data, X.data)

    # --------------------------------------------------------------- not a store
    def test_not_a_store(self, tmp_path):
        with pytest.raises(StoreError, match=r"no such store"):
            open_store(tmp_path / f"missing{self.suffix}")
        junk = tmp_path / f"junk{self.suffix}"
        if self.backend == "zarr":
            junk.mkdir()
            with pytest.raises(StoreError, match=r"not a ranktide store \(no zarr.json\)"):
                open_store(junk)
        else:
            junk.write_text("hello\n")
            with pytest.raises(StoreError, match=r"not a ranktide store \(not an HDF5 file\)"):
                open_store(junk)

    def test_foreign_container_is_not_a_store(self, tmp_path):
        path = self.path(tmp_path)
        if self.backend == "zarr":
            import zarr

            zarr.open_group(str(path), mode="w").create_array("x", shape=(3,), dtype="i4")
        else:
            with h5py.File(path, "w") as fh:
                fh["x"] = np.arange(3)
        with pytest.raises(StoreError, match=r"not a ranktide store \(no 'ranktide-store'"):
            open_store(path)

    def test_newer_format_version(self, tmp_path):
        path = self.path(tmp_path)
        write_store(path, sp.identity(3, format="csr"), backend=self.backend).close()
        self.edit_attrs(path, lambda a: a.update(format_version=2))
        with pytest.raises(StoreError, match=r"format version 2 is newer .* \(1\); upgrade"):
            open_store(path)

    def test_incomplete_store(self, tmp_path):
        path = self.path(tmp_path)
        write_store(path, sp.identity(3, format="csr"), backend=self.backend).close()
        self.edit_attrs(path, lambda a: a.pop("complete"))
        with pytest.raises(StoreError, match=r"incomplete store"):
            open_store(path)

    def test_interrupted_writer_temp_is_incomplete_and_final_name_absent(self, tmp_path):
        path = self.path(tmp_path)
        w = create_store(path, n_cols=4, backend=self.backend)
        w.append(np.array([0, 2]), np.array([0, 3]), np.array([1.0, 2.0]))
        tmp = w._tmp
        if self.backend == "hdf5":
            w._be._fh.flush()
        assert tmp.exists() and not path.exists()
        with pytest.raises(StoreError, match=r"incomplete store"):
            open_store(tmp)
        w.abort()
        assert list(tmp_path.iterdir()) == []

    def test_exception_in_with_block_leaves_nothing(self, tmp_path):
        path = self.path(tmp_path)
        with pytest.raises(RuntimeError, match="boom"):
            with create_store(path, n_cols=4, backend=self.backend) as w:
                w.append(np.array([0, 1]), np.array([2]), np.array([1.0]))
                raise RuntimeError("boom")
        assert list(tmp_path.iterdir()) == []

    # --------------------------------------------------------------- output exists
    def test_output_exists(self, tmp_path):
        path = self.path(tmp_path)
        X = sp.identity(4, format="csr")
        first = write_store(path, X, backend=self.backend)
        fp = first.fingerprint
        first.close()
        with pytest.raises(OutputExistsError, match=r"already exists; pass --overwrite"):
            write_store(path, X, backend=self.backend)
        with pytest.raises(OutputExistsError, match=r"already exists"):
            create_store(path, n_cols=4, backend=self.backend)
        with write_store(path, 2 * X, backend=self.backend, overwrite=True) as s:
            assert s.fingerprint != fp
            assert_same_csr(s.read_block(0, 4).X, 2 * X)
        assert sorted(p.name for p in tmp_path.iterdir()) == [path.name]

    # --------------------------------------------------------------- writer checks
    def test_streamed_appends_match_one_shot_write(self, tmp_path):
        rng = np.random.default_rng(8)
        X = random_csr(rng, 120, 25, 0.15)
        y = rng.integers(0, 3, 120)
        with small_chunks(8):
            ref = write_store(self.path(tmp_path, "a"), X, y, backend=self.backend)
            with create_store(self.path(tmp_path, "b"), n_cols=25, backend=self.backend) as w:
                cuts = np.unique(np.r_[0, rng.integers(0, 120, 9), 120])
                for a, b in zip(cuts[:-1], cuts[1:], strict=True):
                    lo, hi = X.indptr[a], X.indptr[b]
                    w.append(X.indptr[a : b + 1] - lo, X.indices[lo:hi], X.data[lo:hi])
                    w.append_targets(classes=y[a:b])
        with ref, open_store(self.path(tmp_path, "b")) as got:
            assert got.fingerprint == ref.fingerprint
            assert got.target_kind == "classes" and got.n_outputs == int(y.max()) + 1

    def test_target_count_mismatch(self, tmp_path):
        path = self.path(tmp_path)
        with pytest.raises(InputError, match=r"targets \(targets/classes\) have 2 rows .* 3 rows"):
            with create_store(path, n_cols=3, backend=self.backend) as w:
                w.append(np.array([0, 1, 2, 3]), np.array([0, 1, 2]), np.ones(3))
                w.append_targets(classes=np.array([0, 1]))
        with pytest.raises(InputError, match=r"weights have 1 rows but the matrix has 3"):
            write_store_with_weights(path, self.backend, np.ones(1))
        assert list(tmp_path.iterdir()) == []

    def test_bad_entries(self, tmp_path):
        path = self.path(tmp_path)
        be = self.backend
        bad_value = sp.csr_matrix(np.array([[1.0, 0.0], [0.0, np.inf]]))
        # counted from 1, as Matrix Market does
        with pytest.raises(InputError, match=r"row 2, column 2: value inf is not finite"):
            write_store(path, bad_value, backend=be)
        with pytest.raises(InputError,
                           match=r"row 1: column id 5 is outside 0..3 \(column 6 of 4\)"):
            with create_store(path, n_cols=4, backend=be) as w:
                w.append(np.array([0, 1]), np.array([5]), np.array([1.0]))
        with pytest.raises(InputError, match=r"row 2: column ids 2 then 2 are not strictly"):
            with create_store(path, n_cols=4, backend=be) as w:
                w.append(np.array([0, 1, 3]), np.array([0, 2, 2]), np.ones(3))
        with pytest.raises(InputError, match=r"row 3: weight -1.0 is invalid"):
            write_store_with_weights(path, be, np.array([1.0, 0.0, -1.0]))
        with pytest.raises(InputError, match=r"row 2 has class -1 outside"):
            write_store(path, sp.identity(2, format="csr"), np.array([0, -1]), backend=be)
        assert list(tmp_path.iterdir()) == []


def write_store_with_weights(path: Path, backend: str, w: np.ndarray) -> None:
    with create_store(path, n_cols=3, backend=backend) as writer:
        writer.append(np.array([0, 1, 2, 3]), np.array([0, 1, 2]), np.ones(3))
        writer.append_weights(w)


class TestZarrStore(StoreContract):
    backend = "zarr"
    suffix = ".zarr"

    def flip_byte(self, path: Path, array: str, segment: int) -> None:
        chunk = path / array / "c" / str(segment)
        raw = bytearray(chunk.read_bytes())
        raw[len(raw) // 2] ^= 0x5A
        chunk.write_bytes(bytes(raw))

    def edit_attrs(self, path: Path, change) -> None:
        meta = json.loads((path / "zarr.json").read_text())
        change(meta["attributes"]["ranktide"])
        (path / "zarr.json").write_text(json.dumps(meta))

    def test_missing_chunk_reads_as_fill_and_is_caught(self, tmp_path):
        # DESIGN §11: zarr reads a missing chunk as the fill value; the checksum catches it
        rng = np.random.default_rng(9)
        X = random_csr(rng, 40, 30, 0.2)
        path = self.path(tmp_path)
        with small_chunks(16):
            write_store(path, X, backend="zarr").close()
        os.remove(path / "indices" / "c" / "1")
        with open_store(path) as s, pytest.raises(StoreError, match=r"'indices' segment 1 "):
            s.verify()

    @pytest.mark.parametrize("codec", ["zstd", "lz4", "none"])
    def test_direct_chunk_reader_matches_zarr(self, tmp_path, codec):
        # reference: zarr's own array reader on the same directory
        import zarr

        rng = np.random.default_rng(11)
        X = random_csr(rng, 90, 30, 0.3)
        V = rng.standard_normal((90, 3)).astype(np.float32)
        path = self.path(tmp_path)
        with small_chunks(24):
            write_store(path, X, V, backend="zarr", codec=codec).close()
        os.remove(path / "data" / "c" / "1")  # a missing chunk must read as zeros, as in zarr
        group = zarr.open_group(str(path), mode="r")
        with open_store(path, verify=False) as s:
            be = s._be
            for name in ("indptr", "indices", "data", "targets/values"):
                n = be.shape(name)[0]
                want = np.asarray(group[name][:])
                np.testing.assert_array_equal(be.read(name, 0, n), want)
                assert be._direct[name] is not None  # the direct path was taken
                out = np.empty_like(want[8:])
                be.read(name, 8, n, out=out)  # unaligned for 1-D arrays: zarr's own path
                np.testing.assert_array_equal(out, want[8:])


class TestHdf5Store(StoreContract):
    backend = "hdf5"
    suffix = ".h5"

    def flip_byte(self, path: Path, array: str, segment: int) -> None:
        with h5py.File(path, "r") as fh:
            ds = fh[array]
            info = ds.id.get_chunk_info_by_coord((segment * ds.chunks[0],))
            offset, size = info.byte_offset, info.size
        with open(path, "r+b") as fh:
            fh.seek(offset + size // 2)
            byte = fh.read(1)[0]
            fh.seek(offset + size // 2)
            fh.write(bytes([byte ^ 0x5A]))

    def edit_attrs(self, path: Path, change) -> None:
        with h5py.File(path, "r+") as fh:
            attrs = json.loads(fh.attrs["ranktide"])
            change(attrs)
            fh.attrs["ranktide"] = json.dumps(attrs)

    @pytest.mark.parametrize("codec", ["zstd", "lz4", "none"])
    def test_direct_chunk_decoding_matches_h5py(self, tmp_path, codec):
        # reference: h5py's own dataset read of the same file
        rng = np.random.default_rng(12)
        X = random_csr(rng, 90, 30, 0.3)
        V = rng.standard_normal((90, 3)).astype(np.float32)
        path = self.path(tmp_path)
        with small_chunks(24):
            write_store(path, X, V, backend="hdf5", codec=codec).close()
        with h5py.File(path, "r") as fh, open_store(path, verify=False) as s:
            be = s._be
            for name in ("indptr", "indices", "data", "targets/values"):
                want = fh[name][...]
                n = want.shape[0]
                np.testing.assert_array_equal(be.read(name, 0, n), want)
                assert (be._decoders[name] is None) == (codec == "none")
                np.testing.assert_array_equal(be.read(name, 5, n), want[5:])


# ------------------------------------------------------------------- across backends


def test_backends_agree_on_blocks_bytes_and_fingerprint(tmp_path):
    rng = np.random.default_rng(10)
    X = random_csr(rng, 500, 60, 0.1)
    y = rng.integers(0, 6, 500)
    w = rng.random(500)
    stores = []
    with small_chunks(64):
        for backend, codec, name in [
            ("zarr", "zstd", "a.zarr"),
            ("hdf5", "zstd", "b.h5"),
            ("zarr", "lz4", "c.zarr"),
            ("hdf5", "none", "d.h5"),
        ]:
            stores.append(
                write_store(tmp_path / name, X, y, weights=w, backend=backend, codec=codec)
            )
    ref = stores[0]
    for s in stores[1:]:
        assert s.fingerprint == ref.fingerprint
        assert s.attrs["checksums"] == ref.attrs["checksums"]
        assert s.block_ranges(block_bytes=2000) == ref.block_ranges(block_bytes=2000)
        for b1, b2 in zip(ref.blocks(block_bytes=2000), s.blocks(block_bytes=2000), strict=True):
            assert_same_csr(b1.X, b2.X)
            np.testing.assert_array_equal(b1.targets, b2.targets)
            np.testing.assert_array_equal(b1.weights, b2.weights)
    X2 = X.copy()
    X2.data[17] += 1.0
    with small_chunks(64):
        other = write_store(tmp_path / "e.zarr", X2, y, weights=w)
    assert other.fingerprint != ref.fingerprint
    for s in [*stores, other]:
        s.close()


def test_backend_from_suffix(tmp_path):
    X = sp.identity(2, format="csr")
    for name, backend in [("a.h5", "hdf5"), ("b.hdf5", "hdf5"), ("c", "zarr"), ("d.zarr", "zarr")]:
        with write_store(tmp_path / name, X) as s:
            assert s.backend == backend
    with pytest.raises(ConfigError, match=r"backend 'parquet' is unknown"):
        write_store(tmp_path / "x", X, backend="parquet")
    with pytest.raises(ConfigError, match=r"codec 'brotli' is unknown"):
        write_store(tmp_path / "x", X, codec="brotli")


def test_duplicates_are_summed_and_rows_sorted(tmp_path):
    # scipy reference: COO -> dense sums duplicate entries (scipy.sparse.coo_matrix docs)
    rows = np.array([0, 0, 0, 2, 2])
    cols = np.array([3, 1, 3, 0, 0])
    vals = np.array([1.0, 2.0, 4.0, 0.5, 0.25])
    X = sp.coo_matrix((vals, (rows, cols)), shape=(3, 5))
    with write_store(tmp_path / "s", X) as s:
        blk = s.read_block(0, 3)
        np.testing.assert_array_equal(blk.X.toarray(), X.toarray().astype(np.float32))
        assert blk.X.has_sorted_indices and np.all(np.diff(blk.X.indices[:2]) > 0)


@settings(max_examples=40, deadline=None)
@given(
    lengths=st.lists(st.integers(0, 50), min_size=0, max_size=80),
    budget=st.integers(1, 600),
)
def test_block_ranges_respect_the_budget(tmp_path_factory, lengths, budget):
    n = len(lengths)
    indptr = np.concatenate([[0], np.cumsum(lengths)]).astype(np.int64)
    nnz = int(indptr[-1])
    indices = np.concatenate([np.arange(k) for k in lengths]) if nnz else np.zeros(0, int)
    X = sp.csr_matrix((np.ones(nnz, np.float32), indices, indptr), shape=(n, 60))
    path = tmp_path_factory.mktemp("br") / "s"
    with mock.patch.object(store_mod, "_INDPTR_PIECE", 7), write_store(path, X) as s:
        ranges = s.block_ranges(block_bytes=budget)
    cost = indptr * 8 + 8 * np.arange(n + 1)  # int32 id + float32 value per entry, int64 pointer
    if n == 0:
        assert ranges == []
        return
    assert [a for a, _ in ranges] == [0] + [b for _, b in ranges[:-1]]
    assert ranges[-1][1] == n
    for a, b in ranges:
        assert b > a
        used = cost[b] - cost[a]
        assert used <= budget or b == a + 1  # a lone row may exceed the budget
        if b < n:
            assert cost[b + 1] - cost[a] > budget  # greedy: one more row would not fit


def test_crc32_check_value():
    # published CRC-32 check value of the ASCII string "123456789" (Williams 1993;
    # the value is quoted from memory): CBF43926
    assert segment_checksum(np.frombuffer(b"123456789", dtype=np.uint8)) == "cbf43926"


@settings(max_examples=40, deadline=None)
@given(
    n=st.integers(0, 200),
    seg=st.integers(1, 40),
    cuts=st.lists(st.integers(0, 200), max_size=10),
)
def test_streamed_segment_checksums_match_whole_segments(n, seg, cuts):
    a = np.arange(n, dtype=np.int64) * 7919 % 1013
    h = SegmentHasher(seg)
    bounds = sorted({0, n, *[c for c in cuts if c <= n]})
    for lo, hi in zip(bounds[:-1], bounds[1:], strict=True):
        h.update(a[lo:hi])
    want = [segment_checksum(a[i : i + seg]) for i in range(0, n, seg)]
    assert h.finish() == want


def test_writer_argument_checks(tmp_path):
    with pytest.raises(ConfigError, match=r"n_cols must be >= 1"):
        create_store(tmp_path / "s", n_cols=0)
    with pytest.raises(ConfigError, match=r"target kind 'labels' is unknown"):
        create_store(tmp_path / "s", n_cols=3, kind="labels")
    with create_store(tmp_path / "s", n_cols=3, kind="classes") as w:
        w.append(np.array([0, 1]), np.array([0]), np.ones(1))
        with pytest.raises(ConfigError, match=r"targets of kind 'values' given to a store"):
            w.append_targets(values=np.ones((1, 2)))
    assert list(tmp_path.iterdir()) == []


def test_empty_store(tmp_path):
    X = sp.csr_matrix((0, 5), dtype=np.float32)
    with write_store(tmp_path / "e.h5", X, np.zeros(0, dtype=np.int64)) as s:
        assert s.shape == (0, 5) and s.nnz == 0 and s.block_ranges() == []
        assert list(s.blocks(rows=3)) == []
        s.verify()


def test_target_kind_inference(tmp_path):
    X = sp.identity(3, format="csr")
    with write_store(tmp_path / "c", X, [0, 2, 1]) as s:
        assert s.target_kind == "classes" and s.n_outputs == 3
        np.testing.assert_array_equal(s.read_block(0, 3).targets, [0, 2, 1])
    with write_store(tmp_path / "v", X, [0.5, 2.0, 1.0]) as s:
        assert s.target_kind == "values" and s.n_outputs == 1
        np.testing.assert_array_equal(s.read_block(0, 3).targets, [[0.5], [2.0], [1.0]])
    dense_tags = np.array([[1, 0], [0, 0], [1, 1]])
    with write_store(tmp_path / "t", X, dense_tags, kind="tags") as s:
        assert s.target_kind == "tags" and s.n_outputs == 2
        # scipy reference: the nonzero pattern of the dense indicator matrix
        assert_same_csr(s.read_block(0, 3).targets, sp.csr_matrix(dense_tags, dtype=np.float32))
    with pytest.raises(InputError, match=r"class ids: expected 3 integers, got shape \(2,\)"):
        write_store(tmp_path / "bad", X, [0, 1])
    assert sorted(p.name for p in tmp_path.iterdir()) == ["c", "t", "v"]
