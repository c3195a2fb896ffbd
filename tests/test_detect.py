"""Tests for recursive.detect against published tables, textbook formulas and scipy/numpy.

Run-length tests feed one long seeded N(shift, sd^2) stream to a single detector. Every detector
restarts at its zero state after a signal, so the gaps between signals are independent
zero-state run lengths; exactly ``n_runs`` of them are collected. The tolerance is a few
standard errors (sample sd / sqrt(runs)) plus the stated accuracy of the reference.
"""

import json
import math

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy import integrate, stats
from scipy.spatial.distance import mahalanobis

from recursive.detect import (
    Calibration,
    Cusum,
    Ewma,
    InputRegion,
    PageHinkley,
    ParamDrift,
    SpreadCusum,
    StdBaseline,
    Trust,
    crps_normal,
    crps_t,
    log_score_normal,
    log_score_t,
)

# ----------------------------------------------------------------------------------------------
# helpers: independent reference computations
# ----------------------------------------------------------------------------------------------


def run_lengths(det, rng, n_runs, shift=0.0, sd=1.0, chunk=100_000):
    """Collect exactly n_runs run lengths from one detector on an iid N(shift, sd^2) stream."""
    out = []
    count = 0
    step = det.step
    while True:
        for z in (rng.standard_normal(chunk) * sd + shift).tolist():
            count += 1
            if step(z).signal:
                out.append(count)
                count = 0
                if len(out) == n_runs:
                    return np.asarray(out, dtype=float)


def mean_and_se(rl):
    return rl.mean(), rl.std(ddof=1) / math.sqrt(rl.size)


def siegmund_one_sided(drift, h):
    """Siegmund (1985) ARL approximation of a one-sided CUSUM; drift = shift - k."""
    b = h + 1.166
    if drift == 0.0:
        return b * b
    return (math.exp(-2.0 * drift * b) + 2.0 * drift * b - 1.0) / (2.0 * drift * drift)


def siegmund_two_sided(shift, k, h):
    """Two-sided combination 1/ARL = 1/ARL+ + 1/ARL- of Siegmund's approximation."""
    up = siegmund_one_sided(shift - k, h)
    down = siegmund_one_sided(-shift - k, h)
    return 1.0 / (1.0 / up + 1.0 / down)


def brook_evans_arl(increment_cdf, h, m=400, start=0.0):
    """Brook & Evans (1972) Markov-chain ARL of S_t = max(0, S_{t-1} + X_t), signal S > h.

    States are m cells of width w = 2h/(2m - 1) centred on i*w; cell 0 also holds the atom
    at 0 and the last cell ends at h. ARL from ``start`` is interpolated between centres.
    """
    w = 2.0 * h / (2 * m - 1)
    centres = np.arange(m) * w
    upper_edges = (np.arange(m) + 0.5) * w
    cdf = increment_cdf(upper_edges[None, :] - centres[:, None])
    trans = np.empty((m, m))
    trans[:, 0] = cdf[:, 0]
    trans[:, 1:] = np.diff(cdf, axis=1)
    arl = np.linalg.solve(np.eye(m) - trans, np.ones(m))
    return float(np.interp(start, centres, arl))


def crps_by_quadrature(y, dist):
    """CRPS = int (F(x) - 1{x >= y})^2 dx split at y (definition, Gneiting & Raftery 2007)."""
    left = integrate.quad(lambda x: dist.cdf(x) ** 2, -np.inf, y, limit=200, epsabs=1e-13)[0]
    right = integrate.quad(lambda x: dist.sf(x) ** 2, y, np.inf, limit=200, epsabs=1e-13)[0]
    return left + right


def same(a, b):
    """Bit-level equality of step results: repr of a float is exact and spells nan/-0.0."""
    return repr(a) == repr(b)


def json_round_trip(state):
    return json.loads(json.dumps(state))


# ----------------------------------------------------------------------------------------------
# CUSUM
# ----------------------------------------------------------------------------------------------

# Montgomery, Introduction to Statistical Quality Control, ARL table of the tabular CUSUM with
# k = 1/2 -- values quoted from memory: in control 168 (h = 4), 465 (h = 5); 1-sigma shift
# 8.38 (h = 4), 10.4 (h = 5). Tolerance adds half a unit in the last quoted digit.


@pytest.mark.parametrize(
    ("h", "table", "digit", "n_runs", "seed"),
    [(4.0, 168.0, 0.5, 4000, 101), (5.0, 465.0, 0.5, 3000, 102)],
)
def test_cusum_in_control_arl_montgomery_and_siegmund(h, table, digit, n_runs, seed):
    rl = run_lengths(Cusum(k=0.5, h=h), np.random.default_rng(seed), n_runs)
    arl, se = mean_and_se(rl)
    assert abs(arl - table) < 4.0 * se + digit
    # Siegmund (1985) approximation, accurate to a few percent (3 % allowed).
    approx = siegmund_two_sided(0.0, 0.5, h)
    assert abs(arl - approx) < 4.0 * se + 0.03 * approx


@pytest.mark.parametrize(
    ("h", "table", "digit", "seed"), [(4.0, 8.38, 0.005, 103), (5.0, 10.4, 0.05, 104)]
)
def test_cusum_one_sigma_shift_arl_montgomery_and_siegmund(h, table, digit, seed):
    rl = run_lengths(Cusum(k=0.5, h=h), np.random.default_rng(seed), 6000, shift=1.0)
    arl, se = mean_and_se(rl)
    assert abs(arl - table) < 4.0 * se + digit
    approx = siegmund_two_sided(1.0, 0.5, h)
    assert abs(arl - approx) < 4.0 * se + 0.03 * approx


def test_cusum_head_start_against_lucas_crosier_and_markov_chain():
    # Lucas & Crosier (1982): h = 5, k = 1/2, head start h/2, 1-sigma shift ARL 6.35 (quoted
    # from memory); also a Brook & Evans (1972) Markov chain of the upper side started at 2.5
    # (the lower side essentially never signals at a +1 shift).
    rl = run_lengths(Cusum(0.5, 5.0, head_start=2.5), np.random.default_rng(105), 6000, shift=1.0)
    arl, se = mean_and_se(rl)
    assert abs(arl - 6.35) < 4.0 * se + 0.005
    chain = brook_evans_arl(lambda x: stats.norm.cdf(x + 0.5 - 1.0), 5.0, start=2.5)
    assert abs(arl - chain) < 4.0 * se + 0.01 * chain
    # the head start must matter: without it the same shift takes about 10.4 samples
    assert arl < 8.0


def test_cusum_recursion_signal_restart_and_reset():
    c = Cusum(k=0.5, h=2.0, head_start=0.5)
    assert c.statistic == 0.5
    # hand computation of Page's recursion: S+ = max(0, S+ + z - k), S- = max(0, S- - z - k)
    r = c.step(1.0)
    assert (r.upper, r.lower, r.signal) == (1.0, 0.0, 0)
    r = c.step(1.25)
    assert (r.upper, r.lower, r.signal) == (1.75, 0.0, 0)
    assert c.run_length == 2
    r = c.step(1.0)
    assert (r.upper, r.lower, r.signal) == (2.25, 0.0, 1)
    # restarted at the head start after the signal
    assert c.statistic == 0.5 and c.run_length == 0
    r = c.step(-3.0)
    assert (r.upper, r.lower, r.signal) == (0.0, 3.0, -1)
    c.step(-1.0)
    c.reset()
    assert c.statistic == 0.5 and c.run_length == 0
    assert c.params() == {"k": 0.5, "h": 2.0, "head_start": 0.5}


