"""Tune: prequential choice of prior, noise and half-life against published results."""

from __future__ import annotations

import itertools
import math
from dataclasses import replace

import numpy as np
import pytest
from sklearn.linear_model import BayesianRidge

from daemon.cli import main
from daemon.config import InputConfig, ModelConfig, load, loads
from daemon.exitcodes import EXIT_OK
from daemon.workbench import backtest, historian, plant, tune
from tests.conftest import c301_model, toml_config

_HOUR = 3600.0


def _history(t, X, y, tags):
    return backtest.History("sim", tuple(tags), "y", np.asarray(t, float), np.asarray(X, float),
                            np.asarray(t, float).copy(), np.asarray(y, float))


def _linear(seed=1, n=400, p=5, noise=0.5):
    rng = np.random.default_rng(seed)
    X = rng.standard_normal((n, p))
    w = rng.normal(0.0, 2.0, p)
    y = 10.0 + X @ w + rng.normal(0.0, noise, n)
    t = 1.767e9 + _HOUR * np.arange(n)
    tags = [f"x{i}" for i in range(p)]
    inputs = tuple(InputConfig(tag, -5.0, 5.0) for tag in tags)
    return _history(t, X, y, tags), X, y, inputs


def test_without_forgetting_the_choice_is_the_evidence_maximum_of_bayesian_ridge():
    # reference: the evidence approximation (Bishop, PRML sec. 3.5) as implemented by
    # scikit-learn's BayesianRidge: alpha_ is the noise precision, lambda_ the weight
    # precision, the intercept is unpenalized (fit_intercept). With the noise known to the
    # posterior, the prequential log density after one burn-in result is the log evidence
    # given that result, so its maximum is the same one.
    hist, X, y, inputs = _linear()
    base = ModelConfig(name="sim", inputs=inputs, basis_kind="identity", alpha=1.0,
                       noise_std=1.0, forgetting="none", half_life=None, gate=None)
    res = tune.tune(hist, base, burn_in=1, policy="none", lab_delay=0.0)
    assert res.model.forgetting == "none"
    ref = BayesianRidge(tol=1e-12, max_iter=10_000, alpha_1=1e-12, alpha_2=1e-12,
                        lambda_1=1e-12, lambda_2=1e-12).fit(X, y)
    assert res.model.alpha == pytest.approx(ref.lambda_, rel=0.02)
    assert res.model.noise_std == pytest.approx(ref.alpha_ ** -0.5, rel=0.01)
    # and the noise level itself is recovered (simulated sd 0.5)
    assert res.model.noise_std == pytest.approx(0.5, rel=0.1)


def test_learned_noise_recovers_the_noise_level():
    hist, X, y, inputs = _linear(seed=3)
    base = ModelConfig(name="sim", inputs=inputs, basis_kind="identity", alpha=1.0,
                       noise_guess=2.0, noise_strength=2.0, forgetting="none", half_life=None,
                       gate=None)
    res = tune.tune(hist, base, burn_in=1)
    assert res.best.noise_std == pytest.approx(0.5, rel=0.1)
    ref = BayesianRidge(tol=1e-12, max_iter=10_000).fit(X, y)
    assert res.best.noise_std == pytest.approx(ref.alpha_ ** -0.5, rel=0.03)


def test_recovers_the_optimal_half_life_of_a_random_walk_level():
    # reference: for a level that moves as a random walk (variance q per lab interval) seen
    # through noise of variance r, the optimal one-step predictor is exponential smoothing
    # (Muth 1960, citation from memory) with the steady-state Kalman gain: the prior variance
    # p solves p = p r / (p + r) + q, so with s = q/r, P = p/r = (s + sqrt(s^2 + 4 s)) / 2
    # and K = P / (P + 1) = (-s + sqrt(s^2 + 4 s)) / 2.
    # Stabilized forgetting of a flat-prior intercept is exponential smoothing with gain
    # 1 - lambda, lambda = 2^(-dt / half-life), so the best half-life is
    # dt ln 2 / -ln(1 - K); the predictive variance sigma^2 (1 + K) must then match the
    # innovation variance r / (1 - K), i.e. sigma = sqrt(r / (1 - K^2)).
    rng = np.random.default_rng(1)
    n, s, r = 2000, 0.01, 16.0
    dt = 4 * _HOUR
    level = 100.0 + np.cumsum(rng.normal(0.0, math.sqrt(s * r), n))
    y = level + rng.normal(0.0, math.sqrt(r), n)
    x = rng.uniform(-1.0, 1.0, (n, 1))  # an input with no effect
    t = 1.767e9 + dt * np.arange(n)
    hist = _history(t, x, y, ["x"])
    k = (-s + math.sqrt(s * s + 4 * s)) / 2
    best_h = dt * math.log(2.0) / -math.log(1.0 - k)
    base = ModelConfig(name="sim", inputs=(InputConfig("x", -1.0, 1.0),), basis_kind="identity",
                       alpha=1.0, noise_std=4.0, forgetting="stabilized", half_life=86400.0,
                       gate=None)
    res = tune.tune(hist, base, burn_in=20, policy="stabilized")
    assert res.model.forgetting == "stabilized"
    # tolerance: a factor 1.3 either way (the score is flat near its maximum: the sampling
    # spread of the estimate over seeds is about 20 % with 2000 lab results)
    assert best_h / 1.3 < res.model.half_life < best_h * 1.3, (res.model.half_life, best_h)
    assert res.model.noise_std == pytest.approx(math.sqrt(r / (1 - k * k)), rel=0.05)


def _small_plant(tmp_path, **kw):
    sc = replace(plant.Scenario.drifting(days=25.0, seed=5), **kw)
    path = tmp_path / "h.csv"
    historian.write_csv(path, plant.simulate(sc))
    return path


