"""Report: the pictures, and the numbers drawn in them."""

from __future__ import annotations

import math
import xml.etree.ElementTree as ET
from dataclasses import replace

import matplotlib.image as mpimg
import numpy as np
import pytest
from scipy import special, stats

from daemon.cli import main
from daemon.config import Config, DaemonConfig, demo_config
from daemon.exitcodes import EXIT_OK, EXIT_USAGE
from daemon.runtime import wire
from daemon.runtime.service import Service
from daemon.workbench import backtest, demo, historian, live, plant, report
from tests.conftest import MODEL


@pytest.fixture(scope="module")
def run_files(tmp_path_factory):
    folder = tmp_path_factory.mktemp("report")
    sc = replace(plant.Scenario.demo(seed=2), days=12.0, step_day=6.0, fouling_ppm_per_day=10.0,
                 outage_days=(8.0, 9.5), blunders=2)
    path = folder / "h.csv"
    historian.write_csv(path, plant.simulate(sc))
    model = next(m for m in demo_config().models if m.name == MODEL)
    res = backtest.backtest(backtest.load_history(path), model, train=3 * 86400.0, unit="ppm")
    pred = folder / "pred.csv"
    backtest.write_predictions(pred, res)
    return folder, path, res, pred


def test_report_writes_both_pages_as_images(run_files, tmp_path):
    _, _, res, pred = run_files
    track = report.load_track(pred)
    paths = report.report(track, tmp_path / "r.png", note="simulated data", dpi=50)
    assert paths == [str(tmp_path / "r.png"), str(tmp_path / "r-calibration.png")]
    page1 = mpimg.imread(paths[0])
    page2 = mpimg.imread(paths[1])
    # figure sizes 14 x 10 and 13 x 5.2 inches at 50 dpi
    assert page1.shape[:2] == (500, 700) and page1.shape[2] in (3, 4)
    assert page2.shape[:2] == (260, 650)
    # not a blank canvas: a good share of the pixels are not white
    assert np.mean(page1[..., :3].min(axis=2) < 0.9) > 0.05
    svg = report.report(track, tmp_path / "r.svg")
    root = ET.parse(svg[0]).getroot()
    assert root.tag.endswith("svg")
    assert "AX-350 [ppm]" in open(svg[0]).read() or "AX-350" in open(svg[0]).read()
    with pytest.raises(ValueError, match="suffix"):
        report.report(track, tmp_path / "noext")


def test_pit_and_coverage_from_z_equal_the_student_t_ones():
    # z maps the predictive CDF to a normal quantile; reference: scipy.stats.t cdf and
    # interval computed on the original Student-t predictives
    rng = np.random.default_rng(7)
    n = 500
    dof = rng.uniform(3, 40, n)
    mean = rng.normal(0, 10, n)
    scale = rng.uniform(1, 5, n)
    y = mean + scale * rng.standard_t(5, n)
    cdf = stats.t.cdf(y, dof, mean, scale)
    z = special.ndtri(cdf)
    cal = report.calibration(z)
    np.testing.assert_allclose(cal["pit"], cdf, rtol=1e-12, atol=1e-15)
    for level, cover in zip(cal["levels"], cal["coverage"], strict=True):
        lo, hi = stats.t.interval(level, dof, mean, scale)
        inside = np.mean((y >= lo) & (y <= hi))
        assert cover == pytest.approx(inside, abs=1.0 / n + 1e-12)


def _page_cusum(z, k, h):
    """Page's tabular CUSUM written out directly (Page 1954; as tabulated in Montgomery,
    Introduction to Statistical Quality Control, ch. 9, the chapter number from memory),
    restarting both sums after a signal."""
    up = lo = 0.0
    out = []
    for v in z:
        up, lo = max(0.0, up + v - k), max(0.0, lo - v - k)
        signal = 1 if up > h else (-1 if lo > h else 0)
        out.append((up, lo, signal))
        if signal:
            up = lo = 0.0
    return out, (up, lo)


