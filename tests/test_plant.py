"""Tests of the simulator of the invented C-301 column (daemon/workbench/plant.py)."""

import json
import re

import numpy as np
import pytest
from scipy import stats

from daemon.workbench.plant import (
    BASE_COEF,
    CENTERS,
    COEF_NAMES,
    RANGES,
    SCALES,
    TAGS,
    TARGET,
    Scenario,
    basis,
    events,
    simulate,
)

DAY = 86400.0
HOUR = 3600.0


@pytest.fixture(scope="module")
def demo():
    return simulate(Scenario.demo(seed=11))


@pytest.fixture(scope="module")
def stationary_long():
    return simulate(Scenario.stationary(days=120, seed=5))


def test_constants():
    assert TAGS == ("TI-104", "FI-201", "PI-110", "AI-305")
    assert TARGET == "AX-350"
    assert RANGES["TI-104"] == (95.0, 125.0)
    assert RANGES["FI-201"] == (8.0, 20.0)
    assert RANGES["PI-110"] == (0.8, 1.6)
    assert RANGES["AI-305"] == (2.0, 8.0)
    assert len(COEF_NAMES) == len(BASE_COEF) == 7


def test_same_seed_same_run_other_seed_other_run():
    a = simulate(Scenario.demo(seed=3))
    b = simulate(Scenario.demo(seed=3))
    c = simulate(Scenario.demo(seed=4))
    for name in ("t", "X", "lab_t", "lab_y", "lab_arrival", "lab_blunder", "truth_y", "coef"):
        np.testing.assert_array_equal(getattr(a, name), getattr(b, name), err_msg=name)
    assert not np.array_equal(a.X, c.X)
    assert not np.array_equal(a.lab_y, c.lab_y)


def test_shapes_and_grid(demo):
    sc = demo.scenario
    k = int(round(sc.days * DAY / sc.sample_period_s))
    assert k == 90 * 1440
    assert demo.t.shape == (k,)
    assert demo.X.shape == (k, 4)
    assert demo.truth_y.shape == (k,)
    assert demo.coef.shape == (k, 7)
    m = demo.lab_t.size
    for name in ("lab_y", "lab_arrival", "lab_blunder", "lab_index"):
        assert getattr(demo, name).shape == (m,)
    assert demo.lab_blunder.dtype == bool
    assert demo.t[0] == 1767571200.0  # 2026-01-05T00:00Z, calendar.timegm((2026, 1, 5, 0, 0, 0))
    np.testing.assert_array_equal(np.diff(demo.t), 60.0)
    # one lab result every 4 h over 90 days, minus the 4-day outage (and samples reported in it)
    assert 90 * 6 - 4 * 6 - 2 <= m <= 90 * 6


def test_lab_times_are_sample_times(demo):
    assert np.all(np.isin(demo.lab_t, demo.t))
    np.testing.assert_array_equal(demo.lab_t, demo.t[demo.lab_index])
    assert np.all(np.diff(demo.lab_t) > 0)


@pytest.mark.parametrize("delay", [(1.0, 3.0), (0.25, 0.5), (2.0, 2.0)])
def test_arrival_within_configured_delay(delay):
    run = simulate(Scenario(seed=2, days=10, lab_delay_h=delay))
    lag = run.lab_arrival - run.lab_t
    # arrivals are rounded to whole seconds
    assert lag.min() >= delay[0] * HOUR - 0.5
    assert lag.max() <= delay[1] * HOUR + 0.5
    np.testing.assert_array_equal(run.lab_arrival, np.rint(run.lab_arrival))
    if delay[1] > delay[0]:
        assert lag.max() - lag.min() > 0.5 * (delay[1] - delay[0]) * HOUR


def test_lab_spacing_follows_period_and_jitter():
    sc = Scenario(seed=9, days=20, lab_period_h=3.0, lab_jitter_min=15.0)
    run = simulate(sc)
    gaps = np.diff(run.lab_t)
    assert gaps.min() >= 3.0 * HOUR - 2 * 15 * 60 - 60
    assert gaps.max() <= 3.0 * HOUR + 2 * 15 * 60 + 60
    assert abs(gaps.mean() - 3.0 * HOUR) < 120


