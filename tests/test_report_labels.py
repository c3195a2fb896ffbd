"""Issue 14 item 15: what the report says and labels.

The picture is written as SVG with text kept as text, so its labels can be read back; the
calibration verdict is checked against the binomial band computed here with scipy.stats.
"""

from __future__ import annotations

import math
from dataclasses import replace

import numpy as np
import pytest
from scipy import stats

from daemon.config import demo_config
from daemon.workbench import backtest, plant, report

matplotlib = pytest.importorskip("matplotlib")


@pytest.fixture(scope="module")
def pred_file(tmp_path_factory):
    sc = replace(plant.Scenario.stationary(days=12.0, seed=4), blunders=2)
    res = backtest.backtest_scenario(sc, demo_config().models[0], train=4 * 86400.0)
    path = tmp_path_factory.mktemp("rep") / "pred.csv"
    backtest.write_predictions(path, res)
    return path, res


def test_picture_labels_band_limits_stale_training_year_and_references(pred_file, tmp_path):
    path, res = pred_file
    track = report.load_track(path)
    matplotlib.rcParams["svg.fonttype"] = "none"  # text stays text
    try:
        out = report.report(track, tmp_path / "r.svg", unit="ppm")[0]
    finally:
        matplotlib.rcParams["svg.fonttype"] = "path"
    svg = open(out, encoding="utf-8").read()
    for label in ("|z| &lt; 1.96", "upper limit h = 5", "lower limit -h = -5",
                  "(right axis)", "stale after", "training period",
                  "reference: static model", "reference: static + lab bias update",
                  "2026-01-"):
        assert label in svg, label
    assert track.meta["stale_after_source"] == "lab interval"
    # the stale line is at the derived value (4 h sampling: 3 x 4 h + the delay, about 14 h)
    assert 12 * 3600 < track.meta["stale_after"] < 16 * 3600


def test_coverage_verdict_is_the_binomial_band():
    n, level = 400, 0.95
    rng = np.random.default_rng(11)
    half = stats.norm.ppf(0.975) * math.sqrt(level * (1 - level) / n)  # normal approx.
    good = report.coverage_verdict(rng.standard_normal(n), level)
    assert good["band"] == pytest.approx((level - half, level + half), rel=1e-3)
    assert good["inside"] and not good["biased"]
    wide = report.coverage_verdict(1.6 * rng.standard_normal(n), level)
    # the exact binomial probability of so few inside, for a calibrated model, is tiny
    k = round(wide["coverage"] * n)
    assert not wide["inside"] and stats.binom.cdf(k, n, level) < 1e-6
    shifted = report.coverage_verdict(0.4 + rng.standard_normal(n), level)
    assert shifted["biased"] and shifted["mean_z"] > 0


def test_summaries_say_when_coverage_is_outside_the_band(pred_file):
    path, res = pred_file
    track = report.load_track(path)
    text = report.summary_text(track)
    assert "coverage of the 95% interval" in text and "band" in text
    # the same track with its residuals inflated: the summary must say so
    for f in track.fits:
        if f.get("z") is not None and math.isfinite(f["z"]):
            f["z"] = 2.5 * f["z"] + 1.0
    bad = report.summary_text(track)
    assert "BELOW the band" in bad and "too narrow" in bad and "a bias" in bad
    assert "calibration" in backtest.summary_text(res, "ppm").lower()


def test_summary_gives_the_rmse_without_the_gated_results_too():
    # a hand-made track: 4 lab results, one of them a blunder the gate rejected; the RMSE of
    # the published predictions computed here by hand (numpy) with and without it
    t = np.array([0.0, 10.0, 20.0, 30.0, 40.0])
    mean = np.array([1.0, 2.0, 3.0, 4.0, 5.0])
    fits = [{"t": 5.0, "y": 1.5, "z": 0.5, "reason": "ok"},
            {"t": 15.0, "y": 2.0, "z": 0.0, "reason": "ok"},
            {"t": 25.0, "y": 30.0, "z": 9.0, "reason": "gated"},
            {"t": 35.0, "y": 3.0, "z": -1.0, "reason": "ok"}]
    track = backtest.Track(model="m", t=t, mean=mean, std=np.ones(5), lo=mean - 2,
                           hi=mean + 2, status=["learning"] * 5, trust=["normal"] * 5,
                           fits=fits, alerts=[], meta={"level": 0.95})
    text = report.summary_text(track)
    published = np.array([1.0, 2.0, 3.0, 4.0])  # the newest prediction at or before each t
    y = np.array([1.5, 2.0, 30.0, 3.0])
    every = np.sqrt(np.mean((y - published) ** 2))
    kept = np.sqrt(np.mean((y[[0, 1, 3]] - published[[0, 1, 3]]) ** 2))
    assert f"RMSE at 4 lab results (as published at sample time): published {every:#.4g}" in text
    assert f"without the 1 the gate rejected: published {kept:#.4g}" in text
