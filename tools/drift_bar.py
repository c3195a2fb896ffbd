#!/usr/bin/env python3
"""The drift bar of the simulated plant: tune on the first fortnight, backtest the whole run.

For each preset and seed: simulate the run (`daemon.workbench.plant`), tune the demo model
(`daemon.workbench.tune.tune`) on the lab results drawn in the first ``--train-days`` at the
lab delay, then backtest the tuned model over the whole run through the daemon's message path
(`daemon.workbench.backtest.backtest`), scoring the published predictions of every result
after the training period. Prints one markdown table: the RMSE over the results the gate
accepted, its ratio to the static model with a lab bias update and to the static model, the
coverage of the 95 % interval (and whether it is inside the binomial 99 % band) and what tune
chose.

    PYTHONPATH=. OPENBLAS_NUM_THREADS=1 .venv/bin/python tools/drift_bar.py \
        --preset real_drift --seeds 0-4 --preset stationary --seeds 0-2

``--variant`` runs the tuned model also with a change (``adapt``: adapt_offset with the
bounds tune would write), so a change can be measured against tune's own choice in one run.
The bar (issue 12): on the drifting plant, recursive RMSE at most 0.65 times the bias update's,
coverage inside the band; on the stationary plant, at most 5 % above the static model's.
"""

from __future__ import annotations

import argparse
import math
import sys
import time
from dataclasses import replace

import numpy as np
from scipy import stats

from daemon.config import demo_config
from daemon.workbench import backtest, plant, tune

_DAY = 86400.0


def _seeds(text: str) -> list[int]:
    out: list[int] = []
    for part in text.split(","):
        if "-" in part:
            a, b = part.split("-")
            out.extend(range(int(a), int(b) + 1))
        else:
            out.append(int(part))
    return out


def band(n: int, level: float = 0.95, conf: float = 0.99) -> tuple[float, float]:
    """The binomial ``conf`` band of the coverage of ``n`` results at ``level``."""
    lo = stats.binom.ppf((1 - conf) / 2, n, level) / n
    hi = stats.binom.ppf(1 - (1 - conf) / 2, n, level) / n
    return float(lo), float(hi)


def scenario_of(preset: str, seed: int, days: float | None) -> plant.Scenario:
    make = getattr(plant.Scenario, preset)
    return make(seed=seed) if days is None else make(days=days, seed=seed)


def adapt_variant(m):
    """The tuned model with the offset rate adapted, bounds a factor 100 either side."""
    if m.forgetting not in ("offset", "term_drift") or not m.offset_drift:
        return None
    return replace(m, adapt_offset=True)


VARIANTS = {"adapt": adapt_variant}


def run_one(preset: str, seed: int, *, days: float | None, train_days: float,
            lab_delay: float, variants=()) -> list[dict]:
    sc = scenario_of(preset, seed, days)
    run = plant.simulate(sc)
    hist = backtest.history_from_run(run, f"<{preset} {seed}>")
    start = demo_config().models[0]
    t0 = time.perf_counter()
    res = tune.tune(hist, start, until=float(hist.t[0]) + train_days * _DAY,
                    lab_delay=lab_delay)
    t_tune = time.perf_counter() - t0
    rows = []
    models = [("tuned", res.model)] + [(v, VARIANTS[v](res.model)) for v in variants]
    for label, m in models:
        if m is None:
            continue
        bt = backtest.backtest(hist, m, train=train_days * _DAY, lab_delay=lab_delay)
        ug = bt.scores_ungated
        n = ug["model"].n
        lo, hi = band(n)
        cov = ug["model"].coverage
        rows.append({
            "preset": preset, "seed": seed, "label": label,
            "rmse": ug["model"].rmse, "bias": ug["bias"].rmse, "static": ug["static"].rmse,
            "ratio": bt.ratio_ungated, "ratio_static": ug["model"].rmse / ug["static"].rmse,
            "coverage": cov, "in_band": lo <= cov <= hi, "band": (lo, hi), "n": n,
            "choice": tune._describe_choice(res.best) if label == "tuned"
            else f"{label}: {_model_text(m)}",
            "warnings": len(res.warnings), "tune_s": t_tune})
    return rows