def test_events_in_arrival_order(demo):
    evs = list(events(demo))
    assert len(evs) == demo.t.size + demo.lab_t.size
    arrival = [e[1] if e[0] == "x" else e[3] for e in evs]
    assert all(a <= b for a, b in zip(arrival, arrival[1:], strict=False))
    xs = [e for e in evs if e[0] == "x"]
    np.testing.assert_array_equal([e[1] for e in xs], demo.t)
    np.testing.assert_array_equal(np.array([e[2] for e in xs]), demo.X)
    ys = [e for e in evs if e[0] == "y"]
    drawn = np.array([e[1] for e in ys])
    order = np.argsort(demo.lab_arrival, kind="stable")
    np.testing.assert_array_equal(drawn, demo.lab_t[order])
    np.testing.assert_array_equal([e[2] for e in ys], demo.lab_y[order])
    np.testing.assert_array_equal([e[3] for e in ys], demo.lab_arrival[order])
    # every lab result comes after the feature sample of its drawn time
    pos = {e[1]: i for i, e in enumerate(evs) if e[0] == "x"}
    for i, e in enumerate(evs):
        if e[0] == "y":
            assert pos[e[1]] < i


def test_events_tie_feature_first():
    # lab delay of exactly one hour on a one-minute grid: arrivals coincide with sample times
    run = simulate(Scenario(seed=1, days=2, lab_delay_h=(1.0, 1.0), lab_jitter_min=0.0))
    evs = list(events(run))
    for i, e in enumerate(evs):
        if e[0] == "y":
            j = i - 1
            while evs[j][0] == "y":
                j -= 1
            assert evs[j][1] == e[3]


def test_outage_has_no_lab_results(demo):
    o0, o1 = (demo.t[0] + d * DAY for d in demo.scenario.outage_days)
    assert not np.any((demo.lab_t >= o0) & (demo.lab_t < o1))
    assert not np.any((demo.lab_arrival >= o0) & (demo.lab_arrival < o1))
    assert np.any(demo.lab_t < o0) and np.any(demo.lab_t >= o1)
    # the gap spans the outage
    before = demo.lab_t[demo.lab_t < o0].max()
    after = demo.lab_t[demo.lab_t >= o1].min()
    assert after - before >= o1 - o0


def test_truth_follows_documented_formula(demo):
    # the relation written out by hand from the module docstring
    z = (demo.X - CENTERS) / SCALES
    zT, zF, zP, zA = z.T
    c = demo.coef.T
    y = c[0] + c[1] * zT + c[2] * zF + c[3] * zP + c[4] * zA + c[5] * zT**2 + c[6] * zT * zA
    np.testing.assert_allclose(demo.truth_y, y, rtol=1e-12, atol=1e-9)
    np.testing.assert_allclose(CENTERS, [110.0, 14.0, 1.2, 5.0])
    np.testing.assert_allclose(SCALES, [15.0, 6.0, 0.4, 3.0])


def test_inputs_excite_the_regression(demo):
    lo = np.array([RANGES[t][0] for t in TAGS])
    hi = np.array([RANGES[t][1] for t in TAGS])
    assert np.all(demo.X >= lo) and np.all(demo.X <= hi)
    # each input moves over a good part of its range
    spread = np.percentile(demo.X, 95, axis=0) - np.percentile(demo.X, 5, axis=0)
    assert np.all(spread > 0.3 * (hi - lo))
    # excited but not perfectly: basis columns at lab times well conditioned, yet correlated
    A = basis(demo.X[demo.lab_index])
    assert np.linalg.cond(A) < 50
    corr = np.corrcoef(A[:, 1:].T)
    assert np.abs(corr[np.triu_indices(6, 1)]).max() > 0.1
    # the inputs are autocorrelated (OU), not white noise
    d = demo.X[:, 0] - demo.X[:, 0].mean()
    assert np.dot(d[1:], d[:-1]) / np.dot(d, d) > 0.95
    assert 50 < np.percentile(demo.truth_y, 1) and np.percentile(demo.truth_y, 99) < 450


