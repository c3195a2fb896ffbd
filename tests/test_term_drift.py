"""Per-term drift (TermDrift, kernel term_drift) against outside references.

References: the covariance-form Kalman filter (Kalman 1960; written out here), filterpy's
KalmanFilter, a scalar Kalman filter on the residual of a fixed model, the conjugate
dynamic linear model with unknown noise variance, the information-form identities checked
with numpy dense algebra, and 60-digit arithmetic (mpmath).
"""

from __future__ import annotations

import json
import math

import numpy as np
import pytest
from numpy.testing import assert_allclose
from scipy.linalg import solve_triangular

from recursive import Posterior, RandomWalk, Stabilized, TermDrift, _givens, _linalg
from recursive.forgetting import forgetting_from_dict

try:
    from recursive import _kernel
except ImportError:  # the extension is optional
    _kernel = None

IMPLS = ["c", "py"]


def _impl(name):
    if name == "c":
        if _kernel is None or not hasattr(_kernel, "term_drift"):
            pytest.skip("recursive._kernel with term_drift is not built")
        return _kernel.term_drift
    return _givens.term_drift


def _tri(rng, n, positive=True):
    R = np.triu(rng.normal(scale=0.4, size=(n, n)), 1)
    d = rng.uniform(0.5, 2.0, n)
    if not positive:
        d *= rng.choice([-1.0, 1.0], n)
    R[np.diag_indices(n)] = d
    return R


def _rates(rng, n, p_zero=0.5):
    return rng.uniform(0.05, 2.0, n) * (rng.random(n) >= p_zero)


def _exact(R0, z0, c):
    """Information form of V <- V + diag(c), valid for a singular Lambda (numpy).

    Lambda' = Lambda (I + C Lambda)^{-1} and eta' = (I + Lambda C)^{-1} eta: the
    information-filter time update with F = I (Woodbury identity), with no inverse of
    Lambda.
    """
    lam, eta = R0.T @ R0, R0.T @ z0
    n = len(c)
    C = np.diag(c)
    return lam @ np.linalg.inv(np.eye(n) + C @ lam), np.linalg.solve(np.eye(n) + lam @ C, eta)


# ------------------------------------------------------------------ the kernel
@pytest.mark.parametrize("impl", IMPLS)
@pytest.mark.parametrize("n", [1, 2, 5, 8, 17, 32])
def test_kernel_against_information_form_numpy(impl, n):
    fn = _impl(impl)
    rng = np.random.default_rng(100 + n)
    for trial in range(6):
        R0 = _tri(rng, n, positive=bool(trial % 2))
        z0 = rng.normal(size=n)
        q = _rates(rng, n, p_zero=[0.0, 0.5, 0.9][trial % 3])
        s = float(10.0 ** rng.uniform(-3, 1))
        R, z = R0.copy(), z0.copy()
        fn(R, z, q, s)
        lam, eta = _exact(R0, z0, s * q)
        assert_allclose(R.T @ R, lam, atol=1e-12 * max(1.0, np.abs(lam).max()))
        assert_allclose(R.T @ z, eta, atol=1e-12 * max(1.0, np.abs(eta).max()))
        assert np.all(np.tril(R, -1) == 0.0)
        # rows at or above the last drifting term get a non-negative diagonal; the mean
        # (scipy solve_triangular) is unchanged
        last = int(np.flatnonzero(q)[-1]) if q.any() else -1
        assert np.all(np.diagonal(R)[:last + 1] >= 0.0)
        assert_allclose(solve_triangular(R, z), solve_triangular(R0, z0), rtol=1e-10,
                        atol=1e-12)


@pytest.mark.parametrize("impl", IMPLS)
def test_kernel_with_equal_rates_is_random_walk(impl):
    """diag(c, ..., c) = c I: the same update as the existing random_walk kernel."""
    fn = _impl(impl)
    rng = np.random.default_rng(200)
    for n in (1, 3, 8, 16):
        R0, z0 = _tri(rng, n), rng.normal(size=n)
        R1, z1, R2, z2 = R0.copy(), z0.copy(), R0.copy(), z0.copy()
        fn(R1, z1, np.full(n, 0.5), 1.4)
        _linalg.lapack_random_walk(R2, z2, 0.7)  # LAPACK Householder QL
        assert_allclose(R1, R2, rtol=1e-12, atol=1e-13)
        assert_allclose(z1, z2, rtol=1e-12, atol=1e-13)


