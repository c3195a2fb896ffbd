"""Tests of the square-root information kernels: the C extension and its Python twin.

Every computation is checked against numpy / scipy (LAPACK) or filterpy, for both
implementations; the two are also compared with each other.
"""

from __future__ import annotations

import array
import math
import os

import numpy as np
import pytest
from filterpy.kalman import KalmanFilter
from numpy.testing import assert_allclose
from scipy.linalg import solve_triangular

from recursive import _givens, _linalg

try:
    from recursive import _kernel
    _KERNEL_ERROR = None
except ImportError as exc:  # the extension is optional
    _kernel = None
    _KERNEL_ERROR = exc

SIZES = [0, 1, 2, 5, 8, 17, 32]
FUNCS = ("update", "stabilize", "random_walk", "predict", "solve_upper", "rank_ratio")


@pytest.fixture(params=["c", "py"])
def K(request):
    if request.param == "c":
        if _kernel is None:
            pytest.skip(f"recursive._kernel is not built ({_KERNEL_ERROR}); "
                        "only the Python fallback is tested")
        return _kernel
    return _givens


def test_kernel_is_built_when_required():
    if os.environ.get("POSTERIORD_REQUIRE_KERNEL") != "1":
        pytest.skip("POSTERIORD_REQUIRE_KERNEL is not set to 1")
    assert _kernel is not None, f"recursive._kernel cannot be imported: {_KERNEL_ERROR}"


def _tri(rng, n, positive=True):
    """Well-conditioned upper-triangular factor (diagonal positive unless told)."""
    R = np.triu(rng.normal(scale=0.4, size=(n, n)), 1)
    d = rng.uniform(0.5, 2.0, n)
    if not positive:
        d *= rng.choice([-1.0, 1.0], n)
    R[np.diag_indices(n)] = d
    return R


def _tol(*arrays):
    return 1e-12 * max([1.0] + [float(np.max(np.abs(a))) for a in arrays if np.size(a)])


# ------------------------------------------------------------------ update
@pytest.mark.parametrize("n", SIZES)
@pytest.mark.parametrize("positive", [True, False])
def test_update_adds_the_row_to_the_gram_matrix(K, n, positive):
    rng = np.random.default_rng(100 + n)
    R0, z0 = _tri(rng, n, positive), rng.normal(size=n)
    phi, y = rng.normal(size=n), float(rng.normal())
    R, z, p = R0.copy(), z0.copy(), phi.copy()
    e = K.update(R, z, p, y)
    assert isinstance(e, float)
    # numpy reference: R^T R = R0^T R0 + phi phi^T, R^T z = R0^T z0 + phi y
    lam = R0.T @ R0 + np.outer(phi, phi)
    assert_allclose(R.T @ R, lam, atol=_tol(lam))
    assert_allclose(R.T @ z, R0.T @ z0 + phi * y, atol=_tol(lam, z0))
    assert np.all(np.tril(R, -1) == 0.0)
    assert np.all(np.diagonal(R) >= 0.0)
    assert np.all(p == 0.0)
    # e^2 is the last diagonal entry of the LAPACK QR (numpy.linalg.qr) of the stack
    stack = np.block([[R0, z0[:, None]], [phi[None, :], np.array([[y]])]])
    r = np.linalg.qr(stack, mode="r")
    assert abs(e) == pytest.approx(abs(r[n, n]), rel=1e-11, abs=1e-12)
    # and the whole stack is preserved: [R z; 0 e] has the same Gram matrix
    out = np.block([[R, z[:, None]], [np.zeros((1, n)), np.array([[e]])]])
    assert_allclose(out.T @ out, stack.T @ stack, atol=_tol(stack.T @ stack))


@pytest.mark.parametrize("n", [1, 3, 8, 32])
def test_update_residual_is_standardized_prediction_error(K, n):
    # Standard identity: e = (y - phi^T m) / sqrt(1 + phi^T V phi), V = (R0^T R0)^{-1},
    # here with its sign (R0 has a positive diagonal).
    rng = np.random.default_rng(200 + n)
    for _ in range(5):
        R0, z0 = _tri(rng, n), rng.normal(size=n)
        phi, y = rng.normal(size=n), float(rng.normal(scale=3.0))
        m = np.linalg.solve(R0, z0)
        V = np.linalg.inv(R0.T @ R0)
        expected = (y - phi @ m) / math.sqrt(1.0 + phi @ V @ phi)
        e = K.update(R0.copy(), z0.copy(), phi.copy(), y)
        assert e == pytest.approx(expected, rel=1e-11, abs=1e-13)


@pytest.mark.parametrize("n", [1, 2, 6, 20])
def test_update_from_flat_prior_gives_least_squares(K, n):
    rng = np.random.default_rng(300 + n)
    N = n + 4
    X = rng.normal(size=(N, n))
    Y = X @ rng.normal(size=n) + 0.1 * rng.normal(size=N)
    R, z = np.zeros((n, n)), np.zeros(n)
    ss = 0.0
    for k in range(N):
        if k < n:
            # fewer samples than weights: a zero pivot, so not identified yet
            assert K.rank_ratio(R) == 0.0
            assert all(math.isnan(v) for v in K.predict(R, z, X[k]))
        ss += K.update(R, z, X[k].copy(), float(Y[k])) ** 2
    assert K.rank_ratio(R) > 1e-3
    m = solve_triangular(R, z)
    coef, res, _rank, _sv = np.linalg.lstsq(X, Y, rcond=None)  # numpy.linalg.lstsq
    assert_allclose(m, coef, rtol=1e-10, atol=1e-12)
    assert ss == pytest.approx(float(res[0]), rel=1e-9)