# ----------------------------------------------------------------------------------------------
# Page-Hinkley
# ----------------------------------------------------------------------------------------------


def test_page_hinkley_equals_one_sided_cusum():
    rng = np.random.default_rng(201)
    zs = (rng.standard_normal(5000) * 1.3 + 0.35).tolist()
    mu, delta, threshold = 0.1, 0.2, 4.0
    ph = PageHinkley(mu, delta, threshold)
    # independent one-sided CUSUM recursion with k = mu + delta (Page 1954), restart on signal
    s = 0.0
    ref_stats, ref_signals = [], []
    for z in zs:
        s = max(0.0, s + z - (mu + delta))
        ref_stats.append(s)
        ref_signals.append(s > threshold)
        if s > threshold:
            s = 0.0
    got = [ph.step(z) for z in zs]
    assert sum(ref_signals) > 20  # the comparison covers many restarts
    assert [g.signal for g in got] == ref_signals
    np.testing.assert_allclose([g.statistic for g in got], ref_stats, rtol=0, atol=1e-9)
    # definition: statistic = cumsum - running minimum (with m_0 = 0)
    for g in got:
        assert g.statistic == g.cumsum - g.minimum and g.minimum <= 0.0
    # and the project's two-sided Cusum upper side, on a stream where its lower side is quiet
    cu = Cusum(k=mu + delta, h=threshold)
    ph2 = PageHinkley(mu, delta, threshold)
    for z in (rng.standard_normal(2000) + 1.0).tolist():
        a, b = cu.step(z), ph2.step(z)
        assert a.signal != -1
        assert (a.signal == 1) == b.signal
        assert abs(a.upper - b.statistic) < 1e-9


# ----------------------------------------------------------------------------------------------
# spread CUSUM
# ----------------------------------------------------------------------------------------------


def spread_increment_cdf(sigma1, sd):
    """CDF of z^2/2 (1 - 1/sigma1^2) - ln sigma1 for z ~ N(0, sd^2), via chi-square(1)."""
    a = 0.5 * (1.0 - 1.0 / sigma1**2)
    b = math.log(sigma1)
    return lambda x: stats.chi2.cdf(np.maximum((x + b) / (a * sd * sd), 0.0), 1)


def test_spread_cusum_in_control_arl_against_markov_chain():
    # Brook & Evans (1972) Markov chain with 400 states, chi-square(1) increments; the chain's
    # discretisation error is well below 1 % here (checked against 200 states).
    cdf = spread_increment_cdf(1.5, 1.0)
    chain = brook_evans_arl(cdf, 3.0, m=400)
    assert abs(chain - brook_evans_arl(cdf, 3.0, m=200)) < 0.01 * chain
    rl = run_lengths(SpreadCusum(1.5, 3.0), np.random.default_rng(301), 3000)
    arl, se = mean_and_se(rl)
    assert abs(arl - chain) < 4.0 * se + 0.01 * chain


def test_spread_cusum_defaults_rarely_signal_in_control_and_detect_doubling():
    det = SpreadCusum()
    chain0 = brook_evans_arl(spread_increment_cdf(1.5, 1.0), 5.0)
    assert chain0 > 2000  # in-control: rare signals
    rl = run_lengths(det, np.random.default_rng(302), 150)
    arl, se = mean_and_se(rl)
    assert abs(arl - chain0) < 4.0 * se + 0.01 * chain0
    # sd 1 -> 2: zero-state delay against the same Markov chain with sd = 2
    chain1 = brook_evans_arl(spread_increment_cdf(1.5, 2.0), 5.0)
    rl = run_lengths(SpreadCusum(), np.random.default_rng(303), 4000, sd=2.0)
    arl1, se1 = mean_and_se(rl)
    assert abs(arl1 - chain1) < 4.0 * se1 + 0.01 * chain1
    assert chain1 < 12.0
    # one seeded trajectory: a change after 200 quiet samples is caught within a handful
    rng = np.random.default_rng(304)
    det = SpreadCusum()
    quiet = [det.step(z).signal for z in rng.standard_normal(200).tolist()]
    assert not any(quiet)
    delay = next(
        i for i, z in enumerate((2.0 * rng.standard_normal(100)).tolist(), 1) if det.step(z).signal
    )
    assert delay <= 25


def test_spread_cusum_recursion():
    det = SpreadCusum(sigma1=2.0, h=1.0)
    a, b = 0.5 * (1 - 1 / 4), math.log(2.0)  # increment a z^2 - b
    r = det.step(0.0)
    assert r.statistic == 0.0 and not r.signal
    r = det.step(2.0)
    assert r.statistic == pytest.approx(a * 4 - b, rel=1e-14) and not r.signal
    r = det.step(1.5)
    assert r.statistic == pytest.approx(a * 4 - b + a * 2.25 - b, rel=1e-14) and not r.signal
    r = det.step(2.0)
    assert r.statistic == pytest.approx(2 * (a * 4 - b) + a * 2.25 - b, rel=1e-14)
    assert r.signal and det.statistic == 0.0


# ----------------------------------------------------------------------------------------------
# EWMA
# ----------------------------------------------------------------------------------------------

# Lucas & Saccucci (1990), Technometrics 32(1), asymptotic limits -- values quoted from memory:
# lambda 0.10, L 2.814: ARL0 500, 1-sigma shift 10.3; lambda 0.20, L 2.962: 500 and 10.5.
# Tolerance: 4 standard errors plus half a unit in the last digit plus 1 % for the memory.


@pytest.mark.parametrize(
    ("lam", "L", "arl1", "seed"), [(0.10, 2.814, 10.3, 401), (0.20, 2.962, 10.5, 402)]
)
def test_ewma_arl_lucas_saccucci(lam, L, arl1, seed):
    rng = np.random.default_rng(seed)
    rl = run_lengths(Ewma(lam, L, exact_limits=False), rng, 3000)
    arl, se = mean_and_se(rl)
    assert abs(arl - 500.0) < 4.0 * se + 0.5 + 5.0
    rl = run_lengths(Ewma(lam, L, exact_limits=False), rng, 5000, shift=1.0)
    arl, se = mean_and_se(rl)
    assert abs(arl - arl1) < 4.0 * se + 0.05 + 0.01 * arl1


def test_ewma_exact_limits_match_simulated_spread():
    # Roberts (1959): Var(E_t) = lam/(2-lam) (1 - (1-lam)^(2t)); the limit / L must equal the
    # sd of E_t across independent paths. Each path is a fresh detector (L huge: no signals).
    lam, L, n_paths, T = 0.2, 1e6, 8000, 6
    rng = np.random.default_rng(403)
    values = np.empty((n_paths, T))
    limits = None
    for p in range(n_paths):
        det = Ewma(lam, L, exact_limits=True)
        steps = [det.step(z) for z in rng.standard_normal(T).tolist()]
        values[p] = [s.value for s in steps]
        limits = [s.limit for s in steps]
    sd = values.std(axis=0, ddof=1)
    expected = np.sqrt(lam / (2 - lam) * (1 - (1 - lam) ** (2 * np.arange(1, T + 1))))
    np.testing.assert_allclose(np.asarray(limits) / L, expected, rtol=1e-12)
    # sd of a sample sd ~ sd / sqrt(2 n): 4 of those
    assert np.all(np.abs(sd - expected) < 4 * expected / math.sqrt(2 * n_paths))


