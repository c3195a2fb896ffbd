"""Unit tests of daemon.runtime.monitor: the detectors wired to one model, reasons, levels, events.

The monitor is fed hand-built :class:`recursive.Step` outcomes (whose ``y`` is made consistent
with ``z`` through ``scipy.stats``) and a small stand-in posterior, so every number it acts on
is known. Each reason is checked against an independent computation: Page's tabular CUSUM
recursion (Page 1954), the Gaussian log-likelihood ratio from ``scipy.stats.norm``, interval
coverage from ``scipy.stats.t.interval``, Mahalanobis distances from ``scipy.spatial`` and
``numpy.cov(aweights=...)``, the weighted geometric mean from ``scipy.stats.gmean``. The
level of every reason is read from the table in the module docstring, so the documentation
and the behaviour are checked against each other.
"""

from __future__ import annotations

import math
import re

import msgpack
import numpy as np
import pytest
from conftest import c301_model, toml_config
from scipy import integrate, stats
from scipy.spatial.distance import mahalanobis

from daemon.config import loads
from daemon.runtime import monitor as monitor_mod
from daemon.runtime.monitor import REASONS, STATES, Monitor
from daemon.workbench import plant
from recursive import Step

LO = np.array([plant.RANGES[t][0] for t in plant.TAGS])
HI = np.array([plant.RANGES[t][1] for t in plant.TAGS])
MID = (LO + HI) / 2.0


# ---------------------------------------------------------------------------------- helpers
def doc_levels() -> dict[str, str]:
    """Reason -> level name, read from the table in daemon.runtime.monitor's docstring."""
    out = {}
    for line in monitor_mod.__doc__.splitlines():
        m = re.match(r"^``(\w+)``\s+(\d)\s", line)
        if m:
            out[m.group(1)] = STATES[int(m.group(2))]
    return out


LEVEL = doc_levels()


def model_cfg(alerts: dict | None = None, **tables):
    """The C-301 model config of the daemon tests with an ``[model.alerts]`` table."""
    m = c301_model(**tables)
    if alerts:
        m["alerts"] = alerts
    return loads(toml_config({"metrics": ""}, [m]), "<test>").models[0]


def make(alerts: dict | None = None, **tables) -> Monitor:
    cfg = model_cfg(alerts, **tables)
    return Monitor(cfg, cfg.build_basis())


def lab(z: float, *, mean: float = 150.0, scale: float = 10.0, dof: float = math.inf,
        accepted: bool = True, reject_run: int = 0) -> Step:
    """A Step whose y has the standardized residual z under a (t) predictive."""
    if math.isinf(dof):
        r, std = z, scale
    else:
        # the same CDF value under the t predictive (scipy's t and normal as the reference)
        r = float(stats.t.ppf(stats.norm.cdf(z), dof))
        std = scale * math.sqrt(dof / (dof - 2.0)) if dof > 2 else math.inf
    y = mean + r * scale
    return Step(None, y, mean, scale, std, dof, y - mean, z, math.nan, accepted,
                "ok" if accepted else "gated", reject_run, 0)


class FakePosterior:
    """What the monitor reads of a posterior: mean, square-root factor and noise variance
    (as recursive.Posterior gives them: ``scale_matrix = noise_var (R^T R)^{-1}``),
    flatten()."""

    def __init__(self, n: int = 3):
        self.mean = np.zeros(n)
        self.scale_matrix = np.eye(n)
        self.flattened: list[float] = []

    identified = True
    noise_var = 1.0

    @property
    def sqrt_information(self) -> np.ndarray:
        # R upper triangular with R^T R = inverse of the scale matrix (numpy Cholesky)
        return np.linalg.cholesky(np.linalg.inv(self.scale_matrix)).T

    def flatten(self, keep: float) -> None:
        self.flattened.append(keep)


def rows(k: int, rng, spread: float = 0.2) -> np.ndarray:
    """k input rows around the middle of the instrument ranges."""
    return MID + (HI - LO) / 2.0 * spread * rng.standard_normal((k, len(MID)))