# ------------------------------------------------------------------ stabilize
@pytest.mark.parametrize("n", SIZES)
@pytest.mark.parametrize("delta", [0.0, 0.3, 0.9, 1.0])
def test_stabilize_mixes_information_with_the_prior(K, n, delta):
    rng = np.random.default_rng(400 + n)
    R0, z0 = _tri(rng, n, positive=False), rng.normal(size=n)
    r0 = rng.uniform(0.1, 2.0, n) * rng.choice([-1.0, 1.0], n)
    r0[::3] = 0.0  # flat prior on some weights
    zp = r0 * rng.normal(size=n)
    R, z = R0.copy(), z0.copy()
    K.stabilize(R, z, r0, zp, delta)
    # numpy reference: Lambda <- delta Lambda + (1-delta) diag(r0^2), likewise eta
    lam = delta * (R0.T @ R0) + (1.0 - delta) * np.diag(r0 ** 2)
    eta = delta * (R0.T @ z0) + (1.0 - delta) * r0 * zp
    assert_allclose(R.T @ R, lam, atol=_tol(lam))
    assert_allclose(R.T @ z, eta, atol=_tol(lam, eta))
    assert np.all(np.tril(R, -1) == 0.0)
    if delta == 1.0:
        assert np.array_equal(R, R0) and np.array_equal(z, z0)
    if delta == 0.0:
        assert_allclose(R, np.diag(np.abs(r0)), atol=1e-15)


def test_stabilize_from_zero_information_and_zero_prior(K):
    n = 4
    R, z = np.zeros((n, n)), np.zeros(n)
    K.stabilize(R, z, np.zeros(n), np.zeros(n), 0.5)
    assert np.all(R == 0.0) and np.all(z == 0.0)
    r0 = np.array([1.0, 0.0, 2.0, 0.0])
    z0 = np.array([0.5, 0.0, -1.0, 0.0])
    K.stabilize(R, z, r0, z0, 0.75)
    assert_allclose(R.T @ R, 0.25 * np.diag(r0 ** 2), atol=1e-15)
    assert_allclose(R.T @ z, 0.25 * r0 * z0, atol=1e-15)


# ------------------------------------------------------------------ random_walk
@pytest.mark.parametrize("n", SIZES + [40])
@pytest.mark.parametrize("c", [1e-4, 0.3, 50.0])
def test_random_walk_against_covariance_form(K, n, c):
    rng = np.random.default_rng(500 + n)
    R0, z0 = _tri(rng, n, positive=False), rng.normal(size=n)
    R, z = R0.copy(), z0.copy()
    K.random_walk(R, z, c)
    lam = R0.T @ R0
    # numpy reference: Lambda <- inv(inv(Lambda) + c I), mean unchanged
    expected = np.linalg.inv(np.linalg.inv(lam) + c * np.eye(n)) if n else lam
    assert_allclose(R.T @ R, expected, atol=_tol(expected))
    assert_allclose(np.linalg.solve(R, z) if n else z, np.linalg.solve(R0, z0) if n else z0,
                    rtol=1e-10, atol=1e-12)
    assert np.all(np.tril(R, -1) == 0.0)
    assert np.all(np.diagonal(R) >= 0.0)


@pytest.mark.parametrize("n", [1, 3, 8, 20])
def test_random_walk_matches_filterpy_kalman_predict(K, n):
    rng = np.random.default_rng(600 + n)
    c = 0.05
    R, z = _tri(rng, n), rng.normal(size=n)
    kf = KalmanFilter(dim_x=n, dim_z=1)
    kf.x = np.linalg.solve(R, z).reshape(n, 1)
    kf.P = np.linalg.inv(R.T @ R)
    kf.F = np.eye(n)
    kf.Q = c * np.eye(n)
    kf.predict()  # filterpy: x <- F x, P <- F P F^T + Q
    K.random_walk(R, z, c)
    Rinv = solve_triangular(R, np.eye(n))
    assert_allclose(Rinv @ Rinv.T, kf.P, rtol=1e-11, atol=1e-13)
    assert_allclose(solve_triangular(R, z), kf.x[:, 0], rtol=1e-10, atol=1e-12)


@pytest.mark.parametrize("n", [2, 5, 17])
@pytest.mark.parametrize("kind", ["zero_pivot", "zero_row", "few_samples"])
def test_random_walk_singular_information_equals_exact_limit(K, n, kind):
    rng = np.random.default_rng(700 + n)
    c = 0.7
    if kind == "few_samples":  # n - 1 samples: rank n - 1 up to rounding
        R0 = np.linalg.qr(np.vstack([rng.normal(size=(n - 1, n)), np.zeros((1, n))]),
                          mode="r")
    else:
        R0 = _tri(rng, n, positive=False)
        j = n // 2
        if kind == "zero_pivot":  # exactly singular, off-diagonal entries still present
            R0[j, j] = 0.0
        else:
            R0[j, :] = 0.0
    z0 = rng.normal(size=n)
    R, z = R0.copy(), z0.copy()
    K.random_walk(R, z, c)
    assert np.all(np.isfinite(R)) and np.all(np.isfinite(z))
    lam, eta = R0.T @ R0, R0.T @ z0
    # exact limit (numpy): Lambda (I + c Lambda)^{-1} and (I + c Lambda)^{-1} eta, which are
    # the Schur complement w^2 I - w^4 (w^2 I + Lambda)^{-1} etc. and need no inverse of Lambda
    A = np.eye(n) + c * lam
    assert_allclose(R.T @ R, lam @ np.linalg.inv(A), atol=1e-12)
    assert_allclose(R.T @ z, np.linalg.solve(A, eta), atol=1e-12)
    assert K.rank_ratio(R) < 1e-8


def _ill_conditioned(rng, n, cond):
    """Upper-triangular factor with condition number ``cond`` and a random overall scale."""
    u = np.linalg.qr(rng.normal(size=(n, n)))[0]
    v = np.linalg.qr(rng.normal(size=(n, n)))[0]
    sv = np.logspace(0, math.log10(cond), n) * 10.0 ** rng.uniform(-3, 3)
    R = np.linalg.qr((u * sv) @ v, mode="r")
    return R * np.where(np.diagonal(R) < 0, -1.0, 1.0)[:, None]