def test_ewma_recursion_and_restart():
    det = Ewma(lam=0.1, L=3.0)
    # first limit is L * lam exactly: lam/(2-lam) * (1 - (1-lam)^2) = lam^2
    r = det.step(2.0)
    assert r.value == pytest.approx(0.2) and r.limit == pytest.approx(0.3) and r.signal == 0
    r = det.step(4.0)
    assert r.value == pytest.approx(0.1 * 4.0 + 0.9 * 0.2)
    assert r.signal == 1 and det.value == 0.0
    r = det.step(-3.5)
    assert r.signal == -1 and r.limit == pytest.approx(0.3)
    asym = Ewma(lam=0.1, L=3.0, exact_limits=False)
    assert asym.step(0.0).limit == pytest.approx(3.0 * math.sqrt(0.1 / 1.9))


# ----------------------------------------------------------------------------------------------
# scores
# ----------------------------------------------------------------------------------------------

CASES = [(-3.0, 0.5, 1.7), (0.2, 0.5, 1.7), (5.0, 0.5, 1.7), (0.0, 0.0, 1.0), (12.0, -1.0, 0.3)]


@pytest.mark.parametrize(("y", "mu", "sigma"), CASES)
def test_crps_normal_closed_form_against_quadrature(y, mu, sigma):
    ref = crps_by_quadrature(y, stats.norm(mu, sigma))
    assert crps_normal(y, mu, sigma) == pytest.approx(ref, rel=1e-8, abs=1e-11)


@pytest.mark.parametrize("dof", [1.5, 2.5, 4.0, 10.0, 50.0, 1000.0])
@pytest.mark.parametrize(("y", "mu", "scale"), CASES)
def test_crps_t_closed_form_against_quadrature(y, mu, scale, dof):
    ref = crps_by_quadrature(y, stats.t(dof, loc=mu, scale=scale))
    assert crps_t(y, mu, scale, dof) == pytest.approx(ref, rel=1e-7, abs=1e-10)


def test_scores_array_paths_match_scalar_paths_and_scipy():
    rng = np.random.default_rng(501)
    y = rng.standard_normal(50) * 3
    mu = rng.standard_normal(50)
    s = rng.uniform(0.2, 3.0, 50)
    dof = np.array([1.5, 3.0, 30.0, 1e5, np.inf] * 10)
    ct = crps_t(y, mu, s, dof)
    lt = log_score_t(y, mu, s, dof)
    for i in range(50):
        assert ct[i] == pytest.approx(
            crps_t(float(y[i]), float(mu[i]), float(s[i]), float(dof[i])), rel=1e-12
        )
        assert lt[i] == pytest.approx(
            log_score_t(float(y[i]), float(mu[i]), float(s[i]), float(dof[i])), rel=1e-12
        )
    np.testing.assert_allclose(log_score_normal(y, mu, s), -stats.norm.logpdf(y, mu, s), rtol=1e-13)
    finite = np.isfinite(dof)
    np.testing.assert_allclose(
        lt[finite], -stats.t.logpdf(y[finite], dof[finite], mu[finite], s[finite]), rtol=1e-9
    )
    # broadcasting and 0-d results
    assert crps_normal(np.array(0.3), 0.0, 1.0) == pytest.approx(crps_normal(0.3, 0.0, 1.0), 1e-15)
    assert isinstance(crps_t(np.float32(0.3), 0.0, 1.0, 5.0), float)
    assert crps_t(np.zeros((2, 3)), 0.0, 1.0, 4.0).shape == (2, 3)


@pytest.mark.parametrize("dof", [0.5, 1.0, 3.0, 30.0, 1e4])
def test_log_score_t_against_scipy(dof):
    for y, mu, s in CASES:
        ref = -stats.t.logpdf(y, dof, mu, s)
        assert log_score_t(y, mu, s, dof) == pytest.approx(ref, rel=1e-10)
        assert log_score_normal(y, mu, s) == pytest.approx(-stats.norm.logpdf(y, mu, s), rel=1e-13)


def test_t_scores_reduce_to_normal():
    for y, mu, s in CASES:
        # dof = inf takes the normal branch exactly
        assert crps_t(y, mu, s, math.inf) == crps_normal(y, mu, s)
        assert log_score_t(y, mu, s, math.inf) == log_score_normal(y, mu, s)
        # very large finite dof: the t tends to the normal (difference O(1/dof)); differences
        # of lgamma values would lose ~1e-2 here, the asymptotic series must not
        assert crps_t(y, mu, s, 1e13) == pytest.approx(crps_normal(y, mu, s), rel=1e-9)
        assert log_score_t(y, mu, s, 1e13) == pytest.approx(log_score_normal(y, mu, s), rel=1e-9)


def test_half_gamma_ratio_series_against_lgamma():
    # large-dof branch (asymptotic series) vs direct lgamma where both are accurate
    for dof in [60.0, 61.5, 80.0, 200.0]:
        for y, mu, s in CASES:
            direct = -(
                math.lgamma((dof + 1) / 2)
                - math.lgamma(dof / 2)
                - 0.5 * math.log(dof * math.pi)
                - (dof + 1) / 2 * math.log1p(((y - mu) / s) ** 2 / dof)
            ) + math.log(s)
            assert log_score_t(y, mu, s, dof) == pytest.approx(direct, rel=1e-12)


# ----------------------------------------------------------------------------------------------
# calibration
# ----------------------------------------------------------------------------------------------


def test_calibration_running_means_against_weighted_averages():
    rng = np.random.default_rng(601)
    n, half_life, dof = 40, 7.0, 4.0
    mu = rng.standard_normal(n)
    scale = rng.uniform(0.5, 2.0, n)
    y = mu + scale * rng.standard_t(dof, n) * 1.3
    cal = Calibration(half_life, level=0.9)
    results = [cal.step(y[i], mu[i], scale[i], dof) for i in range(n)]
    ages = np.arange(n)[::-1]
    weights = 0.5 ** (ages / half_life)
    lo, hi = stats.t.interval(0.9, dof, loc=mu, scale=scale)
    covered = (y >= lo) & (y <= hi)
    logs = -stats.t.logpdf(y, dof, mu, scale)
    crps = np.array(
        [crps_by_quadrature(y[i], stats.t(dof, loc=mu[i], scale=scale[i])) for i in range(n)]
    )
    assert [r.covered for r in results] == covered.tolist()
    last = results[-1]
    assert last.coverage == pytest.approx(np.average(covered, weights=weights), rel=1e-12)
    assert last.log_score == pytest.approx(np.average(logs, weights=weights), rel=1e-12)
    assert last.crps == pytest.approx(np.average(crps, weights=weights), rel=1e-7)
    # bias correction: the first result is the first observation itself
    assert results[0].log_score == pytest.approx(logs[0], rel=1e-12)
    assert cal.count == n


