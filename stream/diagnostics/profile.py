"""The profiler: where the time of a solver-style pass goes.

:func:`profile_store` runs ``passes`` gradient passes (the pass every outer
solver iteration costs, :mod:`ranktide.passes.gradient`) at a given model — or at
``W = 0`` with the best intercept and random orthonormal factors of a given
rank, so that the products have realistic sizes — and times every block:
reading, decoding, each kernel phase, the combine and the time the computing
thread waited for data. :func:`write_profile` writes ``profile.csv`` (one row
per block per pass), ``profile.json`` (totals, shares, throughput, slowest
blocks, verdict and advice) and ``profile.png``.
"""

from __future__ import annotations

import csv
import io
import os
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
from ranktide.atomic import atomic_write_bytes, atomic_write_json
from ranktide.errors import ConfigError, ModelError
from ranktide.losses import LOSS_NAMES, TARGET_KIND
from ranktide.model import load_model
from ranktide.passes.budget import format_bytes, plan_blocks
from ranktide.passes.engine import PassProfile
from ranktide.passes.gradient import PassRequest, gradient_pass
from ranktide.passes.intercept import best_intercept
from ranktide.store.memory_source import MemorySource, as_source

__all__ = ["profile_store", "ProfileReport", "summarize", "write_profile", "format_report",
           "VERDICT_RULE", "csv_rows", "jsonable"]

#: the rule behind the verdict, written into profile.json
VERDICT_RULE = (
    "io-bound when the seconds spent reading and decoding blocks (read_s + decode_s, summed "
    "over blocks) are at least the seconds spent computing them (the block function plus the "
    "combine); compute-bound otherwise. ratio = (read_s + decode_s) / compute seconds; with "
    "read-ahead a pass lasts about the larger of the two."
)

_LOSS_OF_KIND = {kind: name for name, kind in TARGET_KIND.items()}

#: a block computing in less than this is dominated by per-block overhead
#: (common practice, no source)
SMALL_BLOCK_S = 0.02
#: an io-bound pass over blocks smaller than this should read bigger ones
#: (common practice, no source)
SMALL_BLOCK_BYTES = 4 * 2**20


@dataclass
class ProfileReport:
    """Profile of ``passes`` gradient passes over one source."""

    profile: PassProfile
    summary: dict[str, Any]
    setup: dict[str, Any] = field(default_factory=dict)


def _loss_for(src: Any, loss: str | None) -> str:
    if loss is not None:
        if loss not in LOSS_NAMES:
            raise ConfigError(f"loss {loss!r}: unknown; choose one of {', '.join(LOSS_NAMES)}")
        return loss
    kind = getattr(src, "target_kind", None)
    if kind not in _LOSS_OF_KIND:
        where = getattr(src, "path", None) or "in-memory source"
        raise ConfigError(f"{where}: has no targets, so no loss to profile; ingest targets "
                          "or pass a model")
    return _LOSS_OF_KIND[kind]


def _orthonormal(rng: np.random.Generator, rows: int, cols: int) -> np.ndarray:
    cols = min(cols, rows)
    return np.linalg.qr(rng.standard_normal((rows, cols)))[0] if cols else np.zeros((rows, 0))


def _request(src: Any, *, model: Any, rank: int, power_cols: int, seed: Any,
             keep_projections: bool, block_rows: int | None, block_bytes: int | None,
             backend: str) -> tuple[PassRequest, dict[str, Any]]:
    n, d = src.shape
    k = int(src.n_outputs)
    rng = np.random.default_rng(seed)
    if model is not None:
        U, s, V, b, loss = _load_factors(model)
        if np.ndim(U) != 2 or np.ndim(V) != 2 or (np.shape(U)[0], np.shape(V)[0]) != (d, k):
            where = getattr(src, "path", None) or "in-memory source"
            raise ModelError(f"{where}: has {d} features and {k} outputs but the model is "
                             f"{np.shape(U)[0]} x {np.shape(V)[0]}; profile with a model "
                             "trained on this data")
        origin = "model"
    else:
        loss = _loss_for(src, None)
        b = best_intercept(src, loss=loss, block_rows=block_rows, block_bytes=block_bytes,
                           backend=backend)
        U = _orthonormal(rng, d, rank)
        V = _orthonormal(rng, k, U.shape[1])
        U = U[:, : V.shape[1]]
        s = np.zeros(U.shape[1])  # W = 0, factors of rank R for realistic product sizes
        origin = "zero model, best intercept, random factors"
    Omega = _orthonormal(rng, k, power_cols)
    Psi = _orthonormal(rng, d, power_cols)
    req = PassRequest(loss, U, s, V, b, Omega=Omega, Psi=Psi, keep_projections=keep_projections)
    setup = {"loss": loss, "origin": origin, "rank": int(U.shape[1]),
             "omega_cols": int(Omega.shape[1]), "psi_cols": int(Psi.shape[1])}
    return req, setup