@pytest.mark.parametrize("impl", ["c", "py", "lapack"])
def test_random_walk_accurate_whatever_the_conditioning(impl):
    """Against 60-digit arithmetic (mpmath): Lambda' = Lambda (I + c Lambda)^{-1}, factored.

    The new factor is compared entrywise with the upper Cholesky factor of the exact
    Lambda', computed in mpmath; the relative error stays at rounding level for condition
    numbers of R up to 1e11 and for c from 1e-8 to 1e4.
    """
    mp = pytest.importorskip("mpmath")
    if impl == "c" and _kernel is None:
        pytest.skip(f"recursive._kernel is not built ({_KERNEL_ERROR})")
    fn = {"c": getattr(_kernel, "random_walk", None), "py": _givens.random_walk,
          "lapack": _linalg.lapack_random_walk}[impl]
    rng = np.random.default_rng(1400)
    n = 6
    with mp.workdps(60):
        for cond in 10.0 ** np.arange(0, 12):
            R0 = _ill_conditioned(rng, n, cond)
            z0 = R0 @ rng.normal(size=n)
            c = float(10.0 ** rng.uniform(-8, 4))
            Rm = mp.matrix(R0.tolist())
            lam = Rm.T * Rm
            new = lam * mp.inverse(mp.eye(n) + c * lam)
            exact = np.array(mp.cholesky((new + new.T) / 2).T.tolist(), dtype=float)
            R, z = R0.copy(), z0.copy()
            fn(R, z, c)
            err = np.linalg.norm(R - exact) / np.linalg.norm(exact)
            assert err < 1e-13, (cond, c, err)
            mean0, mean = solve_triangular(R0, z0), solve_triangular(R, z)
            assert np.linalg.norm(mean - mean0) <= 1e-12 * np.linalg.norm(mean0), (cond, c)


def test_random_walk_of_zero_information_stays_zero(K):
    R, z = np.zeros((6, 6)), np.zeros(6)
    K.random_walk(R, z, 2.0)
    assert np.all(R == 0.0) and np.all(z == 0.0)


# ------------------------------------------------------------------ predict, solve, rank
@pytest.mark.parametrize("n", SIZES)
def test_predict_against_scipy_solve_triangular(K, n):
    rng = np.random.default_rng(800 + n)
    R, z, phi = _tri(rng, n, positive=False), rng.normal(size=n), rng.normal(size=n)
    phi0 = phi.copy()
    mean, lev = K.predict(R, z, phi)
    u = solve_triangular(R, phi, trans="T") if n else phi
    assert mean == pytest.approx(float(u @ z), rel=1e-12, abs=1e-13)
    assert lev == pytest.approx(float(u @ u), rel=1e-12, abs=1e-13)
    assert np.array_equal(phi, phi0)


def test_predict_with_zero_pivot_is_nan(K):
    R = np.diag([1.0, 0.0, 2.0])
    R[0, 1] = 0.5
    mean, lev = K.predict(R, np.ones(3), np.ones(3))
    assert math.isnan(mean) and math.isnan(lev)


@pytest.mark.parametrize("n", SIZES)
def test_solve_upper_against_scipy_solve_triangular(K, n):
    rng = np.random.default_rng(900 + n)
    R, b = _tri(rng, n, positive=False), rng.normal(size=n)
    expected = solve_triangular(R, b) if n else b.copy()
    K.solve_upper(R, b)
    assert_allclose(b, expected, rtol=1e-12, atol=1e-13)


def test_solve_upper_zero_pivot_raises_and_keeps_b(K):
    R = np.triu(np.ones((3, 3)))
    R[2, 2] = 0.0
    b = np.array([1.0, 2.0, 3.0])
    with pytest.raises(ZeroDivisionError, match=r"R\[2, 2\]"):
        K.solve_upper(R, b)
    assert np.array_equal(b, [1.0, 2.0, 3.0])


def _rank_ratio_numpy(R):
    d = np.abs(np.diagonal(R))
    norms = np.linalg.norm(np.triu(R), axis=0)
    with np.errstate(invalid="ignore"):
        r = np.where(norms > 0, d / np.where(norms > 0, norms, 1.0), 0.0)
    return float(min(1.0, r.min())) if R.size else 1.0


@pytest.mark.parametrize("n", SIZES)
def test_rank_ratio_against_numpy(K, n):
    rng = np.random.default_rng(1000 + n)
    for _ in range(3):
        R = _tri(rng, n, positive=False) * rng.uniform(1e-3, 1e3, n)[None, :]
        assert K.rank_ratio(R) == pytest.approx(_rank_ratio_numpy(R), rel=1e-13)
        if n > 1:
            R[n - 1, n - 1] = 0.0
            assert K.rank_ratio(R) == 0.0
            R[:, n - 1] = 0.0  # 0/0 counts as 0
            assert K.rank_ratio(R) == 0.0


def test_rank_ratio_is_scale_invariant_and_robust(K):
    R = np.array([[1.0, 1.0], [0.0, 1e-6]])
    base = K.rank_ratio(R)
    assert base == pytest.approx(1e-6 / math.hypot(1.0, 1e-6), rel=1e-13)
    R2 = R * np.array([1.0, 1e200])[None, :]  # squares would overflow without scaling
    assert K.rank_ratio(R2) == pytest.approx(base, rel=1e-13)
    assert K.rank_ratio(np.eye(3)) == 1.0
    assert K.rank_ratio(np.zeros((0, 0))) == 1.0
    assert math.isnan(K.rank_ratio(np.array([[1.0, np.nan], [0.0, 1.0]])))


# ------------------------------------------------------------------ layout and agreement
def test_strict_lower_triangle_is_never_read_or_written(K):
    rng = np.random.default_rng(1100)
    n = 6
    R0, z0, phi = _tri(rng, n), rng.normal(size=n), rng.normal(size=n)
    r0, zp = rng.uniform(0.5, 1.0, n), rng.normal(size=n)
    junk = R0.copy()
    junk[np.tril_indices(n, -1)] = np.nan

    def run(R):
        z = z0.copy()
        out = [K.update(R, z, phi.copy(), 0.3)]
        K.stabilize(R, z, r0, zp, 0.6)
        K.random_walk(R, z, 0.2)
        out += list(K.predict(R, z, phi))
        b = phi.copy()
        K.solve_upper(R, b)
        out += list(b) + [K.rank_ratio(R)] + list(z)
        return np.array(out)

    clean = R0.copy()
    expected = run(clean)
    got = run(junk)
    assert np.array_equal(got, expected)
    assert np.array_equal(np.triu(junk), np.triu(clean))
    assert np.all(np.isnan(junk[np.tril_indices(n, -1)]))