def test_calibration_coverage_of_calibrated_normal_predictive():
    rng = np.random.default_rng(602)
    n = 4000
    cal = Calibration(half_life=1e9, level=0.95)  # weights all ~1
    mu = rng.standard_normal(n)
    y = mu + 2.0 * rng.standard_normal(n)
    for i in range(n):
        r = cal.step(y[i], mu[i], 2.0)
    se = math.sqrt(0.95 * 0.05 / n)  # binomial standard error
    assert abs(r.coverage - 0.95) < 4 * se
    # mean log score of a calibrated normal is its entropy 0.5 ln(2 pi e sigma^2) (scipy);
    # per-sample sd of the log score is sd(z^2 / 2) = 1 / sqrt(2)
    assert abs(r.log_score - stats.norm(0, 2.0).entropy()) < 4 / math.sqrt(2 * n)
    # mean CRPS of a calibrated normal: sigma / sqrt(pi) (Gneiting & Raftery 2007)
    se_crps = np.std(crps_normal(y, mu, 2.0), ddof=1) / math.sqrt(n)
    assert abs(r.crps - 2.0 / math.sqrt(math.pi)) < 4 * se_crps


# ----------------------------------------------------------------------------------------------
# std baseline
# ----------------------------------------------------------------------------------------------


def test_std_baseline_geometric_weighted_mean_and_flags():
    rng = np.random.default_rng(701)
    stds = rng.uniform(0.5, 1.5, 30)
    learn = rng.uniform(size=30) < 0.6
    learn[0] = True
    sb = StdBaseline(half_life=5.0, limit_abs=1.4, ratio=1.5)
    assert math.isnan(sb.baseline)
    learned = []
    for s, lrn in zip(stds, learn, strict=True):
        r = sb.step(s, learn=bool(lrn))
        if learned:
            w = 0.5 ** (np.arange(len(learned))[::-1] / 5.0)
            ref = math.exp(np.average(np.log(learned), weights=w))
            assert r.baseline == pytest.approx(ref, rel=1e-12)
            assert r.ratio == pytest.approx(s / ref, rel=1e-12)
            assert r.too_high_ratio == (s / ref > 1.5)
        else:
            assert math.isnan(r.baseline) and not r.too_high_ratio
        assert r.too_high_abs == (s > 1.4)
        if lrn:
            learned.append(s)
    # a jump is judged against the old baseline, and learn=False leaves it alone
    before = sb.baseline
    r = sb.step(before * 2.0)
    assert r.too_high_ratio and sb.baseline == before
    plain = StdBaseline(3.0)
    plain.step(1.0, learn=True)
    r = plain.step(100.0)
    assert not r.too_high_abs and not r.too_high_ratio and r.ratio == 100.0



@pytest.mark.parametrize(("limit_abs", "ratio"), [(1.4, 1.5), (None, None), (None, 1.2)])
def test_std_baseline_judge_is_step_without_learning(limit_abs, ratio):
    """judge() gives step()'s ratio and flags, bit for bit, and learns nothing (step() is
    checked against numpy above)."""
    rng = np.random.default_rng(702)
    sb = StdBaseline(half_life=4.0, limit_abs=limit_abs, ratio=ratio)
    twin = StdBaseline(half_life=4.0, limit_abs=limit_abs, ratio=ratio)
    for s, lrn in zip(rng.uniform(0.3, 2.5, 40), rng.uniform(size=40) < 0.5, strict=True):
        got = sb.judge(float(s))
        want = twin.step(float(s))
        assert (np.float64(got[0]).tobytes(), got[1:]) == (
            np.float64(want.ratio).tobytes(), (want.too_high_abs, want.too_high_ratio))
        assert sb.to_state() == twin.to_state()
        if lrn:
            sb.step(s, learn=True)
            twin.step(s, learn=True)
    assert sb.judge(np.float32(1.0))[0] == twin.step(1.0).ratio  # any real number
    for bad in (0.0, -1.0, math.inf, math.nan):
        with pytest.raises(ValueError, match="std must be finite and > 0"):
            sb.judge(bad)

# ----------------------------------------------------------------------------------------------
# input region
# ----------------------------------------------------------------------------------------------


def test_input_region_against_numpy_weighted_cov_and_scipy_mahalanobis():
    rng = np.random.default_rng(801)
    n, d, half_life = 60, 3, 20.0
    a = rng.standard_normal((d, d))
    xs = rng.standard_normal((n, d)) @ a.T + np.array([400.0, 2.0, -5.0])
    reg = InputRegion(d, half_life, limit=4.0)
    for i, x in enumerate(xs):
        if i < d + 1:
            assert math.isnan(reg.distance(x))
        reg.update(x)
    weights = 0.5 ** (np.arange(n)[::-1] / half_life)
    cov = np.cov(xs.T, aweights=weights)
    mean = np.average(xs, axis=0, weights=weights)
    np.testing.assert_allclose(reg.mean, mean, rtol=1e-12)
    np.testing.assert_allclose(reg.cov, cov, rtol=1e-10, atol=1e-12)
    # the documented ridge: 1e-8 times each variance (floored at 1e-12 tr(C)/n)
    ridge = 1e-8 * np.maximum(np.diag(cov), 1e-12 * np.trace(cov) / d)
    vi = np.linalg.inv(cov + np.diag(ridge))
    vi_plain = np.linalg.inv(cov)
    for p in [mean + 0.1, xs[3], mean + 5 * a[:, 0], np.array([401.0, 0.0, -3.0])]:
        ref = mahalanobis(p, mean, vi)
        assert reg.distance(p) == pytest.approx(ref, rel=1e-9)
        # and the ridge is tiny: same distance as the unregularised one to 1e-4
        assert reg.distance(p) == pytest.approx(mahalanobis(p, mean, vi_plain), rel=1e-4)
        r = reg.step(p)
        assert r.outside == (ref > 4.0)
    assert reg.step(mean + 10 * a[:, 0]).outside


def test_input_region_constant_input_and_learn_flag():
    reg = InputRegion(2, 50.0, limit=3.0)
    rng = np.random.default_rng(802)
    for v in rng.standard_normal(10).tolist():
        reg.step([v, 7.0], learn=True)
    assert reg.count == 10
    assert math.isfinite(reg.distance([0.0, 7.0]))
    assert reg.step([0.0, 7.5]).outside  # the constant input moved: new region
    reg.step([0.0, 7.5])
    assert reg.count == 10
    same_point = InputRegion(1, 5.0, 1.0)
    for _ in range(3):
        same_point.update([2.0])
    assert same_point.distance([2.0]) == 0.0 and same_point.distance([2.1]) == math.inf


# ----------------------------------------------------------------------------------------------
# parameter drift
# ----------------------------------------------------------------------------------------------


def random_spd(rng, k, scale=1.0):
    a = rng.standard_normal((k, k))
    return scale * (a @ a.T + k * np.eye(k))


def kl_reference(m0, s0, m1, s1):
    """Closed-form KL(N0 || N1) with numpy.linalg.slogdet and inv."""
    k = m0.size
    inv1 = np.linalg.inv(s1)
    d = m1 - m0
    return 0.5 * (
        np.trace(inv1 @ s0) + d @ inv1 @ d - k + np.linalg.slogdet(s1)[1] - np.linalg.slogdet(s0)[1]
    )