def test_least_squares_recovers_coefficients(stationary_long):
    run = stationary_long
    sc = run.scenario
    A = basis(run.X[run.lab_index])
    y = run.lab_y
    b, *_ = np.linalg.lstsq(A, y, rcond=None)
    true = np.asarray(sc.base_coef)
    np.testing.assert_array_equal(run.coef, np.tile(true, (run.t.size, 1)))
    # noise: Gaussian sd plus rounding to 1 ppm, whose variance is q^2/12 (uniform rounding
    # error, Sheppard's correction; from memory)
    sigma2 = sc.lab_noise_ppm**2 + sc.lab_resolution_ppm**2 / 12.0
    # standard errors of ordinary least squares: Cov(b) = sigma^2 (A^T A)^-1
    cov = sigma2 * np.linalg.inv(A.T @ A)
    se = np.sqrt(np.diag(cov))
    assert np.all(np.abs(b - true) < 4.0 * se), (b, true, se)
    # the whole vector: (b - beta)^T (A^T A) (b - beta) / sigma^2 ~ chi2(p) (scipy.stats.chi2)
    d = b - true
    q = d @ (A.T @ A) @ d / sigma2
    assert q < stats.chi2.ppf(0.999, df=A.shape[1])
    # residual variance: (m - p) s^2 / sigma^2 ~ chi2(m - p)
    m, p = A.shape
    rss = float(np.sum((y - A @ b) ** 2))
    assert stats.chi2.ppf(0.0005, m - p) < rss / sigma2 < stats.chi2.ppf(0.9995, m - p)


def test_lab_noise_level(stationary_long):
    run = stationary_long
    res = run.lab_y - run.truth_y[run.lab_index]
    sigma2 = 8.0**2 + 1.0 / 12.0
    n = res.size
    # mean of Gaussian noise: |mean| < 4 sd/sqrt(n); variance: chi2(n) bounds (scipy.stats.chi2)
    assert abs(res.mean()) < 4 * np.sqrt(sigma2 / n)
    ss = float(np.sum(res**2))
    assert stats.chi2.ppf(0.0005, n) < ss / sigma2 < stats.chi2.ppf(0.9995, n)
    # rounded to the lab resolution
    np.testing.assert_array_equal(run.lab_y, np.round(run.lab_y))


def test_blunders_flagged(demo):
    sc = demo.scenario
    assert demo.lab_blunder.sum() == sc.blunders == 4
    res = np.abs(demo.lab_y - demo.truth_y[demo.lab_index])
    sigma = sc.lab_noise_ppm
    assert np.all(res[demo.lab_blunder] > 5 * sigma)
    # 5 sigma for a Gaussian: two-sided tail 5.7e-7 per sample (scipy.stats.norm.sf)
    assert 2 * stats.norm.sf(5) < 1e-6
    assert np.all(res[~demo.lab_blunder] < 5 * sigma)


def test_no_blunders_by_default(stationary_long):
    assert not stationary_long.lab_blunder.any()


def test_fouling_drift_is_linear():
    run = simulate(Scenario.drifting(days=30, seed=2))
    days = (run.t - run.t[0]) / DAY
    intercept = run.coef[:, 0]
    slope, offset = np.polyfit(days, intercept, 1)
    assert slope == pytest.approx(1.0, rel=1e-9)
    assert offset == pytest.approx(BASE_COEF[0], abs=1e-6)
    np.testing.assert_array_equal(run.coef[:, 1:], np.tile(BASE_COEF[1:], (run.t.size, 1)))


def test_feed_grade_step():
    sc = Scenario(
        seed=6,
        days=20,
        step_day=10.0,
        step_size=40.0,
        step_feed_shift=1.5,
        setpoint_moves_per_day=0.0,
    )
    run = simulate(sc)
    t_step = run.t[0] + 10 * DAY
    after = run.t >= t_step
    np.testing.assert_array_equal(run.coef[~after, 4], BASE_COEF[4])
    np.testing.assert_array_equal(run.coef[after, 4], BASE_COEF[4] + 40.0)
    ai = run.X[:, TAGS.index("AI-305")]
    before_mean = ai[(run.t >= t_step - 8 * DAY) & (run.t < t_step)].mean()
    after_mean = ai[(run.t >= t_step + 1 * DAY) & (run.t < t_step + 9 * DAY)].mean()
    assert after_mean - before_mean == pytest.approx(1.5, abs=0.3)


def test_excursion_pushes_ti_above_range():
    sc = Scenario(seed=8, days=6, excursion_day=3.0, excursion_hours=6.0, excursion_degC=6.0)
    run = simulate(sc)
    ti = run.X[:, 0]
    rel = run.t - run.t[0]
    t0, t1 = 3 * DAY, 3 * DAY + 6 * HOUR
    plateau = (rel >= t0 + 0.5 * HOUR) & (rel <= t1 - 0.5 * HOUR)
    assert np.all(ti[plateau] >= 125.0 + 6.0)
    outside = (rel < t0) | (rel > t1)
    assert np.all(ti[outside] <= 125.0)
    assert np.all(run.X[:, 1:] <= [20.0, 1.6, 8.0])


