"""The dense-analyzer trial on the invented K-700 column, through the command line.

Simulated data from a fictitious unit (``daemon.workbench.plant.DenseScenario``), not plant
data. For each seed: write the historian export, ``posteriord tune`` on the first half at the
analyzer's delay, ``posteriord backtest`` over the file, ``posteriord report``; then score
what was published against the bias update (its factor chosen on the first half),
persistence, and an independent Kalman filter with a random-walk offset and near-constant
slopes (filterpy's ``KalmanFilter``; its rates chosen on the first half by the same
prequential log score), every prediction made from the results known at its sample's time.

    OPENBLAS_NUM_THREADS=1 .venv/bin/python tools/dense_trial.py --seeds 0 1 2 [--policy offset]
"""

from __future__ import annotations

import argparse
import contextlib
import csv
import io
import math
import os
import sys
import tempfile
import time

import numpy as np

from daemon.cli import main
from daemon.workbench.historian import write_csv
from daemon.workbench.plant import DenseScenario, simulate_dense

try:
    from filterpy.kalman import KalmanFilter
except ImportError:  # pragma: no cover - the tool says so below
    KalmanFilter = None


def reference_kf(X, y, known, q0: float, qs: float, r: float, gate: float = 5.0):
    """Predictions (mean, variance) of a Kalman filter with state ``(offset, slopes)``, a
    random walk of variance ``q0`` per sample on the offset and ``qs`` on each slope, noise
    variance ``r**2``; the prediction for sample ``i`` uses results ``< known[i]`` and is
    widened for the samples elapsed since the last of them; innovations beyond ``gate``
    predictive sds are not learned (a blunder)."""
    k, n = X.shape
    H_all = np.column_stack([np.ones(k), X])
    f = KalmanFilter(dim_x=n + 1, dim_z=1)
    f.x = np.zeros((n + 1, 1))
    f.P = np.eye(n + 1) * 10.0
    f.F = np.eye(n + 1)
    f.Q = np.diag([q0] + [qs] * n)
    f.R = np.array([[r * r]])
    mean = np.full(k, np.nan)
    var = np.full(k, np.nan)
    learned = 0
    for i in range(k):
        while learned < known[i]:
            f.predict()
            H = H_all[learned][None, :]
            s = (H @ f.P @ H.T).item() + r * r
            if abs(y[learned] - (H @ f.x).item()) <= gate * math.sqrt(s):
                f.update(np.array([[y[learned]]]), H=H)
            learned += 1
        steps = i - learned + 1
        H = H_all[i][None, :]
        mean[i] = (H @ f.x).item()
        var[i] = (H @ (f.P + steps * f.Q) @ H.T).item() + r * r
    return mean, var


def choose_kf(X, y, known, train, grid_q0, grid_qs, grid_r):
    """The rates of `reference_kf` with the best mean Gaussian log density on ``train``."""
    best = None
    for q0 in grid_q0:
        for qs in grid_qs:
            for r in grid_r:
                m, v = reference_kf(X, y, known, q0, qs, r)
                e2 = (y - m)[train] ** 2
                vv = v[train]
                # a blunder would decide alone; its density is capped at 5 sd
                lp = float(np.mean(-0.5 * (np.minimum(e2 / vv, 25.0) + np.log(2 * np.pi * vv))))
                if best is None or lp > best[0]:
                    best = (lp, q0, qs, r)
    return best


def read_columns(path) -> dict:
    """The predictions file as float columns, read with the csv module (empty cells nan)."""
    with open(path, encoding="utf-8", newline="") as f:
        rows = list(csv.DictReader(line for line in f if not line.startswith("#")))
    return {c: np.array([float(r[c]) if r[c] else math.nan for r in rows])
            for c in ("t", "mean", "std", "lab", "bias_mean", "bias_std", "persist",
                      "persist_std")}


def _cli(args: list[str]) -> str:
    out = io.StringIO()
    with contextlib.redirect_stdout(out), contextlib.redirect_stderr(out):
        code = main(args)
    if code != 0:
        raise RuntimeError(f"posteriord {' '.join(args)} exited {code}:\n{out.getvalue()}")
    return out.getvalue()


