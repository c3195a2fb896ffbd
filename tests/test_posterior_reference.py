"""The core against outside references: textbook formulas, certified data, reference libraries."""

from __future__ import annotations

import math
import pathlib
import warnings

import numpy as np
import pytest
from scipy import special, stats

from recursive import Exponential, Posterior, RandomWalk, Stabilized, TermDrift
from recursive.basis import Input, Polynomial

DATA = pathlib.Path(__file__).parent / "data"


def _design(rng, n_samples, n_features):
    X = rng.normal(size=(n_samples, n_features))
    X[:, 0] = 1.0
    return X


def _learn(post, X, y, t=None):
    steps = []
    for i in range(len(y)):
        steps.append(post.update(X[i], y[i], None if t is None else t[i]))
    return steps


# --------------------------------------------------------------------------- Bishop PRML
def test_batch_posterior_and_predictive_bishop_prml_3_53_3_59():
    """Bishop, Pattern Recognition and Machine Learning (2006), eqs. 3.53-3.54 and 3.58-3.59."""
    rng = np.random.default_rng(1)
    alpha, beta = 0.7, 25.0
    X = _design(rng, 60, 5)
    y = X @ rng.normal(size=5) + rng.normal(size=60) / math.sqrt(beta)
    post = Posterior(5, alpha=alpha, noise_std=1 / math.sqrt(beta))
    _learn(post, X, y)
    S_N = np.linalg.inv(alpha * np.eye(5) + beta * X.T @ X)  # eq. 3.54
    m_N = beta * S_N @ X.T @ y  # eq. 3.53
    np.testing.assert_allclose(post.mean, m_N, rtol=1e-10, atol=0)
    np.testing.assert_allclose(post.cov, S_N, rtol=1e-10, atol=0)
    Xq = _design(rng, 7, 5)
    pred = post.predict(Xq)
    var = 1 / beta + np.einsum("ij,jk,ik->i", Xq, S_N, Xq)  # eq. 3.59
    np.testing.assert_allclose(pred.mean, Xq @ m_N, rtol=1e-10)  # eq. 3.58
    np.testing.assert_allclose(pred.var, var, rtol=1e-10)
    assert np.all(np.isinf(pred.dof))
    lo, hi = pred.interval(0.9)
    np.testing.assert_allclose(hi - pred.mean, stats.norm.ppf(0.95) * np.sqrt(var), rtol=1e-10)
    one = post.predict(Xq[2])
    assert one.mean == pytest.approx(pred.mean[2], rel=1e-13)


# --------------------------------------------------------------------------- scikit-learn
def test_posterior_mean_equals_sklearn_ridge():
    """scikit-learn Ridge(alpha=lambda, fit_intercept=False) with lambda = alpha * sigma^2."""
    from sklearn.linear_model import Ridge

    rng = np.random.default_rng(2)
    X = _design(rng, 80, 6)
    y = X @ rng.normal(size=6) + 0.3 * rng.normal(size=80)
    alpha, sigma = 2.0, 0.3
    post = Posterior(6, alpha=alpha, noise_std=sigma)
    _learn(post, X, y)
    ridge = Ridge(alpha=alpha * sigma**2, fit_intercept=False, solver="cholesky", tol=1e-14)
    ridge.fit(X, y)
    np.testing.assert_allclose(post.mean, ridge.coef_, rtol=1e-9)
    # learned noise: lambda = alpha * sigma0^2 with sigma0 the prior guess
    post2 = Posterior(6, alpha=alpha, noise_prior=(0.5, 3.0))
    _learn(post2, X, y)
    ridge.set_params(alpha=alpha * 0.25).fit(X, y)
    np.testing.assert_allclose(post2.mean, ridge.coef_, rtol=1e-9)


