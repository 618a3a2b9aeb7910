"""Smoke test of tools/bench_real.py on a tiny data set in the realdata.py file format.

The data: scikit-learn's bundled handwritten digits (load_digits, 1797 rows of 8x8 pixel
counts, 10 classes; shipped with the package, no download), as sparse rows; tags are
invented from the digit (parity, size, closed loops) so the multilabel task has targets.
"""

from __future__ import annotations

import json
import sys
from pathlib import Path

import numpy as np
import pytest
import scipy.io
import scipy.sparse as sp
from sklearn.datasets import load_digits

TOOLS = Path(__file__).resolve().parents[2] / "tools"
sys.path.insert(0, str(TOOLS))
import bench_real  # noqa: E402  (tools/ is not a package)

LOOPS = {0: "1", 6: "1", 8: "2", 9: "1", 4: "1"}


def _tags(digit: int) -> str:
    tags = ["parity::" + ("even" if digit % 2 == 0 else "odd"),
            "size::" + ("small" if digit < 5 else "large")]
    if digit in LOOPS:
        tags.append("loops::" + LOOPS[digit])
    return " ".join(tags)


def _write_digits(out: Path, seed: int = 0) -> None:
    """A 60/15/25 per-class split of the digits, written as realdata.py writes its files."""
    X, y = load_digits(return_X_y=True)
    rng = np.random.default_rng(seed)
    parts: dict[str, list[int]] = {"train": [], "val": [], "test": []}
    for c in range(10):
        rows = rng.permutation(np.flatnonzero(y == c))
        n_test, n_val = len(rows) // 4, len(rows) * 15 // 100
        parts["test"] += rows[:n_test].tolist()
        parts["val"] += rows[n_test:n_test + n_val].tolist()
        parts["train"] += rows[n_test + n_val:].tolist()
    names = [f"digit{c}" for c in range(10)]
    out.mkdir(parents=True)
    (out / "classes.txt").write_text("".join(f"{n}\n" for n in names))
    for split, rows in parts.items():
        rows = np.sort(rows)
        scipy.io.mmwrite(out / f"X_{split}.mtx", sp.coo_matrix(X[rows]))
        (out / f"labels_{split}.txt").write_text("".join(f"{names[c]}\n" for c in y[rows]))
        (out / f"tags_{split}.txt").write_text("".join(f"{_tags(c)}\n" for c in y[rows]))
    (out / "summary.json").write_text(json.dumps({"options": {"source": "load_digits"}}))


@pytest.mark.slow
def test_bench_real_smoke(tmp_path):
    data = tmp_path / "data"
    _write_digits(data)
    doc = bench_real.main([
        "--data", str(data), "--out", str(tmp_path / "out"), "--path", "3",
        "--lr-grid", "1.0", "--lr-max-iter", "200", "--sgd-alphas", "0.001",
        "--sgd-epochs", "2", "--chunk-rows", "256", "--tag-grid", "1.0",
        "--tag-min-count", "5"])
    assert json.loads((tmp_path / "out" / "results.json").read_text())["rows"] == doc["rows"]
    rows = {r.get("key", r["system"]): r for r in doc["rows"]}
    assert set(bench_real.SYSTEMS) <= set(rows)
    for key in ("ranktide", "ranktide_refit", "lr", "lr_train", "sgd"):
        for field in ("accuracy", "macro_f1", "rare_recall", "log_loss", "fit_s",
                      "peak_rss_mib", "model_bytes"):
            assert np.isfinite(rows[key][field]), (key, field)
    for key in ("ranktide_tags", "tags"):
        for field in ("micro_f1", "p_at_1", "p_at_5", "fit_s", "model_bytes"):
            assert np.isfinite(rows[key][field]), (key, field)
    majority = rows["majority class (training prior)"]
    # a trivial predictor's accuracy on 10 near-balanced classes is ~0.1 (common practice,
    # no source: any working classifier on the digits is far above it)
    assert rows["ranktide"]["accuracy"] > majority["accuracy"] + 0.5
    assert rows["ranktide"]["macro_f1"] > majority["macro_f1"] + 0.5
    assert rows["ranktide"]["log_loss"] < majority["log_loss"]
    # precision@1 of a fixed ranking by tag frequency against the fitted tag model
    assert rows["ranktide_tags"]["p_at_1"] > rows["most frequent tags (training counts)"]["p_at_1"]
    assert set(doc["goals"]) == {"ranktide vs lr", "ranktide vs lr_train",
                                 "ranktide_refit vs lr"}
    for found in doc["goals"].values():
        assert set(found) == {"accuracy", "macro_f1", "rare_recall", "model_2x_smaller",
                              "fit_s_le_lr_single_fit"}
    assert rows["lr_train"]["refit_rows"] == "train" and rows["lr"]["refit_rows"] == "train+val"
    assert rows["ranktide_refit"]["refit_with_valid"]["rows"] > rows["ranktide"]["rank"] >= 0
    table = bench_real.table(doc["rows"])
    assert table.splitlines()[0].startswith("| system | accuracy | macro_f1 |")