def _load_factors(model: Any) -> tuple[np.ndarray, ...]:
    """``U, s, V, b, loss`` of a Model or of a model directory (read by
    :func:`ranktide.model.load_model`, every format version; shapes are checked
    against the data by the caller)."""
    m = model if hasattr(model, "U") and hasattr(model, "loss") else load_model(model)
    return m.U, m.s, m.V, m.b, m.loss


def _warm_up(src: Any, req: PassRequest) -> None:
    """Load (or compile) the kernels on a few rows, outside the timings."""
    n = src.shape[0]
    blk = src.read_block(0, min(n, 16))
    mem = MemorySource(blk.X, blk.targets, kind=src.target_kind, weights=blk.weights,
                       n_outputs=src.n_outputs)
    gradient_pass(mem, req)


def profile_store(
    store: Any,
    *,
    model: Any = None,
    passes: int = 3,
    rank: int = 16,
    power_cols: int = 8,
    backend: str = "serial",
    block_rows: int | None = None,
    block_bytes: int | None = None,
    memory: int | str | None = None,
    n_threads: int | None = None,
    seed: Any = 0,
    progress: bool = False,
) -> ProfileReport:
    """Profile ``passes`` solver-style gradient passes over ``store``.

    Parameters
    ----------
    store : Store, path or source
    model : path or Model, optional
        A model directory (``factors.npz`` + ``model.json``); by default the
        zero model with the best intercept and random orthonormal ``U``,
        ``V`` of rank ``rank``.
    passes : int
        Number of profiled passes (after a warm-up on a few rows).
    rank, power_cols : int
        Rank of the random factors; columns of ``Omega`` and ``Psi``.
    backend, n_threads : as in :func:`ranktide.passes.engine.run_pass`
    block_rows, block_bytes : int, optional
        Block size; otherwise planned from ``memory``
        (:func:`ranktide.passes.budget.plan_blocks`).
    memory : int or str, optional
        Memory budget (default a quarter of RAM).
    seed : int or Generator
        Seed of the random factors.

    Returns
    -------
    ProfileReport
    """
    if int(passes) < 1:
        raise ConfigError(f"passes = {passes}: profile at least one pass")
    if int(rank) < 1:
        raise ConfigError(f"rank = {rank}: must be at least 1")
    opened = isinstance(store, (str, os.PathLike))
    src = as_source(store)
    try:
        r_plan = rank if model is None else None
        plan = None
        if block_rows is None and block_bytes is None:
            plan = plan_blocks(src, budget=memory, rank=r_plan or 16, omega_cols=power_cols,
                               psi_cols=power_cols, keep_projections=True, dense_gradient=False,
                               backend=backend, n_threads=n_threads)
            block_rows = plan.block_rows
        keep = bool(plan.projections_fit) if plan is not None else False
        req, setup = _request(src, model=model, rank=rank, power_cols=power_cols, seed=seed,
                              keep_projections=keep, block_rows=block_rows,
                              block_bytes=block_bytes, backend=backend)
        _warm_up(src, req)
        prof = PassProfile()
        for _ in range(int(passes)):
            res = gradient_pass(src, req, backend=backend, block_rows=block_rows,
                                block_bytes=block_bytes, n_threads=n_threads, profile=prof,
                                progress=progress)
            del res
        setup.update({
            "store": str(getattr(src, "path", None) or "in-memory"),
            "backend": backend, "passes": int(passes), "block_rows": block_rows,
            "block_bytes": block_bytes, "codec": getattr(src, "codec", None),
            "store_backend": getattr(src, "backend", None), "n_rows": int(src.shape[0]),
            "n_cols": int(src.shape[1]), "n_outputs": int(src.n_outputs), "nnz": int(src.nnz),
            "keep_projections": keep,
            "planned_peak_bytes": None if plan is None else plan.peak_bytes,
            "memory_budget": None if plan is None else plan.budget,
        })
        return ProfileReport(profile=prof, summary=summarize(prof, setup), setup=setup)
    finally:
        if opened:
            src.close()