def test_param_drift_against_closed_form_monte_carlo_and_scipy():
    rng = np.random.default_rng(901)
    k = 4
    m_ref, s_ref = rng.standard_normal(k), random_spd(rng, k)
    m_now, s_now = m_ref + 0.5 * rng.standard_normal(k), random_spd(rng, k, 0.7)
    pd = ParamDrift(window=10.0)
    first = pd.step(0.0, m_ref, s_ref)
    assert (first.mahalanobis, first.kl, first.replaced) == (0.0, 0.0, True)
    r = pd.step(3.0, m_now, s_now)
    assert not r.replaced and r.reference_time == 0.0
    assert r.mahalanobis == pytest.approx(
        mahalanobis(m_now, m_ref, np.linalg.inv(s_ref)), rel=1e-12
    )
    ref_kl = kl_reference(m_now, s_now, m_ref, s_ref)
    assert r.kl == pytest.approx(ref_kl, rel=1e-11)
    # Monte Carlo: KL = E_0[log p0(x) - log p1(x)] with scipy.stats.multivariate_normal
    x = stats.multivariate_normal(m_now, s_now).rvs(100_000, random_state=rng)
    diff = stats.multivariate_normal(m_now, s_now).logpdf(x) - stats.multivariate_normal(
        m_ref, s_ref
    ).logpdf(x)
    assert abs(diff.mean() - r.kl) < 4 * diff.std() / math.sqrt(diff.size)
    # entropy identity: KL = cross-entropy - entropy
    assert r.kl == pytest.approx(
        -stats.multivariate_normal(m_ref, s_ref).logpdf(m_now)
        + 0.5 * np.trace(np.linalg.inv(s_ref) @ s_now)
        - stats.multivariate_normal(m_now, s_now).entropy(),
        rel=1e-10,
    )


def test_param_drift_window_and_non_pd():
    pd = ParamDrift(window=5.0)
    eye = np.eye(2)
    pd.step(1.0, [0.0, 0.0], eye)
    assert not pd.step(5.9, [1.0, 0.0], eye).replaced
    r = pd.step(6.0, [2.0, 0.0], eye)
    # computed against the old reference, then replaced
    assert r.replaced and r.reference_time == 6.0 and r.mahalanobis == pytest.approx(2.0)
    r = pd.step(7.0, [2.0, 1.0], eye)
    assert r.mahalanobis == pytest.approx(1.0) and r.kl == pytest.approx(0.5)
    bad = ParamDrift(window=1.0)
    bad.step(0.0, [0.0, 0.0], [[1.0, 2.0], [2.0, 1.0]])  # indefinite reference
    r = bad.step(0.5, [1.0, 0.0], eye)
    assert math.isnan(r.mahalanobis) and math.isnan(r.kl)
    ok = ParamDrift(window=1.0)
    ok.step(0.0, [0.0, 0.0], eye)
    r = ok.step(0.5, [1.0, 0.0], [[1.0, 0.0], [0.0, 0.0]])  # singular current covariance
    assert r.mahalanobis == pytest.approx(1.0) and math.isnan(r.kl)


def _old_param_drift(m, s, m_ref, s_ref):
    """The formulas ParamDrift used before it read the square-root factor: Cholesky factors
    of both covariances and triangular solves (scipy.linalg), computed here directly."""
    import scipy.linalg as sl

    lr, lc = np.linalg.cholesky(s_ref), np.linalg.cholesky(s)
    y = sl.solve_triangular(lr, m - m_ref, lower=True)
    a = sl.solve_triangular(lr, lc, lower=True)
    maha2 = float(y @ y)
    kl = 0.5 * (float(np.sum(a * a)) + maha2 - m.size
                + 2.0 * float(np.sum(np.log(np.diag(lr)) - np.log(np.diag(lc)))))
    return math.sqrt(maha2), max(kl, 0.0)


@pytest.mark.parametrize("noise", ["learned", "known"])
def test_param_drift_from_the_square_root_factor_equals_the_covariance_formulas(noise):
    from recursive import Posterior, Stabilized

    rng = np.random.default_rng(77)
    n = 5
    post = Posterior(n, alpha=0.5, forgetting=Stabilized(50.0),
                     noise_std=0.3 if noise == "known" else None, noise_prior=(0.5, 2.0))
    w = rng.standard_normal(n)
    pd_sqrt, pd_cov = ParamDrift(window=30.0), ParamDrift(window=30.0)
    ref = None
    for i in range(120):
        phi = np.r_[1.0, rng.standard_normal(n - 1)]
        # the weights move half way through: the distances grow
        post.update(phi, float(phi @ (w + (i > 60)) + 0.3 * rng.standard_normal()), float(i))
        m, s = post.mean, post.scale_matrix
        a = pd_sqrt.step_sqrt(float(i), m, post.sqrt_information, post.noise_var)
        b = pd_cov.step(float(i), m, s)
        if ref is None:
            assert (a.mahalanobis, a.kl, a.replaced) == (0.0, 0.0, True)
        else:
            d_old, kl_old = _old_param_drift(m, s, *ref)
            assert a.mahalanobis == pytest.approx(d_old, rel=1e-12, abs=1e-300)
            assert a.kl == pytest.approx(kl_old, rel=1e-12, abs=1e-15)
            assert b.mahalanobis == pytest.approx(d_old, rel=1e-12, abs=1e-300)
            assert b.kl == pytest.approx(kl_old, rel=1e-12, abs=1e-15)
        assert (a.replaced, a.reference_time) == (b.replaced, b.reference_time)
        if a.replaced:
            ref = (m, s)
    assert a.mahalanobis > 1.0  # the check above covered a real drift


def test_param_drift_state_round_trip_keeps_the_bits_and_reads_old_states():
    from recursive import Posterior

    rng = np.random.default_rng(78)
    post = Posterior(3, alpha=1.0)
    pd = ParamDrift(window=100.0)
    for i in range(10):
        phi = rng.standard_normal(3)
        post.update(phi, float(phi.sum()), float(i))
        pd.step_sqrt(float(i), post.mean, post.sqrt_information, post.noise_var)
    state = json.loads(json.dumps(pd.to_state()))
    back = ParamDrift.from_state(state)
    phi = rng.standard_normal(3)
    post.update(phi, 3.0, 20.0)
    a = pd.step_sqrt(20.0, post.mean, post.sqrt_information, post.noise_var)
    b = back.step_sqrt(20.0, post.mean, post.sqrt_information, post.noise_var)
    assert (a.mahalanobis, a.kl) == (b.mahalanobis, b.kl)
    # a state written with the reference's covariance (before the factor was kept)
    old = ParamDrift(window=100.0)
    old.step(0.0, [0.0, 0.0], [[4.0, 0.0], [0.0, 1.0]])
    st_old = old.to_state()
    for k in ("reference_factor", "reference_lower"):
        del st_old[k]
    st_old["reference_cov"] = [[4.0, 0.0], [0.0, 1.0]]
    r = ParamDrift.from_state(st_old).step(1.0, [2.0, 1.0], np.eye(2))
    # d^2 = 2^2 / 4 + 1^2 / 1 (hand computed)
    assert r.mahalanobis == pytest.approx(math.sqrt(2.0), rel=1e-15)


def test_param_drift_kl_is_computed_only_when_read():
    pd = ParamDrift(window=10.0)
    pd.step(0.0, [0.0, 0.0], np.eye(2))
    r = pd.step(1.0, [1.0, 0.0], [[1.0, 0.0], [0.0, 0.0]])  # singular: the KL would be nan
    assert r._kl is None  # nothing computed yet
    assert math.isnan(r.kl) and r._args is None


# ----------------------------------------------------------------------------------------------
# trust state machine
# ----------------------------------------------------------------------------------------------