def test_any_float64_buffer_is_accepted(K):
    n = 3
    R = memoryview(bytearray(8 * n * n)).cast("B").cast("d", (n, n))
    for i in range(n):
        R[i, i] = 1.0
    z = array.array("d", [1.0, 2.0, 3.0])
    phi = array.array("d", [1.0, 0.0, 0.0])
    e = K.update(R, z, phi, 2.0)
    Rn = np.asarray(R)
    assert_allclose(Rn.T @ Rn, np.eye(3) + np.diag([1.0, 0.0, 0.0]), atol=1e-15)
    assert e == pytest.approx((2.0 - 1.0) / math.sqrt(2.0), rel=1e-14)
    assert np.asarray(phi).tolist() == [0.0, 0.0, 0.0]


def test_c_and_python_agree():
    if _kernel is None:
        pytest.skip(f"recursive._kernel is not built ({_KERNEL_ERROR})")
    rng = np.random.default_rng(1200)
    for trial in range(40):
        n = int(rng.choice([1, 2, 4, 8, 16, 17, 32]))
        R0 = _tri(rng, n, positive=bool(trial % 2))
        if trial % 5 == 0:
            R0[rng.integers(n), :] = 0.0  # singular: exercises the zero branches
        z0, phi = rng.normal(size=n), rng.normal(size=n)
        r0, zp = rng.uniform(0.0, 2.0, n), rng.normal(size=n)
        y, delta, c = float(rng.normal()), float(rng.uniform()), float(rng.uniform(0.01, 5))
        res = {}
        for name, K in (("c", _kernel), ("py", _givens)):
            R, z = R0.copy(), z0.copy()
            e = K.update(R, z, phi.copy(), y)
            a = (R.copy(), z.copy())
            K.stabilize(R, z, r0, zp, delta)
            b = (R.copy(), z.copy())
            K.random_walk(R, z, c)
            pr = K.predict(R, z, phi)
            x = phi.copy()
            if np.all(np.diagonal(R) != 0.0):
                K.solve_upper(R, x)
            res[name] = [np.array([e]), *a, *b, R, z, np.array(pr), x,
                         np.array([K.rank_ratio(R0)])]
        for u, v in zip(res["c"], res["py"], strict=True):
            assert_allclose(u, v, rtol=1e-13, atol=1e-13 * max(1.0, np.max(np.abs(v))))


# ------------------------------------------------------------------ bad arguments
def _good(n=3):
    R = np.eye(n)
    return {"R": R, "z": np.ones(n), "phi": np.ones(n), "r0": np.ones(n), "z0": np.ones(n)}


_DEFAULT = object()


def _call(K, fn, a, scalar=_DEFAULT):
    if fn == "update":
        return K.update(a["R"], a["z"], a["phi"], 1.0 if scalar is _DEFAULT else scalar)
    if fn == "stabilize":
        return K.stabilize(a["R"], a["z"], a["r0"], a["z0"],
                           0.5 if scalar is _DEFAULT else scalar)
    if fn == "random_walk":
        return K.random_walk(a["R"], a["z"], 0.1 if scalar is _DEFAULT else scalar)
    if fn == "predict":
        return K.predict(a["R"], a["z"], a["phi"])
    if fn == "solve_upper":
        return K.solve_upper(a["R"], a["z"])
    return K.rank_ratio(a["R"])


_USES = {"update": {"R", "z", "phi"}, "stabilize": {"R", "z", "r0", "z0"},
         "random_walk": {"R", "z"}, "predict": {"R", "z", "phi"}, "solve_upper": {"R", "z"},
         "rank_ratio": {"R"}}
# The array each function checks last: failing on it means the others are already held.
_LAST = {"update": "phi", "stabilize": "z0", "random_walk": "R", "predict": "phi",
         "solve_upper": "R", "rank_ratio": "R"}
_WRITES = {"update": ("R", "z", "phi"), "stabilize": ("R", "z"), "random_walk": ("R", "z"),
           "predict": (), "solve_upper": ("z",), "rank_ratio": ()}


def _bad_cases():
    f32 = np.eye(3, dtype=np.float32)
    big_endian = np.eye(3).astype(">f8")
    strided = np.zeros((3, 6))[:, ::2]
    fortran = np.asfortranarray(np.triu(np.ones((3, 3))))
    return [
        ("R", f32, TypeError, "float64"),
        ("R", big_endian, TypeError, "float64"),
        ("R", [[1.0, 0, 0], [0, 1, 0], [0, 0, 1]], TypeError, "float64"),
        ("R", None, TypeError, "float64"),
        ("R", b"x" * 72, TypeError, "float64"),
        ("R", np.ones(9), ValueError, "dimension"),
        ("R", np.eye(4), ValueError, "shape"),
        ("R", np.ones((3, 4)), ValueError, "shape"),
        ("R", strided, ValueError, "contiguous"),
        ("R", fortran, ValueError, "contiguous"),
        ("z", np.ones(3, dtype=np.int64), TypeError, "float64"),
        ("z", np.ones((3, 1)), ValueError, "dimension"),
        ("z", np.ones(1100), ValueError, "1024"),
        ("phi", np.ones(4), ValueError, "shape"),
        ("phi", np.ones(6)[::2], ValueError, "contiguous"),
        ("r0", np.ones(2), ValueError, "shape"),
        ("z0", np.ones((3, 3)), ValueError, "dimension"),
    ]


def _bad_calls():
    for fn in FUNCS:
        for i, (key, bad, exc, msg) in enumerate(_bad_cases()):
            if key not in _USES[fn]:
                continue
            if fn == "rank_ratio" and np.shape(bad) == (4, 4):
                continue  # a 4x4 R is valid on its own for rank_ratio
            yield pytest.param(fn, key, bad, exc, msg, id=f"{fn}-{key}-{i}")


@pytest.mark.parametrize("fn, key, bad, exc, msg", list(_bad_calls()))
def test_bad_arrays_raise_and_change_nothing(K, fn, key, bad, exc, msg):
    a = _good()
    a[key] = bad
    before = {k: np.array(v, copy=True) for k, v in a.items() if isinstance(v, np.ndarray)}
    with pytest.raises(exc, match=msg):
        _call(K, fn, a)
    for k, v in before.items():
        assert np.array_equal(a[k], v)