# ---------------------------------------------------------------------------
# summary, verdict, advice
# ---------------------------------------------------------------------------
def _components(rec: Any) -> dict[str, float]:
    """Disjoint seconds of one block: I/O, named phases, the unnamed rest."""
    out = {"read": rec.read_s, "decode": rec.decode_s}
    for name, sec in rec.all_phases().items():
        out[name] = sec
    out["other_compute"] = max(rec.compute_s - sum(rec.phases.values()), 0.0)
    out["combine"] = rec.combine_s
    return out


def verdict(io_s: float, compute_s: float) -> tuple[str, float]:
    """``("io-bound" | "compute-bound", io_s / compute_s)`` by :data:`VERDICT_RULE`."""
    ratio = io_s / compute_s if compute_s > 0 else float("inf")
    return ("io-bound" if io_s >= compute_s else "compute-bound"), ratio


def _advice(v: str, tot: dict, n_blocks: int, setup: dict) -> list[str]:
    out = []
    mean_work = tot["work_s"] / max(n_blocks, 1)
    mean_bytes = tot["bytes_decoded"] / max(n_blocks, 1)
    # bigger blocks pay when per-block overhead weighs (little compute per block)
    # or when an io-bound pass reads small blocks (chunks at both ends of a
    # block are decoded twice, DESIGN §11)
    if mean_work < SMALL_BLOCK_S or (v == "io-bound" and mean_bytes < SMALL_BLOCK_BYTES):
        out.append(f"bigger blocks: blocks average {format_bytes(mean_bytes)} decoded and "
                   f"{mean_work * 1e3:.1f} ms of compute; raise --block-rows or --memory")
    if v == "io-bound":
        codec = setup.get("codec")
        if codec not in (None, "none"):
            out.append(f"another codec: decoding {codec} dominates; re-ingest with a faster "
                       "codec (lz4 or none) if disk space allows")
        else:
            out.append("reading dominates: put the store on a faster disk or compress it so "
                       "fewer bytes are read")
    else:
        if setup.get("backend") == "serial":
            out.append("more threads: compute dominates; try --backend threads or a higher "
                       "NUMBA_NUM_THREADS")
        else:
            out.append("more threads: compute dominates; add cores (or dask workers), or "
                       "lower the rank / power columns")
    if tot["wall_s"] > 0 and tot["wait_s"] / tot["wall_s"] > 0.3 and v == "compute-bound":
        out.append("the computing thread waited for data for over 30% of the pass: reads do "
                   "not overlap compute; check that the kernels release the GIL")
    return out