def quiet_batch(mon: Monitor, clock: float, last_lab_t: float | None, x=None) -> list[dict]:
    """A prediction batch that raises nothing on its own (small std and leverage)."""
    X = np.atleast_2d(MID if x is None else x)
    k = X.shape[0]
    return mon.on_predictions(clock, X, np.full(k, 10.0), np.full(k, 0.01), last_lab_t)


def page_cusum(z, k: float, h: float) -> list[tuple[int, float, float]]:
    """Page's two-sided tabular CUSUM, restarted at 0 after each signal.

    Returns (sign, upper, lower) per step, sign 0 without a signal (Montgomery's form:
    C+_i = max(0, z_i - k + C+_{i-1}), C-_i = max(0, -z_i - k + C-_{i-1}), signal when > h).
    """
    up = lo = 0.0
    out = []
    for v in z:
        up = max(0.0, v - k + up)
        lo = max(0.0, -v - k + lo)
        sign = 1 if up > h else -1 if lo > h else 0
        out.append((sign, up, lo))
        if sign:
            up = lo = 0.0
    return out


def held_after_signal(signals: list[bool], hold: int) -> list[bool]:
    """Active at lab i when a signal came at one of the last ``hold`` labs (i included)."""
    return [any(signals[j] for j in range(max(0, i - hold + 1), i + 1))
            for i in range(len(signals))]


# ---------------------------------------------------------------------------------- table
def test_reason_table_documents_every_reason():
    assert set(LEVEL) == set(REASONS)
    assert STATES == ("normal", "caution", "untrusted")
    assert LEVEL["mean_shift"] == "untrusted" and LEVEL["uncertainty"] == "untrusted"


def test_fresh_monitor_is_normal_without_reasons():
    mon = make()
    assert mon.state == "normal"
    assert mon.reasons() == []
    v = mon.view()
    assert v["state"] == "normal" and v["calibration"]["count"] == 0
    assert math.isnan(v["std"]["baseline"])


# ---------------------------------------------------------------------------------- lab reasons
def test_mean_shift_follows_page_recursion_and_hold():
    rng = np.random.default_rng(11)
    z = np.concatenate([rng.standard_normal(40), 1.5 + rng.standard_normal(40),
                        rng.standard_normal(30), -2.0 + rng.standard_normal(20)])
    k, h, hold = 0.5, 5.0, 4
    mon = make({"cusum_k": k, "cusum_h": h, "hold": hold, "leverage_limit": 0,
                "region_limit": 0, "std_ratio": 0})
    post = FakePosterior()
    ref = page_cusum(z, k, h)
    active, events = [], []
    for i, v in enumerate(z.tolist()):
        ev = mon.on_lab(1000.0 + i, lab(v), MID, post)
        events += ev
        active.append("mean_shift" in mon.lab_active)
        if ref[i][0]:
            lvl, value, limit = mon.lab_active["mean_shift"]
            assert STATES[lvl] == LEVEL["mean_shift"]
            assert value == pytest.approx(max(ref[i][1], ref[i][2]), rel=1e-12)
            assert limit == h
    signals = [s != 0 for s, _, _ in ref]
    assert sum(signals) >= 3, "the stream must contain several signals of both signs"
    assert {s for s, _, _ in ref if s} == {1, -1}
    assert active == held_after_signal(signals, hold)
    # the first signal turns the model untrusted, with mean_shift as the reason
    first = next(e for e in events if e["kind"] == "state")
    assert first["new"] == "untrusted" and first["old"] == "normal"
    assert [r["name"] for r in first["reasons"]] == ["mean_shift"]
    assert first["reasons"][0]["level"] == "untrusted"
    assert first["t"] == 1000.0 + signals.index(True)
    # the statistics in the view are the running sums of the reference
    assert mon.view()["cusum"]["upper"] == pytest.approx(ref[-1][1] if not ref[-1][0] else 0.0)
    assert mon.view()["cusum"]["lower"] == pytest.approx(ref[-1][2] if not ref[-1][0] else 0.0)
    assert post.flattened == []  # auto_flatten is off by default