def test_cusum_drawn_is_the_trust_monitors_cusum(run_files):
    _, path, res, _ = run_files
    lab = res.track.lab_arrays()
    up, dn, sig = report.cusum_path(lab["z"], lab["learned"], 0.5, 5.0)
    z = lab["z"][lab["learned"] & np.isfinite(lab["z"])]
    ref, last = _page_cusum(z, 0.5, 5.0)
    have = np.isfinite(up)
    np.testing.assert_allclose(up[have], [r[0] for r in ref], rtol=1e-12)
    np.testing.assert_allclose(dn[have], [r[1] for r in ref], rtol=1e-12)
    assert list(sig[have]) == [r[2] for r in ref]
    assert any(r[2] for r in ref)  # fast fouling makes it signal
    # and the daemon's own detector, run on the same messages, ends in the same state
    model = res.model
    svc = Service(Config(DaemonConfig(), (model,)))

    class Pub:
        def send_multipart(self, frames):
            pass

    svc.pub = Pub()
    for _, name, body in backtest.feed_messages(res.history, [model], lab_delay=res.lab_delay,
                                                block=res.block):
        svc.process([[name.encode(), wire.packb(body)]])
    state = svc.runners[MODEL].monitor.cusum.to_state()
    assert (state["upper"], state["lower"]) == pytest.approx(last, rel=1e-12)


def test_staleness_counts_from_when_a_result_arrived():
    pred_t = np.array([0.0, 10.0, 20.0, 30.0, 40.0, 50.0])
    lab_t = np.array([5.0, 12.0, 25.0])
    seen = np.array([15.0, 22.0, 45.0])      # arrived 10 s after drawn
    learned = np.array([True, True, False])  # the last one was gated
    got = report.staleness(pred_t, lab_t, seen, learned)
    np.testing.assert_array_equal(got[:2], [np.nan, np.nan])
    np.testing.assert_array_equal(got[2:], [20.0 - 5.0, 30.0 - 12.0, 40.0 - 12.0, 50.0 - 12.0])


def test_report_from_a_recorded_stream(run_files, tmp_path):
    _, _, res, _ = run_files
    rec = tmp_path / "s.rec"
    with live.RecordWriter(rec) as w:
        for i, (topic, payload) in enumerate(res.frames):
            w.write(1000.0 + i, topic, payload)
    track = report.load_track(rec, MODEL)
    assert track.t.tolist() == res.track.t.tolist()
    np.testing.assert_array_equal([f["z"] for f in track.fits], [f["z"] for f in res.track.fits])
    assert len(track.alerts) == len(res.track.alerts)
    paths = report.report(track, tmp_path / "live.png", unit="ppm", dpi=40)
    assert mpimg.imread(paths[0]).shape[:2] == (400, 560)
    with pytest.raises(ValueError, match="choose one with --model"):
        report.load_track(rec)  # two models (and the no-forgetting companion) in the file
    with pytest.raises(ValueError, match="no messages of model"):
        report.load_track(rec, "other")


def test_report_command(run_files, tmp_path, capsys):
    _, _, _, pred = run_files
    out = tmp_path / "c.png"
    assert main(["report", str(pred), "--out", str(out), "--unit", "ppm"]) == EXIT_OK
    printed = capsys.readouterr().out.split()
    assert printed == [str(out), str(tmp_path / "c-calibration.png")]
    assert mpimg.imread(out).shape[:2] == (1100, 1540)
    bad = tmp_path / "bad.csv"
    bad.write_text("a,b\n1,2\n")
    assert main(["report", str(bad), "--out", str(out)]) == EXIT_USAGE
    assert "not a predictions file" in capsys.readouterr().err


def test_demo_story_without_the_live_part(tmp_path, capsys):
    out = tmp_path / "demo"
    assert demo.main(["--skip-live", "--days", "16", "--tune-days", "8", "--out", str(out),
                      "--quiet"]) == 0
    text = capsys.readouterr().out
    for step in ("1/5", "2/5", "3/5", "5/5"):
        assert step in text
    assert "static ridge" in text and "<- chosen" in text
    img = mpimg.imread(out / "c301-report.png")
    assert img.shape[:2] == (1100, 1540)
    assert math.isfinite(backtest.read_predictions(out / "c301-backtest.csv").mean[-1])


def test_reference_scores_from_the_file_equal_the_backtest_headline(run_files):
    # the predictions file carries the published prediction and the references at each lab
    # row: the report's figures are the backtest's, computed again from the file alone
    _, _, res, pred = run_files
    track = report.load_track(pred)
    np.testing.assert_array_equal(track.dof, res.track.dof)
    refs = report.reference_scores(track)
    assert res.n_left_out == 0
    expected = {"published": "model", "no forgetting": "noforget", "static": "static",
                "bias update": "bias", "persistence": "persist"}
    for label, key in expected.items():
        n, rmse = refs[label]
        assert n == res.n_scored == res.scores[key].n
        assert rmse == pytest.approx(res.scores[key].rmse, rel=1e-12)