@pytest.mark.parametrize("impl", IMPLS)
def test_kernel_zero_rates_change_nothing(impl):
    fn = _impl(impl)
    rng = np.random.default_rng(300)
    R0, z0 = _tri(rng, 6), rng.normal(size=6)
    for q, s in ((np.zeros(6), 3.0), (np.ones(6), 0.0)):
        R, z = R0.copy(), z0.copy()
        fn(R, z, q, s)
        assert np.array_equal(R, R0) and np.array_equal(z, z0)


@pytest.mark.parametrize("impl", IMPLS)
@pytest.mark.parametrize("kind", ["zero_pivot", "zero_row", "few_samples", "flat_constant"])
def test_kernel_singular_information_equals_exact_limit(impl, kind):
    fn = _impl(impl)
    rng = np.random.default_rng(400)
    n = 6
    if kind == "few_samples":  # n - 2 samples
        R0 = np.linalg.qr(np.vstack([rng.normal(size=(n - 2, n)), np.zeros((2, n))]),
                          mode="r")
    elif kind == "flat_constant":  # flat prior on the constant, before any data
        R0 = np.diag(np.r_[0.0, rng.uniform(0.5, 2.0, n - 1)])
    else:
        R0 = _tri(rng, n, positive=False)
        if kind == "zero_pivot":
            R0[2, 2] = 0.0
        else:
            R0[2, :] = 0.0
    z0 = R0 @ rng.normal(size=n) if kind == "flat_constant" else rng.normal(size=n)
    q = np.array([1.0, 0.0, 0.7, 0.0, 0.0, 2.0])
    R, z = R0.copy(), z0.copy()
    fn(R, z, q, 0.8)
    assert np.all(np.isfinite(R)) and np.all(np.isfinite(z))
    lam, eta = _exact(R0, z0, 0.8 * q)
    assert_allclose(R.T @ R, lam, atol=1e-12)
    assert_allclose(R.T @ z, eta, atol=1e-12)
    if kind == "flat_constant":
        # nothing is known about the constant, so its drift changes nothing; the
        # identified slopes (prior information) keep their exact values
        assert np.array_equal(R[:, 0], R0[:, 0])
        assert_allclose(z[1:] / np.diagonal(R)[1:], z0[1:] / np.diagonal(R0)[1:], rtol=1e-14)


@pytest.mark.parametrize("impl", IMPLS)
def test_kernel_overflowing_rate_forgets_that_weight(impl):
    """s * q_j = inf: the limit is the Schur complement Lambda - Lambda e_j e_j^T Lambda /
    Lambda_jj (everything known about w_j removed; numpy)."""
    fn = _impl(impl)
    rng = np.random.default_rng(500)
    n, j = 5, 2
    R0, z0 = _tri(rng, n), rng.normal(size=n)
    q = np.zeros(n)
    q[j] = 1e300
    R, z = R0.copy(), z0.copy()
    fn(R, z, q, 1e10)
    lam, eta = R0.T @ R0, R0.T @ z0
    col = lam[:, j]
    assert_allclose(R.T @ R, lam - np.outer(col, col) / lam[j, j], atol=1e-12)
    assert_allclose(R.T @ z, eta - col * eta[j] / lam[j, j], atol=1e-12)
    assert np.all(np.isfinite(R)) and np.all(np.isfinite(z))


def _ill_conditioned(rng, n, cond):
    u = np.linalg.qr(rng.normal(size=(n, n)))[0]
    v = np.linalg.qr(rng.normal(size=(n, n)))[0]
    sv = np.logspace(0, math.log10(cond), n) * 10.0 ** rng.uniform(-3, 3)
    R = np.linalg.qr((u * sv) @ v, mode="r")
    return R * np.where(np.diagonal(R) < 0, -1.0, 1.0)[:, None]