def trial(seed: int, days: float, folder: str, policy: str | None = None) -> dict:
    sc = DenseScenario(seed=seed, days=days)
    run = simulate_dense(sc)
    data = os.path.join(folder, f"k700-{seed}.csv")
    write_csv(data, run)
    half = f"{days / 2 * 24:g}h"
    delay = f"{sc.delay_samples * sc.period_s / 60:g}m"
    model = os.path.join(folder, f"model-{seed}.toml")
    pred = os.path.join(folder, f"pred-{seed}.csv")
    t0 = time.perf_counter()
    _cli(["tune", data, "--target", run.target, "--until", half, "--lab-delay", delay,
          "--out", model] + (["--policy", policy] if policy else []))
    t_tune = time.perf_counter() - t0
    summary = _cli(["backtest", data, "--config", model, "--train", half, "--lab-delay", delay,
                    "--out", pred])
    _cli(["report", pred, "--out", os.path.join(folder, f"report-{seed}.png")])
    cols = read_columns(pred)
    row = {t: i for i, t in enumerate(cols["t"].tolist())}
    idx = np.array([row[float(t)] for t in run.t.tolist()])
    k = run.t.size
    y = run.lab_y
    second = np.arange(k) >= k // 2
    first = (np.arange(k) >= 20) & ~second
    # the backtest's feed: a result arriving with a sample comes after it
    known = np.maximum(np.arange(k) - sc.delay_samples, 0)
    out = {"seed": seed, "tune_s": t_tune}
    for name, m_col, s_col in (("posteriord", "mean", "std"), ("bias", "bias_mean", "bias_std"),
                               ("persist", "persist", "persist_std")):
        mean, std = cols[m_col][idx], cols[s_col][idx]
        e = (y - mean)[second]
        out[name] = (float(np.sqrt(np.mean(e ** 2))),
                     float(np.mean(np.abs(e) <= 1.96 * std[second])))
    if KalmanFilter is not None:
        lp, q0, qs, r = choose_kf(run.X, y, known, first, (2.5e-4, 6e-4, 1e-3, 2.5e-3),
                                  (0.0, 1e-7, 1e-6), (0.02, 0.03, 0.04, 0.05))
        m, v = reference_kf(run.X, y, known, q0, qs, r)
        e = (y - m)[second]
        out["kf"] = (float(np.sqrt(np.mean(e ** 2))),
                     float(np.mean(np.abs(e) <= 1.96 * np.sqrt(v[second]))))
        out["kf_rates"] = (q0, qs, r)
    out["summary"] = summary
    return out


def main_(argv=None) -> int:
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--seeds", type=int, nargs="+", default=[0])
    p.add_argument("--days", type=float, default=12.0)
    p.add_argument("--policy", default=None)
    p.add_argument("--keep", default=None, help="folder for the files (default: temporary)")
    p.add_argument("-v", "--verbose", action="store_true", help="print each backtest summary")
    a = p.parse_args(argv)
    if KalmanFilter is None:
        print("filterpy is not installed: no Kalman filter reference", file=sys.stderr)
    with tempfile.TemporaryDirectory() as tmp:
        folder = a.keep or tmp
        os.makedirs(folder, exist_ok=True)
        print("simulated data from a fictitious unit, not plant data")
        print(f"{'seed':>4} {'posteriord':>16} {'bias update':>16} {'persistence':>16} "
              f"{'reference KF':>16} {'/bias':>6} {'/KF':>6} {'/pers':>6} {'tune s':>7}")
        for seed in a.seeds:
            r = trial(seed, a.days, folder, a.policy)
            if a.verbose:
                print(r["summary"])

            def cell(key, r=r):
                v = r.get(key)
                return f"{v[0]:.4f} {100 * v[1]:5.1f}%" if v else f"{'-':>16}"

            kf = r.get("kf", (math.nan,))[0]
            print(f"{seed:>4} {cell('posteriord'):>16} {cell('bias'):>16} {cell('persist'):>16} "
                  f"{cell('kf'):>16} {r['posteriord'][0] / r['bias'][0]:6.3f} "
                  f"{r['posteriord'][0] / kf:6.3f} {r['posteriord'][0] / r['persist'][0]:6.3f} "
                  f"{r['tune_s']:7.1f}", flush=True)
    return 0


if __name__ == "__main__":
    sys.exit(main_())
