"""A summary of a store, computed in one streamed pass over its blocks.

Shape, density, bytes on disk and decoded, compression ratio, row-length
quantiles (exact, from a histogram of row lengths), empty rows and columns,
and a summary of the targets (class counts with the most and least frequent
classes, tags per row, value ranges) and weights.
"""

from __future__ import annotations

import os
from pathlib import Path
from typing import Any

import numpy as np
import ranktide.store.format as _fmt
from ranktide.errors import ConfigError
from ranktide.outputs import format_size
from ranktide.store import open_store

__all__ = ["inspect_store", "QUANTILES", "format_inspection"]

#: row-length quantiles reported
QUANTILES = (0.0, 0.25, 0.5, 0.75, 0.9, 0.99, 1.0)
_TOP = 5


def _disk_bytes(path: Path) -> int:
    if path.is_file():
        return path.stat().st_size
    total = 0
    for root, _dirs, files in os.walk(path):
        for f in files:
            total += os.path.getsize(os.path.join(root, f))
    return total


def _decoded_bytes(attrs: dict[str, Any]) -> int:
    total = 0
    for meta in attrs.get("arrays", {}).values():
        total += int(np.prod(meta["shape"])) * np.dtype(meta["dtype"]).itemsize
    return total


def hist_quantiles(hist: np.ndarray, qs: tuple[float, ...]) -> list[int]:
    """Quantiles of integer data given as a histogram ``hist[v] = count of v``.

    The smallest ``v`` whose cumulative count reaches ``q * n`` (the inverse
    of the empirical distribution function, numpy's ``"inverted_cdf"``).
    """
    cdf = np.cumsum(hist)
    n = int(cdf[-1]) if cdf.size else 0
    if n == 0:
        return [0 for _ in qs]
    out = []
    for q in qs:
        target = max(1, int(np.ceil(q * n - 1e-9)))
        out.append(int(np.searchsorted(cdf, target, side="left")))
    return out


def _ranked(counts: np.ndarray, names: list[str] | None, what: str) -> dict[str, Any]:
    order = np.argsort(-counts, kind="stable")
    def item(j: int) -> dict[str, Any]:
        return {what: int(j), "name": names[j] if names else str(j), "count": int(counts[j])}

    bottom = order[::-1][:_TOP]
    return {"top": [item(j) for j in order[:_TOP]], "bottom": [item(j) for j in bottom]}


class _Acc:
    """Running sums of one pass."""

    def __init__(self, store: Any) -> None:
        n_cols = store.shape[1]
        self.kind = store.target_kind
        self.k = int(store.n_outputs or 0)
        self.col_counts = np.zeros(n_cols, dtype=np.int64)
        self.len_hist = np.zeros(1, dtype=np.int64)
        self.cls = np.zeros(self.k, dtype=np.int64)
        self.tag_hist = np.zeros(1, dtype=np.int64)
        self.vmin = np.full(self.k, np.inf)
        self.vmax = np.full(self.k, -np.inf)
        self.vsum = np.zeros(self.k)
        self.w = {"min": np.inf, "max": -np.inf, "sum": 0.0, "zero": 0}

    @staticmethod
    def _add_hist(hist: np.ndarray, values: np.ndarray) -> np.ndarray:
        h = np.bincount(values)
        if h.size > hist.size:
            hist = np.concatenate((hist, np.zeros(h.size - hist.size, dtype=np.int64)))
        hist[: h.size] += h
        return hist

    def add(self, b: Any) -> None:
        X = b.X
        self.col_counts += np.bincount(X.indices, minlength=self.col_counts.size)
        self.len_hist = self._add_hist(self.len_hist, np.diff(X.indptr))
        t = b.targets
        if self.kind == "classes" and t.size:
            self.cls += np.bincount(t, minlength=self.k)[: self.k]
        elif self.kind == "tags":
            self.tag_hist = self._add_hist(self.tag_hist, np.diff(t.indptr))
            self.cls += np.bincount(t.indices, minlength=self.k)[: self.k]
        elif self.kind == "values" and t.shape[0]:
            t64 = t.astype(np.float64)
            self.vmin = np.minimum(self.vmin, t64.min(axis=0))
            self.vmax = np.maximum(self.vmax, t64.max(axis=0))
            self.vsum += t64.sum(axis=0)
        if b.weights is not None and b.weights.size:
            w = b.weights.astype(np.float64)
            self.w["min"] = min(self.w["min"], float(w.min()))
            self.w["max"] = max(self.w["max"], float(w.max()))
            self.w["sum"] += float(w.sum())
            self.w["zero"] += int(np.count_nonzero(w == 0))