@pytest.mark.parametrize("impl", IMPLS)
def test_kernel_accurate_whatever_the_conditioning(impl):
    """Against 60-digit arithmetic (mpmath): the new factor equals the upper Cholesky factor
    of the exact Lambda (I + C Lambda)^{-1} to rounding level, for cond(R) up to 1e11."""
    mp = pytest.importorskip("mpmath")
    fn = _impl(impl)
    rng = np.random.default_rng(600)
    n = 6
    with mp.workdps(60):
        for cond in 10.0 ** np.arange(0, 12):
            R0 = _ill_conditioned(rng, n, cond)
            z0 = R0 @ rng.normal(size=n)
            q = _rates(rng, n) * 10.0 ** rng.uniform(-6, 3)
            q[rng.integers(n)] = float(10.0 ** rng.uniform(-6, 3))
            lam = mp.matrix(R0.tolist()).T * mp.matrix(R0.tolist())
            new = lam * mp.inverse(mp.eye(n) + mp.diag(q.tolist()) * lam)
            exact = np.array(mp.cholesky((new + new.T) / 2).T.tolist(), dtype=float)
            R, z = R0.copy(), z0.copy()
            fn(R, z, q, 1.0)
            err = np.linalg.norm(R - exact) / np.linalg.norm(exact)
            assert err < 1e-13, (cond, err)
            mean0, mean = solve_triangular(R0, z0), solve_triangular(R, z)
            assert np.linalg.norm(mean - mean0) <= 1e-12 * np.linalg.norm(mean0), cond


def test_kernel_c_and_python_agree():
    if _kernel is None or not hasattr(_kernel, "term_drift"):
        pytest.skip("recursive._kernel with term_drift is not built")
    rng = np.random.default_rng(700)
    for trial in range(40):
        n = int(rng.choice([1, 2, 4, 8, 16, 17, 32]))
        R0 = _tri(rng, n, positive=bool(trial % 2))
        if trial % 5 == 0:
            R0[rng.integers(n), :] = 0.0
        z0, q = rng.normal(size=n), _rates(rng, n, p_zero=0.3)
        s = float(rng.uniform(0.01, 5.0))
        out = []
        for fn in (_kernel.term_drift, _givens.term_drift):
            R, z = R0.copy(), z0.copy()
            fn(R, z, q, s)
            out.append((R, z))
        for u, v in zip(out[0], out[1], strict=True):
            assert_allclose(u, v, rtol=1e-13, atol=1e-13 * max(1.0, np.max(np.abs(v))))


@pytest.mark.parametrize("impl", IMPLS)
def test_kernel_strict_lower_triangle_is_never_read_or_written(impl):
    fn = _impl(impl)
    rng = np.random.default_rng(800)
    n = 7
    R0, z0, q = _tri(rng, n), rng.normal(size=n), _rates(rng, n, p_zero=0.2)
    junk = R0.copy()
    junk[np.tril_indices(n, -1)] = np.nan
    clean, zc, zj = R0.copy(), z0.copy(), z0.copy()
    fn(clean, zc, q, 0.9)
    fn(junk, zj, q, 0.9)
    assert np.array_equal(np.triu(junk), np.triu(clean)) and np.array_equal(zj, zc)
    assert np.all(np.isnan(junk[np.tril_indices(n, -1)]))


@pytest.mark.parametrize("impl", IMPLS)
@pytest.mark.parametrize("q, s, msg", [
    ([1.0, -0.5, 0.0], 1.0, "-0.5"), ([1.0, math.nan, 0.0], 1.0, "nan"),
    ([math.inf, 0.0, 0.0], 1.0, "inf"), ([1.0, 0.0, 0.0], -2.0, "-2.0"),
    ([1.0, 0.0, 0.0], math.inf, "inf"), ([1.0, 0.0, 0.0], math.nan, "nan"),
    ([1.0, 0.0], 1.0, "shape"),
])
def test_kernel_bad_arguments_raise_and_change_nothing(impl, q, s, msg):
    fn = _impl(impl)
    R0, z0 = _tri(np.random.default_rng(900), 3), np.ones(3)
    R, z = R0.copy(), z0.copy()
    with pytest.raises(ValueError, match=msg):
        fn(R, z, np.array(q), s)
    assert np.array_equal(R, R0) and np.array_equal(z, z0)


