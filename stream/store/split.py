"""A streamed train / holdout split of a store.

Rows keep their order within each part; targets and weights go with their
rows. For class targets the split is stratified: of the ``c_j`` rows of
class ``j``, exactly ``round(holdout * c_j)`` (round half to even, as
``numpy.rint``) go to the holdout part, chosen uniformly at random by the
seeded generator. For other targets exactly ``round(holdout * n)`` rows are
chosen uniformly. The same seed gives the same split.

The two parts are written aside, both finished and fsynced, then put in
place one right after the other (:func:`ranktide.store.writer.place_together`:
an error on the way puts the old pair back). A kill between those two renames
cannot be undone (POSIX has no call that replaces two names at once), so both
parts carry the attribute ``split``: a shared build id, which part this is and
where its partner is (relative to this store's directory). Every reader checks
it when opening a part (:func:`ranktide.store.reader.open_store`) and refuses a
part whose partner names it back under another id, with one line saying to
run the split again.
"""

from __future__ import annotations

import os
import uuid
from pathlib import Path
from typing import Any

import numpy as np
from ranktide.errors import ConfigError
from ranktide.outputs import check_not_overlapping, check_output, real_path
from ranktide.store.reader import open_store
from ranktide.store.writer import create_store, place_together

__all__ = ["split_store", "holdout_mask_counts", "split_attrs"]


def split_attrs(build: str, part: str, path: Path, partner: Path,
                settings: dict[str, Any]) -> dict[str, Any]:
    """The ``split`` attribute of one part: build id, part, partner path, settings.

    ``partner`` is stored relative to the directory holding ``path`` (symbolic
    links resolved), so a pair moved together still finds itself.
    """
    home = real_path(path).parent
    return {"id": build, "part": part,
            "partner": os.path.relpath(real_path(partner), home), **settings}


def holdout_mask_counts(counts: np.ndarray, holdout: float, rng: np.random.Generator):
    """Choose holdout members per class.

    Parameters
    ----------
    counts : int array (k,)
        Rows per class.
    holdout : float
        Fraction in (0, 1).
    rng : numpy.random.Generator

    Returns
    -------
    mask : bool array (sum(counts),)
        Class-major layout: ``mask[offset[j] + i]`` tells whether the ``i``-th
        row of class ``j`` (in row order) is held out.
    offset : int64 array (k,)
        Start of each class in ``mask``.
    """
    counts = np.asarray(counts, dtype=np.int64)
    offset = np.zeros(counts.size, dtype=np.int64)
    if counts.size > 1:
        np.cumsum(counts[:-1], out=offset[1:])
    mask = np.zeros(int(counts.sum()), dtype=bool)
    take = np.rint(holdout * counts).astype(np.int64)
    for j in np.flatnonzero(take):  # one draw per class, not per row
        chosen = rng.choice(int(counts[j]), size=int(take[j]), replace=False)
        mask[offset[j] + chosen] = True
    return mask, offset


def _class_counts(store: Any, k: int, block_bytes: int | None) -> np.ndarray:
    counts = np.zeros(k, dtype=np.int64)
    for b in store.blocks(block_bytes=block_bytes):
        counts += np.bincount(b.targets, minlength=k)[:k]
    return counts


def _block_holdout(y: np.ndarray, seen: np.ndarray, mask: np.ndarray, offset: np.ndarray):
    """Holdout flags of one block's rows from their occurrence rank within the class."""
    order = np.argsort(y, kind="stable")
    ys = y[order]
    m = ys.shape[0]
    starts = np.ones(m, dtype=bool)
    starts[1:] = ys[1:] != ys[:-1]
    group_start = np.maximum.accumulate(np.where(starts, np.arange(m), 0))
    occ = seen[ys] + (np.arange(m) - group_start)
    out = np.empty(m, dtype=bool)
    out[order] = mask[offset[ys] + occ]
    seen += np.bincount(y, minlength=seen.size)[: seen.size]
    return out


def _append_rows(writer: Any, b: Any, rows: np.ndarray, kind: str | None) -> None:
    X = b.X[rows]
    X.sort_indices()
    writer.append(X.indptr.astype(np.int64), X.indices, X.data)
    t = b.targets
    if kind == "classes":
        writer.append_targets(classes=t[rows])
    elif kind == "values":
        writer.append_targets(values=t[rows])
    elif kind == "tags":
        T = t[rows]
        T.sort_indices()
        writer.append_targets(tags_indptr=T.indptr.astype(np.int64), tags_indices=T.indices)
    if b.weights is not None:
        writer.append_weights(b.weights[rows])


