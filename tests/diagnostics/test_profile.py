"""The profiler and ``ranktide profile``.

References: the CSV is checked against the source's own row count and nnz
(scipy.sparse), and the verdict against the rule the JSON states, recomputed
from the CSV columns with the csv module; the PNG against the PNG signature
(ISO/IEC 15948, from memory).
"""

from __future__ import annotations

import csv
import json

import numpy as np
import pytest
import scipy.sparse as sp
from ranktide.cli.main import main
from ranktide.diagnostics.profile import VERDICT_RULE, profile_store, verdict, write_profile
from ranktide.store.memory_source import MemorySource


def _source(n=600, d=200, k=8, seed=0, cls=MemorySource):
    rng = np.random.default_rng(seed)
    X = sp.random(n, d, density=0.05, format="csr", random_state=rng, dtype=np.float32)
    y = rng.integers(0, k, n).astype(np.int32)
    return cls(X, y, n_outputs=k), X


def _read_csv(path):
    with open(path, newline="") as fh:
        return list(csv.DictReader(fh))


def _check_rule(summary, rows):
    # the stated rule, recomputed from the CSV: io = read + decode; compute =
    # the block function (compute_s) plus the combine (its phases + combine_s)
    io = sum(float(r["read_s"]) + float(r["decode_s"]) for r in rows)
    fold_cols = [c for c in rows[0] if c.startswith("xt_")] + ["combine_s"]
    comp = sum(float(r["compute_s"]) + sum(float(r[c]) for c in fold_cols) for r in rows)
    assert summary["verdict"] == ("io-bound" if io >= comp else "compute-bound")
    assert summary["verdict_ratio"] == pytest.approx(io / comp, rel=1e-3, abs=1e-6)
    assert summary["verdict_rule"] == VERDICT_RULE


def test_csv_accounts_for_every_row_of_every_pass(tmp_path):
    src, X = _source()
    rep = profile_store(src, passes=3, rank=4, block_rows=140)
    paths = write_profile(rep, tmp_path / "prof")
    rows = _read_csv(paths["csv"])
    assert len(rows) == 3 * 5
    for p in range(3):
        mine = [r for r in rows if int(r["pass"]) == p]
        assert [int(r["block"]) for r in mine] == list(range(5))
        firsts = [int(r["first_row"]) for r in mine]
        sizes = [int(r["rows"]) for r in mine]
        # contiguous blocks covering rows 0..n-1 exactly once
        assert firsts == list(np.cumsum([0] + sizes[:-1]))
        assert sum(sizes) == X.shape[0]
        assert sum(int(r["nnz"]) for r in mine) == X.nnz
    for col in ("bytes_disk", "bytes_decoded", "read_s", "decode_s", "wait_s",
                "projections_s", "dense_s", "xt_products_s", "combine_s"):
        assert col in rows[0]
    summary = json.loads(paths["json"].read_text())
    assert summary["totals"]["rows"] == 3 * X.shape[0]
    assert len(summary["slowest_blocks"]) == 5
    assert sum(summary["share_by_phase"].values()) == pytest.approx(1.0)
    assert summary["throughput"]["rows_per_s"] > 0
    _check_rule(summary, rows)
    assert paths["png"].read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"


class _SlowDisk(MemorySource):
    """A source that reports 5 s of reading per block (the profiler trusts Block.io)."""

    def read_block(self, start, stop):
        blk = super().read_block(start, stop)
        blk.io["read_s"] = 5.0
        return blk


def test_verdict_follows_the_rule(tmp_path):
    assert verdict(2.0, 1.0) == ("io-bound", 2.0)
    assert verdict(1.0, 1.0)[0] == "io-bound"
    assert verdict(0.5, 1.0) == ("compute-bound", 0.5)
    slow, _ = _source(n=200, cls=_SlowDisk)
    rep = profile_store(slow, passes=1, rank=2, block_rows=50)
    rows = _read_csv(write_profile(rep, tmp_path / "slow")["csv"])
    _check_rule(rep.summary, rows)
    assert rep.summary["verdict"] == "io-bound"
    assert any("codec" in a or "reading dominates" in a for a in rep.summary["advice"])
    fast, _ = _source(n=200)
    rep = profile_store(fast, passes=1, rank=2, block_rows=50)
    assert rep.summary["verdict"] == "compute-bound"  # reads from memory cost ~nothing
    assert any("more threads" in a for a in rep.summary["advice"])