# ------------------------------------------------------------------ the policy
def _design(rng, N, n):
    X = rng.normal(size=(N, n))
    X[:, 0] = 1.0
    return X


def _kalman_reference(P, m, X, y, t, q, r):
    """Covariance-form Kalman filter, F = I (Kalman 1960), written out: for each sample
    P <- P + dt diag(q); S = h^T P h + r; K = P h / S; m <- m + K (y - h^T m);
    P <- (I - K h^T) P (I - K h^T)^T + r K K^T (Joseph form)."""
    n = len(m)
    out = []
    for i in range(len(y)):
        if i > 0:
            P = P + (t[i] - t[i - 1]) * np.diag(q)
        h = X[i]
        S = h @ P @ h + r
        K = P @ h / S
        pred = (h @ m, S)
        m = m + K * (y[i] - h @ m)
        A = np.eye(n) - np.outer(K, h)
        P = A @ P @ A.T + r * np.outer(K, K)
        out.append((m.copy(), P.copy(), pred))
    return out


def test_matches_covariance_form_kalman_filter():
    rng = np.random.default_rng(1000)
    n, N, sigma, alpha = 4, 300, 0.2, 2.0
    q = np.array([3e-3, 0.0, 5e-4, 0.0])
    X = _design(rng, N, n)
    t = np.cumsum(rng.exponential(2.0, size=N))
    y = X @ rng.normal(size=n) + sigma * rng.normal(size=N)
    m0 = rng.normal(size=n)
    post = Posterior(n, alpha=alpha, prior_mean=m0, noise_std=sigma, forgetting=TermDrift(q))
    ref = _kalman_reference(np.eye(n) / alpha, m0, X, y, t, q, sigma**2)
    for i in range(N):
        step = post.update(X[i], y[i], float(t[i]))
        m, P, (f, S) = ref[i]
        assert step.mean == pytest.approx(f, rel=1e-10, abs=1e-12)
        assert step.std == pytest.approx(math.sqrt(S), rel=1e-10)
        assert_allclose(post.mean, m, rtol=1e-10, atol=1e-12)
        assert_allclose(post.cov, P, rtol=1e-10, atol=1e-14)


@pytest.mark.parametrize("noise", ["known", "learned"])
def test_matches_filterpy_kalman_filter(noise):
    """filterpy KalmanFilter with F = I, Q = dt diag(q), H = phi^T, R = sigma^2."""
    from filterpy.kalman import KalmanFilter

    rng = np.random.default_rng(1100)
    n, N, sigma, alpha = 5, 200, 0.3, 1.5
    q = np.array([0.0, 0.0, 0.0, 0.0, 2e-3])  # drifting term last: the most rotations
    X = _design(rng, N, n)
    t = np.cumsum(rng.uniform(0.2, 5.0, size=N))
    y = X @ rng.normal(size=n) + sigma * rng.normal(size=N)
    m0 = rng.normal(size=n)
    kw = {"noise_std": sigma} if noise == "known" else {"noise_prior": (sigma, 5.0)}
    post = Posterior(n, alpha=alpha, prior_mean=m0, forgetting=TermDrift(q), **kw)
    kf = KalmanFilter(dim_x=n, dim_z=1)
    kf.x, kf.P, kf.F = m0.copy(), np.eye(n) / alpha, np.eye(n)
    kf.R = np.array([[sigma**2]])
    for i in range(N):
        if i > 0:
            kf.Q = (t[i] - t[i - 1]) * np.diag(q)
            kf.predict()
        kf.update(y[i], H=X[i][None, :])
        post.update(X[i], y[i], float(t[i]))
        assert_allclose(post.mean, kf.x, rtol=1e-9, atol=1e-12)
        # with learned noise q is in units of sigma0^2 (= sigma here): V sigma0^2 = P
        got = post.cov if noise == "known" else post.unit_cov * sigma**2
        assert_allclose(got, kf.P, rtol=1e-9, atol=1e-14)