def summarize(prof: PassProfile, setup: dict[str, Any]) -> dict[str, Any]:
    """Totals, shares, throughput, slowest blocks, verdict and advice (a JSON dict)."""
    recs = prof.records
    tot = prof.totals()
    tot["work_s"] = sum(r.work_s for r in recs)
    comp: dict[str, float] = {}
    for r in recs:
        for name, sec in _components(r).items():
            comp[name] = comp.get(name, 0.0) + sec
    busy = sum(comp.values())
    shares = {name: (sec / busy if busy > 0 else 0.0) for name, sec in comp.items()}
    io_s = tot["read_s"] + tot["decode_s"]
    v, ratio = verdict(io_s, tot["work_s"])
    wall = tot["wall_s"]
    slow = sorted(recs, key=lambda r: r.io_s + r.work_s, reverse=True)[:5]
    slowest = []
    for r in slow:
        parts = _components(r)
        worst = max(parts, key=parts.get)
        slowest.append({"pass": r.pass_index, "block": r.block, "first_row": r.first_row,
                        "rows": r.rows, "nnz": r.nnz, "seconds": r.io_s + r.work_s,
                        "slowest_phase": worst, "phase_seconds": parts[worst]})
    per_pass = [p["wall_s"] for p in prof.passes]
    return {
        "setup": setup,
        "passes": len(prof.passes),
        "blocks": len(recs),
        "totals": {k: (float(v) if isinstance(v, float) else v) for k, v in tot.items()},
        "seconds_by_phase": comp,
        "share_by_phase": shares,
        "pass_seconds": per_pass,
        "throughput": {
            "rows_per_s": tot["rows"] / wall if wall > 0 else None,
            "nnz_per_s": tot["nnz"] / wall if wall > 0 else None,
            "decoded_MB_per_s": tot["bytes_decoded"] / 1e6 / wall if wall > 0 else None,
        },
        "slowest_blocks": slowest,
        "verdict": v,
        "verdict_ratio": ratio,
        "verdict_inputs": {"io_s": io_s, "compute_s": tot["work_s"]},
        "verdict_rule": VERDICT_RULE,
        "advice": _advice(v, tot, len(recs) // max(len(prof.passes), 1), setup),
    }


# ---------------------------------------------------------------------------
# output files
# ---------------------------------------------------------------------------
def csv_rows(prof: PassProfile) -> tuple[list[str], list[list[Any]]]:
    """Header and rows of ``profile.csv`` (one row per block per pass)."""
    names = prof.phase_names()
    header = (["pass", "block", "first_row", "rows", "nnz", "bytes_disk", "bytes_decoded",
               "read_s", "decode_s"] + [f"{n}_s" for n in names]
              + ["combine_s", "compute_s", "wait_s"])
    rows = []
    for r in prof.records:
        rows.append([r.pass_index, r.block, r.first_row, r.rows, r.nnz, r.bytes_disk,
                     r.bytes_decoded, r.read_s, r.decode_s]
                    + [r.all_phases().get(n, 0.0) for n in names]
                    + [r.combine_s, r.compute_s, r.wait_s])
    return header, rows


def _csv_bytes(prof: PassProfile) -> bytes:
    header, rows = csv_rows(prof)
    buf = io.StringIO()
    w = csv.writer(buf, lineterminator="\n")
    w.writerow(header)
    for row in rows:
        w.writerow([f"{x:.6g}" if isinstance(x, float) else x for x in row])
    return buf.getvalue().encode()


def _png_bytes(prof: PassProfile) -> bytes:
    import matplotlib

    matplotlib.use("Agg", force=False)
    from matplotlib.figure import Figure

    recs = prof.records
    comps = [_components(r) for r in recs]
    names: list[str] = []
    for c in comps:
        for n in c:
            if n not in names:
                names.append(n)
    x = np.arange(len(recs))
    fig = Figure(figsize=(max(6.0, min(18.0, 0.12 * len(recs) + 4)), 5.0))
    ax = fig.add_subplot(1, 1, 1)
    bottom = np.zeros(len(recs))
    for name in names:
        vals = np.array([c.get(name, 0.0) for c in comps])
        ax.bar(x, vals, bottom=bottom, width=0.85, label=name)
        bottom += vals
    ax.set_xlabel("block (pass-major order)")
    ax.set_ylabel("seconds")
    ax2 = ax.twinx()
    thr = np.array([r.rows / t if (t := r.io_s + r.work_s) > 0 else 0.0 for r in recs])
    ax2.plot(x, thr, color="black", marker=".", linewidth=1, label="rows/s")
    ax2.set_ylabel("rows / s (block)")
    for p in prof.passes[1:]:
        start = sum(q["n_blocks"] for q in prof.passes[: p["pass_index"]])
        ax.axvline(start - 0.5, color="grey", linewidth=0.8, linestyle=":")
    h1, l1 = ax.get_legend_handles_labels()
    h2, l2 = ax2.get_legend_handles_labels()
    ax.legend(h1 + h2, l1 + l2, fontsize=7, loc="upper center", ncol=4,
              bbox_to_anchor=(0.5, -0.16), frameon=False)
    ax.set_title("time per block by phase")
    fig.tight_layout()
    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=100)
    return buf.getvalue()