def test_trust_raises_immediately_and_clears_after_count():
    tr = Trust(clear_after_count=3)
    r = tr.step(0.0, {"mean_shift": (2, 6.1, 5.0)})
    assert (r.state, r.changed, r.old, r.level) == ("untrusted", True, "normal", 2)
    assert r.reasons == (("mean_shift", 2, 6.1, 5.0),)
    for t in (1.0, 2.0):
        r = tr.step(t, {})
        assert r.state == "untrusted" and not r.changed
    r = tr.step(3.0, {})
    assert (r.state, r.changed, r.old, r.reasons) == ("normal", True, "untrusted", ())


def test_trust_clearing_needs_count_and_time():
    tr = Trust(clear_after_count=3, clear_after_time=10.0)
    tr.step(0.0, {"stale": (1, 100.0, 60.0)})
    # three absent steps but only 2 time units since the first absent one
    for t in (1.0, 2.0, 3.0):
        assert tr.step(t, {}).state == "caution"
    r = tr.step(11.0, {})
    assert r.state == "normal" and r.changed
    tr2 = Trust(clear_after_count=3, clear_after_time=10.0)
    tr2.step(0.0, {"stale": (1, 100.0, 60.0)})
    assert tr2.step(1.0, {}).state == "caution"
    assert tr2.step(20.0, {}).state == "caution"  # time passed, count 2 < 3
    assert tr2.step(21.0, {}).state == "normal"


def test_trust_no_flapping_on_alternating_condition():
    tr = Trust(clear_after_count=3)
    changes = []
    for i in range(40):
        active = {"spread": (1, 2.0, 1.5)} if i % 2 == 0 else {}
        changes.append(tr.step(float(i), active).changed)
    assert changes[0] and not any(changes[1:])
    assert tr.state == "caution"


def test_trust_level_is_max_over_reasons_and_steps_down_with_hysteresis():
    tr = Trust(clear_after_count=2)
    r = tr.step(0.0, {"b": (1, 1.0, 0.5), "a": (2, 3.0, 2.0)})
    assert r.state == "untrusted" and [x[0] for x in r.reasons] == ["a", "b"]
    # "a" drops to level 1 while "b" goes away
    r = tr.step(1.0, {"a": (1, 1.5, 1.0)})
    assert r.state == "untrusted" and r.reasons == (("a", 2, 1.5, 1.0), ("b", 1, 1.0, 0.5))
    r = tr.step(2.0, {"a": (1, 1.4, 1.0)})
    assert r.state == "caution" and r.changed and r.reasons == (("a", 1, 1.4, 1.0),)
    tr.step(3.0, {})
    assert tr.step(4.0, {}).state == "normal"


def test_trust_acknowledge_flags_without_clearing():
    tr = Trust(clear_after_count=1)
    r = tr.step(0.0, {"a": (1, 1.0, 0.5)})
    assert not r.acknowledged
    tr.acknowledge()
    r = tr.step(1.0, {"a": (1, 1.1, 0.5)})
    assert r.acknowledged and r.state == "caution" and r.reasons == (("a", 1, 1.1, 0.5),)
    r = tr.step(2.0, {"a": (2, 3.0, 0.5)})  # escalation is news
    assert not r.acknowledged
    tr.acknowledge()
    r = tr.step(3.0, {"a": (2, 3.0, 0.5), "b": (1, 0.0, 0.0)})  # so is a new reason
    assert not r.acknowledged
    tr.reset()
    r = tr.step(4.0, {})
    assert r.state == "normal" and not r.acknowledged and r.reasons == ()
    custom = Trust(levels=("ok", "bad"))
    assert custom.step(0.0, {"x": (1, 0.0, 0.0)}).state == "bad"


# ----------------------------------------------------------------------------------------------
# state round trips (hypothesis, derandomized)
# ----------------------------------------------------------------------------------------------

RT = settings(max_examples=30, deadline=None, derandomize=True)
zs_strategy = st.lists(st.floats(-6.0, 6.0, allow_nan=False), min_size=1, max_size=60)


def check_round_trip(make, feed, items, split):
    split = min(split, len(items))
    a = make()
    ref = [feed(a, x) for x in items]
    b = make()
    head = [feed(b, x) for x in items[:split]]
    c = type(b).from_state(json_round_trip(b.to_state()))
    tail = [feed(c, x) for x in items[split:]]
    assert same(head + tail, ref)
    assert c.to_state() == a.to_state()
    assert c.params() == a.params()


@RT
@given(zs_strategy, st.integers(0, 60), st.floats(0.0, 3.0))
def test_round_trip_cusum(zs, split, hs):
    check_round_trip(lambda: Cusum(0.5, 3.1, head_start=hs), lambda d, z: d.step(z), zs, split)


@RT
@given(zs_strategy, st.integers(0, 60))
def test_round_trip_page_hinkley(zs, split):
    check_round_trip(lambda: PageHinkley(0.1, 0.3, 2.5), lambda d, z: d.step(z), zs, split)


@RT
@given(zs_strategy, st.integers(0, 60))
def test_round_trip_spread_cusum(zs, split):
    check_round_trip(lambda: SpreadCusum(1.7, 2.0), lambda d, z: d.step(z), zs, split)


@RT
@given(zs_strategy, st.integers(0, 60), st.booleans())
def test_round_trip_ewma(zs, split, exact):
    check_round_trip(lambda: Ewma(0.3, 1.5, exact), lambda d, z: d.step(z), zs, split)


@RT
@given(zs_strategy, st.integers(0, 60), st.floats(1.1, 1e6))
def test_round_trip_calibration(zs, split, dof):
    check_round_trip(
        lambda: Calibration(4.0, 0.8),
        lambda d, z: d.step(z * 1.5, 0.2, 1.3, dof if z > 0 else math.inf),
        zs,
        split,
    )


@RT
@given(zs_strategy, st.integers(0, 60))
def test_round_trip_std_baseline(zs, split):
    check_round_trip(
        lambda: StdBaseline(3.0, limit_abs=10.0, ratio=1.4),
        lambda d, z: d.step(math.exp(z / 3), learn=z > -1.0),
        zs,
        split,
    )


@RT
@given(st.integers(0, 2**32 - 1), st.integers(1, 30), st.integers(0, 30))
def test_round_trip_input_region(seed, n, split):
    xs = np.random.default_rng(seed).standard_normal((n, 3)).tolist()
    check_round_trip(
        lambda: InputRegion(3, 6.0, 2.0), lambda d, x: d.step(x, learn=x[0] > -0.5), xs, split
    )


@RT
@given(st.integers(0, 2**32 - 1), st.integers(1, 20), st.integers(0, 20))
def test_round_trip_param_drift(seed, n, split):
    rng = np.random.default_rng(seed)
    items = []
    t = 0.0
    for _ in range(n):
        t += float(rng.uniform(0, 2))
        items.append((t, rng.standard_normal(3), random_spd(rng, 3)))
    check_round_trip(lambda: ParamDrift(3.0), lambda d, x: d.step(*x), items, split)


def _trust_feed(tr, item):
    t, active, ack = item
    r = tr.step(t, active)
    if ack:
        tr.acknowledge()
    return r