def test_offset_only_is_scalar_kalman_filter_on_the_residual():
    """Slopes pinned by a tight prior, the offset drifting: the optimal-gain bias update,
    a scalar Kalman filter on y - x^T w (Kalman 1960): p <- p + q dt; k = p / (p + r);
    b <- b + k (y - x^T w - b); p <- (1 - k) p, starting from a flat prior on b."""
    rng = np.random.default_rng(1200)
    n, N, sigma, qb = 4, 400, 0.1, 2e-4
    w = rng.normal(size=n - 1)
    X = _design(rng, N, n)
    t = np.cumsum(rng.exponential(3.0, size=N))
    bias = 1.0 + np.cumsum(rng.normal(size=N) * np.sqrt(qb * np.diff(t, prepend=t[0])))
    y = X[:, 1:] @ w + bias + sigma * rng.normal(size=N)
    post = Posterior(n, alpha=[0.0] + [1e22] * (n - 1), prior_mean=np.r_[0.0, w],
                     noise_std=sigma, forgetting=TermDrift([qb, 0.0, 0.0, 0.0]))
    b = p = math.nan
    r = sigma**2
    for i in range(N):
        res = y[i] - X[i, 1:] @ w
        if i == 0:
            b, p = res, r  # flat prior: the first residual, with its variance
        else:
            p += qb * (t[i] - t[i - 1])
            f, s = b, p + r
            k = p / s
            b += k * (res - b)
            p *= 1.0 - k
        step = post.update(X[i], y[i], float(t[i]))
        if i > 0:
            assert step.innovation == pytest.approx(res - f, rel=1e-10, abs=1e-12)
            assert step.std == pytest.approx(math.sqrt(s), rel=1e-10)
        assert post.mean[0] == pytest.approx(b, rel=1e-10, abs=1e-12)
        assert post.cov[0, 0] == pytest.approx(p, rel=1e-10)
    # and the slopes have not moved
    assert_allclose(post.mean[1:], w, rtol=1e-12)


@pytest.mark.parametrize("half_life", [None, 40.0])
def test_learned_noise_is_the_conjugate_dynamic_linear_model(half_life):
    """Unknown noise variance: the conjugate dynamic linear model in scaled form (West &
    Harrison, Bayesian Forecasting and Dynamic Models, 2nd ed., sec. 4.6: evolution variance
    proportional to the observational variance; recurrences from memory). With V the
    covariance over sigma^2: V <- V + dt diag(q) / sigma0^2; S = 1 + h^T V h;
    m <- m + V h e / S; V <- V - V h h^T V / S (Joseph form); nu <- nu + 1; ss <- ss + e^2 / S; the
    one-step predictive is Student-t with nu dof and scale^2 = ss / nu * S. With a
    half-life the stabilized step of Kulhavy & Zarrop (1993) comes first, on the scaled
    information and on (nu, ss)."""
    rng = np.random.default_rng(1300)
    n, N, sigma0, strength, alpha = 3, 250, 0.4, 3.0, 0.8
    q = np.array([4e-3, 0.0, 1e-3])
    X = _design(rng, N, n)
    t = np.cumsum(rng.exponential(1.5, size=N))
    y = X @ rng.normal(size=n) + 0.25 * rng.normal(size=N)
    post = Posterior(n, alpha=alpha, noise_prior=(sigma0, strength),
                     forgetting=TermDrift(q, half_life=half_life))
    lam0 = alpha * sigma0**2 * np.eye(n)
    V, m = np.linalg.inv(lam0), np.zeros(n)
    nu0, ss0 = strength, strength * sigma0**2
    nu, ss = nu0, ss0
    for i in range(N):
        if i > 0:
            dt = t[i] - t[i - 1]
            if half_life is not None:
                d = 2.0 ** (-dt / half_life)
                lam = d * np.linalg.inv(V) + (1 - d) * lam0
                m = np.linalg.solve(lam, d * np.linalg.solve(V, m))  # prior mean 0
                V = np.linalg.inv(lam)
                nu, ss = d * nu + (1 - d) * nu0, d * ss + (1 - d) * ss0
            V = V + dt * np.diag(q) / sigma0**2
        h = X[i]
        S = 1.0 + h @ V @ h
        e = y[i] - h @ m
        step = post.update(h, y[i], float(t[i]))
        assert step.mean == pytest.approx(h @ m, rel=1e-10, abs=1e-12)
        assert step.dof == pytest.approx(nu, rel=1e-12)
        assert step.scale == pytest.approx(math.sqrt(ss / nu * S), rel=1e-10)
        K = V @ h / S
        m = m + K * e
        A = np.eye(n) - np.outer(K, h)
        V = A @ V @ A.T + np.outer(K, K)  # Joseph form of V - V h h^T V / S
        nu, ss = nu + 1.0, ss + e * e / S
        assert_allclose(post.mean, m, rtol=1e-10, atol=1e-12)
        assert_allclose(post.unit_cov, V, rtol=1e-9, atol=1e-11 * np.abs(V).max())
        assert post.noise_var == pytest.approx(ss / nu, rel=1e-10)