def _model_text(m) -> str:
    def per_h(q):
        return f"{math.sqrt(q * 3600):.3g}"
    out = f"offset drift {per_h(m.offset_drift or 0.0)} per 1h"
    if m.adapt_offset:
        rate = m.adaptation().rate
        out += (f", adapted {per_h(rate.lo)}..{per_h(rate.hi)} per 1h, window "
                f"{m.adapt_window:g}")
    return out


def table(rows: list[dict]) -> str:
    out = ["| plant | seed | model | RMSE ppm | / bias update | / static | coverage | "
           "tune's choice |", "|---|---|---|---|---|---|---|---|"]
    for r in rows:
        cov = f"{100 * r['coverage']:.1f} %" + ("" if r["in_band"] else " (outside)")
        out.append(f"| {r['preset']} | {r['seed']} | {r['label']} | {r['rmse']:.4g} | "
                   f"{r['ratio']:.3f} | {r['ratio_static']:.3f} | {cov} | {r['choice']} |")
    return "\n".join(out)


def verdict(rows: list[dict]) -> list[str]:
    out = []
    for r in rows:
        if r["label"] != "tuned":
            continue
        if r["preset"] == "stationary":
            ok = r["ratio_static"] <= 1.05 and r["in_band"]
            what = f"/ static {r['ratio_static']:.3f} (bar <= 1.05)"
        else:
            ok = r["ratio"] <= 0.65 and r["in_band"]
            what = f"/ bias {r['ratio']:.3f} (bar <= 0.65)"
        out.append(f"{r['preset']} {r['seed']}: {'meets' if ok else 'misses'} the bar: {what}, "
                   f"coverage {100 * r['coverage']:.1f} % in [{100 * r['band'][0]:.1f}, "
                   f"{100 * r['band'][1]:.1f}]")
    return out


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--preset", action="append", choices=("real_drift", "stationary",
                                                          "drifting"))
    ap.add_argument("--seeds", action="append", help="e.g. 0-4 or 0,2 (one per --preset)")
    ap.add_argument("--days", type=float, default=None, help="run length (preset default)")
    ap.add_argument("--train-days", type=float, default=14.0)
    ap.add_argument("--lab-delay-h", type=float, default=2.0)
    ap.add_argument("--variant", action="append", default=[], choices=sorted(VARIANTS))
    args = ap.parse_args(argv)
    presets = args.preset or ["real_drift", "stationary"]
    seeds = args.seeds or ["0-4", "0-2"][:len(presets)]
    if len(seeds) != len(presets):
        ap.error("give one --seeds per --preset")
    rows = []
    for preset, s in zip(presets, seeds, strict=True):
        for seed in _seeds(s):
            got = run_one(preset, seed, days=args.days, train_days=args.train_days,
                          lab_delay=3600.0 * args.lab_delay_h, variants=args.variant)
            for r in got:
                print(f"# {r['preset']} {r['seed']} {r['label']}: RMSE {r['rmse']:.4g} ratio "
                      f"{r['ratio']:.3f} static {r['ratio_static']:.3f} coverage "
                      f"{r['coverage']:.3f} ({r['choice']}; tune {r['tune_s']:.0f} s)",
                      file=sys.stderr, flush=True)
            rows.extend(got)
    print(table(rows))
    print()
    for line in verdict(rows):
        print(line)
    tuned = [r for r in rows if r["label"] == "tuned" and r["preset"] != "stationary"]
    if tuned:
        print(f"\nmean ratio to the bias update (drifting presets): "
              f"{np.mean([r['ratio'] for r in tuned]):.3f}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