@pytest.mark.parametrize("fn", FUNCS)
def test_read_only_outputs_are_refused_inputs_accepted(K, fn):
    for key in ("R", "z", "phi", "r0", "z0"):
        a = _good()
        a[key].flags.writeable = False
        if key in _WRITES[fn]:
            with pytest.raises(ValueError, match="read-only"):
                _call(K, fn, a)
        else:
            _call(K, fn, a)


@pytest.mark.parametrize("fn", ["update", "stabilize", "random_walk", "solve_upper"])
def test_outputs_sharing_memory_are_refused(K, fn):
    a = _good()
    buf = np.ones(12)
    a["R"] = buf[:9].reshape(3, 3)
    a["z"] = buf[8:11]  # overlaps the last entry of R
    with pytest.raises(ValueError, match="share memory"):
        _call(K, fn, a)
    if fn == "update":
        a = _good()
        a["phi"] = a["z"]
        with pytest.raises(ValueError, match="share memory"):
            _call(K, fn, a)


@pytest.mark.parametrize("fn, value, exc", [
    ("update", "1.0", TypeError), ("update", None, TypeError),
    ("stabilize", -0.1, ValueError), ("stabilize", 1.5, ValueError),
    ("stabilize", float("nan"), ValueError), ("stabilize", "0.5", TypeError),
    ("random_walk", 0.0, ValueError), ("random_walk", -1.0, ValueError),
    ("random_walk", float("inf"), ValueError), ("random_walk", float("nan"), ValueError),
])
def test_bad_scalars_raise(K, fn, value, exc):
    a = _good()
    with pytest.raises(exc, match=("real number" if exc is TypeError else repr(value)[:3])):
        _call(K, fn, a, scalar=value)


def test_wrong_argument_count_raises(K):
    R, z = np.eye(2), np.ones(2)
    with pytest.raises(TypeError):
        K.update(R, z, z.copy())
    with pytest.raises(TypeError):
        K.random_walk(R, z)
    with pytest.raises(TypeError):
        K.rank_ratio(R, z)


@pytest.mark.parametrize("fn", FUNCS)
def test_buffers_are_released_on_success_and_error(K, fn):
    # A memoryview cannot be released while a buffer taken from it is still held.
    n = 3
    for fail in (False, True):
        views = {k: memoryview(bytearray(8 * n * (n if k == "R" else 1))).cast("B")
                 .cast("d", (n, n) if k == "R" else (n,)) for k in ("R", "z", "phi", "r0", "z0")}
        for i in range(n):
            views["R"][i, i] = 1.0
            views["r0"][i] = 1.0
        a = dict(views)
        if fail:
            a[_LAST[fn]] = np.ones(7, dtype=np.float32)
            with pytest.raises(TypeError) as info:
                _call(K, fn, a)
            del info  # drop the traceback (and any frames holding array views)
        else:
            _call(K, fn, a)
        for v in views.values():
            v.release()


# ------------------------------------------------------------------ LAPACK fallback
def test_lapack_fallback_agrees_with_reference():
    """The scipy/LAPACK versions used without the C extension give the same results."""
    rng = np.random.default_rng(1300)
    for trial in range(30):
        n = int(rng.choice([0, 1, 2, 5, 8, 17, 32]))
        R0 = _tri(rng, n, positive=bool(trial % 2))
        if trial % 5 == 0 and n:
            R0[rng.integers(n), :] = 0.0
        z0, phi = rng.normal(size=n), rng.normal(size=n)
        r0, zp = rng.uniform(0.0, 2.0, n), rng.normal(size=n)
        y, delta, c = float(rng.normal()), float(rng.uniform()), float(rng.uniform(0.01, 5))
        res = {}
        for name, (upd, stab, rw, pred, rr) in {
                "lapack": (_linalg.lapack_update, _linalg.lapack_stabilize,
                           _linalg.lapack_random_walk, _linalg.lapack_predict,
                           _linalg.lapack_rank_ratio),
                "py": (_givens.update, _givens.stabilize, _givens.random_walk,
                       _givens.predict, _givens.rank_ratio)}.items():
            R, z, p = R0.copy(), z0.copy(), phi.copy()
            e = upd(R, z, p, y)
            out = [np.array([e]), R.copy(), z.copy(), p]
            stab(R, z, r0, zp, delta)
            out += [R.copy(), z.copy()]
            rw(R, z, c)
            out += [R, z, np.array(pred(R, z, phi)), np.array([rr(R0)])]
            res[name] = out
        for u, v in zip(res["lapack"], res["py"], strict=True):
            assert_allclose(u, v, rtol=1e-12, atol=1e-12 * max(1.0, np.max(np.abs(v), initial=0)),
                            equal_nan=True)


# ------------------------------------------------------------------ stabilized_rows
def _rows_args(rng, n, k):
    M = rng.normal(size=(n, n))
    kappa = rng.uniform(0.0, 3.0, n)
    c0, dc = rng.normal(size=n), rng.normal(size=n)
    P, dt = rng.normal(size=(k, n)), rng.uniform(0.0, 500.0, k)
    return M, kappa, c0, dc, P, dt


@pytest.mark.parametrize(("n", "k"), [(1, 1), (3, 0), (9, 20), (17, 256)])
def test_stabilized_rows_against_numpy(K, n, k):
    """The per-row sums against the same formula written with numpy arrays."""
    rng = np.random.default_rng(1500 + n + k)
    M, kappa, c0, dc, P, dt = _rows_args(rng, n, k)
    out = np.full((3, k), np.nan)
    K.stabilized_rows(out, M, kappa, c0, dc, P, dt, 120.0)
    d = 2.0 ** (-dt / 120.0)
    g = M @ P.T
    q = kappa[:, None] + (1.0 - kappa)[:, None] * d
    assert_allclose(out[2], d, rtol=1e-15)
    assert_allclose(out[1], (g * g / q).sum(axis=0), rtol=1e-12)
    assert_allclose(out[0], (g / q * (c0[:, None] + dc[:, None] * d)).sum(axis=0),
                    rtol=1e-12, atol=1e-12)