def _check(store_path: Path, out_train: Path, out_hold: Path, holdout: float, overwrite: bool):
    if not (0.0 < float(holdout) < 1.0):
        raise ConfigError(f"holdout={holdout}: must be a fraction strictly between 0 and 1")
    if real_path(out_train) == real_path(out_hold):
        raise ConfigError(f"{out_train}: the train and holdout outputs must differ")
    check_not_overlapping(out_hold, {"the train output": out_train}, option="--out-holdout")
    check_not_overlapping(out_train, {"the holdout output": out_hold}, option="--out")
    check_output(out_train, {"the input store": store_path}, overwrite=overwrite)
    check_output(out_hold, {"the input store": store_path}, overwrite=overwrite,
                 option="--out-holdout")


def split_store(
    store: Any,
    out_train: str | Path,
    out_holdout: str | Path,
    *,
    holdout: float = 0.2,
    seed: int | np.random.Generator | None = 0,
    overwrite: bool = False,
    backend: str | None = None,
    codec: str | None = None,
    block_bytes: int | None = None,
) -> dict[str, Any]:
    """Split a store's rows into a train store and a holdout store, streamed.

    Parameters
    ----------
    store : Store or path
    out_train, out_holdout : path
        Stores to create.
    holdout : float
        Fraction of rows (of each class, for class targets) held out.
    seed : int or Generator
        Normalized with ``numpy.random.default_rng``.
    overwrite : bool
        Replace existing outputs.
    backend, codec : str, optional
        Of the outputs; default: those of the input.
    block_bytes : int, optional
        Decoded bytes per block read.

    Returns
    -------
    dict
        ``train`` and ``holdout`` paths and row counts, ``seed``,
        ``stratified``, and for class targets ``holdout_per_class``.
    """
    own = not hasattr(store, "blocks")
    st = open_store(store) if own else store
    try:
        tr_p, ho_p = Path(out_train), Path(out_holdout)
        _check(Path(st.path), tr_p, ho_p, holdout, overwrite)
        rng = np.random.default_rng(seed)
        n, d = st.shape
        kind = st.target_kind
        k = int(st.n_outputs or 0)
        if kind == "classes":
            counts = _class_counts(st, k, block_bytes)
        else:
            counts = np.array([n], dtype=np.int64)
        mask, offset = holdout_mask_counts(counts, holdout, rng)
        seen = np.zeros(counts.size, dtype=np.int64)

        build = uuid.uuid4().hex
        settings = {"seed": seed if isinstance(seed, int) else None,
                    "holdout_fraction": float(holdout)}

        def make(p: Path, part: str, partner: Path):
            return create_store(
                p, n_cols=d, kind=kind, n_outputs=st.n_outputs, names=st.output_names,
                backend=backend or st.backend, codec=codec or st.codec, overwrite=overwrite,
                source=str(st.path), attrs={"split": split_attrs(build, part, p, partner,
                                                                 settings)},
            )  # fmt: skip

        w_tr = make(tr_p, "train", ho_p)
        w_ho = None
        try:
            w_ho = make(ho_p, "holdout", tr_p)
            for b in st.blocks(block_bytes=block_bytes):
                if kind == "classes":
                    hold = _block_holdout(b.targets, seen, mask, offset)
                else:
                    hold = mask[b.start : b.stop]
                _append_rows(w_ho, b, np.flatnonzero(hold), kind)
                _append_rows(w_tr, b, np.flatnonzero(~hold), kind)
            n_tr, n_ho = w_tr.n_rows, w_ho.n_rows
            w_tr.finish_aside()
            w_ho.finish_aside()
            place_together([w_tr, w_ho])
        except BaseException:
            w_tr.abort()
            if w_ho is not None:
                w_ho.abort()
            raise
        out: dict[str, Any] = {
            "source": str(st.path),
            "train": str(tr_p),
            "holdout": str(ho_p),
            "train_rows": int(n_tr),
            "holdout_rows": int(n_ho),
            "holdout_fraction": float(holdout),
            "seed": seed if isinstance(seed, int) else None,
            "stratified": kind == "classes",
            "split_id": build,
        }
        if kind == "classes":
            out["holdout_per_class"] = np.rint(holdout * counts).astype(np.int64).tolist()
        return out
    finally:
        if own:
            st.close()