@RT
@given(
    st.lists(
        st.tuples(
            st.dictionaries(
                st.sampled_from(["mean_shift", "stale", "spread"]),
                st.tuples(st.integers(1, 2), st.floats(-1e3, 1e3), st.floats(-1e3, 1e3)),
                max_size=3,
            ),
            st.booleans(),
        ),
        min_size=1,
        max_size=40,
    ),
    st.integers(0, 40),
)
def test_round_trip_trust(steps, split):
    items = [(0.7 * i, active, ack) for i, (active, ack) in enumerate(steps)]
    check_round_trip(
        lambda: Trust(clear_after_count=2, clear_after_time=1.0), _trust_feed, items, split
    )


def test_trust_round_trip_mid_countdown_with_acknowledgement():
    items = [
        (0.0, {"a": (2, 5.0, 4.0), "b": (1, 1.0, 0.5)}, True),
        (1.0, {"a": (1, 4.5, 4.0)}, False),  # a counting down from 2, b counting down
        (1.5, {"c": (1, 0.2, 0.1)}, False),
    ] + [(2.0 + i, {"c": (1, 0.3, 0.1)} if i % 3 == 0 else {}, False) for i in range(12)]
    make = lambda: Trust(clear_after_count=3, clear_after_time=2.0)  # noqa: E731
    for split in range(1, len(items)):
        check_round_trip(make, _trust_feed, items, split)
    # the acknowledgement survives the round trip
    tr = make()
    for item in items[:2]:
        _trust_feed(tr, item)
    back = Trust.from_state(json_round_trip(tr.to_state()))
    r = back.step(1.2, {"a": (1, 4.0, 4.0), "b": (1, 1.0, 0.5)})
    assert r.acknowledged and r.state == "untrusted"


# ----------------------------------------------------------------------------------------------
# ValueError paths
# ----------------------------------------------------------------------------------------------


def _stepped(obj, *calls):
    for c in calls:
        c(obj)
    return obj


BAD_CALLS = {
    "cusum k<0": lambda: Cusum(k=-0.1),
    "cusum k nan": lambda: Cusum(k=math.nan),
    "cusum h=0": lambda: Cusum(h=0.0),
    "cusum h inf": lambda: Cusum(h=math.inf),
    "cusum head_start>=h": lambda: Cusum(h=2.0, head_start=2.0),
    "cusum head_start<0": lambda: Cusum(head_start=-1.0),
    "cusum k str": lambda: Cusum(k="a"),
    "cusum z nan": lambda: Cusum().step(math.nan),
    "cusum state schema": lambda: Cusum.from_state({**Cusum().to_state(), "schema": 2}),
    "cusum state kind": lambda: Cusum.from_state(Ewma().to_state()),
    "cusum state missing": lambda: Cusum.from_state(
        {k: v for k, v in Cusum().to_state().items() if k != "upper"}
    ),
    "cusum state negative": lambda: Cusum.from_state({**Cusum().to_state(), "upper": -1.0}),
    "cusum state not dict": lambda: Cusum.from_state([1, 2]),
    "cusum state params": lambda: Cusum.from_state({**Cusum().to_state(), "params": {"x": 1}}),
    "ph delta<0": lambda: PageHinkley(0.0, -0.1, 1.0),
    "ph threshold 0": lambda: PageHinkley(0.0, 0.1, 0.0),
    "ph mu inf": lambda: PageHinkley(math.inf, 0.1, 1.0),
    "ph z inf": lambda: PageHinkley(0.0, 0.1, 1.0).step(math.inf),
    "ph state minimum": lambda: PageHinkley.from_state(
        {**PageHinkley(0.0, 0.1, 1.0).to_state(), "minimum": 1.0}
    ),
    "spread sigma1=1": lambda: SpreadCusum(sigma1=1.0),
    "spread h<0": lambda: SpreadCusum(h=-1.0),
    "spread z nan": lambda: SpreadCusum().step(math.nan),
    "spread state": lambda: SpreadCusum.from_state({**SpreadCusum().to_state(), "s": -1.0}),
    "ewma lam 0": lambda: Ewma(lam=0.0),
    "ewma lam>1": lambda: Ewma(lam=1.5),
    "ewma L 0": lambda: Ewma(L=0.0),
    "ewma exact str": lambda: Ewma(exact_limits="yes"),
    "ewma z nan": lambda: Ewma().step(math.nan),
    "ewma state t": lambda: Ewma.from_state({**Ewma().to_state(), "t": -1}),
    "score sigma 0": lambda: crps_normal(0.0, 0.0, 0.0),
    "score sigma nan": lambda: log_score_normal(0.0, 0.0, math.nan),
    "score sigma array": lambda: crps_normal(np.zeros(3), 0.0, np.array([1.0, -1.0, 1.0])),
    "score t scale": lambda: log_score_t(0.0, 0.0, -1.0, 3.0),
    "score t dof 0": lambda: log_score_t(0.0, 0.0, 1.0, 0.0),
    "score t dof array": lambda: log_score_t(np.zeros(2), 0.0, 1.0, np.array([3.0, -1.0])),
    "crps t dof 1": lambda: crps_t(0.0, 0.0, 1.0, 1.0),
    "crps t dof nan": lambda: crps_t(0.0, 0.0, 1.0, math.nan),
    "crps t dof array": lambda: crps_t(np.zeros(2), 0.0, 1.0, np.array([3.0, 0.5])),
    "calib half_life": lambda: Calibration(0.0),
    "calib level 1": lambda: Calibration(5.0, level=1.0),
    "calib y nan": lambda: Calibration(5.0).step(math.nan, 0.0, 1.0),
    "calib mu inf": lambda: Calibration(5.0).step(0.0, math.inf, 1.0),
    "calib scale": lambda: Calibration(5.0).step(0.0, 0.0, 0.0),
    "calib dof": lambda: Calibration(5.0).step(0.0, 0.0, 1.0, 1.0),
    "baseline half_life": lambda: StdBaseline(-1.0),
    "baseline limit_abs": lambda: StdBaseline(5.0, limit_abs=0.0),
    "baseline ratio": lambda: StdBaseline(5.0, ratio=1.0),
    "baseline std": lambda: StdBaseline(5.0).step(0.0),
    "baseline state": lambda: StdBaseline.from_state({**StdBaseline(5.0).to_state(), "count": 2}),
    "region n_inputs": lambda: InputRegion(0, 5.0, 3.0),
    "region n_inputs float": lambda: InputRegion(2.0, 5.0, 3.0),
    "region half_life": lambda: InputRegion(2, 0.0, 3.0),
    "region limit": lambda: InputRegion(2, 5.0, -3.0),
    "region ridge": lambda: InputRegion(2, 5.0, 3.0, ridge=-1.0),
    "region x shape": lambda: InputRegion(2, 5.0, 3.0).update([1.0, 2.0, 3.0]),
    "region x nan": lambda: InputRegion(2, 5.0, 3.0).distance([1.0, math.nan]),
    "region x text": lambda: InputRegion(2, 5.0, 3.0).step(["a", "b"]),
    "region state": lambda: InputRegion.from_state(
        {**InputRegion(2, 5.0, 3.0).to_state(), "scatter": [[1.0]]}
    ),
    "drift window": lambda: ParamDrift(0.0),
    "drift t nan": lambda: ParamDrift(1.0).step(math.nan, [0.0], [[1.0]]),
    "drift t back": lambda: _stepped(ParamDrift(1.0), lambda p: p.step(5.0, [0.0], [[1.0]])).step(
        4.0, [0.0], [[1.0]]
    ),
    "drift mean 2d": lambda: ParamDrift(1.0).step(0.0, [[0.0]], [[1.0]]),
    "drift cov shape": lambda: ParamDrift(1.0).step(0.0, [0.0, 0.0], [[1.0]]),
    "drift size change": lambda: _stepped(
        ParamDrift(1.0), lambda p: p.step(0.0, [0.0], [[1.0]])
    ).step(1.0, [0.0, 0.0], np.eye(2)),
    "trust levels short": lambda: Trust(levels=("only",)),
    "trust levels dup": lambda: Trust(levels=("a", "a")),
    "trust levels str": lambda: Trust(levels="abc"),
    "trust levels empty name": lambda: Trust(levels=("a", "")),
    "trust count 0": lambda: Trust(clear_after_count=0),
    "trust count float": lambda: Trust(clear_after_count=2.5),
    "trust time<0": lambda: Trust(clear_after_time=-1.0),
    "trust t nan": lambda: Trust().step(math.nan, {}),
    "trust t back": lambda: _stepped(Trust(), lambda t: t.step(5.0, {})).step(4.0, {}),
    "trust active type": lambda: Trust().step(0.0, [("a", 1, 0.0, 0.0)]),
    "trust level 0": lambda: Trust().step(0.0, {"a": (0, 1.0, 1.0)}),
    "trust level 3": lambda: Trust().step(0.0, {"a": (3, 1.0, 1.0)}),
    "trust entry len": lambda: Trust().step(0.0, {"a": (1, 1.0)}),
    "trust value text": lambda: Trust().step(0.0, {"a": (1, "x", 1.0)}),
    "trust name": lambda: Trust().step(0.0, {3: (1, 1.0, 1.0)}),
    "trust state level": lambda: Trust.from_state(
        {
            **Trust().to_state(),
            "reasons": {"a": {"held": {"5": [0, 0.0]}, "value": 1.0, "limit": 1.0, "ack": 0}},
        }
    ),
    "trust state malformed": lambda: Trust.from_state(
        {**Trust().to_state(), "reasons": {"a": {"held": {}}}}
    ),
}


