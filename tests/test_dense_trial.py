"""The users' dense-analyzer trial, rehearsed on the invented K-700 column.

Simulated data from a fictitious unit (``plant.DenseScenario``), not plant data: seven
normalized inputs, an analyzer result every 10 minutes known 4 samples after its sample, an
unmeasured offset that walks and that the operators counter with one input, an analyzer
zero drift, blunders. The workflow is the engineer's: the export written as a historian CSV,
``posteriord tune`` on the first half at the analyzer's delay, ``posteriord backtest`` over
the file. What was published for each sample's own time is scored against

- the bias update (the backtest's reference, its factor chosen on the first half);
- persistence (the last known lab value);
- an independent Kalman filter with a random-walk offset and random-walk slopes, written
  with filterpy's ``KalmanFilter`` (predict, update), its rates chosen on the first half by
  the Gaussian log score over a small grid, every prediction from the results known at its
  sample's time (a result arriving with a sample comes after it, as the backtest feeds it).
"""

from __future__ import annotations

import csv
import math

import numpy as np
import pytest

from daemon.cli import main
from daemon.exitcodes import EXIT_OK
from daemon.workbench import historian, plant

filterpy_kalman = pytest.importorskip("filterpy.kalman")

SCENARIO = plant.DenseScenario(seed=0, days=8.0)


def reference_kf(X, y, known, q0, qs, r, gate=5.0):
    """Means and variances of the filterpy Kalman filter described in the module docstring;
    an innovation beyond ``gate`` predictive sds is not learned (a blunder)."""
    k, n = X.shape
    H_all = np.column_stack([np.ones(k), X])
    f = filterpy_kalman.KalmanFilter(dim_x=n + 1, dim_z=1)
    f.x = np.zeros((n + 1, 1))
    f.P = np.eye(n + 1) * 10.0
    f.F = np.eye(n + 1)
    f.Q = np.diag([q0] + [qs] * n)
    f.R = np.array([[r * r]])
    mean, var = np.full(k, np.nan), np.full(k, np.nan)
    learned = 0
    for i in range(k):
        while learned < known[i]:
            f.predict()
            H = H_all[learned][None, :]
            s = (H @ f.P @ H.T).item() + r * r
            if abs(y[learned] - (H @ f.x).item()) <= gate * math.sqrt(s):
                f.update(np.array([[y[learned]]]), H=H)
            learned += 1
        H = H_all[i][None, :]
        mean[i] = (H @ f.x).item()
        # widened for the samples from the last learned result to this one
        var[i] = (H @ (f.P + (i - learned + 1) * f.Q) @ H.T).item() + r * r
    return mean, var


def _read(path):
    with open(path, encoding="utf-8", newline="") as f:
        rows = list(csv.DictReader(line for line in f if not line.startswith("#")))
    return {c: np.array([float(r[c]) if r[c] else math.nan for r in rows])
            for c in ("t", "mean", "std", "lo", "hi", "bias_mean", "persist")}


def _ar1_coverage_band(rho, n, level=0.95, p=0.99, reps=4000, seed=0):
    """The central ``p`` range of the coverage of a calibrated Gaussian predictive whose
    standardized errors follow an AR(1) with lag-one correlation ``rho`` (Monte Carlo): the
    binomial band assumes independent hits, and dense analyzer errors are not."""
    rng = np.random.default_rng(seed)
    e = rng.standard_normal((reps, n))
    z = np.empty_like(e)
    z[:, 0] = e[:, 0]
    c = math.sqrt(1.0 - rho * rho)
    for j in range(1, n):
        z[:, j] = rho * z[:, j - 1] + c * e[:, j]
    q = 1.959963984540054  # scipy.special.ndtri(0.975)
    cov = np.mean(np.abs(z) <= q, axis=1)
    return tuple(np.quantile(cov, [(1 - p) / 2, (1 + p) / 2]))


@pytest.fixture(scope="module")
def trial(tmp_path_factory):
    folder = tmp_path_factory.mktemp("dense")
    run = plant.simulate_dense(SCENARIO)
    data = folder / "k700.csv"
    historian.write_csv(data, run)
    half = f"{SCENARIO.days / 2 * 24:g}h"
    delay = f"{SCENARIO.delay_samples * SCENARIO.period_s / 60:g}m"
    model = folder / "model.toml"
    pred = folder / "pred.csv"
    # the offset policy alone keeps the test short; tools/dense_trial.py compares them all
    assert main(["tune", str(data), "--target", run.target, "--until", half,
                 "--lab-delay", delay, "--policy", "offset", "--out", str(model)]) == EXIT_OK
    assert main(["backtest", str(data), "--config", str(model), "--train", half,
                 "--lab-delay", delay, "--out", str(pred)]) == EXIT_OK
    cols = _read(pred)
    row = {t: i for i, t in enumerate(cols["t"].tolist())}
    idx = np.array([row[t] for t in run.t.tolist()])
    k = run.t.size
    second = np.arange(k) >= k // 2
    first = (np.arange(k) >= 20) & ~second
    known = np.maximum(np.arange(k) - SCENARIO.delay_samples, 0)
    best = None
    for q0 in (4e-4, 1e-3, 2.5e-3):
        for r in (0.03, 0.05):
            m, v = reference_kf(run.X, run.lab_y, known, q0, 1e-7, r)
            e2 = (run.lab_y - m)[first] ** 2
            lp = float(np.mean(-0.5 * (np.minimum(e2 / v[first], 25.0) + np.log(v[first]))))
            if best is None or lp > best[0]:
                best = (lp, m, v)
    return run, cols, idx, second, best[1], best[2], model.read_text()


def _rmse(y, m):
    return float(np.sqrt(np.mean((y - m) ** 2)))


def test_tuned_model_beats_the_bias_update_and_matches_the_reference_filter(trial):
    run, cols, idx, second, kf_mean, _, model_text = trial
    y = run.lab_y[second]
    ours = _rmse(y, cols["mean"][idx][second])
    bias = _rmse(y, cols["bias_mean"][idx][second])
    persist = _rmse(y, cols["persist"][idx][second])
    kf = _rmse(y, kf_mean[second])
    assert "offset_drift" in model_text
    # the bar on real data: the bias update's RMSE times 0.65 or less
    assert ours <= 0.65 * bias, (ours, bias)
    assert ours <= 1.10 * kf, (ours, kf)
    assert ours <= persist, (ours, persist)


def test_published_std_is_finite_and_coverage_is_in_its_band(trial):
    run, cols, idx, second, kf_mean, kf_var, _ = trial
    std = cols["std"][idx][second]
    assert np.isfinite(std).all() and (std > 0).all()
    y = run.lab_y[second]
    inside = (cols["lo"][idx][second] <= y) & (y <= cols["hi"][idx][second])
    cover = float(np.mean(inside))
    z = (y - cols["mean"][idx][second]) / std
    rho = float(np.corrcoef(z[:-1], z[1:])[0, 1])
    lo, hi = _ar1_coverage_band(rho, y.size)
    assert lo <= cover <= hi, (cover, lo, hi, rho)
    # and no further from the nominal 95 % than the reference filter's own intervals
    kf_cover = float(np.mean(np.abs(y - kf_mean[second]) <= 1.959963984540054
                             * np.sqrt(kf_var[second])))
    assert abs(cover - 0.95) <= abs(kf_cover - 0.95) + 0.01, (cover, kf_cover)