def test_dead_times_delay_inputs():
    dead = (600.0, 0.0, 0.0, 1800.0)
    run = simulate(Scenario(seed=4, days=3, dead_times_s=dead))
    shift = [10, 0, 0, 30]
    X_eff = np.column_stack(
        [
            np.concatenate([np.repeat(run.X[0, i], s), run.X[: run.t.size - s, i]])
            for i, s in enumerate(shift)
        ]
    )
    np.testing.assert_allclose(run.truth_y, np.sum(basis(X_eff) * run.coef, axis=1), rtol=1e-12)


def test_scenario_state_round_trip():
    sc = Scenario.demo(seed=7)
    state = json.loads(json.dumps(sc.to_state()))
    assert state["schema"] == "plant.scenario/1"
    assert Scenario.from_state(state) == sc
    with pytest.raises(ValueError, match="schema"):
        Scenario.from_state({**state, "schema": "other/9"})
    with pytest.raises(ValueError, match="bogus"):
        Scenario.from_state({**state, "bogus": 1})


@pytest.mark.parametrize(
    "kwargs, text",
    [
        ({"days": -1.0}, "-1.0"),
        ({"sample_period_s": 0.0}, "0.0"),
        ({"lab_delay_h": (3.0, 1.0)}, "(3.0, 1.0)"),
        ({"lab_noise_ppm": -2.0}, "-2.0"),
        ({"step_day": 99.0}, "99.0"),
        ({"outage_days": (5.0, 2.0)}, "(5.0, 2.0)"),
        ({"blunders": -1}, "-1"),
        ({"excursion_day": 40.0}, "40.0"),
        ({"fouling_coef": 7}, "7"),
        ({"lab_jitter_min": 200.0}, "200.0"),
        ({"dead_times_s": (0.0, -5.0, 0.0, 0.0)}, "-5.0"),
        ({"seed": 1.5}, "1.5"),
        ({"offset_sd_ppm": -1.0}, "-1.0"),
        ({"offset_tau_h": 0.0}, "0.0"),
        ({"zero_walk_ppm": float("nan")}, "nan"),
        ({"lab_slow_share": 1.5}, "1.5"),
        ({"lab_slow_delay_h": (9.0, 2.0)}, "(9.0, 2.0)"),
    ],
)
def test_scenario_rejects_bad_values(kwargs, text):
    with pytest.raises(ValueError, match=re.escape(text)):
        Scenario(**{"days": 30.0, **kwargs})


def test_too_many_blunders():
    with pytest.raises(ValueError, match="blunders=500"):
        simulate(Scenario(seed=0, days=2, blunders=500))


def test_basis_rejects_wrong_width():
    with pytest.raises(ValueError, match=r"\(3, 5\)"):
        basis(np.zeros((3, 5)))
    np.testing.assert_allclose(basis(CENTERS), [1, 0, 0, 0, 0, 0, 0])


# ---------------------------------------------------------------------------------- disturbances
def test_offset_is_an_ar1_with_the_textbook_stationary_law():
    # reference: the AR(1) x[n] = a x[n-1] + e[n], var(e) = s2, has stationary variance
    # s2 / (1 - a^2) and autocorrelation a^h at lag h (Box & Jenkins; from memory), and
    # statsmodels' ArmaProcess gives the same autocorrelations
    from statsmodels.tsa.arima_process import ArmaProcess

    sd, tau_h, dt = 10.0, 6.0, 600.0
    run = simulate(Scenario(seed=8, days=2000.0, sample_period_s=dt, offset_sd_ppm=sd,
                            offset_tau_h=tau_h))
    a = np.exp(-dt / (tau_h * HOUR))
    s2 = sd ** 2 * (1 - a ** 2)  # the variance of one innovation
    o = run.offset
    # about 4000 independent stretches: the sample variance is within 2.2 % (one sd)
    assert np.var(o) == pytest.approx(s2 / (1 - a ** 2), rel=0.1)
    acf_ref = ArmaProcess([1.0, -a], [1.0]).acf(40)
    for h in (1, 12, 36):
        r = np.corrcoef(o[:-h], o[h:])[0, 1]
        assert r == pytest.approx(a ** h, abs=0.03)
        assert acf_ref[h] == pytest.approx(a ** h, rel=1e-12)
    # the offset is in the truth (through the intercept), in no input
    assert np.array_equal(run.coef[:, 0], BASE_COEF[0] + o)
    calm = simulate(Scenario(seed=8, days=2000.0, sample_period_s=dt))
    np.testing.assert_array_equal(run.X, calm.X)
    np.testing.assert_allclose(run.truth_y - calm.truth_y, o, atol=1e-9)