def test_profile_with_a_model_and_threads(tmp_path):
    from ranktide.model import Model, save_model
    from ranktide.store import write_store

    src, X = _source(n=300, d=50, k=5, seed=3)
    write_store(tmp_path / "s.zarr", X, src.targets).close()
    rng = np.random.default_rng(0)
    U = np.linalg.qr(rng.standard_normal((50, 3)))[0]
    V = np.linalg.qr(rng.standard_normal((5, 3)))[0]
    save_model(tmp_path / "m", Model(U=U, s=np.array([1.0, 0.5, 0.1]), V=V, b=np.zeros(5),
                                     loss="softmax"))
    rep = profile_store(tmp_path / "s.zarr", model=tmp_path / "m", passes=2, block_rows=64,
                        backend="threads", n_threads=2)
    assert rep.setup["origin"] == "model" and rep.setup["rank"] == 3
    assert rep.summary["totals"]["rows"] == 600


def test_cli_profile(tmp_path, capsys):
    from ranktide.store import write_store

    src, X = _source(n=400, d=60, k=4, seed=5)
    write_store(tmp_path / "s.zarr", X, src.targets).close()
    out = tmp_path / "out"
    code = main(["profile", str(tmp_path / "s.zarr"), "--passes", "2", "--rank", "3",
                 "--block-rows", "100", "--out", str(out), "--json", "--quiet"])
    assert code == 0
    doc = json.loads(capsys.readouterr().out)
    assert doc["passes"] == 2 and doc["blocks"] == 8
    assert {p.name for p in out.iterdir()} == {"profile.csv", "profile.json", "profile.png"}
    assert len(_read_csv(out / "profile.csv")) == 8
    code = main(["profile", str(tmp_path / "s.zarr"), "--passes", "1", "--memory", "64MB"])
    text = capsys.readouterr().out
    assert code == 0 and "verdict" in text and "slowest blocks" in text


@pytest.mark.parametrize("argv, msg", [
    (["--passes", "0"], "passes = 0"),
    (["--memory", "lots"], "memory size 'lots'"),
    (["--block-rows", "0"], "--block-rows 0"),
])
def test_cli_profile_bad_options(tmp_path, capsys, argv, msg):
    from ranktide.store import write_store

    src, X = _source(n=50, d=20, k=3)
    write_store(tmp_path / "s.zarr", X, src.targets).close()
    assert main(["profile", str(tmp_path / "s.zarr"), *argv]) == 2
    err = capsys.readouterr().err.strip()
    assert msg in err and len(err.splitlines()) == 1


def test_cli_profile_bad_model(tmp_path, capsys):
    from ranktide.model import Model, save_model
    from ranktide.store import write_store

    src, X = _source(n=50, d=20, k=3)
    write_store(tmp_path / "s.zarr", X, src.targets).close()
    m = tmp_path / "m"
    m.mkdir()
    (m / "model.json").write_text('{"loss": "softmax"}')  # not written by ranktide
    assert main(["profile", str(tmp_path / "s.zarr"), "--model", str(m), "--quiet"]) == 2
    err = capsys.readouterr().err.strip()
    assert "not a ranktide model" in err and len(err.splitlines()) == 1
    # a 21-feature model on 20-feature data, read by the model loader (any format version)
    rng = np.random.default_rng(0)
    U, _ = np.linalg.qr(rng.normal(size=(21, 1)))
    save_model(tmp_path / "m21", Model(loss="softmax", U=U, s=np.ones(1), V=np.eye(3)[:, :1],
                                       b=np.zeros(3)))
    assert main(["profile", str(tmp_path / "s.zarr"), "--model", str(tmp_path / "m21"),
                 "--quiet"]) == 2
    assert "has 20 features and 3 outputs but the model is 21 x 3" in capsys.readouterr().err


def test_cli_profile_missing_store(tmp_path, capsys):
    assert main(["profile", str(tmp_path / "nope.zarr"), "--quiet"]) == 2
    err = capsys.readouterr().err.strip()
    assert "nope.zarr" in err and len(err.splitlines()) == 1