def test_auto_flatten_flattens_once_per_signal_and_says_so():
    rng = np.random.default_rng(5)
    z = np.concatenate([rng.standard_normal(20), 3.0 + rng.standard_normal(6)])
    mon = make({"auto_flatten": True, "flatten_keep": 0.3})
    post = FakePosterior()
    ref = page_cusum(z, 0.5, 5.0)
    actions = []
    for i, v in enumerate(z.tolist()):
        actions += [e for e in mon.on_lab(float(i), lab(v), MID, post) if e["kind"] == "action"]
    n_signals = sum(1 for s, _, _ in ref if s)
    assert n_signals >= 1
    assert post.flattened == [0.3] * n_signals
    assert len(actions) == n_signals
    assert actions[0] | {"t": 0} == {"t": 0, "kind": "action", "action": "flatten", "keep": 0.3,
                                     "reason": "mean_shift", "direction": 1}


def test_spread_reason_follows_the_normal_likelihood_ratio():
    rng = np.random.default_rng(3)
    z = np.concatenate([rng.standard_normal(50), 2.0 * rng.standard_normal(60),
                        rng.standard_normal(20)])
    sigma1, h, hold = 1.5, 5.0, 3
    mon = make({"spread_sigma": sigma1, "spread_h": h, "hold": hold, "cusum_h": 50.0})
    post = FakePosterior()
    # log N(z; 0, sigma1^2) - log N(z; 0, 1), from scipy
    llr = stats.norm.logpdf(z, scale=sigma1) - stats.norm.logpdf(z)
    s, signals, active = 0.0, [], []
    for i, v in enumerate(z.tolist()):
        s = max(0.0, s + llr[i])
        signals.append(s > h)
        if s > h:
            s = 0.0
        mon.on_lab(float(i), lab(v), MID, post)
        active.append("spread" in mon.lab_active)
        assert mon.view()["spread"]["statistic"] == pytest.approx(s, abs=1e-9)
    assert sum(signals) >= 2
    assert active == held_after_signal(signals, hold)
    assert "mean_shift" not in mon.lab_active
    names = {r["name"]: r["level"] for r in mon.reasons()}
    assert names.get("spread", LEVEL["spread"]) == LEVEL["spread"]


def test_miscalibrated_uses_weighted_coverage_of_the_t_interval():
    rng = np.random.default_rng(8)
    dof, level, half_life, cmin = 6.0, 0.9, 8.0, 0.8
    # well calibrated, then residuals three times too wide
    z = np.concatenate([rng.standard_normal(30), 3.0 * rng.standard_normal(30)])
    mon = make({"calibration_half_life": half_life, "coverage_min": cmin, "cusum_h": 1e6,
                "spread_h": 1e6}, level=level)
    post = FakePosterior()
    w = 2.0 ** (-1.0 / half_life)
    covered, active, expected = [], [], []
    for i, v in enumerate(z.tolist()):
        st = lab(float(v), dof=dof)
        lo, hi = stats.t.interval(level, dof, loc=st.mean, scale=st.scale)
        covered.append(lo <= st.y <= hi)
        n = len(covered)
        weights = w ** np.arange(n - 1, -1, -1)
        cov = float(np.dot(weights, covered) / weights.sum())
        mon.on_lab(float(i), st, MID, post)
        active.append("miscalibrated" in mon.lab_active)
        # judged only from the 20th lab result on (documented in docs/settings.md)
        expected.append(n >= 20 and cov < cmin)
        assert mon.view()["calibration"]["coverage"] == pytest.approx(cov, rel=1e-12)
    assert active == expected
    assert any(expected) and not all(expected)
    lvl, value, limit = mon.lab_active["miscalibrated"]
    assert STATES[lvl] == LEVEL["miscalibrated"] and limit == cmin and value < cmin