def test_stabilized_mean_equals_weighted_ridge_sklearn():
    """Stabilized forgetting == Ridge, sample_weight 2**(-(t_N - t_i)/h) (scikit-learn)."""
    from sklearn.linear_model import Ridge

    rng = np.random.default_rng(3)
    n, N, h = 4, 150, 20.0
    X = _design(rng, N, n)
    t = np.cumsum(rng.exponential(2.0, size=N))  # irregular sample times
    y = X @ rng.normal(size=n) + 0.1 * rng.normal(size=N) + 0.02 * t
    alpha, sigma = 0.5, 0.1
    post = Posterior(n, alpha=alpha, noise_std=sigma, forgetting=Stabilized(h))
    _learn(post, X, y, t)
    w = 2.0 ** (-(t[-1] - t) / h)
    ridge = Ridge(alpha=alpha * sigma**2, fit_intercept=False, solver="cholesky")
    ridge.fit(X, y, sample_weight=w)
    np.testing.assert_allclose(post.mean, ridge.coef_, rtol=1e-8)


# --------------------------------------------------------------------------- least squares
def test_flat_prior_matches_statsmodels_recursive_ls_step_by_step():
    """Flat prior == statsmodels RecursiveLS filtered coefficients once identified."""
    from statsmodels.regression.recursive_ls import RecursiveLS

    rng = np.random.default_rng(4)
    n, N = 4, 60
    X = _design(rng, N, n)
    y = X @ rng.normal(size=n) + 0.5 * rng.normal(size=N)
    ref = RecursiveLS(y, X).fit().recursive_coefficients.filtered  # (n, N)
    post = Posterior(n, alpha=0.0, noise_prior=(1.0, 0.0))
    for i in range(N):
        post.update(X[i], y[i])
        if i + 1 < n:
            assert not post.identified
            assert np.all(np.isnan(post.mean))
            pred = post.predict(X[i])
            assert not pred.identified and math.isnan(pred.mean)
        elif i + 1 > n:  # identified, with residual degrees of freedom
            np.testing.assert_allclose(post.mean, ref[:, i], rtol=1e-7, atol=1e-9)


def test_longley_nist_certified_values():
    """NIST StRD Longley (data: statsmodels.datasets.longley); certified values from memory,
    cross-checked against statsmodels OLS below so a slip of memory would show."""
    import statsmodels.api as sm

    data = sm.datasets.longley.load_pandas()
    X = np.column_stack([np.ones(16), data.exog.to_numpy(float)])
    y = data.endog.to_numpy(float)
    certified = np.array([-3482258.63459582, 15.0618722713733, -0.358191792925910e-01,
                          -2.02022980381683, -1.03322686717359, -0.511041056535807e-01,
                          1829.15146461355])
    certified_sd = 304.854073561965
    ols = sm.OLS(y, X).fit()
    np.testing.assert_allclose(ols.params, certified, rtol=1e-7)  # the memory check
    post = Posterior(7, alpha=0.0, noise_prior=(1.0, 0.0))
    _learn(post, X, y)
    np.testing.assert_allclose(post.mean, certified, rtol=1e-9)
    assert math.sqrt(post.noise_var) == pytest.approx(certified_sd, rel=1e-9)
    assert post.dof == 9


def _pontius():
    rows = [line.split() for line in (DATA / "nist-strd-pontius.txt").read_text().splitlines()
            if line.strip() and not line.startswith("#")]
    arr = np.array(rows, dtype=float)
    return arr[:, 1], arr[:, 0]  # x (load), y (deflection)


