"""Adaptive rates (recursive.adaptive): the variational-Bayes noise against the published
iteration, convergence to a known noise and a known drift rate within chi-square bounds,
bounds, state round trip and bad settings."""

from __future__ import annotations

import json
import math

import numpy as np
import pytest
from scipy import stats

from daemon.config import ConfigError, loads
from recursive import Posterior
from recursive.adaptive import MIN_RESULTS, Adaptation, RateMatch, RateState, VBNoise
from recursive.forgetting import TermDrift
from tests.conftest import c301_model, toml_config


def _vbakf_reference(H, Y, T, m, P, q, a, b, a0, b0, half_life, iterations):
    """Särkkä and Nummenmaa (2009), the VB-AKF algorithm in covariance form, written out
    for a scalar measurement with F = I and Q = dt diag(q); the forgetting of (a, b) is the
    paper's ``rho`` with the prior (a0, b0) as its floor (recursive.adaptive.VBNoise)."""
    out, t_last = [], None
    for h, y, t in zip(H, Y, T, strict=True):
        if t_last is not None:
            dt = t - t_last
            P = P + dt * np.diag(q)
            rho = 2.0 ** (-dt / half_life)
            a, b = a0 + rho * (a - a0), b0 + rho * (b - b0)
        t_last = t
        s = h @ P @ h
        pred = (h @ m, math.sqrt(b / a + s), 2 * a)
        a_k, b_k = a + 0.5, b
        for _ in range(iterations):
            sig2 = b_k / a_k
            S = s + sig2
            K = P @ h / S
            m_n = m + K * (y - h @ m)
            P_n = P - np.outer(K, K) * S
            b_k = b + 0.5 * (y - h @ m_n) ** 2 + 0.5 * h @ P_n @ h
        m, P, a, b = m_n, P_n, a_k, b_k
        out.append((pred, m.copy(), P.copy(), a, b))
    return out


@pytest.mark.parametrize("iterations", [1, 3])
def test_vb_noise_equals_the_published_iteration_in_covariance_form(iterations):
    rng = np.random.default_rng(5)
    n, N, sigma0, strength = 3, 60, 0.8, 4.0
    alpha = np.array([0.5, 1.0, 2.0])
    q = (0.01, 0.0, 0.002)
    H = np.column_stack([np.ones(N), rng.uniform(-1, 1, (N, 2))])
    Y = H @ [1.0, 2.0, -1.0] + rng.normal(0.0, [0.5] * 30 + [1.5] * 30)
    T = np.cumsum(rng.uniform(0.5, 2.0, N))
    post = Posterior(n, alpha=alpha, noise_prior=(sigma0, strength),
                     forgetting=TermDrift(q), adapt=Adaptation(VBNoise(5.0, iterations)))
    a0, b0 = strength / 2, strength * sigma0 ** 2 / 2
    ref = _vbakf_reference(H, Y, T, np.zeros(n), np.diag(1 / alpha), np.array(q), a0, b0, a0,
                           b0, 5.0, iterations)
    for h, y, t, (pred, m, P, a, b) in zip(H, Y, T, ref, strict=True):
        st = post.update(h, float(y), float(t))
        np.testing.assert_allclose([st.mean, st.scale, st.dof], pred, rtol=1e-9)
        np.testing.assert_allclose(post.mean, m, rtol=1e-9, atol=1e-12)
        np.testing.assert_allclose(post.scale_matrix, P, rtol=1e-8, atol=1e-13)
        s = post.to_state()
        np.testing.assert_allclose([s["nu"] / 2, s["ss"] / 2], [a, b], rtol=1e-10)
    # a prediction later widens by the same Q and forgets (a, b) alike
    dt = 3.0
    p = post.predict(H[0], t=float(T[-1] + dt))
    rho = 2.0 ** (-dt / 5.0)
    a_p, b_p = a0 + rho * (a - a0), b0 + rho * (b - b0)
    s_p = H[0] @ (P + dt * np.diag(q)) @ H[0]
    np.testing.assert_allclose([p.scale, p.dof], [math.sqrt(b_p / a_p + s_p), 2 * a_p],
                               rtol=1e-9)