def test_half_life_is_stabilized_then_drift_covariance_form():
    """Known noise, half-life h: Lambda <- delta Lambda + (1 - delta) Lambda0 and
    eta <- delta eta + (1 - delta) eta0 (Kulhavy & Zarrop 1993), then P <- P + dt diag(q)
    and the Kalman update (Kalman 1960), written out in covariance form."""
    rng = np.random.default_rng(1400)
    n, N, sigma, alpha, h = 4, 250, 0.2, 1.0, 30.0
    q = np.array([2e-3, 0.0, 0.0, 0.0])
    X = _design(rng, N, n)
    t = np.cumsum(rng.exponential(2.0, size=N))
    y = X @ rng.normal(size=n) + sigma * rng.normal(size=N)
    m0 = rng.normal(size=n)
    post = Posterior(n, alpha=alpha, prior_mean=m0, noise_std=sigma,
                     forgetting=TermDrift(q, half_life=h))
    lam0 = alpha * np.eye(n)
    P, m = np.linalg.inv(lam0), m0.copy()
    for i in range(N):
        if i > 0:
            dt = t[i] - t[i - 1]
            d = 2.0 ** (-dt / h)
            lam = d * np.linalg.inv(P) + (1 - d) * lam0
            m = np.linalg.solve(lam, d * np.linalg.solve(P, m) + (1 - d) * lam0 @ m0)
            P = np.linalg.inv(lam) + dt * np.diag(q)
        x = X[i]
        S = x @ P @ x + sigma**2
        step = post.update(x, y[i], float(t[i]))
        assert step.std == pytest.approx(math.sqrt(S), rel=1e-10)
        K = P @ x / S
        m = m + K * (y[i] - x @ m)
        P = P - np.outer(K, x @ P)
        assert_allclose(post.mean, m, rtol=1e-10, atol=1e-12)
        assert_allclose(post.cov, P, rtol=1e-9, atol=1e-14)


@pytest.mark.parametrize("noise_std", [0.3, None])
def test_zero_rates_are_no_forgetting_bit_for_bit(noise_std):
    rng = np.random.default_rng(1500)
    n, N = 4, 60
    X = _design(rng, N, n)
    y = X @ rng.normal(size=n) + 0.3 * rng.normal(size=N)
    a = Posterior(n, alpha=[0.0, 1, 1, 1], noise_std=noise_std, forgetting=TermDrift([0.0] * n))
    b = Posterior(n, alpha=[0.0, 1, 1, 1], noise_std=noise_std)
    for i in range(N):
        a.update(X[i], y[i], float(2 * i))
        b.update(X[i], y[i], float(2 * i))
    sa, sb = a.to_state(), b.to_state()
    assert sa["R"] == sb["R"] and sa["z"] == sb["z"] and (sa["nu"], sa["ss"]) == (sb["nu"],
                                                                                  sb["ss"])
    pa, pb = a.predict(X[:5], t=200.0), b.predict(X[:5], t=200.0)
    assert np.array_equal(pa.mean, pb.mean) and np.array_equal(pa.std, pb.std)