def _targets_summary(acc: _Acc, store: Any) -> dict[str, Any] | None:
    kind = acc.kind
    names = store.output_names
    n = store.shape[0]
    if kind == "classes":
        out = {"kind": kind, "n_classes": acc.k, "classes_present": int(np.count_nonzero(acc.cls))}
        out["counts"] = acc.cls.tolist()
        out.update(_ranked(acc.cls, names, "class"))
        return out
    if kind == "tags":
        per_row = hist_quantiles(acc.tag_hist, (0.0, 0.5, 1.0))
        total = int((acc.tag_hist * np.arange(acc.tag_hist.size)).sum())
        out = {
            "kind": kind,
            "n_tags": acc.k,
            "tags_per_row": {"min": per_row[0], "median": per_row[1], "max": per_row[2],
                             "mean": total / n if n else 0.0},
            "rows_without_tags": int(acc.tag_hist[0]),
            "tag_counts": acc.cls.tolist(),
        }  # fmt: skip
        out.update(_ranked(acc.cls, names, "tag"))
        return out
    if kind == "values":
        mean = acc.vsum / n if n else acc.vsum
        return {
            "kind": kind,
            "n_outputs": acc.k,
            "min": acc.vmin.tolist(),
            "max": acc.vmax.tolist(),
            "mean": mean.tolist(),
            "overall_min": float(acc.vmin.min()) if acc.k and n else None,
            "overall_max": float(acc.vmax.max()) if acc.k and n else None,
        }
    return None


def inspect_need(store: Any, block_bytes: int | None = None) -> int:
    """Bytes :func:`inspect_store` holds at its peak, from the store's shape.

    Per column: the running counts, one block's ``bincount`` and their sum
    (three int64 arrays of ``n_cols``); per output: six float64/int64 arrays;
    and two decoded blocks (the one read and the one read ahead).
    """
    d = int(store.shape[1])
    k = int(store.n_outputs or 0)
    blocks = 2 * int(_fmt.DEFAULT_BLOCK_BYTES if block_bytes is None else block_bytes)
    return 3 * 8 * d + 6 * 8 * k + blocks


def inspect_store(store: Any, *, block_bytes: int | None = None,
                  memory: int | None = None) -> dict[str, Any]:
    """Summarize a store in one streamed pass.

    Parameters
    ----------
    store : Store or path
        An open store, or the path of one (opened and closed here).
    block_bytes : int, optional
        Decoded bytes per block (the store's default when omitted).
    memory : int, optional
        Memory budget in bytes: refused at once (before any allocation) when
        :func:`inspect_need` exceeds it.

    Returns
    -------
    dict
        JSON-ready: ``path``, ``backend``, ``codec``, ``fingerprint``,
        ``shape``, ``nnz``, ``density``, ``bytes_disk``, ``bytes_decoded``,
        ``compression_ratio``, ``row_nnz`` (quantiles, mean), ``empty_rows``,
        ``empty_cols``, ``targets`` (per kind, or None), ``weights`` (or None).
    """
    own = not hasattr(store, "blocks")
    st = open_store(store) if own else store
    try:
        need = inspect_need(st, block_bytes)
        if memory is not None and need > memory:
            raise ConfigError(
                f"{st.path}: inspecting {st.shape[1]} columns needs about "
                f"{format_size(need)} (three 8-byte counts per column) but the memory budget "
                f"is {format_size(memory)}; raise --memory, or re-ingest with fewer columns "
                "(hash the features into fewer)"
            )
        acc = _Acc(st)
        for b in st.blocks(block_bytes=block_bytes):
            acc.add(b)
        n, d = st.shape
        disk = _disk_bytes(Path(st.path))
        dec = _decoded_bytes(st.attrs)
        qv = hist_quantiles(acc.len_hist, QUANTILES)
        res: dict[str, Any] = {
            "path": str(st.path),
            "backend": st.backend,
            "codec": st.codec,
            "fingerprint": st.fingerprint,
            "shape": [n, d],
            "nnz": st.nnz,
            "density": st.nnz / (n * d) if n * d else 0.0,
            "bytes_disk": disk,
            "bytes_decoded": dec,
            "compression_ratio": dec / disk if disk else None,
            "row_nnz": {
                "quantiles": {f"{q:g}": v for q, v in zip(QUANTILES, qv, strict=True)},
                "mean": st.nnz / n if n else 0.0,
            },
            "empty_rows": int(acc.len_hist[0]) if n else 0,
            "empty_cols": int(np.count_nonzero(acc.col_counts == 0)),
            "targets": _targets_summary(acc, st),
            "weights": None,
        }
        if st.has_weights:
            w = acc.w
            res["weights"] = {
                "min": w["min"] if n else None,
                "max": w["max"] if n else None,
                "mean": w["sum"] / n if n else None,
                "sum": w["sum"],
                "zero": w["zero"],
            }
        return res
    finally:
        if own:
            st.close()