def test_vb_noise_converges_to_a_known_noise_within_a_chi_square_bound():
    rng = np.random.default_rng(11)
    N, sigma = 3000, 0.7
    post = Posterior(3, alpha=[0.0, 1.0, 1.0], noise_prior=(3.0, 2.0),
                     forgetting=TermDrift((0.0, 1e-6, 0.0)), adapt=Adaptation(VBNoise(None)))
    for k in range(N):
        h = np.array([1.0, *rng.uniform(-1, 1, 2)])
        post.update(h, float(h @ [5.0, 1.0, 2.0] + sigma * rng.standard_normal()), float(k))
    # the sum of N squared N(0, sigma^2) errors is sigma^2 chi2(N) (scipy); the prior (worth
    # two results at 3.0) and three weights move the estimate by well under the band's width
    lo, hi = stats.chi2.ppf([0.0005, 0.9995], N) / N
    ratio = post.noise_var / sigma ** 2
    assert lo - 3 / N < ratio < hi + 2 * 9 / sigma ** 2 / N


def _offset_walk(seed, q_true, start_q, window, N=6000, sigma=0.5):
    rng = np.random.default_rng(seed)
    post = Posterior(3, alpha=[0.0, 1.0, 1.0], noise_std=sigma,
                     forgetting=TermDrift((start_q, 0.0, 0.0)),
                     adapt=None if window is None else
                     Adaptation(rate=RateMatch(0, 1e-5, 10.0, window)))
    off, qs, z2 = 0.0, [], []
    for k in range(N):
        off += math.sqrt(q_true) * rng.standard_normal()
        h = np.array([1.0, *rng.uniform(-1, 1, 2)])
        st = post.update(h, float(off + h[1:] @ [2.0, -1.0] + sigma * rng.standard_normal()),
                         float(k))
        if k >= N // 2:
            qs.append(post.forgetting.q[0])
            z2.append((st.innovation / st.scale) ** 2)
    return np.array(qs), np.array(z2)


def test_matched_offset_rate_converges_to_the_true_one():
    q_true = 0.04
    qs, z2 = _offset_walk(1, q_true, q_true / 16, 100.0)
    # the mean over the second half within 40 % (the estimate's sd is about half the rate
    # for a window of 100 results, over ~10 independent windows: common practice bound)
    assert 0.6 < qs.mean() / q_true < 1.4
    # calibrated: the squared standardized innovations of a filter with the right rate are
    # chi2(1) each, so their sum is chi2(n) (scipy), here inside the two-sided 99.9 % band
    n = z2.size
    lo, hi = stats.chi2.ppf([0.0005, 0.9995], n) / n
    assert lo < z2.mean() < hi
    # and the filter that keeps the starting rate is not (the check can fail)
    _, z2_fixed = _offset_walk(1, q_true, q_true / 16, None)
    assert not lo < z2_fixed.mean() < hi


def test_rate_match_step_is_the_weighted_moment_ratio_and_keeps_its_bounds():
    rng = np.random.default_rng(3)
    rm = RateMatch(0, 0.01, 0.5, 7.0)
    st = rm.start(0.2)
    v2, S, D, used = [], [], [], []
    for k in range(40):
        v2.append(float(rng.exponential(2.0 if k < 25 else 80.0)))
        S.append(float(1.0 + st.q * 3.0))
        D.append(3.0)
        used.append(st.q)
        st = rm.step(st, v2[-1], S[-1], D[-1])
        lam = 2.0 ** (-1.0 / 7.0)
        w = lam ** np.arange(k, -1, -1)
        est = np.sum(w * (np.array(v2) - (np.array(S) - np.array(used) * 3.0))) / np.sum(
            w * 3.0)
        want = used[-1] if k + 1 < MIN_RESULTS else min(max(est, 0.01), 0.5)
        assert st.q == pytest.approx(want, rel=1e-12)
        assert 0.01 <= st.q <= 0.5
    assert st.q == 0.5  # the large residuals push it to its upper bound, not past it
    assert RateState.from_dict(json.loads(json.dumps(st.to_dict()))) == st


def test_state_round_trip_gives_the_same_bits():
    rng = np.random.default_rng(2)
    mk = dict(alpha=[0.0, 1.0], noise_prior=(1.0, 2.0), forgetting=TermDrift((0.05, 0.0), 10.0),
              gate=4.0, adapt=Adaptation(VBNoise(20.0, 2), RateMatch(0, 1e-3, 1.0, 5.0)))
    a = Posterior(2, **mk)
    rows = [(np.array([1.0, x]), float(3 * x + rng.normal()), float(k))
            for k, x in enumerate(rng.uniform(-1, 1, 80))]
    for h, y, t in rows[:40]:
        a.update(h, y, t)
    b = Posterior.from_state(json.loads(json.dumps(a.to_state())))
    assert b.to_state() == a.to_state() and b.adapted == a.adapted
    for h, y, t in rows[40:]:
        assert a.update(h, y, t) == b.update(h, y, t)
    assert a.to_state() == b.to_state()
    assert a.adapted["rate"] != 0.05 and a.config() == Posterior(2, **mk).config()