@pytest.mark.parametrize("noise_std", [0.3, None])
def test_equal_rates_are_random_walk(noise_std):
    """RandomWalk(q) adds q dt I to P (q in the weights' units squared per time unit, over
    sigma_ref^2 in the scaled state): TermDrift([q] * n) is the same process."""
    rng = np.random.default_rng(1600)
    n, N, q = 5, 150, 2e-3
    X = _design(rng, N, n)
    t = np.cumsum(rng.exponential(2.0, size=N))
    y = X @ rng.normal(size=n) + 0.3 * rng.normal(size=N)
    kw = {"noise_std": noise_std, "noise_prior": (0.3, 2.0)}
    a = Posterior(n, alpha=[0.0, 1, 1, 1, 1], forgetting=TermDrift([q] * n), **kw)
    b = Posterior(n, alpha=[0.0, 1, 1, 1, 1], forgetting=RandomWalk(q), **kw)
    for i in range(N):
        sa, sb = a.update(X[i], y[i], float(t[i])), b.update(X[i], y[i], float(t[i]))
        if i > n:
            assert sa.scale == pytest.approx(sb.scale, rel=1e-10)
    assert_allclose(a.mean, b.mean, rtol=1e-10, atol=1e-12)
    assert_allclose(a.cov, b.cov, rtol=1e-10, atol=1e-14)
    pa, pb = a.predict(X[:7], t=t[-1] + np.arange(7.0) * 30), b.predict(X[:7], t=t[-1] + np.arange(
        7.0) * 30)
    assert_allclose(pa.scale, pb.scale, rtol=1e-10)


def test_flat_constant_before_data_stays_finite_and_then_exact():
    """Flat prior on the constant: R is singular until data arrive. The drift must neither
    make nan/inf nor change what is known; once identified the result is the information
    filter written out in dense numpy (Lambda' = Lambda (I + C Lambda)^{-1}, then
    Lambda += h h^T / r, eta += h y / r), which needs no prior covariance."""
    rng = np.random.default_rng(1700)
    n, sigma = 4, 0.2
    q = np.array([1e-2, 0.0, 3e-3, 0.0])
    post = Posterior(n, alpha=[0.0, 1.0, 1.0, 1.0], noise_std=sigma, forgetting=TermDrift(q))
    X = _design(rng, 30, n)
    X[:3, 0] = 0.0  # the first samples do not see the constant: still unidentified
    t = np.cumsum(rng.exponential(2.0, size=30))
    y = X @ rng.normal(size=n) + sigma * rng.normal(size=30)
    lam = np.diag([0.0, 1.0, 1.0, 1.0])  # absolute units: precision of the weights
    eta = np.zeros(n)
    for i in range(30):
        if i > 0:
            C = (t[i] - t[i - 1]) * np.diag(q)
            lam, eta = lam @ np.linalg.inv(np.eye(n) + C @ lam), np.linalg.solve(
                np.eye(n) + lam @ C, eta)
        lam = lam + np.outer(X[i], X[i]) / sigma**2
        eta = eta + X[i] * y[i] / sigma**2
        post.update(X[i], y[i], float(t[i]))
        st = post.to_state()
        R, z = np.array(st["R"]), np.array(st["z"])
        assert np.all(np.isfinite(R)) and np.all(np.isfinite(z))
        assert_allclose(R.T @ R / sigma**2, lam, rtol=1e-10, atol=1e-10)
        assert_allclose(R.T @ z / sigma**2, eta, rtol=1e-10, atol=1e-10)
        assert post.identified == (i >= 3)
        if post.identified:
            assert_allclose(post.mean, np.linalg.solve(lam, eta), rtol=1e-9, atol=1e-12)
        else:
            assert np.all(np.isnan(post.predict(X[:2], t=t[i] + 5.0).mean))