def _mib(b: int) -> str:
    return f"{b / 2**20:,.2f} MiB"


def format_inspection(info: dict[str, Any]) -> str:
    """The result of :func:`inspect_store` as aligned text tables."""
    n, d = info["shape"]
    q = info["row_nnz"]["quantiles"]
    ratio = info["compression_ratio"]
    rows = [
        ("store", info["path"]),
        ("backend / codec", f"{info['backend']} / {info['codec']}"),
        ("fingerprint", info["fingerprint"]),
        ("rows x columns", f"{n:,} x {d:,}"),
        ("entries", f"{info['nnz']:,}"),
        ("density", f"{info['density']:.3g}"),
        ("bytes on disk", _mib(info["bytes_disk"])),
        ("bytes decoded", _mib(info["bytes_decoded"])),
        ("compression ratio", f"{ratio:.2f}" if ratio else "-"),
        ("row entries min/25/50/75/90/99%/max",
         " / ".join(str(q[k]) for k in ("0", "0.25", "0.5", "0.75", "0.9", "0.99", "1"))),
        ("row entries mean", f"{info['row_nnz']['mean']:.2f}"),
        ("empty rows", f"{info['empty_rows']:,}"),
        ("empty columns", f"{info['empty_cols']:,}"),
    ]  # fmt: skip
    t = info["targets"]
    if t is None:
        rows.append(("targets", "none"))
    elif t["kind"] == "classes":
        rows.append(("targets", f"classes: {t['n_classes']} ({t['classes_present']} present)"))
        for label, key in (("most frequent", "top"), ("least frequent", "bottom")):
            rows.append((label, ", ".join(f"{c['name']} ({c['count']:,})" for c in t[key])))
    elif t["kind"] == "tags":
        tp = t["tags_per_row"]
        rows.append(("targets", f"tags: {t['n_tags']}"))
        rows.append(("tags per row min/median/max",
                     f"{tp['min']} / {tp['median']} / {tp['max']} (mean {tp['mean']:.2f})"))
        rows.append(("rows without tags", f"{t['rows_without_tags']:,}"))
        for label, key in (("most frequent", "top"), ("least frequent", "bottom")):
            rows.append((label, ", ".join(f"{c['name']} ({c['count']:,})" for c in t[key])))
    else:
        rows.append(("targets", f"values: {t['n_outputs']} outputs"))
        if t["overall_min"] is not None:
            rows.append(("value range", f"{t['overall_min']:.6g} .. {t['overall_max']:.6g}"))
    w = info["weights"]
    if w is not None and w["min"] is not None:
        rows.append(("weights min/mean/max",
                     f"{w['min']:.6g} / {w['mean']:.6g} / {w['max']:.6g} ({w['zero']} zero)"))
    width = max(len(k) for k, _ in rows)
    return "\n".join(f"{k:<{width}}  {v}" for k, v in rows)
