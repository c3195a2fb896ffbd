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