def test_rowwise_with_half_life_batches_do_not_change_rows():
    """With a half-life the widening works row by row: any batch gives each row the same
    bits (the promise of Posterior.rowwise)."""
    rng = np.random.default_rng(1800)
    n, N = 4, 60
    X = _design(rng, N, n)
    y = X @ rng.normal(size=n) + 0.3 * rng.normal(size=N)
    post = Posterior(n, alpha=[0.0, 1, 1, 1], noise_prior=(0.3, 2.0),
                     forgetting=TermDrift([1e-3, 0, 0, 0], half_life=50.0))
    for i in range(N):
        post.update(X[i], y[i], float(i))
    assert TermDrift([1e-3, 0, 0, 0]).needs_u
    assert not post.forgetting.needs_u
    if not _linalg.HAVE_KERNEL:
        assert not post.rowwise
        return
    assert post.rowwise
    Q = _design(rng, 40, n)
    ts = N + rng.uniform(0, 100, 40)
    full = post.predict(Q, t=ts)
    for lo, hi in ((0, 1), (3, 17), (17, 40), (5, 6)):
        part = post.predict(Q[lo:hi], t=ts[lo:hi])
        assert np.array_equal(part.mean, full.mean[lo:hi])
        assert np.array_equal(part.std, full.std[lo:hi])


# ------------------------------------------------------------------ construction, state
@pytest.mark.parametrize("policy", [TermDrift([1e-3, 0.0, 0.1 + 0.2, 7e-300]),
                                    TermDrift((0.0, 2.5), half_life=1.0 / 3.0),
                                    TermDrift(np.array([1e-9]))])
def test_to_dict_round_trip_is_bit_exact(policy):
    d = json.loads(json.dumps(policy.to_dict()))
    back = forgetting_from_dict(d)
    assert back == policy and back.to_dict() == policy.to_dict()
    assert [x.hex() for x in back.q] == [x.hex() for x in policy.q]
    assert isinstance(back, TermDrift) and not isinstance(back, Stabilized)


def test_posterior_state_round_trip_with_term_drift_is_bit_exact():
    rng = np.random.default_rng(1900)
    X = _design(rng, 40, 3)
    y = X @ rng.normal(size=3) + 0.1 * rng.normal(size=40)
    ref = Posterior(3, alpha=[0.0, 1, 1], noise_prior=(0.2, 1.0),
                    forgetting=TermDrift([1e-3, 0.0, 1e-4], half_life=80.0))
    for i in range(20):
        ref.update(X[i], y[i], float(i))
    copy = Posterior.from_state(json.loads(json.dumps(ref.to_state())))
    for i in range(20, 40):
        assert ref.update(X[i], y[i], float(i)) == copy.update(X[i], y[i], float(i))
    assert ref.to_state() == copy.to_state()


@pytest.mark.parametrize("q, half_life, msg", [
    ([1e-3, -1e-4], None, "-0.0001"), ([math.nan, 0.0], None, "nan"),
    ([0.0, math.inf], None, "inf"), ([], None, r"\[\]"), (1e-3, None, "0.001"),
    ("0.1", None, "'0.1'"), ([0.0, "x"], None, "'x'"), ([[1e-3, 0.0]], None, r"\[\[0.001"),
    ([True, 0.0], None, "True"), ([1e-3], 0.0, "0.0"), ([1e-3], -5.0, "-5.0"),
    ([1e-3], math.nan, "nan"), ([1e-3], "soon", "'soon'"),
])
def test_bad_arguments_raise_value_error_naming_the_value(q, half_life, msg):
    with pytest.raises(ValueError, match=msg):
        TermDrift(q, half_life=half_life)


def test_wrong_length_is_refused_by_the_posterior():
    with pytest.raises(ValueError, match=r"one rate per term \(4\), got 3: \[0.001, 0.0, 0.0\]"):
        Posterior(4, forgetting=TermDrift([1e-3, 0.0, 0.0]))
    with pytest.raises(ValueError, match="one rate per term"):
        Posterior.from_config({**Posterior(2).config(), "forgetting": {
            "kind": "term_drift", "q": [1.0, 2.0, 3.0], "half_life": None}})