def test_bad_adaptive_settings_are_refused():
    with pytest.raises(ValueError, match="iterations"):
        VBNoise(None, 0)
    with pytest.raises(ValueError, match="half_life"):
        VBNoise(-1.0)
    with pytest.raises(ValueError, match="lo <= hi"):
        RateMatch(0, 2.0, 1.0)
    with pytest.raises(ValueError, match="learned noise"):
        Posterior(2, noise_std=1.0, adapt=Adaptation(VBNoise()))
    with pytest.raises(ValueError, match="TermDrift"):
        Posterior(2, adapt=Adaptation(rate=RateMatch(0, 0.0, 1.0)))

    def load(noise=None, forgetting=None):
        tables = {}
        if noise is not None:
            tables["noise"] = noise
        if forgetting is not None:
            tables["forgetting"] = forgetting
        return loads(toml_config({}, [c301_model("m", **tables)]), "<t>").models[0]

    with pytest.raises(ConfigError, match="noise.adaptive"):
        load(noise={"std": 5.0, "adaptive": True})
    with pytest.raises(ConfigError, match="adaptive_half_life"):
        load(noise={"adaptive_half_life": "1d"})
    with pytest.raises(ConfigError, match="adapt_offset"):
        load(forgetting={"policy": "stabilized", "half_life": "1d", "adapt_offset": True})
    with pytest.raises(ConfigError, match="adapt_window"):
        load(forgetting={"policy": "stabilized", "half_life": "1d", "adapt_window": 5})
    with pytest.raises(ConfigError, match="offset_drift_min"):
        load(forgetting={"policy": "offset", "half_life": "1d", "offset_drift": "1 per 1h",
                         "adapt_offset": True, "offset_drift_min": "2 per 1h",
                         "offset_drift_max": "1 per 1h"})
    with pytest.raises(ConfigError, match="offset_drift_max"):
        load(forgetting={"policy": "offset", "half_life": "1d", "offset_drift": "1 per 1h",
                         "adapt_offset": True, "offset_drift_max": 5})
    m = load(noise={"guess": 10.0, "adaptive": True},
             forgetting={"policy": "offset", "half_life": "1d", "offset_drift": "1 per 1h",
                         "adapt_offset": True})
    ad = m.adaptation()
    assert ad.rate.lo == pytest.approx(1 / 3600 / 100) and ad.rate.hi == pytest.approx(1 / 36)
    assert ad.noise == VBNoise(None, 3)


def test_fit_messages_and_metrics_show_the_adapted_values():
    from daemon.runtime.metrics import _offset_rate
    from daemon.runtime.runner import ModelRunner
    from daemon.workbench import plant

    run = plant.simulate(plant.Scenario(seed=4, days=2.0, sample_period_s=300.0,
                                        lab_period_h=1.0))
    cfg = loads(toml_config({}, [c301_model(
        "m", noise={"guess": 10.0, "adaptive": True},
        forgetting={"policy": "offset", "half_life": "1d", "offset_drift": "5 per 1h",
                    "adapt_offset": True, "adapt_window": 3})]), "<t>").models[0]
    r = ModelRunner(cfg)
    labs = list(zip(run.lab_t.tolist(), run.lab_y.tolist(), strict=True))
    fit = None
    for t, row in zip(run.t.tolist(), run.X.tolist(), strict=True):
        r.add_features(t, row, None)
        while labs and labs[0][0] + 1800.0 <= t:
            fit, _ = r.learn(*labs.pop(0), None)
    assert fit["noise_std"] == pytest.approx(math.sqrt(r.post.noise_var))
    assert fit["offset_q"] == r.post.forgetting.q[0] == _offset_rate(r)
    assert fit["offset_q"] != 25.0 / 3600.0  # it moved
    plain = ModelRunner(loads(toml_config({}, [c301_model("p")]), "<t>").models[0])
    assert math.isnan(_offset_rate(plain)) and plain.post.adapted is None
