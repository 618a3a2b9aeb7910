"""The run report: summary figures agree with the run, readable axes, a real browser loads it."""

from __future__ import annotations

import json
import re
import shutil

import browser
import numpy as np
import pytest
from planted import planted_rows
from ranktide.cli import main as cli
from ranktide.diagnostics import report
from ranktide.runs.train import train


@pytest.fixture(scope="module")
def path_run(tmp_path_factory):
    root = tmp_path_factory.mktemp("report")
    X, y = planted_rows(11, 500)
    Xv, yv = planted_rows(12, 200)
    res = train(X, targets=y, loss="softmax", path_steps=3, path_floor=0.1, valid=(Xv, yv),
                max_passes=8, tol=1e-2, seed=0, out=root / "run", checkpoint_passes=3)
    page = report.write_report(root / "run")
    return root, res, page


def _summary_rows(page) -> dict[str, str]:
    text = page.read_text()
    return dict(re.findall(r"<tr><th>(.*?)</th><td>(.*?)</td></tr>", text))


def test_summary_shows_the_chosen_model_and_the_console_counts(path_run):
    root, res, page = path_run
    rows = _summary_rows(page)
    meta = json.loads((root / "run" / "model" / "model.json").read_text())
    best = res.path[res.best_index]
    assert float(rows["chosen model: lam"]) == pytest.approx(best.lam, rel=1e-5)
    assert float(rows["chosen model: lam"]) == pytest.approx(meta["lam"], rel=1e-5)
    assert int(rows["chosen model: rank"]) == best.rank == meta["rank"]
    assert float(rows["chosen model: validation accuracy"]) == pytest.approx(best.score, 1e-5)
    assert int(rows["chosen model: passes in its step"]) == best.passes
    # the run's passes as the console's closing line counts them (TrainResult.passes)
    assert int(rows["run: passes"]) == res.passes
    assert int(rows["run: path values fitted"]) == len(res.path)


def test_captions_describe_the_figures(path_run):
    _root, _res, page = path_run
    captions = re.findall(r"<figcaption>(.*?)</figcaption>", page.read_text())
    assert len(captions) == 4  # convergence, rank, singular values, path (not profiled)
    for c in captions:
        assert ".png" not in c and len(c.split()) >= 10, c


def test_report_without_passes_is_one_line_and_writes_nothing(tmp_path, capsys):
    run = tmp_path / "run"
    run.mkdir()
    (run / "config.json").write_text("{}")
    assert cli.main(["report", str(run)]) == 2
    err = capsys.readouterr().err.strip()
    assert len(err.splitlines()) == 1 and "no passes recorded" in err
    assert not (run / "report").exists()


def _drawn_labels(axis, fig):
    from matplotlib.backends.backend_agg import FigureCanvasAgg

    canvas = FigureCanvasAgg(fig)
    canvas.draw()  # tick labels get their final text and extent
    renderer = canvas.get_renderer()
    ticks = [t for t in axis.get_major_ticks() if t.label1.get_visible() and t.label1.get_text()]
    lo, hi = axis.get_view_interval()
    ticks = [t for t in ticks if lo <= t.get_loc() <= hi]
    return [(t.get_loc(), t.label1.get_text(), t.label1.get_window_extent(renderer))
            for t in ticks]


@pytest.mark.parametrize("lams", [
    [0.07135, 0.01595, 0.003568],  # the demo's path: under two decades
    list(0.1 * 0.5 ** np.arange(12)),  # twelve values over 3.3 decades
])
def test_log_path_axis_labels_do_not_overlap(lams):
    from matplotlib.figure import Figure

    fig = Figure(figsize=(4.6, 3.6), dpi=100)
    ax = fig.add_subplot(1, 1, 1)
    ax.plot(lams, np.linspace(0, 1, len(lams)), marker=".")
    ax.set_xscale("log")
    report._log_axis(ax.xaxis, np.asarray(lams), at_values=True)
    labels = _drawn_labels(ax.xaxis, fig)
    assert len(labels) >= 2
    boxes = sorted((b.x0, b.x1) for _l, _t, b in labels)
    for (_a0, a1), (b0, _b1) in zip(boxes, boxes[1:], strict=False):
        assert a1 < b0, labels  # no two labels overlap
    assert not any(t.label1.get_text() for t in ax.xaxis.get_minor_ticks())
    for loc, text, _b in labels:  # each label names its tick's value to 2 digits
        assert float(text) == pytest.approx(loc, rel=0.06)


def test_integer_axes_have_integer_ticks():
    from matplotlib.figure import Figure

    fig = Figure(figsize=(4.6, 3.6), dpi=100)
    ax = fig.add_subplot(1, 1, 1)
    ax.plot([1, 2, 3], [0, 1, 3])  # few passes, small ranks: the default puts 0.5 steps
    report._integer_axis(ax.xaxis)
    report._integer_axis(ax.yaxis)
    for axis in (ax.xaxis, ax.yaxis):
        locs = [loc for loc, _t, _b in _drawn_labels(axis, fig)]
        assert locs and all(float(v).is_integer() for v in locs), locs


@pytest.mark.skipif(not browser.CHROMIUM.exists(),
                    reason="needs /usr/bin/chromium (Debian packages chromium, chromium-driver: "
                           "make browser)")
def test_report_page_loads_in_headless_chromium(path_run, tmp_path):
    _root, _res, page = path_run
    seen = browser.load_page(page, tmp_path / "profile", screenshot=tmp_path / "page.png")
    assert seen["title"].startswith("ranktide run report")
    assert len(seen["images"]) == 4
    for src, complete, width in seen["images"]:
        assert complete and width > 0, src  # every figure was found and decoded
    assert seen["errors"] == []
    assert (tmp_path / "page.png").stat().st_size > 10_000
    # the check can fail: the same page with one figure missing
    broken = tmp_path / "broken"
    shutil.copytree(page.parent, broken)
    (broken / "rank.png").unlink()
    seen = browser.load_page(broken / "report.html", tmp_path / "profile2")
    widths = {src: width for src, _c, width in seen["images"]}
    assert widths["rank.png"] == 0 and widths["path.png"] > 0
    assert seen["errors"], "a missing image is reported as a failed load"