def test_stabilized_rows_everything_forgotten_gives_infinite_leverage(K):
    """delta underflows to 0 where kappa is 0: the division by zero shows, silently."""
    M, kappa = np.eye(2), np.array([0.0, 1.0])
    P = np.array([[1.0, 1.0], [0.0, 1.0]])
    out = np.empty((3, 2))
    with np.errstate(all="raise"):
        K.stabilized_rows(out, M, kappa, np.ones(2), np.ones(2), P, np.full(2, 1e9), 1.0)
    assert out[2].tolist() == [0.0, 0.0]
    assert out[1, 0] == math.inf and out[1, 1] == 1.0


def test_stabilized_rows_c_and_python_agree():
    if _kernel is None:
        pytest.skip(f"recursive._kernel is not built ({_KERNEL_ERROR})")
    rng = np.random.default_rng(1600)
    for _ in range(20):
        n, k = int(rng.integers(1, 33)), int(rng.integers(0, 300))
        args = _rows_args(rng, n, k)
        a, b = np.empty((3, k)), np.empty((3, k))
        _kernel.stabilized_rows(a, *args, 50.0)
        _givens.stabilized_rows(b, *args, 50.0)
        assert_allclose(a, b, rtol=1e-12, atol=1e-12)


@pytest.mark.parametrize(("change", "error", "match"), [
    ({"out": np.empty((2, 4))}, ValueError, "out must have shape"),
    ({"out": np.empty((3, 5))}, ValueError, "shape"),
    ({"M": np.eye(4)}, ValueError, "M must have shape"),
    ({"c0": np.ones(4)}, ValueError, "c0 must have shape"),
    ({"P": np.ones((4, 4))}, ValueError, "P must have shape"),
    ({"dt": np.ones(3)}, ValueError, "dt must have shape"),
    ({"kappa": np.ones(3, dtype=np.float32)}, TypeError, "kappa must be a float64"),
    ({"P": np.ones((4, 6))[:, ::2]}, ValueError, "C-contiguous"),
    ({"half_life": 0.0}, ValueError, "half_life must be positive"),
    ({"half_life": math.inf}, ValueError, "half_life must be positive"),
    ({"half_life": "1"}, TypeError, "half_life must be a real number"),
])
def test_stabilized_rows_bad_arguments(K, change, error, match):
    a = {"out": np.empty((3, 4)), "M": np.eye(3), "kappa": np.ones(3), "c0": np.ones(3),
         "dc": np.ones(3), "P": np.ones((4, 3)), "dt": np.ones(4), "half_life": 1.0}
    a.update(change)
    with pytest.raises(error, match=match):
        K.stabilized_rows(a["out"], a["M"], a["kappa"], a["c0"], a["dc"], a["P"], a["dt"],
                          a["half_life"])


def test_stabilized_rows_refuses_shared_or_read_only_output(K):
    P = np.ones((4, 3))
    out = np.empty((3, 4))
    with pytest.raises(ValueError, match="out and"):
        K.stabilized_rows(out, np.eye(3), np.ones(3), np.ones(3), np.ones(3), P, out[0], 1.0)
    ro = np.empty((3, 4))
    ro.flags.writeable = False
    with pytest.raises(ValueError, match="writable"):
        K.stabilized_rows(ro, np.eye(3), np.ones(3), np.ones(3), np.ones(3), P, np.ones(4), 1.0)


# ------------------------------------------------------------------ sizes above the stack
def test_heap_workspaces_above_the_stack_size_give_the_numpy_results():
    """n = 600 > 256, the size up to which the kernel's vector workspaces are on the stack
    (a 561-term model, degree 2 on 32 inputs, is the case that needed it): every function
    against its numpy / scipy reference, and n above MAX_N still refused."""
    if _kernel is None:
        pytest.skip(f"recursive._kernel is not built ({_KERNEL_ERROR})")
    n = 600
    rng = np.random.default_rng(1600)
    # the R of a QR factorization of a tall Gaussian matrix: well conditioned at any n
    R0 = np.ascontiguousarray(np.linalg.qr(rng.normal(size=(2 * n, n)))[1] / np.sqrt(2 * n))
    z0, phi = rng.normal(size=n), rng.normal(size=n)
    lam = R0.T @ R0
    # predict: u = R^{-T} phi (scipy.linalg.solve_triangular)
    mean, lev = _kernel.predict(R0, z0, phi)
    u = solve_triangular(R0, phi, trans="T")
    assert mean == pytest.approx(float(u @ z0), rel=1e-10)
    assert lev == pytest.approx(float(u @ u), rel=1e-10)
    # update: the Gram matrix gains phi phi^T
    R, z = R0.copy(), z0.copy()
    _kernel.update(R, z, phi.copy(), 0.5)
    assert_allclose(R.T @ R, lam + np.outer(phi, phi), atol=_tol(lam) * 10)
    # stabilize: Lambda <- delta Lambda + (1 - delta) diag(r0^2)
    r0, delta = rng.uniform(0.1, 2.0, n), 0.7
    zp = r0 * rng.normal(size=n)
    R, z = R0.copy(), z0.copy()
    _kernel.stabilize(R, z, r0, zp, delta)
    assert_allclose(R.T @ R, delta * lam + (1 - delta) * np.diag(r0 ** 2), atol=_tol(lam) * 10)
    # random walk and term drift: Lambda <- inv(inv(Lambda) + C), numpy.linalg.inv
    cov = np.linalg.inv(lam)
    for fn, c in ((lambda R, z: _kernel.random_walk(R, z, 0.3), 0.3 * np.ones(n)),
                  (lambda R, z: _kernel.term_drift(R, z, np.r_[1.0, np.zeros(n - 1)], 0.3),
                   np.r_[0.3, np.zeros(n - 1)])):
        R, z = R0.copy(), z0.copy()
        fn(R, z)
        want = np.linalg.inv(cov + np.diag(c))
        assert_allclose(R.T @ R, want, atol=1e-9 * np.abs(want).max())
    # stabilized rows: a batch over the heap-sized M (numpy reference as in the test above)
    out = np.empty((3, 2))
    M = np.ascontiguousarray(rng.normal(size=(n, n)) / np.sqrt(n))
    kappa, c0, dc = rng.uniform(0.1, 1.0, n), rng.normal(size=n), rng.normal(size=n)
    P, dt = rng.normal(size=(2, n)), np.array([0.0, 3.0])
    _kernel.stabilized_rows(out, M, kappa, c0, dc, P, dt, 2.0)
    d = 2.0 ** (-dt / 2.0)
    g = P @ M.T
    q = kappa[None, :] + (1 - kappa[None, :]) * d[:, None]
    assert_allclose(out[1], np.sum(g * g / q, axis=1), rtol=1e-10)
    assert_allclose(out[0], np.sum(g / q * (c0 + dc * d[:, None]), axis=1), rtol=1e-9,
                    atol=1e-9)
    big = _kernel.MAX_N + 1
    with pytest.raises(ValueError, match=f"at most {_kernel.MAX_N}"):
        _kernel.predict(np.eye(big), np.ones(big), np.ones(big))