def test_calibration_scores_match_scipy():
    # log score: -log density of scipy's t; CRPS: its defining integral by quadrature
    mon = make({"calibration_half_life": 1e9})
    post = FakePosterior()
    st = lab(1.3, mean=200.0, scale=7.0, dof=5.0)
    mon.on_lab(0.0, st, MID, post)
    v = mon.view()["calibration"]
    dist = stats.t(5.0, loc=200.0, scale=7.0)
    assert v["log_score"] == pytest.approx(-dist.logpdf(st.y), rel=1e-10)
    crps = (integrate.quad(lambda x: dist.cdf(x) ** 2, -np.inf, st.y)[0]
            + integrate.quad(lambda x: dist.sf(x) ** 2, st.y, np.inf)[0])
    assert v["crps"] == pytest.approx(crps, rel=1e-6)


def test_rejections_need_two_same_sign_gate_rejections():
    mon = make()
    post = FakePosterior()
    runs = [0, 1, 2, 3, -1, -2, 0, 1]
    active = []
    for i, run in enumerate(runs):
        mon.on_lab(float(i), lab(5.0 if run > 0 else -5.0 if run < 0 else 0.1,
                                 accepted=abs(run) == 0, reject_run=run), MID, post)
        active.append(mon.lab_active.get("rejections"))
    assert [a is not None for a in active] == [abs(r) >= 2 for r in runs]
    assert active[3] == (1, 3.0, 2.0) and STATES[active[3][0]] == LEVEL["rejections"]
    # gated results do not reach the residual detectors
    assert mon.calibration.count == 2


def test_param_drift_is_the_mahalanobis_distance_in_the_reference_metric():
    rng = np.random.default_rng(21)
    n, limit = 3, 2.5
    mon = make({"drift_window": "1d", "drift_limit": limit})
    post = FakePosterior(n)
    a = rng.standard_normal((n, n))
    ref_cov = a @ a.T + n * np.eye(n)
    post.scale_matrix = ref_cov.copy()
    mon.on_lab(0.0, lab(0.0), MID, post)  # installs the reference
    ref_mean = post.mean.copy()
    direction = rng.standard_normal(n)
    # unit length in the reference metric: the distances run from 0.4 to 4 across the limit
    direction *= 2.0 / mahalanobis(direction, np.zeros(n), np.linalg.inv(ref_cov))
    for i, step in enumerate(np.linspace(0.2, 2.0, 10)):
        post.mean = ref_mean + step * direction
        cov = ref_cov * (1.0 + 0.1 * step)
        post.scale_matrix = cov
        mon.on_lab(3600.0 * (i + 1), lab(0.0), MID, post)
        d = mahalanobis(post.mean, ref_mean, np.linalg.inv(ref_cov))
        assert mon.last["drift"] == pytest.approx(d, rel=1e-10)
        # KL(current || reference) of two Gaussians, the textbook closed form
        inv = np.linalg.inv(ref_cov)
        kl = 0.5 * (np.trace(inv @ cov) + d * d - n
                    + np.log(np.linalg.det(ref_cov) / np.linalg.det(cov)))
        assert mon.kl == pytest.approx(kl, rel=1e-9, abs=1e-12)
        assert mon.view()["param_drift"]["kl"] == mon.kl
        assert ("param_drift" in mon.lab_active) == (d > limit)
    assert mon.lab_active["param_drift"][0] == STATES.index(LEVEL["param_drift"])
    assert mon.view()["param_drift"]["mahalanobis"] == mon.last["drift"]