def test_pontius_nist_certified_values_with_monomial_basis():
    """NIST StRD Pontius (certified values in tests/data/nist-strd-pontius.txt header)."""
    x, y = _pontius()
    basis = Polynomial([Input("load", 0.0, 3.0e6)], 2, family="monomial", scale=False)
    assert basis.names == ("1", "load", "load^2")
    Phi = basis(x[:, None])
    post = Posterior(3, alpha=0.0, noise_prior=(1.0, 0.0))
    _learn(post, Phi, y)
    certified = np.array([0.673565789473684e-03, 0.732059160401003e-06, -0.316081871345029e-14])
    certified_sd = np.array([0.107938612033077e-03, 0.157817399981659e-09, 0.486652849992036e-16])
    np.testing.assert_allclose(post.mean, certified, rtol=1e-9)
    assert math.sqrt(post.noise_var) == pytest.approx(0.205177424076185e-03, rel=1e-9)
    assert post.dof == 37
    # standard errors: sqrt(diag(s^2 (X^T X)^-1)) is the scale matrix's diagonal
    np.testing.assert_allclose(np.sqrt(np.diag(post.scale_matrix)), certified_sd, rtol=1e-8)


def test_flat_prior_predictive_is_classical_student_t_statsmodels():
    """Gelman et al., BDA 3rd ed., sec. 14.2: N - p dof, scale^2 = s^2 (1 + x (X^T X)^-1 x);
    the interval equals statsmodels OLS get_prediction obs_ci."""
    import statsmodels.api as sm

    rng = np.random.default_rng(5)
    n, N = 3, 25
    X = _design(rng, N, n)
    y = X @ np.array([1.0, -2.0, 0.5]) + 0.7 * rng.normal(size=N)
    post = Posterior(n, alpha=0.0, noise_prior=(1.0, 0.0))
    _learn(post, X, y)
    Xq = _design(rng, 5, n)
    pred = post.predict(Xq)
    assert np.all(pred.dof == N - n)
    frame = sm.OLS(y, X).fit().get_prediction(Xq).summary_frame(alpha=0.1)
    lo, hi = pred.interval(0.9)
    np.testing.assert_allclose(lo, frame["obs_ci_lower"], rtol=1e-10)
    np.testing.assert_allclose(hi, frame["obs_ci_upper"], rtol=1e-10)


# --------------------------------------------------------------------------- filterpy
@pytest.mark.parametrize("noise", ["known", "learned"])
def test_random_walk_matches_filterpy_kalman_filter(noise):
    """filterpy KalmanFilter with F = I, Q = q*dt*I, H = phi^T, R = sigma^2."""
    from filterpy.kalman import KalmanFilter

    rng = np.random.default_rng(6)
    n, N, q, sigma, alpha = 4, 120, 1e-3, 0.2, 2.0
    X = _design(rng, N, n)
    t = np.cumsum(rng.uniform(0.5, 3.0, size=N))
    y = X @ rng.normal(size=n) + sigma * rng.normal(size=N)
    m0 = rng.normal(size=n)
    if noise == "known":
        post = Posterior(n, alpha=alpha, prior_mean=m0, noise_std=sigma, forgetting=RandomWalk(q))
    else:
        # learned noise: the covariance scales with the noise estimate, the mean does not
        post = Posterior(n, alpha=alpha, prior_mean=m0, noise_prior=(sigma, 5.0),
                         forgetting=RandomWalk(q))
    kf = KalmanFilter(dim_x=n, dim_z=1)
    kf.x = m0.copy()
    kf.P = np.eye(n) / alpha
    kf.F = np.eye(n)
    kf.R = np.array([[sigma**2]])
    for i in range(N):
        if i > 0:
            kf.Q = q * (t[i] - t[i - 1]) * np.eye(n)
            kf.predict()
        kf.update(y[i], H=X[i][None, :])
        step = post.update(X[i], y[i], t[i])
        np.testing.assert_allclose(post.mean, kf.x, rtol=1e-9, atol=1e-12)
        if noise == "known":
            np.testing.assert_allclose(post.cov, kf.P, rtol=1e-9, atol=1e-14)
            assert step.accepted
        else:
            np.testing.assert_allclose(post.unit_cov * sigma**2, kf.P, rtol=1e-9, atol=1e-14)