def _whiten(K):
    fn = getattr(K, "whiten_norm", None)
    if fn is None:
        pytest.skip("this build of recursive._kernel predates whiten_norm")
    return fn


def _whitening(rng, n):
    """A covariance, its mean, and M = L^{-1} for its lower Cholesky factor L."""
    A = rng.normal(size=(n + 3, n)) * rng.uniform(0.1, 10.0, n)
    cov = A.T @ A / (n + 3) + 1e-3 * np.eye(n)
    L = np.linalg.cholesky(cov)
    M = np.ascontiguousarray(solve_triangular(L, np.eye(n), lower=True))
    return cov, rng.normal(size=n), M


@pytest.mark.parametrize("n", [1, 2, 5, 8, 17])
def test_whiten_norm_is_the_mahalanobis_distance_of_scipy(K, n):
    # scipy.spatial.distance.mahalanobis(u, v, VI) = sqrt((u - v)^T VI (u - v))
    from scipy.spatial.distance import mahalanobis

    fn = _whiten(K)
    rng = np.random.default_rng(40 + n)
    cov, mean, M = _whitening(rng, n)
    VI = np.linalg.inv(cov)
    for _ in range(20):
        x = (mean + rng.normal(size=n) * 3.0).tolist()
        assert fn(x, mean, M) == pytest.approx(mahalanobis(x, mean, VI), rel=1e-9)
    assert fn(mean.tolist(), mean, M) == 0.0
    assert fn((), np.zeros(0), np.zeros((0, 0))) == 0.0