def test_offset_walk_and_analyzer_zero_walk_have_the_stated_rates():
    # reference: a random walk with step variance w^2 dt / day has increments over d days of
    # variance w^2 d (sum of independent steps)
    run = simulate(Scenario(seed=9, days=1500.0, sample_period_s=600.0, offset_walk_ppm=4.0,
                            zero_walk_ppm=2.0, lab_noise_ppm=3.0, lab_resolution_ppm=0.0,
                            lab_delay_h=(0.0, 0.0)))
    per_day = 144
    daily = run.offset[::per_day]
    assert np.var(np.diff(daily)) == pytest.approx(4.0 ** 2, rel=0.12)
    assert run.offset[0] == 0.0
    dz = np.diff(run.lab_zero)
    dd = np.diff(run.lab_t) / DAY
    # increments standardized by their own elapsed time are N(0, w^2)
    assert np.var(dz / np.sqrt(dd)) == pytest.approx(2.0 ** 2, rel=0.1)
    # the zero error is in the reported values, not in the truth
    resid = run.lab_y - run.truth_y[run.lab_index] - run.lab_zero
    # far from the floor at 0 ppm (the walks wander far in 1500 days)
    good = run.truth_y[run.lab_index] + run.lab_zero > 30.0
    assert good.sum() > 1000
    assert np.std(resid[good]) == pytest.approx(3.0, rel=0.05)
    calm = simulate(Scenario(seed=9, days=1500.0, sample_period_s=600.0, offset_walk_ppm=4.0,
                             lab_noise_ppm=3.0, lab_resolution_ppm=0.0, lab_delay_h=(0.0, 0.0)))
    np.testing.assert_array_equal(calm.truth_y, run.truth_y)


def test_zero_ramp_is_exact():
    run = simulate(Scenario(seed=1, days=10.0, zero_ramp_ppm_per_day=0.5, lab_noise_ppm=0.0,
                            lab_resolution_ppm=0.0))
    ramp = 0.5 * (run.lab_t - run.scenario.start) / DAY
    np.testing.assert_allclose(run.lab_zero, ramp, rtol=1e-12)
    np.testing.assert_allclose(run.lab_y, run.truth_y[run.lab_index] + ramp, rtol=1e-12)


def test_slow_lab_results_arrive_out_of_order():
    sc = Scenario(seed=4, days=30.0, lab_slow_share=0.3, lab_slow_delay_h=(8.0, 12.0))
    run = simulate(sc)
    delay_h = (run.lab_arrival - run.lab_t) / HOUR
    slow = delay_h > 3.0 + 1e-3
    # the share is binomial: a 99.9 % interval around 0.3 of n results
    lo, hi = stats.binom.interval(0.999, run.lab_t.size, 0.3)
    assert lo <= slow.sum() <= hi
    assert np.all((delay_h[slow] >= 8.0 - 1e-3) & (delay_h[slow] <= 12.0 + 1e-3))
    assert np.any(np.diff(run.lab_arrival) < 0)  # reported after results drawn later
    drawn = [e[1] for e in events(run) if e[0] == "y"]
    assert drawn != sorted(drawn)
    # everything else is the scenario without slow results
    base = simulate(Scenario(seed=4, days=30.0))
    for name in ("X", "lab_t", "lab_y", "truth_y"):
        np.testing.assert_array_equal(getattr(run, name), getattr(base, name), err_msg=name)
    np.testing.assert_array_equal(run.lab_arrival[~slow], base.lab_arrival[~slow])


def test_real_drift_preset_has_every_nuisance():
    run = simulate(Scenario.real_drift(days=20.0, seed=0))
    sc = run.scenario
    assert sc.offset_sd_ppm > 0 and sc.zero_walk_ppm > 0 and sc.blunders > 0
    assert sc.fouling_ppm_per_day > 0 and sc.lab_slow_share > 0
    assert run.lab_blunder.sum() == sc.blunders
    assert np.any(np.diff(run.lab_arrival) < 0)
    assert np.std(run.offset) > 5.0
    assert np.any(run.lab_zero != 0)
    # today's presets have none of it
    for preset in (Scenario.stationary(), Scenario.drifting(), Scenario.demo()):
        assert preset.offset_sd_ppm == preset.offset_walk_ppm == preset.zero_walk_ppm == 0
        assert preset.zero_ramp_ppm_per_day == 0 and preset.lab_slow_share == 0
