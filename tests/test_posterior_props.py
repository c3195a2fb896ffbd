"""Properties of the core: order independence, positive definiteness, state round trips, the gate,
argument checking and the import boundary."""

from __future__ import annotations

import ast
import json
import math
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

import recursive
from recursive import (
    Exponential,
    Gate,
    OutOfOrderError,
    Posterior,
    RandomWalk,
    Stabilized,
    TermDrift,
)

POLICIES = [None, Stabilized(25.0), Exponential(40.0), RandomWalk(1e-3, noise_half_life=60.0),
            TermDrift([1e-3, 0.0, 2e-4, 0.0, 0.0, 5e-4]),
            TermDrift([1e-3, 0.0, 0.0, 0.0, 0.0, 0.0], half_life=50.0)]


def _fit(policy, n):
    """The policy for n weights (per-term rates are given for up to 6)."""
    if isinstance(policy, TermDrift):
        return TermDrift(policy.q[:n], half_life=policy.half_life)
    return policy


def _data(seed, n, N):
    rng = np.random.default_rng(seed)
    X = rng.normal(size=(N, n))
    X[:, 0] = 1.0
    y = X @ rng.normal(size=n) + 0.2 * rng.normal(size=N)
    return X, y


@settings(max_examples=25, deadline=None)
@given(seed=st.integers(0, 2**31), n=st.integers(1, 6), learned=st.booleans())
def test_without_forgetting_order_does_not_matter(seed, n, learned):
    X, y = _data(seed, n, 3 * n + 5)
    perm = np.random.default_rng(seed + 1).permutation(len(y))
    kw = {"noise_prior": (0.5, 2.0)} if learned else {"noise_std": 0.2}
    a, b = Posterior(n, alpha=0.5, **kw), Posterior(n, alpha=0.5, **kw)
    for i in range(len(y)):
        a.update(X[i], y[i])
        b.update(X[perm[i]], y[perm[i]])
    np.testing.assert_allclose(a.mean, b.mean, rtol=1e-9, atol=1e-12)
    np.testing.assert_allclose(a.cov, b.cov, rtol=1e-9, atol=1e-14)
    assert a.noise_var == pytest.approx(b.noise_var, rel=1e-9)


@settings(max_examples=12, deadline=None)
@given(seed=st.integers(0, 2**31), policy=st.sampled_from(POLICIES), n=st.integers(2, 6))
def test_covariance_stays_symmetric_positive_definite(seed, policy, n):
    rng = np.random.default_rng(seed)
    post = Posterior(n, alpha=1.0, noise_prior=(0.3, 2.0), forgetting=_fit(policy, n))
    t = 0.0
    # poorly excited, badly scaled regressors over a long run
    scales = 10.0 ** rng.uniform(-3, 3, size=n)
    for _ in range(600):
        t += rng.exponential(1.0)
        phi = scales * (rng.normal(size=n) * (rng.random() < 0.2) + 1.0)
        post.update(phi, float(phi @ np.ones(n) + rng.normal()), t)
    cov = post.scale_matrix
    assert np.all(np.isfinite(cov))
    np.testing.assert_allclose(cov, cov.T, rtol=1e-12, atol=0)
    np.linalg.cholesky(cov)  # raises unless positive definite


@settings(max_examples=20, deadline=None)
@given(seed=st.integers(0, 2**31), policy=st.sampled_from(POLICIES),
       gate=st.sampled_from([None, 3.0]), learned=st.booleans(), cut=st.integers(0, 30))
def test_state_round_trip_is_bit_exact(seed, policy, gate, learned, cut):
    X, y = _data(seed, 4, 40)
    y[7] += 50.0  # an outlier for the gate
    kw = {"noise_prior": (0.3, 1.0)} if learned else {"noise_std": 0.2}
    ref = Posterior(4, alpha=[0.0, 1.0, 1.0, 2.0], forgetting=_fit(policy, 4), gate=gate, **kw)
    for i in range(cut):
        ref.update(X[i], y[i], t=float(i))
    state = ref.to_state()
    # through JSON too: the state is plain data
    copy = Posterior.from_state(json.loads(json.dumps(state)))
    assert copy.to_state() == state
    for i in range(cut, 40):
        s1, s2 = ref.update(X[i], y[i], t=float(i)), copy.update(X[i], y[i], t=float(i))
        assert s1 == s2 or (math.isnan(s1.mean) and s1.accepted == s2.accepted)
    assert ref.to_state() == copy.to_state()
    p1, p2 = ref.predict(X[:5], t=45.0), copy.predict(X[:5], t=45.0)
    assert np.array_equal(p1.mean, p2.mean, equal_nan=True)
    assert np.array_equal(p1.std, p2.std, equal_nan=True)