# ---------------------------------------------------------------------------------- predictions
def test_std_ratio_against_weighted_geometric_mean():
    rng = np.random.default_rng(2)
    half_life, ratio = 4.0, 1.8
    mon = make({"std_half_life": half_life, "std_ratio": ratio, "leverage_limit": 0,
                "region_limit": 0})
    post = FakePosterior()
    stds = 8.0 + 2.0 * rng.random(12)
    for i, s in enumerate(stds.tolist()):
        mon.on_lab(float(i), lab(0.0, scale=s), MID, post)
    w = 2.0 ** (-1.0 / half_life)
    baseline = stats.gmean(stds, weights=w ** np.arange(len(stds) - 1, -1, -1))
    assert mon.view()["std"]["baseline"] == pytest.approx(baseline, rel=1e-12)
    for s_last, expect in ((baseline * ratio * 0.99, False), (baseline * ratio * 1.01, True)):
        X = np.vstack([MID, MID])
        # only the last row of the batch counts (it is the model's current spread)
        mon.on_predictions(100.0, X, np.array([1e3, s_last]), np.zeros(2), 99.0)
        assert mon.last["std_ratio"] == pytest.approx(s_last / baseline, rel=1e-12)
        assert ("uncertainty_ratio" in mon.pred_active) == expect
    lvl, value, limit = mon.pred_active["uncertainty_ratio"]
    assert STATES[lvl] == LEVEL["uncertainty_ratio"] and limit == ratio
    # learning from predictions would move the baseline; only lab-time stds define it
    assert mon.view()["std"]["baseline"] == pytest.approx(baseline, rel=1e-12)


def test_infinite_std_is_above_the_ratio_limit():
    # a t predictive with dof <= 2 has an infinite std: a model that has forgotten nearly
    # everything must be flagged, not skipped (seen at the end of a long lab outage)
    mon = make({"std_ratio": 3.0, "leverage_limit": 0, "region_limit": 0})
    mon.on_predictions(1.0, np.vstack([MID]), np.array([math.inf]), np.zeros(1), 0.0)
    assert mon.pred_active == {}  # no baseline yet: nothing to compare with
    mon.on_lab(2.0, lab(0.0, scale=9.0), MID, FakePosterior())
    mon.on_predictions(3.0, np.vstack([MID]), np.array([math.inf]), np.zeros(1), 2.0)
    assert mon.pred_active == {"uncertainty_ratio": (1, math.inf, 3.0)}
    assert mon.view()["std"]["ratio"] == math.inf


def test_absolute_std_limit_makes_the_model_untrusted():
    mon = make({"std_limit": 25.0})
    ev = mon.on_predictions(10.0, np.vstack([MID]), np.array([25.5]), np.zeros(1), 9.0)
    assert ev[0]["new"] == "untrusted"
    assert ev[0]["reasons"] == [{"name": "uncertainty", "level": LEVEL["uncertainty"],
                                 "value": 25.5, "limit": 25.0}]
    # an infinite std (t predictive with dof <= 2) is above any limit
    mon2 = make({"std_limit": 25.0})
    mon2.on_predictions(10.0, np.vstack([MID]), np.array([math.inf]), np.zeros(1), 9.0)
    assert "uncertainty" in mon2.pred_active
    # a model that cannot predict yet (nan) is not flagged for its spread
    mon3 = make({"std_limit": 25.0})
    mon3.on_predictions(10.0, np.vstack([MID]), np.array([math.nan]), np.zeros(1), None)
    assert mon3.pred_active == {}


def test_extrapolation_and_out_of_range_per_batch():
    mon = make({"leverage_limit": 0.5, "region_limit": 0})
    X = np.vstack([MID, MID, MID])
    X[1, 0] = HI[0]  # at the end of the range: still in range (closed interval)
    X[2, 3] = LO[3] - 0.01
    mon.on_predictions(5.0, X, np.full(3, 9.0), np.array([0.1, 0.6, 0.2]), 4.0)
    assert mon.pred_active["extrapolation"] == (1, 0.6, 0.5)
    outside = int(np.count_nonzero(((X < LO) | (X > HI)).any(axis=1)))
    assert outside == 1
    assert mon.pred_active["out_of_range"] == (1, float(outside), 0.0)
    assert STATES[mon.pred_active["extrapolation"][0]] == LEVEL["extrapolation"]
    assert STATES[mon.pred_active["out_of_range"][0]] == LEVEL["out_of_range"]
    mon.on_predictions(6.0, np.vstack([MID]), np.full(1, 9.0), np.array([0.5]), 4.0)
    assert mon.pred_active == {}  # at the limit is not above it; the batch replaces the last