def _c301():
    return loads(toml_config({}, [c301_model()])).models[0]


def test_search_is_as_good_as_the_best_point_of_a_full_grid(tmp_path):
    hist = backtest.load_history(_small_plant(tmp_path))
    base = _c301()
    res = tune.tune(hist, base, burn_in=10)
    data = tune.lab_data(hist, base)
    scored = np.arange(data.t.size) >= 10
    grid = itertools.product([1e-5, 1e-4, 1e-3], [5.0, 10.0, 20.0],
                             [86400.0 * d for d in (1, 3, 10, 30)] + [None])
    best = -math.inf
    for a, s, h in grid:
        m = replace(base, alpha=a, noise_guess=s)
        m = replace(m, forgetting="none", half_life=None) if h is None else \
            replace(m, half_life=h)
        best = max(best, tune.prequential(m, data, scored).score)
    assert res.best.score >= best - 1e-3
    # the chosen candidate is evaluated with the values written to the config
    again = tune.prequential(res.model, data, scored)
    assert again.score == res.best.score


def test_lab_blunders_are_left_out_of_the_score_for_every_candidate(tmp_path):
    hist = backtest.load_history(_small_plant(tmp_path, blunders=3))
    res = tune.tune(hist, _c301(), burn_in=10)
    assert res.outliers == 3
    assert res.n_scored == res.n_labs - 10 - 3
    kept = tune.tune(hist, _c301(), burn_in=10, keep_outliers=True)
    assert kept.outliers == 0
    assert kept.best.score < res.best.score - 0.1  # blunders cost dearly in log density


def test_derived_ranges_cover_the_data_with_a_margin():
    rng = np.random.default_rng(0)
    X = np.column_stack([rng.normal(110, 5, 5000), rng.uniform(0.8, 1.6, 5000)])
    t = np.arange(5000.0)
    hist = _history(t, X, np.zeros(5000), ["TI", "PI"])
    inputs = tune.derive_inputs(hist, ["TI", "PI"], dead_times={"PI": 300.0})
    for j, i in enumerate(inputs):
        q = np.quantile(X[:, j], [0.001, 0.999])  # reference: numpy quantiles
        span = q[1] - q[0]
        assert q[0] - 0.1 * span - 0.1 * span <= i.lo <= q[0] - 0.1 * span
        assert q[1] + 0.1 * span <= i.hi <= q[1] + 0.1 * span + 0.1 * span
    assert inputs[1].dead_time == 300.0 and inputs[0].dead_time == 0.0
    assert inputs[1].lo == round(inputs[1].lo, 2)  # two significant digits of the span
    with pytest.raises(ValueError, match="not inputs"):
        tune.derive_inputs(hist, ["TI"], dead_times={"XX": 1.0})


def test_model_block_reads_back_as_the_same_model():
    m = ModelConfig(name="u-1.x", inputs=(InputConfig("A", -1.5, 2.0, 300.0),
                                          InputConfig("B", 0.0, 1e-3)),
                    basis_kind="identity", alpha=3.16e-05, prior_mean=(1.0, 0.25, -2.0),
                    noise_std=0.35, forgetting="exponential", half_life=2.5 * 86400.0,
                    gate=None, level=0.9, keep=6 * _HOUR, tolerance=30.0, cusum_h=4.0,
                    std_limit=12.5, auto_flatten=True)
    block = tune.model_toml(m, ["a comment"])
    assert block.startswith("# a comment\n[[model]]\n")
    assert loads(block).models[0] == m
    m2 = replace(_c301(), noise_guess=9.25, half_life=3 * 86400.0 + 6 * _HOUR)
    assert loads(tune.model_toml(m2)).models[0] == m2
    m3 = replace(m2, forgetting="none", half_life=None)
    assert loads(tune.model_toml(m3)).models[0] == m3


def test_tune_refuses_what_it_cannot_do(tmp_path):
    hist = backtest.load_history(_small_plant(tmp_path))
    with pytest.raises(ValueError, match="kalman"):
        tune.tune(hist, _c301(), policy="kalman")
    with pytest.raises(ValueError, match="lab_delay"):
        tune.tune(hist, _c301(), lab_delay=-1.0)
    with pytest.raises(ValueError, match="linear or higher"):
        tune.tune(hist, replace(_c301(), forgetting="term_drift", half_life=None,
                                linear_drift=1e-9))
    with pytest.raises(ValueError, match="too few"):
        tune.tune(hist, _c301(), burn_in=10_000)
    with pytest.raises(ValueError, match="unknown parameter"):
        tune.tune(hist, _c301(), search=("alpha", "gate"))


def test_tune_command_with_and_without_a_config(tmp_path, capsys):
    path = _small_plant(tmp_path)
    out = tmp_path / "block.toml"
    assert main(["tune", str(path), "--until", "20d", "--unit", "ppm", "--out", str(out),
                 "--top", "4"]) == EXIT_OK
    text = capsys.readouterr().out
    assert "ranges from the data" in text and "<- chosen" in text
    derived = load(out).models[0]
    assert derived.name == "AX-350"
    assert [i.tag for i in derived.inputs] == list(plant.TAGS)
    cfg = tmp_path / "c.toml"
    cfg.write_text(toml_config({}, [c301_model()]))
    out2 = tmp_path / "block2.toml"
    assert main(["tune", str(path), "--config", str(cfg), "--burn-in", "10", "--out",
                 str(out2)]) == EXIT_OK
    tuned = load(out2).models[0]
    assert tuned.inputs == _c301().inputs  # ranges kept from the config
    assert "Tuned by posteriord tune" in out2.read_text()