def write_profile(report: ProfileReport, out: str | os.PathLike) -> dict[str, Path]:
    """Write ``profile.csv``, ``profile.json`` and ``profile.png`` into ``out``.

    Each file is written atomically; ``out`` is created when missing.
    """
    d = Path(out)
    if d.exists() and not d.is_dir():
        raise ConfigError(f"{d}: exists and is not a directory; pass a directory to --out")
    d.mkdir(parents=True, exist_ok=True)
    paths = {"csv": d / "profile.csv", "json": d / "profile.json", "png": d / "profile.png"}
    atomic_write_bytes(paths["csv"], _csv_bytes(report.profile))
    atomic_write_json(paths["json"], jsonable(report.summary))
    atomic_write_bytes(paths["png"], _png_bytes(report.profile))
    return paths


def jsonable(obj: Any) -> Any:
    if isinstance(obj, dict):
        return {str(k): jsonable(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [jsonable(v) for v in obj]
    if isinstance(obj, (np.integer,)):
        return int(obj)
    if isinstance(obj, (float, np.floating)):
        f = float(obj)
        return f if np.isfinite(f) else None
    return obj


def _table(rows: list[list[Any]], header: list[str]) -> str:
    def cell(v: Any) -> str:
        if isinstance(v, float):
            return f"{v:.4g}"
        return str(v)

    body = [[cell(v) for v in r] for r in rows]
    allrows = [header] + body
    widths = [max(len(r[i]) for r in allrows) for i in range(len(header))]
    num = [all(isinstance(r[i], (int, float)) for r in rows) for i in range(len(header))]
    lines = ["  ".join(h.rjust(w) if n else h.ljust(w)
                       for h, w, n in zip(header, widths, num, strict=True)),
             "  ".join("-" * w for w in widths)]
    for r in body:
        lines.append("  ".join(c.rjust(w) if n else c.ljust(w)
                               for c, w, n in zip(r, widths, num, strict=True)))
    return "\n".join(line.rstrip() for line in lines)


def format_report(summary: dict[str, Any]) -> str:
    """The summary as aligned terminal tables."""
    sec = summary["seconds_by_phase"]
    share = summary["share_by_phase"]
    ph = _table([[n, sec[n], 100 * share[n]] for n in sec], ["phase", "seconds", "share %"])
    t = summary["throughput"]
    tot = summary["totals"]

    def fmt(v: Any, spec: str) -> str:
        return "n/a" if v is None else format(v, spec)

    info = _table([
        ["passes", summary["passes"]], ["blocks", summary["blocks"]],
        ["rows", int(tot["rows"])], ["wall seconds", tot["wall_s"]],
        ["rows/s", fmt(t["rows_per_s"], ".4g")], ["nnz/s", fmt(t["nnz_per_s"], ".4g")],
        # a pass that decoded nothing (chunks already decoded, or in-memory data) says so
        ["MB decoded", fmt(tot["bytes_decoded"] / 1e6, ".4g") if tot["bytes_decoded"] else
         "none (cached)"],
        ["decoded MB/s", fmt(t["decoded_MB_per_s"], ".4g") if tot["bytes_decoded"] else "-"],
        ["wait seconds", tot["wait_s"]],
        ["verdict", f"{summary['verdict']} (io/compute = {summary['verdict_ratio']:.3g})"],
    ], ["figure", "value"])
    slow = _table([[b["pass"], b["block"], b["first_row"], b["rows"], b["seconds"],
                    b["slowest_phase"]] for b in summary["slowest_blocks"]],
                  ["pass", "block", "first_row", "rows", "seconds", "slowest phase"])
    adv = "\n".join(f"- {a}" for a in summary["advice"]) or "- none"
    return f"{info}\n\n{ph}\n\nslowest blocks\n{slow}\n\nadvice\n{adv}"