def test_whiten_norm_has_the_bits_of_the_elementwise_array_path(K):
    # the promise recursive.detect.region relies on: a row's distance from the kernel is the
    # array path's (products and sums each rounded, in index order over all of j)
    fn = _whiten(K)
    rng = np.random.default_rng(47)
    for n in (1, 3, 8, 12):
        _cov, mean, M = _whitening(rng, n)
        X = rng.normal(size=(60, n)) * 5.0
        X[0, 0], X[1, -1], X[2, n // 2] = math.inf, -math.inf, math.nan
        X[3] = 1e308
        with np.errstate(over="ignore", invalid="ignore"):
            D = X - mean
            Y = D[:, :1] * M[:, 0]
            for j in range(1, n):
                Y = Y + D[:, j:j + 1] * M[:, j]
            acc = Y[:, 0] * Y[:, 0]
            for i in range(1, n):
                acc = acc + Y[:, i] * Y[:, i]
            want = np.sqrt(acc)
        got = np.array([fn(x, mean, M) for x in X.tolist()])
        assert got.tobytes() == want.tobytes(), n


def test_whiten_norm_c_and_python_agree_to_the_bit():
    if _kernel is None or not hasattr(_kernel, "whiten_norm"):
        pytest.skip("recursive._kernel with whiten_norm is not built")
    rng = np.random.default_rng(48)
    for n in (2, 7, 30):
        _cov, mean, M = _whitening(rng, n)
        for _ in range(30):
            x = (rng.normal(size=n) * 4.0).tolist()
            a, b = _kernel.whiten_norm(x, mean, M), _givens.whiten_norm(x, mean, M)
            assert np.float64(a).tobytes() == np.float64(b).tobytes()
        assert _kernel.whiten_norm(tuple(range(n)), mean, M) == pytest.approx(
            _givens.whiten_norm(list(range(n)), mean, M), rel=0, abs=0)


def test_whiten_norm_bad_arguments(K):
    fn = _whiten(K)
    mean, M = np.zeros(3), np.eye(3)
    with pytest.raises(ValueError, match="3 values"):
        fn([1.0, 2.0], mean, M)
    with pytest.raises(TypeError, match="list or tuple"):
        fn(np.zeros(3), mean, M)
    with pytest.raises(TypeError):
        fn([1.0, "a", 2.0], mean, M)
    with pytest.raises(ValueError, match="shape"):
        fn([1.0, 2.0, 3.0], mean, np.eye(2))
    with pytest.raises(ValueError, match="C-contiguous"):
        fn([1.0, 2.0, 3.0], mean, np.asfortranarray(np.tril(np.ones((3, 3)))))
    with pytest.raises(TypeError, match="positional argument"):
        fn([1.0, 2.0, 3.0], mean)


def _fn(K, name):
    fn = getattr(K, name, None)
    if fn is None:
        pytest.skip(f"this build of recursive._kernel predates {name}")
    return fn


@pytest.mark.parametrize("n", [1, 3, 8, 40])
def test_scaled_row_has_the_bits_of_the_array_expression(K, n):
    # reference: numpy's elementwise ((X - lo) - (hi - X)) / width, each operation rounded
    fn = _fn(K, "scaled_row")
    rng = np.random.default_rng(60 + n)
    lo = rng.uniform(-100.0, 50.0, n)
    hi = lo + rng.uniform(0.01, 300.0, n)
    X = lo + (hi - lo) * rng.uniform(-0.5, 1.5, (50, n))
    X[0, 0], X[1, -1] = math.inf, math.nan
    with np.errstate(invalid="ignore"):
        want = ((X - lo) - (hi - X)) / (hi - lo)
    for i, x in enumerate(X.tolist()):
        out = np.full((1, n + 1), -7.0)
        assert fn(out, x, lo, hi, hi - lo) is None
        assert out[0, 0] == 1.0
        assert out[0, 1:].tobytes() == want[i].tobytes(), i


@pytest.mark.parametrize("n", [1, 4, 9])
def test_outside_equals_numpy_comparisons(K, n):
    fn = _fn(K, "outside")
    rng = np.random.default_rng(70 + n)
    lo, hi = -np.ones(n), np.ones(n) * 2.0
    X = rng.uniform(-1.5, 2.5, (200, n))
    X[0] = lo
    X[1] = hi  # the range is closed
    X[2, 0] = math.nan  # a nan compares false with both bounds: not outside
    for x in X:
        assert fn(tuple(x.tolist()), lo, hi) is bool(np.any((x < lo) | (x > hi)))
    assert fn([], np.zeros(0), np.zeros(0)) is False


def test_row_kernels_bad_arguments(K):
    scaled, out_ = _fn(K, "scaled_row"), _fn(K, "outside")
    lo, hi = np.zeros(2), np.ones(2)
    with pytest.raises(ValueError, match="2 values"):
        scaled(np.empty((1, 3)), [1.0], lo, hi, hi - lo)
    with pytest.raises(ValueError, match="shape"):
        scaled(np.empty((1, 2)), [1.0, 2.0], lo, hi, hi - lo)
    with pytest.raises(ValueError, match="writable"):
        ro = np.empty((1, 3))
        ro.setflags(write=False)
        scaled(ro, [1.0, 2.0], lo, hi, hi - lo)
    with pytest.raises(TypeError, match="list or tuple"):
        out_(np.zeros(2), lo, hi)
    with pytest.raises(TypeError):
        out_([1.0, None], lo, hi)
    with pytest.raises(ValueError, match="shape"):
        out_([1.0, 2.0], lo, np.ones(3))


@pytest.mark.parametrize("n", [1, 3, 8, 17])
def test_whiten_norms_are_whiten_norm_row_by_row_and_scipy_mahalanobis(K, n):
    # the array form: the bits of whiten_norm of each row (so a row's value does not depend
    # on the rows around it), and scipy.spatial.distance.mahalanobis to rounding
    from scipy.spatial.distance import mahalanobis

    fn = _fn(K, "whiten_norms")
    rng = np.random.default_rng(70 + n)
    cov, mean, M = _whitening(rng, n)
    X = mean + rng.normal(size=(90, n)) * 3.0
    X[0, 0], X[1, -1], X[2, n // 2] = math.inf, -math.inf, math.nan
    out = np.empty(90)
    with np.errstate(invalid="ignore", over="ignore"):
        fn(out, X, mean, M)
    rows = np.array([_givens.whiten_norm(x, mean, M) for x in X.tolist()])
    assert out.tobytes() == rows.tobytes()
    split = np.empty(90)
    with np.errstate(invalid="ignore", over="ignore"):
        fn(split[:7], np.ascontiguousarray(X[:7]), mean, M)
        fn(split[7:], np.ascontiguousarray(X[7:]), mean, M)
    assert split.tobytes() == out.tobytes()
    VI = np.linalg.inv(cov)
    assert_allclose(out[3:], [mahalanobis(x, mean, VI) for x in X[3:]], rtol=1e-9)


def test_whiten_norms_bad_arguments(K):
    fn = _fn(K, "whiten_norms")
    mean, M, X = np.zeros(3), np.eye(3), np.ones((4, 3))
    with pytest.raises(ValueError, match=r"out must have shape \(4,\)"):
        fn(np.empty(3), X, mean, M)
    with pytest.raises(ValueError, match="X must have shape"):
        fn(np.empty(4), np.ones((4, 2)), mean, M)
    with pytest.raises(TypeError, match="float64"):
        fn(np.empty(4), X.astype(np.float32), mean, M)
    with pytest.raises(ValueError, match="writable"):
        ro = np.empty(4)
        ro.flags.writeable = False
        fn(ro, X, mean, M)
    both = np.ones(12)
    with pytest.raises(ValueError, match="share memory"):
        fn(both[:4], both.reshape(4, 3), mean, M)


@pytest.mark.parametrize("n", [1, 3, 8, 40])
def test_scaled_rows_are_scaled_row_row_by_row(K, n):
    # reference: numpy's elementwise ((X - lo) - (hi - X)) / width with a leading 1
    fn = _fn(K, "scaled_rows")
    rng = np.random.default_rng(80 + n)
    lo = rng.uniform(-100.0, 50.0, n)
    hi = lo + rng.uniform(1e-3, 200.0, n)
    w = hi - lo
    X = rng.uniform(-300.0, 300.0, size=(50, n))
    X[0, 0], X[1, -1] = math.nan, math.inf
    out = np.empty((50, n + 1))
    with np.errstate(invalid="ignore"):
        fn(out, X, lo, hi, w)
        want = np.concatenate([np.ones((50, 1)), ((X - lo) - (hi - X)) / w], axis=1)
    assert out.tobytes() == want.tobytes()
    with pytest.raises(ValueError, match="out must have shape"):
        fn(np.empty((50, n)), X, lo, hi, w)
    big = np.zeros(50 * (n + 1))
    with pytest.raises(ValueError, match="share memory"):
        fn(big.reshape(50, n + 1), big[:50 * n].reshape(50, n), lo, hi, w)


@pytest.mark.parametrize("n", [1, 3, 8, 40])
def test_outside_rows_flags_what_numpy_comparisons_flag(K, n):
    # reference: numpy's ((X < lo) | (X > hi)).any(axis=1); a nan compares false (in range)
    fn = _fn(K, "outside_rows")
    rng = np.random.default_rng(90 + n)
    lo = rng.uniform(-10.0, 0.0, n)
    hi = lo + rng.uniform(0.5, 20.0, n)
    X = rng.uniform(-15.0, 25.0, size=(64, n))
    X[0] = lo
    X[1] = hi
    X[2, 0] = math.nan
    X[3, -1] = -math.inf
    out = np.full(64, 7.0)
    count = fn(out, X, lo, hi)
    want = ((X < lo) | (X > hi)).any(axis=1)
    assert out.tolist() == want.astype(float).tolist()
    assert count == int(want.sum())
    assert out[0] == out[1] == 0.0 and out[3] == 1.0
    with pytest.raises(ValueError, match=r"out must have shape \(64,\)"):
        fn(np.empty(63), X, lo, hi)
