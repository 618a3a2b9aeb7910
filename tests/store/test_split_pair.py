"""A split's two parts belong together (issue 13): both are finished aside and put in place
one right after the other, an error while placing them puts the old pair back, and both
carry one split id that every reader checks against the partner.

No outside reference applies here: these check the project's own contract from the issue
(common practice, no source).
"""

from __future__ import annotations

import os
import shutil

import numpy as np
import pytest
import ranktide.atomic
import scipy.sparse as sp
from ranktide.errors import StoreError
from ranktide.store import open_store, write_store
from ranktide.store.split import split_store
from userfiles import snapshot

STALE_PAIR = (r"come from different runs of `ranktide split` \(one was interrupted between "
              r"replacing the two\); run the split again with --overwrite")


@pytest.fixture(params=["zarr", "h5"])
def source(request, tmp_path):
    rng = np.random.default_rng(0)
    X = sp.random(60, 9, density=0.3, random_state=1, format="csr", dtype=np.float32)
    ext = request.param
    write_store(tmp_path / f"s.{ext}", X, rng.integers(0, 3, 60), kind="classes")
    return tmp_path, ext


def _split(root, ext, seed, train="t", hold="h", overwrite=True):
    return split_store(root / f"s.{ext}", root / f"{train}.{ext}", root / f"{hold}.{ext}",
                       seed=seed, overwrite=overwrite)


def _remove(path):
    shutil.rmtree(path) if path.is_dir() else path.unlink()


def _attrs(path):
    with open_store(path) as s:
        return s.attrs["split"]


def test_parts_share_one_id_and_name_each_other(source):
    root, ext = source
    info = _split(root, ext, 3, overwrite=False)
    t, h = _attrs(root / f"t.{ext}"), _attrs(root / f"h.{ext}")
    assert t["id"] == h["id"] == info["split_id"]
    assert (t["part"], h["part"]) == ("train", "holdout") and t["seed"] == h["seed"] == 3
    assert (t["partner"], h["partner"]) == (f"h.{ext}", f"t.{ext}")
    # a pair moved together still finds itself and opens
    (root / "moved").mkdir()
    for name in (f"t.{ext}", f"h.{ext}"):
        shutil.move(root / name, root / "moved" / name)
    for name in (f"t.{ext}", f"h.{ext}"):
        open_store(root / "moved" / name).close()


def test_a_stale_pair_is_refused_by_readers(source):
    root, ext = source
    _split(root, ext, 0)
    old_train = root / f"old-t.{ext}"
    shutil.move(root / f"t.{ext}", old_train)
    _split(root, ext, 1)
    # the state a kill between the two renames leaves: an old train next to a new holdout
    _remove(root / f"t.{ext}")
    os.rename(old_train, root / f"t.{ext}")
    for name in (f"t.{ext}", f"h.{ext}"):
        with pytest.raises(StoreError, match=STALE_PAIR):
            open_store(root / name)


def test_a_partner_that_moved_on_is_not_checked(source):
    root, ext = source
    _split(root, ext, 0)
    # the holdout is re-split with another train part: it no longer names t as its partner
    _split(root, ext, 1, train="other")
    open_store(root / f"t.{ext}").close()
    # the holdout's name now holds a plain store: nothing to compare with
    rng = np.random.default_rng(2)
    X = sp.random(5, 9, density=0.5, random_state=2, format="csr", dtype=np.float32)
    write_store(root / f"h.{ext}", X, rng.integers(0, 3, 5), kind="classes", overwrite=True)
    open_store(root / f"other.{ext}").close()
    # a partner that is gone
    _remove(root / f"h.{ext}")
    open_store(root / f"other.{ext}").close()


def test_an_error_placing_the_second_part_puts_the_old_pair_back(source, monkeypatch):
    root, ext = source
    _split(root, ext, 0)
    before = snapshot(root)
    real = ranktide.atomic.exchange_paths
    calls = []

    def second_fails(a, b):
        calls.append(a)
        if len(calls) == 2:
            raise OSError(5, "invented I/O error on the second replacement")
        return real(a, b)

    monkeypatch.setattr(ranktide.atomic, "exchange_paths", second_fails)
    with pytest.raises(OSError, match="invented I/O error"):
        _split(root, ext, 1)
    assert len(calls) >= 2  # the failure came where it was meant to
    assert snapshot(root) == before  # both old, byte-identical, no temporary sibling