def test_outside_region_against_numpy_weighted_covariance():
    rng = np.random.default_rng(4)
    half_life, limit = 30.0, 3.0
    mon = make({"region_half_life": half_life, "region_limit": limit, "leverage_limit": 0})
    post = FakePosterior()
    learned = rows(60, rng)
    for i, x in enumerate(learned):
        # gated results are not part of the learned region
        mon.on_lab(float(i), lab(0.0), x, post)
        mon.on_lab(float(i), lab(9.0, accepted=False, reject_run=1), x + 50.0, post)
    w = 2.0 ** (-np.arange(len(learned) - 1, -1, -1) / half_life)
    mean = np.average(learned, axis=0, weights=w)
    cov = np.cov(learned.T, aweights=w)
    X = np.vstack([mean, mean + 0.5 * (HI - LO) * np.array([0.3, -0.2, 0.4, 0.1])])
    mon.on_predictions(100.0, X, np.full(2, 9.0), np.zeros(2), 99.0)
    d = max(mahalanobis(x, mean, np.linalg.inv(cov)) for x in X)
    assert mon.last["region"] == pytest.approx(d, rel=1e-5)
    assert ("outside_region" in mon.pred_active) == (d > limit)
    assert d > limit
    assert mon.pred_active["outside_region"][0] == STATES.index(LEVEL["outside_region"])


def test_region_is_not_judged_before_enough_lab_results():
    mon = make({"region_limit": 1.0, "leverage_limit": 0})
    post = FakePosterior()
    rng = np.random.default_rng(1)
    for i, x in enumerate(rows(4, rng)):  # 4 inputs: needs more than 4 learned rows
        mon.on_lab(float(i), lab(0.0), x, post)
    mon.on_predictions(10.0, np.vstack([HI]), np.full(1, 9.0), np.zeros(1), 9.0)
    assert "outside_region" not in mon.pred_active


def test_stale_after_the_configured_time():
    mon = make({"leverage_limit": 0, "region_limit": 0})
    stale_after = mon.cfg.stale_after
    assert stale_after == 12 * 3600.0
    quiet_batch(mon, 1000.0 + stale_after, 1000.0)
    assert "stale" not in mon.pred_active  # exactly at the limit is not stale
    ev = quiet_batch(mon, 1000.0 + stale_after + 60.0, 1000.0)
    assert mon.pred_active["stale"] == (1, stale_after + 60.0, stale_after)
    assert ev[0]["new"] == LEVEL["stale"]
    quiet_batch(mon, 1000.0 + stale_after + 120.0, None)  # never learned: no age to judge
    assert "stale" not in mon.pred_active


# ---------------------------------------------------------------------------------- trust
def test_reasons_clear_after_count_and_time_with_hysteresis():
    # docs/settings.md: a reason clears after clear_count evaluations without it *and*
    # clear_time since the first of them; any return restarts the countdown
    mon = make({"leverage_limit": 0.5, "region_limit": 0, "clear_count": 3,
                "clear_time": "10m"})
    post = FakePosterior()
    states = []

    def batch(t, lev):
        mon.on_predictions(t, np.vstack([MID]), np.full(1, 9.0), np.array([lev]), t)
        states.append((t, mon.state))

    batch(0.0, 0.9)                  # raised at once
    batch(60.0, 0.1)                 # absent 1 (t_first = 60)
    batch(120.0, 0.1)                # absent 2
    batch(180.0, 0.9)                # back: countdown restarts
    batch(240.0, 0.1)                # absent 1 (t_first = 240)
    mon.on_lab(300.0, lab(0.0), MID, post)  # a lab result is an evaluation too: absent 2
    states.append((300.0, mon.state))
    batch(360.0, 0.1)                # absent 3 but only 120 s
    batch(840.0, 0.1)                # absent 4, 600 s since t_first: clears
    assert [s for _, s in states] == ["caution"] * 7 + ["normal"]


