"""Atomic writes and pickle-free array files (stream/atomic.py)."""

from __future__ import annotations

import json

import numpy as np
import pytest
from ranktide.atomic import atomic_dir, atomic_write_json, load_npz, save_npz
from ranktide.errors import ModelError, OutputExistsError


def test_atomic_dir_renames_on_success(tmp_path):
    final = tmp_path / "out"
    with atomic_dir(final) as tmp:
        tmp.mkdir()
        (tmp / "a.txt").write_text("x")
        assert not final.exists()
    assert (final / "a.txt").read_text() == "x"
    assert [p.name for p in tmp_path.iterdir()] == ["out"]


def test_atomic_dir_failure_leaves_nothing(tmp_path):
    final = tmp_path / "out"
    with pytest.raises(RuntimeError), atomic_dir(final) as tmp:
        tmp.mkdir()
        (tmp / "a.txt").write_text("x")
        raise RuntimeError("boom")
    assert list(tmp_path.iterdir()) == []


def test_atomic_dir_refuses_existing(tmp_path):
    final = tmp_path / "out"
    final.mkdir()
    (final / "keep").write_text("k")
    with pytest.raises(OutputExistsError, match="already exists; pass --overwrite"):
        with atomic_dir(final):
            pass
    assert (final / "keep").read_text() == "k"
    with atomic_dir(final, overwrite=True) as tmp:
        tmp.mkdir()
    assert list(final.iterdir()) == []


def test_atomic_json_roundtrip(tmp_path):
    p = tmp_path / "m.json"
    atomic_write_json(p, {"b": 1, "a": [1.5]})
    assert json.loads(p.read_text()) == {"a": [1.5], "b": 1}


def test_npz_roundtrip_and_object_refused(tmp_path):
    p = tmp_path / "f.npz"
    save_npz(p, {"U": np.eye(3), "s": np.arange(3.0)})
    got = load_npz(p)
    np.testing.assert_array_equal(got["U"], np.eye(3))
    with pytest.raises(TypeError, match="dtype object"):
        save_npz(tmp_path / "g.npz", {"o": np.array([{}], dtype=object)})
    # An object array written by numpy itself (pickled inside the .npz) is refused on load.
    bad = tmp_path / "bad.npz"
    np.savez(bad, o=np.array([{"x": 1}], dtype=object))
    with pytest.raises(ModelError, match="object"):
        load_npz(bad)


def test_npz_missing_and_garbage(tmp_path):
    with pytest.raises(ModelError, match="file not found"):
        load_npz(tmp_path / "nope.npz")
    junk = tmp_path / "junk.npz"
    junk.write_bytes(b"\x00\x01garbage")
    with pytest.raises(ModelError, match="not a readable .npz"):
        load_npz(junk)