@pytest.mark.parametrize("name", sorted(BAD_CALLS))
def test_value_errors(name):
    with pytest.raises(ValueError):
        BAD_CALLS[name]()


def test_value_error_messages_name_the_bad_value():
    with pytest.raises(ValueError, match="-0.25"):
        Cusum(k=-0.25)
    with pytest.raises(ValueError, match="1.5"):
        Ewma(lam=1.5)
    with pytest.raises(ValueError, match="-2"):
        crps_normal(np.zeros(2), 0.0, np.array([1.0, -2.0]))
    with pytest.raises(ValueError, match="0.75"):
        crps_t(0.0, 0.0, 1.0, 0.75)
    with pytest.raises(ValueError, match="shape"):
        InputRegion(2, 5.0, 3.0).update([1.0])


def test_input_region_distances_match_scipy_mahalanobis_row_by_row():
    """Vectorized distances == scipy.spatial.distance.mahalanobis per row (via distance())."""
    from scipy.spatial.distance import mahalanobis

    rng = np.random.default_rng(77)
    reg = InputRegion(3, half_life=1e9, limit=3.0, ridge=0.0)
    data = rng.normal(size=(60, 3)) @ np.array([[1, 0.5, 0], [0, 1, 0.2], [0, 0, 0.3]])
    assert np.all(np.isnan(reg.distances(data[:2])))
    for row in data:
        reg.update(row)
    X = rng.normal(size=(7, 3)) * 3
    d = reg.distances(X)
    vi = np.linalg.inv(np.cov(data.T))
    for i in range(7):
        assert d[i] == pytest.approx(reg.distance(X[i]), rel=1e-12)
        assert d[i] == pytest.approx(mahalanobis(X[i], data.mean(0), vi), rel=1e-6)
    with pytest.raises(ValueError, match="shape"):
        reg.distances(np.zeros((2, 4)))


def test_trust_advance_is_step_without_the_result():
    """advance() changes the state exactly as step() does and reports a level change."""
    seq = [{"a": (1, 2.0, 1.0)}, {"a": (2, 3.0, 1.0), "b": (1, 1.0, 0.5)}, {}, {}, {},
           {"b": (1, 0.7, 0.5)}, {}, {}, {}, {}]
    one, two, three = (Trust(("ok", "caution", "alarm"), 2, 0.0) for _ in range(3))
    for i, active in enumerate(seq):
        old = one.level
        step = one.step(float(i), active)
        assert two.advance(float(i), active) == step.changed == (one.level != old)
        assert three.advance(float(i), dict(active), checked=True) == step.changed
        assert two.to_state() == one.to_state() == three.to_state()
    with pytest.raises(ValueError, match="level"):
        two.advance(20.0, {"a": (5, 1.0, 1.0)})


def _trust_reference(levels, count, clear_time, steps):
    """The rules of the `Trust` Notes, written out plainly: (state, reasons, acknowledged)
    after each step. ``steps`` holds ``(t, active, acknowledge_after)``."""
    held = {}  # (name, level) -> [absent steps, absent since]
    info, ack, out = {}, {}, []
    for t, active, acknowledge in steps:
        for name, (lvl, value, limit) in active.items():
            for ell in range(1, lvl + 1):
                held[(name, ell)] = [0, 0.0]
            info[name] = (value, limit)
        for (name, ell), rec in list(held.items()):
            if ell <= active.get(name, (0,))[0]:
                continue
            if rec[0] == 0:
                rec[1] = t
            rec[0] += 1
            if rec[0] >= count and t - rec[1] >= clear_time:
                del held[(name, ell)]
        tops = {}
        for name, ell in held:
            tops[name] = max(tops.get(name, 0), ell)
        for name in list(ack):
            if name not in tops:
                del ack[name]  # cleared: coming back is a new, unacknowledged reason
            else:
                ack[name] = min(ack[name], tops[name])
        if acknowledge:
            ack = dict(tops)
        reasons = tuple((n, tops[n], *info[n]) for n in sorted(tops))
        acked = bool(tops) and all(ack.get(n, 0) >= tops[n] for n in tops)
        out.append((levels[max(tops.values(), default=0)], reasons, acked))
    return out


@pytest.mark.parametrize("count,clear_time", [(1, 0.0), (3, 0.0), (2, 2.5), (4, 1.0)])
def test_trust_follows_the_rules_of_its_notes_on_random_reasons(count, clear_time):
    # reference: the hysteresis and acknowledgement rules as the class Notes state them
    rng = np.random.default_rng(50 + count)
    levels = ("normal", "caution", "untrusted")
    steps, t = [], 0.0
    for _ in range(400):
        t += float(rng.choice([0.0, 0.5, 1.0]))
        active = {}
        for name in ("a", "b", "c"):
            if rng.random() < 0.25:
                active[name] = (int(rng.integers(1, 3)), float(rng.normal()), 1.0)
        steps.append((t, active, bool(rng.random() < 0.05)))
    want = _trust_reference(levels, count, clear_time, steps)
    for checked in (False, True):
        tr = Trust(levels, count, clear_time)
        for (t, active, acknowledge), (state, reasons, acked) in zip(steps, want, strict=True):
            tr.advance(t, active, checked=checked)
            if acknowledge:
                tr.acknowledge()
            assert (tr.state, tr.reasons, tr.acknowledged) == (state, reasons, acked), t
            assert tr.holding == bool(reasons), t