def test_state_events_and_acknowledge():
    mon = make({"leverage_limit": 0.5, "region_limit": 0, "std_limit": 30.0})
    ev = mon.on_predictions(10.0, np.vstack([MID]), np.array([9.0]), np.array([0.7]), 9.0)
    assert ev == [{"t": 10.0, "kind": "state", "old": "normal", "new": "caution",
                   "reasons": [{"name": "extrapolation", "level": "caution", "value": 0.7,
                                "limit": 0.5}], "acknowledged": False}]
    assert mon.acknowledge() == {"t": 10.0, "kind": "ack", "state": "caution"}
    assert mon.trust.acknowledged
    # no state change, no event
    assert mon.on_predictions(20.0, np.vstack([MID]), np.array([9.0]), np.array([0.8]),
                              19.0) == []
    # a new, higher reason is not acknowledged
    ev = mon.on_predictions(30.0, np.vstack([MID]), np.array([31.0]), np.array([0.8]), 29.0)
    assert ev[0]["new"] == "untrusted" and ev[0]["acknowledged"] is False
    assert [r["name"] for r in ev[0]["reasons"]] == ["extrapolation", "uncertainty"]


def test_clock_never_goes_back_for_late_lab_results():
    mon = make({"leverage_limit": 0.5, "region_limit": 0})
    mon.on_predictions(5000.0, np.vstack([MID]), np.array([9.0]), np.array([0.9]), 4000.0)
    ev = mon.on_lab(4000.0, lab(0.0, reject_run=2, accepted=False), MID, FakePosterior())
    assert mon.clock == 5000.0
    assert ev == []  # already in caution


def test_reset_forgets_everything():
    rng = np.random.default_rng(9)
    mon = make({"leverage_limit": 0.5})
    post = FakePosterior()
    for i, v in enumerate((3.0 + rng.standard_normal(8)).tolist()):
        mon.on_lab(float(i), lab(v), rows(1, rng)[0], post)
    quiet_batch(mon, 20.0, 19.0)
    assert mon.state == "untrusted"
    mon.reset()
    v = mon.view()
    assert mon.state == "normal" and mon.reasons() == [] and v["reasons"] == []
    assert v["cusum"]["upper"] == 0.0 and v["cusum"]["lower"] == 0.0
    assert v["calibration"]["count"] == 0 and math.isnan(v["calibration"]["coverage"])
    assert math.isnan(v["std"]["baseline"]) and math.isnan(v["leverage"])
    assert mon.region.count == 0 and mon.labs_since_shift is None and mon.clock is None


# ---------------------------------------------------------------------------------- state
def _script(mon: Monitor, rng, n: int, t0: float, post: FakePosterior) -> list:
    """A mixed run of lab results and prediction batches; returns every event."""
    events = []
    for i in range(n):
        t = t0 + 3600.0 * i
        v = float(rng.standard_normal() + (2.5 if i % 17 > 12 else 0.0))
        post.mean = post.mean + 0.05 * rng.standard_normal(post.mean.size)
        events += mon.on_lab(t, lab(v, scale=9.0 + rng.random()), rows(1, rng)[0], post)
        lev = 0.9 if i % 5 == 0 else 0.1
        X = rows(3, rng, 0.3)
        events += mon.on_predictions(t + 60.0, X, 9.0 + rng.random(3), np.full(3, lev),
                                     t if i % 23 else t - 13 * 3600.0)
    return events


