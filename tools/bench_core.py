#!/usr/bin/env python3
"""Benchmark of the numerical core against baselines measured in the same run.

For n = 4, 8, 16, 32 features it prints microseconds per update (random walk, stabilized,
and per-term drift with one drifting term first or last in the basis or all terms
drifting), per single prediction and per prediction in batches of 256, next to (a)
filterpy's KalmanFilter.predict() + update() doing the same random-walk update and (b) a
plain numpy covariance-form RLS loop, and the ratios. Each figure is the best of several
repeats, because shared machines are noisy; the ratios are what to compare between runs.

    .venv/bin/python tools/bench_core.py [--quick]
"""

from __future__ import annotations

import argparse
import time

import numpy as np


def best_of(fn, repeats, number):
    best = float("inf")
    for _ in range(repeats):
        t0 = time.perf_counter()
        fn(number)
        best = min(best, (time.perf_counter() - t0) / number)
    return best * 1e6


def bench(n, number, repeats):
    from filterpy.kalman import KalmanFilter

    from recursive import Posterior, RandomWalk, Stabilized, TermDrift

    rng = np.random.default_rng(n)
    X = rng.normal(size=(1024, n))
    y = X @ rng.normal(size=n) + 0.1 * rng.normal(size=1024)
    q, sigma = 1e-6, 0.1

    def ours(policy):
        post = Posterior(n, alpha=1.0, noise_std=sigma, forgetting=policy)
        state = {"t": 0.0}

        def run(k):
            t = state["t"]
            for i in range(k):
                t += 1.0
                post.update(X[i & 1023], y[i & 1023], t)
            state["t"] = t
        return run, post

    run_rw, post = ours(RandomWalk(q))
    run_stab, _ = ours(Stabilized(500.0))
    # one drifting term first in the basis (an offset there costs a row scaling), last
    # (the most rotations), and every term drifting (the same update as RandomWalk)
    run_td0, _ = ours(TermDrift([q] + [0.0] * (n - 1)))
    run_tdl, _ = ours(TermDrift([0.0] * (n - 1) + [q]))
    run_tda, _ = ours(TermDrift([q] * n))
    for run in (run_stab, run_td0, run_tdl, run_tda):
        run(200)

    kf = KalmanFilter(dim_x=n, dim_z=1)
    kf.F = np.eye(n)
    kf.Q = q * np.eye(n)
    kf.R = np.array([[sigma**2]])
    H = [X[i][None, :] for i in range(1024)]

    def run_kf(k):
        for i in range(k):
            kf.predict()
            kf.update(y[i & 1023], H=H[i & 1023])

    P = np.eye(n)
    w = np.zeros(n)
    lam = 0.999

    def run_rls(k):
        nonlocal P, w
        for i in range(k):
            phi = X[i & 1023]
            Pphi = P @ phi
            gain = Pphi / (lam + phi @ Pphi)
            w = w + gain * (y[i & 1023] - phi @ w)
            P = (P - np.outer(gain, Pphi)) / lam

    run_rw(200)  # identified, caches warm
    batch = X[:256]

    def run_single(k):
        for i in range(k):
            post.predict(X[i & 1023], t=1e9)

    def run_batch(k):
        for _ in range(k):
            post.predict(batch, t=1e9)

    u_rw = best_of(run_rw, repeats, number)
    u_stab = best_of(run_stab, repeats, number)
    u_td = tuple(best_of(r, repeats, number) for r in (run_td0, run_tdl, run_tda))
    u_kf = best_of(run_kf, repeats, number)
    u_rls = best_of(run_rls, repeats, number)
    p1 = best_of(run_single, repeats, number)
    pb = best_of(run_batch, repeats, max(10, number // 50)) / 256
    return u_rw, u_stab, u_td, u_kf, u_rls, p1, pb


def main():
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--quick", action="store_true", help="fewer iterations")
    args = ap.parse_args()
    number, repeats = (300, 3) if args.quick else (3000, 5)
    try:
        from recursive import _kernel  # noqa: F401
        kernel = "C kernel"
    except ImportError:
        kernel = "pure numpy fallback"
    print(f"posteriord core benchmark ({kernel}); microseconds, best of {repeats}")
    head = ("n", "upd RW", "upd stab", "drift 1st", "drift last", "drift all", "drift/RW",
            "filterpy", "np RLS", "kf/ours", "pred 1", "pred/256", "1/batch")
    print("| " + " | ".join(head) + " |")
    print("|" + "---|" * len(head))
    for n in (4, 8, 16, 32):
        u_rw, u_stab, u_td, u_kf, u_rls, p1, pb = bench(n, number, repeats)
        row = (f"{n}", f"{u_rw:.1f}", f"{u_stab:.1f}", *(f"{u:.1f}" for u in u_td),
               f"{max(u_td) / u_rw:.2f}x", f"{u_kf:.1f}", f"{u_rls:.1f}",
               f"{u_kf / u_rw:.2f}x", f"{p1:.1f}", f"{pb:.3f}", f"{p1 / pb:.0f}x")
        print("| " + " | ".join(row) + " |")
    print("upd RW: random-walk update (the same update filterpy does); upd stab: stabilized "
          "forgetting; drift 1st/last/all: TermDrift with one drifting term first or last, or "
          "all drifting; drift/RW: the slowest of the three / upd RW (target <= 2); "
          "kf/ours: filterpy time / ours (target >= 2); 1/batch: single "
          "prediction cost / batched cost per vector (target >= 50).")


if __name__ == "__main__":
    main()