# --------------------------------------------------------------------------- evidence
def test_prequential_sum_equals_log_evidence_known_noise_prml_3_86():
    """Bishop PRML eq. 3.86: ln p(t | alpha, beta)."""
    rng = np.random.default_rng(7)
    n, N, alpha, beta = 5, 40, 1.5, 4.0
    X = _design(rng, N, n)
    y = X @ rng.normal(size=n) + rng.normal(size=N) / math.sqrt(beta)
    post = Posterior(n, alpha=alpha, noise_std=1 / math.sqrt(beta))
    total = sum(s.logpdf for s in _learn(post, X, y))
    A = alpha * np.eye(n) + beta * X.T @ X
    m = beta * np.linalg.solve(A, X.T @ y)
    E = beta / 2 * np.sum((y - X @ m) ** 2) + alpha / 2 * m @ m
    ln_ev = (n / 2 * math.log(alpha) + N / 2 * math.log(beta) - E
             - 0.5 * np.linalg.slogdet(A)[1] - N / 2 * math.log(2 * math.pi))
    assert total == pytest.approx(ln_ev, rel=1e-10)


def test_prequential_sum_equals_log_evidence_normal_gamma():
    """Normal-inverse-gamma marginal likelihood (e.g. Murphy, Machine Learning: a Probabilistic
    Perspective, sec. 7.6.3): Gamma functions, b0^a0 / bN^aN and |V_N|^(1/2) / |V_0|^(1/2)."""
    rng = np.random.default_rng(8)
    n, N, alpha, sigma0, strength = 4, 50, 0.8, 0.6, 3.0
    X = _design(rng, N, n)
    m0 = rng.normal(size=n)
    y = X @ rng.normal(size=n) + 0.5 * rng.normal(size=N)
    post = Posterior(n, alpha=alpha, prior_mean=m0, noise_prior=(sigma0, strength))
    total = sum(s.logpdf for s in _learn(post, X, y))
    L0 = alpha * sigma0**2 * np.eye(n)  # prior precision in units of sigma^2
    LN = L0 + X.T @ X
    mN = np.linalg.solve(LN, L0 @ m0 + X.T @ y)
    a0, b0 = strength / 2, strength * sigma0**2 / 2
    aN = a0 + N / 2
    bN = b0 + 0.5 * (y @ y + m0 @ L0 @ m0 - mN @ LN @ mN)
    ln_ev = (special.gammaln(aN) - special.gammaln(a0) + a0 * math.log(b0) - aN * math.log(bN)
             + 0.5 * (np.linalg.slogdet(L0)[1] - np.linalg.slogdet(LN)[1])
             - N / 2 * math.log(2 * math.pi))
    assert total == pytest.approx(ln_ev, rel=1e-10)
    assert post.noise_var == pytest.approx(bN / aN, rel=1e-10)


# --------------------------------------------------------------------------- calibration
@pytest.mark.parametrize("noise", ["known", "learned"])
def test_calibration_coverage_and_pit(noise):
    """On data drawn from the model: 95% coverage in the binomial 99.9% band (scipy.stats.binom),
    PIT uniform by Kolmogorov-Smirnov (scipy.stats.kstest)."""
    rng = np.random.default_rng(9 if noise == "known" else 10)
    n, N, sigma, alpha = 3, 2000, 0.4, 1.0
    X = _design(rng, N, n)
    if noise == "known":
        w = rng.normal(size=n) / math.sqrt(alpha)  # weights drawn from the prior
        post = Posterior(n, alpha=alpha, noise_std=sigma)
    else:
        # improper prior: the Student-t prediction interval is exact for any fixed w, sigma
        w = rng.normal(size=n)
        post = Posterior(n, alpha=0.0, noise_prior=(1.0, 0.0))
    y = X @ w + sigma * rng.normal(size=N)
    steps = [s for s in _learn(post, X, y) if s.reason == "ok" and s.dof > 0]
    z = np.array([s.z for s in steps])
    covered = np.sum(np.abs(z) <= stats.norm.ppf(0.975))
    lo, hi = stats.binom.interval(0.999, len(z), 0.95)
    assert lo <= covered <= hi
    assert stats.kstest(stats.norm.cdf(z), "uniform").pvalue > 1e-3