def test_gate_rejects_outlier_and_leaves_state_unchanged():
    X, y = _data(1, 3, 30)
    post = Posterior(3, alpha=1.0, noise_std=0.2, gate=4.0)
    for i in range(20):
        post.update(X[i], y[i], t=float(i))
    before = post.to_state()
    step = post.update(X[20], y[20] + 5.0, t=20.0)  # 25 sigma
    assert not step.accepted and step.reason == "gated" and step.reject_run == 1
    after = post.to_state()
    assert after.pop("reject_run") == 1 and before.pop("reject_run") == 0
    assert after == before
    ok = post.update(X[21], y[21], t=21.0)
    assert ok.accepted and ok.reject_run == 0


def test_gate_opens_after_a_run_of_same_sign_rejections():
    """A step change gives a run of same-sign residuals; after `release` of them it is learned."""
    X, y = _data(2, 3, 60)
    post = Posterior(3, alpha=1.0, noise_std=0.2, gate=Gate(4.0, release=3),
                     forgetting=Stabilized(10.0))
    for i in range(30):
        post.update(X[i], y[i], t=float(i))
    reasons = [post.update(X[i], y[i] + 10.0, t=float(i)).reason for i in range(30, 60)]
    assert reasons[:3] == ["gated"] * 3
    assert reasons[3] == "gate_open"
    assert "ok" in reasons[4:]  # re-learned: residuals back inside the gate
    # alternating signs never open it
    post2 = Posterior(3, alpha=1.0, noise_std=0.2, gate=Gate(4.0, release=2))
    for i in range(30):
        post2.update(X[i], y[i], t=float(i))
    runs = [post2.update(X[i], y[i] + (10.0 if i % 2 else -10.0), t=float(i))
            for i in range(30, 40)]
    assert not any(s.accepted for s in runs)
    assert {abs(s.reject_run) for s in runs} == {1}


def test_flatten_moves_toward_the_prior():
    X, y = _data(3, 3, 50)
    post = Posterior(3, alpha=1.0, noise_std=0.2)
    for i in range(50):
        post.update(X[i], y[i])
    c1 = np.trace(post.cov)
    post.flatten(0.5)
    assert c1 < np.trace(post.cov) <= 3.0
    post.flatten(0.0)
    np.testing.assert_allclose(post.cov, np.eye(3), rtol=1e-12)


def test_bad_arguments_raise_value_error_with_the_value():
    with pytest.raises(ValueError, match="n_features"):
        Posterior(0)
    with pytest.raises(ValueError, match="alpha"):
        Posterior(2, alpha=-1.0)
    with pytest.raises(ValueError, match="alpha"):
        Posterior(2, alpha=[1.0, 2.0, 3.0])
    with pytest.raises(ValueError, match="noise_std"):
        Posterior(2, noise_std=0.0)
    with pytest.raises(ValueError, match="noise_prior"):
        Posterior(2, noise_prior=(1.0, -1.0))
    with pytest.raises(ValueError, match="half_life"):
        Stabilized(0.0)
    with pytest.raises(ValueError, match="q must"):
        RandomWalk(-1.0)
    with pytest.raises(ValueError, match="gate"):
        Gate(float("nan"))
    post = Posterior(2, noise_std=1.0)
    with pytest.raises(ValueError, match="shape"):
        post.update([1.0, 2.0, 3.0], 1.0)
    with pytest.raises(ValueError, match="finite"):
        post.update([1.0, float("nan")], 1.0)
    with pytest.raises(ValueError, match="y must be finite"):
        post.update([1.0, 2.0], float("inf"))
    post.update([1.0, 2.0], 1.0, t=10.0)
    with pytest.raises(OutOfOrderError) as info:
        post.update([1.0, 2.0], 1.0, t=5.0)
    assert info.value.t == 5.0 and info.value.t_last == 10.0
    with pytest.raises(ValueError, match="pass t"):
        post.update([1.0, 2.0], 1.0)
    with pytest.raises(ValueError, match="level"):
        post.predict([1.0, 2.0]).interval(1.5)
    with pytest.raises(ValueError, match="schema"):
        Posterior.from_state({"schema": 99})
    state = post.to_state()
    state["R"] = [[1.0, 0.0], [1.0, 1.0]]
    with pytest.raises(ValueError, match="triangular"):
        Posterior.from_state(state)