def test_state_round_trip_continues_identically():
    alerts = {"leverage_limit": 0.5, "region_limit": 3.0, "std_ratio": 1.05, "hold": 3,
              "clear_count": 2, "clear_time": "30m", "drift_window": "5h", "drift_limit": 0.4}
    a = make(alerts)
    rng = np.random.default_rng(17)
    pa = FakePosterior()
    first = _script(a, rng, 41, 0.0, pa)
    assert any(e["kind"] == "state" for e in first)
    assert "extrapolation" in a.pred_active  # the checkpoint falls inside a caution episode
    # the state is plain data: it survives MessagePack (the state folder's encoding)
    state = msgpack.unpackb(msgpack.packb(a.to_state()), raw=False)
    assert state["schema"] == monitor_mod.SCHEMA
    b = make(alerts)
    b.load_state(state)
    pb = FakePosterior()
    pb.mean = pa.mean.copy()
    ra, rb = np.random.default_rng(99), np.random.default_rng(99)
    ea = _script(a, ra, 40, 41 * 3600.0, pa)
    eb = _script(b, rb, 40, 41 * 3600.0, pb)
    assert ea == eb and len(ea) > 0
    assert a.to_state() == b.to_state()
    va, vb = a.view(), b.view()
    assert msgpack.packb(va) == msgpack.packb(vb)


def test_restored_monitor_keeps_prediction_reasons_until_the_next_batch():
    # a lab result right after a restore must see the same active reasons as without it
    alerts = {"leverage_limit": 0.5, "region_limit": 0, "clear_count": 1, "clear_time": 0}
    a = make(alerts)
    a.on_predictions(100.0, np.vstack([MID]), np.array([9.0]), np.array([0.9]), 99.0)
    b = make(alerts)
    b.load_state(msgpack.unpackb(msgpack.packb(a.to_state()), raw=False))
    post = FakePosterior()
    ea = a.on_lab(150.0, lab(0.0), MID, post)
    eb = b.on_lab(150.0, lab(0.0), MID, FakePosterior())
    assert ea == eb == []
    assert a.state == b.state == "caution"
    assert b.view()["leverage"] == 0.9


def test_state_without_prediction_keys_still_loads():
    a = make({"leverage_limit": 0.5, "region_limit": 0})
    a.on_predictions(100.0, np.vstack([MID]), np.array([9.0]), np.array([0.9]), 99.0)
    state = a.to_state()
    del state["pred_active"], state["last"]
    b = make({"leverage_limit": 0.5, "region_limit": 0})
    b.load_state(state)
    assert b.pred_active == {} and math.isnan(b.view()["leverage"])
    assert b.state == "caution"  # the trust state itself was saved


@pytest.mark.parametrize("bad", [{"schema": 99}, {}, {"schema": "1"}])
def test_load_state_rejects_other_schemas(bad):
    mon = make()
    with pytest.raises(ValueError, match=re.escape(repr(bad.get("schema")))):
        mon.load_state(bad)


# ---------------------------------------------------------------------------------- real model
def test_monitor_survives_a_posterior_with_few_degrees_of_freedom():
    # with an uninformative noise prior (strength 0) the first predictive t has dof <= 2,
    # where the variance is infinite and the CRPS undefined; the monitor must skip, not fail
    cfg = model_cfg({}, noise={"guess": 10.0, "strength": 0.0},
                    basis={"kind": "polynomial", "degree": 1, "family": "legendre"})
    basis = cfg.build_basis()
    post = cfg.build_posterior(basis)
    mon = Monitor(cfg, basis)
    sim = plant.simulate(plant.Scenario(seed=3, days=3.0, sample_period_s=600.0))
    steps = []
    for t, i, y in zip(sim.lab_t.tolist(), sim.lab_index.tolist(), sim.lab_y.tolist(),
                       strict=True):
        x = sim.X[i]
        step = post.update(basis(x), y, t)
        steps.append(step)
        mon.on_lab(t, step, x, post)
        pred = post.predict(basis(np.atleast_2d(x)), t=t)
        mon.on_predictions(t, np.atleast_2d(x), pred.std, pred.leverage, t)
    scored = [s for s in steps if s.accepted and math.isfinite(s.z)]
    assert min(s.dof for s in scored) <= 1.0, "the run must include the few-dof start"
    # only results with a proper predictive (dof > 1 for the CRPS) are scored
    assert mon.calibration.count == sum(1 for s in scored if s.dof > 1.0)
    assert mon.calibration.count > 10