# --------------------------------------------------------------------------- windup
def test_windup_stabilized_bounded_exponential_grows():
    """A constant input (one excited direction), 100 000 updates, half-life 100 samples: the
    covariance under Stabilized never exceeds the prior's; under Exponential it grows by
    orders of magnitude (the classical covariance windup)."""
    n, alpha, sigma = 3, 1.0, 0.1
    phi = np.array([1.0, 0.5, -0.3])
    prior_max = 1.0 / alpha
    stab = Posterior(n, alpha=alpha, noise_std=sigma, forgetting=Stabilized(100.0))
    expo = Posterior(n, alpha=alpha, noise_std=sigma, forgetting=Exponential(100.0))
    rng = np.random.default_rng(11)
    ys = 1.0 + sigma * rng.normal(size=100_000)
    stab_max, expo_max = 0.0, 0.0
    for i, y in enumerate(ys):
        stab.update(phi, y)
        if i < 3000:
            expo.update(phi, y)
        if i % 500 == 0:
            stab_max = max(stab_max, np.linalg.eigvalsh(stab.cov).max())
            if i < 3000:
                expo_max = max(expo_max, np.linalg.eigvalsh(expo.cov).max())
    assert stab_max <= prior_max * (1 + 1e-9)
    assert np.linalg.eigvalsh(stab.cov).max() <= prior_max * (1 + 1e-9)
    assert expo_max > 1e6 * prior_max


# --------------------------------------------------------------------------- widening
@pytest.mark.parametrize("policy", [Stabilized(30.0), Exponential(30.0), RandomWalk(2e-3),
                                    RandomWalk(2e-3, noise_half_life=50.0),
                                    TermDrift([2e-3, 0.0, 5e-4, 0.0]),
                                    TermDrift([2e-3, 0.0, 0.0, 0.0], half_life=30.0)])
@pytest.mark.parametrize("noise_std", [0.3, None])
def test_predict_with_time_equals_forget_then_predict(policy, noise_std):
    """The vectorized widening agrees with the exact time update (forget, then predict)."""
    rng = np.random.default_rng(12)
    n, N = 4, 80
    X = _design(rng, N, n)
    y = X @ rng.normal(size=n) + 0.3 * rng.normal(size=N)
    post = Posterior(n, alpha=[0.0, 1.0, 1.0, 1.0], noise_std=noise_std,
                     noise_prior=(0.3, 4.0), forgetting=policy)
    _learn(post, X, y, np.arange(N, dtype=float))
    # the last gap makes 2**(-dt/half_life) underflow to 0: everything is forgotten, and
    # the flat-prior direction leaves the weights unidentified, without a warning
    ts = np.array([N - 1, N + 3.0, N + 40.0, N + 200.0, N + 1e6])
    Xq = _design(rng, len(ts), n)
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        batch = post.predict(Xq, t=ts)
    if getattr(policy, "half_life", None) is not None:
        assert not batch.identified[-1] and math.isnan(batch.mean[-1])
    for j, tj in enumerate(ts):
        one = post.predict(Xq[j], t=tj)
        # the step result is the prediction made from the exactly forgotten state
        step = Posterior.from_state(post.to_state()).update(Xq[j], 0.0, t=tj)
        # nan == nan here: after a long gap exponential forgetting may lose identification
        np.testing.assert_allclose([one.mean, batch.mean[j]], step.mean, rtol=1e-10, atol=1e-12)
        np.testing.assert_allclose([one.scale, batch.scale[j]], step.scale, rtol=1e-10)
        assert one.identified == (not math.isnan(step.mean))
    if noise_std is not None:
        # with known noise, predictions further in the future are never narrower
        same = post.predict(np.repeat(Xq[:1], 4, axis=0), t=ts[:4])
        assert np.all(np.diff(same.scale) >= -1e-12)