def test_quantile_matches_scipy_stdtrit():
    """The interpolated Student-t quantile equals scipy.special.stdtrit (reference)."""
    from scipy import special

    from recursive.quantile import t_quantile

    rng = np.random.default_rng(5)
    ps = (0.55, 0.975, 0.9995, 0.999995)
    for base in (1.5, 2.0, 4.0, 37.0, 2e3, 1e6):  # exact below dof 2, interpolated above
        for spread in (1e-6, 1e-4, 1e-2):
            dof = base * (1 + spread * rng.random(100))
            for p in ps:
                np.testing.assert_allclose(t_quantile(dof, p), special.stdtrit(dof, p),
                                           rtol=5e-14)
    for k in (1, 2, 3, 4, 5, 9):  # the few-row path and the array path
        dof = 25.0 * (1 + 1e-5 * rng.random(k))
        np.testing.assert_allclose(t_quantile(dof, 0.975), special.stdtrit(dof, 0.975),
                                   rtol=5e-14)
    for lo, hi in ((2.0, 3.0), (3.0, 900.0), (800.0, 1e4), (1e4, 1e12), (1e12, 1e300)):
        dof = np.exp(rng.uniform(np.log(lo), np.log(hi), 3000))
        for p in ps:
            np.testing.assert_allclose(t_quantile(dof, p), special.stdtrit(dof, p),
                                       rtol=5e-14)
    odd = np.array([np.inf, 1.0, 0.5, 0.0, -1.0, np.nan])
    want = [special.ndtri(0.975), special.stdtrit(1.0, 0.975), special.stdtrit(0.5, 0.975),
            np.nan, np.nan, np.nan]
    np.testing.assert_allclose(t_quantile(odd, 0.975), want, rtol=1e-15)


def test_quantile_of_a_row_does_not_depend_on_its_batch():
    """Every published interval must be a function of its own row: same bits alone or in
    any batch (one grid cell or many, few rows or many)."""
    from recursive.quantile import t_quantile

    rng = np.random.default_rng(11)
    for spread in (1e-7, 1e-3, 0.5, 50.0):
        dof = 2.0 + 40.0 * (1 + spread * rng.random(300))
        dof[::7] = np.inf
        dof[::11] = 1.5
        whole = t_quantile(dof, 0.975)
        alone = np.array([t_quantile(dof[i:i + 1], 0.975)[0] for i in range(dof.size)])
        assert whole.tobytes() == alone.tobytes()
        for size in (2, 5, 64):
            parts = np.concatenate([t_quantile(dof[i:i + size], 0.975)
                                    for i in range(0, dof.size, size)])
            assert parts.tobytes() == whole.tobytes()


def test_recursive_imports_no_daemon_dependency():
    # every module of the package, so that a new file is covered without editing this test
    code = ("import importlib, pkgutil, sys, recursive\n"
            "names = [m.name for m in pkgutil.walk_packages(recursive.__path__, 'recursive.')]\n"
            "for name in names:\n"
            "    importlib.import_module(name)\n"
            "assert 'recursive.detect.trust' in names, names\n"
            "bad = {'zmq', 'msgpack', 'prometheus_client', 'daemon'} & set(sys.modules)\n"
            "print(sorted(bad))\n")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True,
                         check=True).stdout
    assert out.strip() == "[]"


def test_recursive_sources_import_only_numpy_scipy_and_stdlib():
    root = Path(recursive.__file__).parent
    files = sorted(root.rglob("*.py"))
    assert root / "detect" / "trust.py" in files
    allowed = set(sys.stdlib_module_names) | {"numpy", "scipy", "recursive", "__future__"}
    found = {}
    for path in files:
        for node in ast.walk(ast.parse(path.read_text(), str(path))):
            if isinstance(node, ast.Import):
                tops = [a.name.split(".")[0] for a in node.names]
            elif isinstance(node, ast.ImportFrom) and node.level == 0:
                tops = [node.module.split(".")[0]]
            else:
                continue
            for top in tops:
                found.setdefault(top, set()).add(path.relative_to(root).as_posix())
    assert {"numpy", "scipy"} <= set(found)
    outside = {top: sorted(where) for top, where in found.items() if top not in allowed}
    assert outside == {}
