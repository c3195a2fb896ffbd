"""The short-batch path (a model visit with a single sample) against the general path.

`Posterior.predict_rows`, `ModelRunner._predict_few`, `Monitor.on_prediction_row`,
`InputRegion.distance_row`, `Basis.row_out_of_range` and `t_quantile_scalar` promise the
same bits as the array code they stand in for; the reference here is that array code (the
general path), compared through MessagePack (the published encoding, nan bits included).
The general path itself is checked against outside references in test_posterior_*.py,
test_detect.py and test_monitor.py.
"""

from __future__ import annotations

import math

import msgpack
import numpy as np
import pytest

from daemon.config import loads
from daemon.runtime.runner import _FEW, ModelRunner
from recursive import Posterior, Stabilized, TermDrift
from recursive.adaptive import Adaptation, RateMatch, VBNoise
from recursive.basis import Input, Polynomial
from recursive.detect import InputRegion
from recursive.quantile import t_quantile, t_quantile_scalar


def packed(*values) -> bytes:
    return msgpack.packb([np.asarray(v, dtype=float).tolist() for v in values])


def general(post: Posterior, P: np.ndarray, ts: list, level: float):
    pred = post.predict(P, t=np.asarray(ts, dtype=float))
    lo, hi = pred.interval(level)
    return pred.mean, pred.std, pred.var, lo, hi, pred.dof, pred.leverage


POSTERIORS = {
    "learned": dict(noise_prior=(0.5, 2.0), forgetting=Stabilized(30.0)),
    "known": dict(noise_std=0.4, forgetting=Stabilized(30.0)),
    "flat constant": dict(alpha=np.r_[0.0, np.ones(4)], noise_prior=(0.5, 0.0),
                          forgetting=Stabilized(30.0)),
    "term drift": dict(noise_prior=(0.5, 2.0),
                       forgetting=TermDrift([1e-3, 0, 0, 0, 0], half_life=30.0)),
    # the offset's rate matched to the innovations: the policy in use changes per result
    "adapted rate": dict(noise_prior=(0.5, 2.0),
                         forgetting=TermDrift([1e-3, 0, 0, 0, 0], half_life=30.0),
                         adapt=Adaptation(rate=RateMatch(0, 1e-5, 1.0, 5.0))),
}


@pytest.mark.parametrize("kind", sorted(POSTERIORS))
def test_predict_rows_has_the_bits_of_predict_and_interval(kind):
    rng = np.random.default_rng(5)
    post = Posterior(5, **POSTERIORS[kind])
    assert post.rowwise
    level = 0.9
    checked = 0
    for i in range(60):
        phi = np.r_[1.0, rng.standard_normal(4)]
        t = float(i * 3)
        if i % 3:
            post.update(phi, float(phi.sum() + 0.3 * rng.standard_normal()), t)
        if not post.identified:
            assert post.predict_rows(phi[None, :], [t + 1.0], level) is None
            continue
        # before, at and after the last update; far after it (most of it forgotten); and
        # rows of one to four samples
        for ts in ([t - 1.0], [t], [t + 0.5], [t + 400.0], [t + 1e5], [t, t + 2.0, t + 9.0],
                   [t + 1.0, t + 1.0, t + 3.0, t + 50.0]):
            P = np.r_[1.0, rng.standard_normal(4)] * np.ones((len(ts), 1))
            P[:, 1:] += rng.standard_normal((len(ts), 4))
            fast = post.predict_rows(P, ts, level)
            assert packed(*fast) == packed(*general(post, P, ts, level)), (kind, i, ts)
            checked += 1
    assert checked > 100


def test_predict_rows_declines_where_the_general_path_must_run():
    from recursive import Exponential

    rng = np.random.default_rng(6)
    P = rng.standard_normal((1, 3))
    # adaptive noise has a predictive of its own (Posterior Notes, "Adaptive noise")
    vb = Posterior(3, noise_prior=(0.5, 2.0), forgetting=TermDrift([1e-3, 0, 0], half_life=30.0),
                   adapt=Adaptation(VBNoise(20.0, 2)))
    for i in range(8):
        phi = np.r_[1.0, rng.standard_normal(2)]
        vb.update(phi, float(phi.sum()), float(i))
    assert vb.identified and vb.rowwise
    assert vb.predict_rows(P, [9.0], 0.95) is None
    assert Posterior(3, forgetting=Exponential(10.0)).predict_rows(P, [1.0], 0.95) is None
    post = Posterior(3, forgetting=Stabilized(10.0))
    for _ in range(5):
        post.update(rng.standard_normal(3), 1.0)  # counts samples: no times
    assert post.predict_rows(P, [1.0], 0.95) is None
    timed = Posterior(3, forgetting=Stabilized(10.0))
    timed.update(rng.standard_normal(3), 1.0, 0.0)
    assert timed.predict_rows(P, [math.inf], 0.95) is None  # predict raises the error
    with pytest.raises(ValueError):
        timed.predict_rows(P, [1.0], 1.5)


def test_quantile_scalar_and_its_memo_equal_the_array_function():
    rng = np.random.default_rng(7)
    dofs = np.r_[rng.uniform(0.5, 3000.0, 200), [math.inf, 2.0, 1.0, 0.0, -1.0, math.nan]]
    for p in (0.975, 0.95, 0.5 + 0.99 / 2):
        for d in dofs.tolist():
            for _ in range(2):  # the second call is answered from the memo
                assert packed(t_quantile_scalar(d, p)) == packed(t_quantile(np.array(d), p))


@pytest.fixture(params=["kernel", "floats"])
def row_path(request, monkeypatch):
    """distance_row through the C kernel (where built) and through plain floats."""
    from recursive.detect import region

    if request.param == "floats":
        monkeypatch.setattr(region, "_whiten_norm", None)
    elif region._whiten_norm is None:
        pytest.skip("recursive._kernel with whiten_norm is not built")
    return request.param


def test_region_distance_row_equals_the_rowwise_distances(row_path):
    rng = np.random.default_rng(8)
    reg = InputRegion(4, 50.0, 3.0)
    assert math.isnan(reg.distance_row([0.0] * 4))
    for i in range(80):
        reg.update(rng.standard_normal(4) * [1.0, 2.0, 0.1, 5.0])
        x = (rng.standard_normal(4) * 3).tolist()
        want = reg.distances(np.array([x]), rowwise=True)[0]
        assert packed(reg.distance_row(x)) == packed(want), i
    # a degenerate region (one input never moves): 0 at its mean, inf elsewhere
    flat = InputRegion(2, 50.0, 3.0)
    for _ in range(5):
        flat.update([1.0, 2.0])
    assert flat.distance_row([1.0, 2.0]) == 0.0 and flat.distance_row([1.0, 2.5]) == math.inf
    assert packed(flat.distance_row([1.0, 2.5])) == packed(
        flat.distances(np.array([[1.0, 2.5]]), rowwise=True)[0])


@pytest.fixture(params=["kernel", "floats"])
def basis_row_path(request, monkeypatch):
    """row_terms and row_out_of_range through the C kernel (where built) and plain floats."""
    from recursive import basis

    if request.param == "floats":
        monkeypatch.setattr(basis, "_scaled_row", None)
        monkeypatch.setattr(basis, "_outside", None)
    elif basis._scaled_row is None:
        pytest.skip("recursive._kernel with scaled_row is not built")
    return request.param


def test_row_terms_equal_the_basis_of_the_row(basis_row_path):
    from recursive.basis import Identity

    rng = np.random.default_rng(10)
    inputs = [Input("a", -1.0, 1.0), Input("b", 0.0, 10.0), Input("c", 250.0, 400.0)]
    bases = [Identity(inputs), Polynomial(inputs, degree=1),
             Polynomial(inputs, degree=1, family="monomial", scale=False),
             Polynomial(inputs, degree=2), Polynomial(inputs, degree=3, family="chebyshev")]
    for basis in bases:
        for _ in range(50):
            x = (rng.standard_normal(3) * [1.0, 5.0, 100.0] + [0.0, 5.0, 300.0]).tolist()
            assert packed(basis.row_terms(x)) == packed(basis(np.array([x]))), basis


def test_region_distance_row_with_non_finite_readings(row_path):
    rng = np.random.default_rng(11)
    reg = InputRegion(3, 50.0, 3.0)
    for _ in range(20):
        reg.update(rng.standard_normal(3))
    for x in ([math.inf, 0.0, 0.0], [0.0, 0.0, -math.inf], [math.nan, 1.0, 0.0],
              [1e308, 1e308, 0.0]):
        assert packed(reg.distance_row(x)) == packed(
            reg.distances(np.array([x]), rowwise=True)[0]), x


def test_row_out_of_range_equals_out_of_range(basis_row_path):
    basis = Polynomial([Input("a", -1.0, 1.0), Input("b", 0.0, 10.0)], degree=2)
    for x in ([0.0, 5.0], [-1.0, 10.0], [-1.5, 5.0], [0.0, 10.5], [math.nan, 5.0],
              [2.0, -3.0]):
        assert basis.row_out_of_range(x) == bool(basis.out_of_range(np.array(x)).any())


MODEL_TOML = """
[daemon]
feeds = ["tcp://127.0.0.1:1"]
publish = "tcp://127.0.0.1:2"
control = "tcp://127.0.0.1:3"
metrics = ""

[[model]]
name = "m"
inputs = [{ tag = "a", lo = -3, hi = 3 }, { tag = "b", lo = -3, hi = 3 },
          { tag = "c", lo = -3, hi = 3 }]
[model.basis]
kind = "polynomial"
degree = %(degree)d
[model.prior]
alpha = 1.0
[model.noise]
guess = 0.5
strength = 2.0
[model.forgetting]
policy = "stabilized"
half_life = "1h"
[model.lab]
stale_after = "20m"
[model.alerts]
leverage_limit = 5.0
region_limit = 2.5
clear_count = 3
clear_time = "5m"
"""


@pytest.mark.parametrize("degree", [1, 2])
def test_a_visit_of_a_few_samples_gives_the_general_paths_batch_and_detector_state(degree):
    cfg = loads(MODEL_TOML % {"degree": degree}).models[0]
    fast, ref = ModelRunner(cfg), ModelRunner(cfg)
    rng = np.random.default_rng(9)
    w = rng.standard_normal(3)
    seen = set()
    t = 0.0
    for i in range(300):
        k = int(rng.choice([1, 1, 1, 2, 3, 4, 7, _FEW]))  # samples in this visit
        ts, xs = [], []
        for _ in range(k):
            t += 10.0
            # excursions out of the range and far from the learned region, a lab outage
            x = rng.standard_normal(3) * (4.0 if rng.random() < 0.01 else 1.0)
            if 100 < i < 170:
                x[0] += 2.0
            for r in (fast, ref):
                r.add_features(t, x.tolist(), None)
            ts.append(t)
            xs.append(x.tolist())
        if i % 4 == 0 and not 120 < i < 230:
            y = float(np.array(xs[-1]) @ w + 0.2 * rng.standard_normal())
            for r in (fast, ref):
                r.learn(ts[-1], y, None)
            continue
        a = fast.predict(ts, xs, [None] * k, singles=True)
        # the general path, as predict runs it for rows that take no short path
        X = np.array(xs)
        pred = ref.post.predict(ref.basis(X), t=np.array(ts))
        b = ref._finish(ts, np.array(ts), X, [None] * k, pred, True, None)
        assert packed(a.t, a.mean, a.std, a.var, a.lo, a.hi, a.dof) == packed(
            b.t, b.mean, b.std, b.var, b.lo, b.hi, b.dof), i
        # the trust published with each row (None: the state after the visit, for all)
        published = [ref.trust] * k if b.trust is None else b.trust
        got = [fast.trust] * k if a.trust is None else a.trust
        assert (a.status, got, list(a.marks)) == (b.status, published, list(b.marks)), i
        # both paths take the quiet shortcut (one step for the visit) on the same visits
        assert (a.trust is None) == (b.trust is None), i
        assert msgpack.packb(fast.monitor.to_state()) == msgpack.packb(ref.monitor.to_state())
        assert (fast.last_mean, fast.last_std, fast.n_predictions) == (
            ref.last_mean, ref.last_std, ref.n_predictions)
        seen.update(a.status)
        seen.update(got)
        seen.update(r["name"] for r in fast.monitor.reasons())
        seen.add(("marks", bool(a.marks)))
        seen.add(("quiet", b.trust is None and k > 1))
    # the run went through the cases it was built for (quiet: visits of several samples
    # that the general path steps once)
    assert {"learning", "stale", "caution", "normal", ("marks", True), ("quiet", True)} <= seen


def test_quantile_cells_of_a_batch_equal_those_of_its_rows_alone():
    # the batch path takes the uniform cells (dof up to 833) of all rows at once; rows alone
    # take t_quantile_scalar. Dofs on both sides of that bound, and on cell boundaries.
    rng = np.random.default_rng(12)
    x0, h = 1.2e-3, 1.2e-5
    edges = 1.0 / (x0 + h * rng.integers(0, 41000, 200))
    for dof in (rng.uniform(2.0, 800.0, 500), np.exp(rng.uniform(np.log(2.0), 14.0, 500)),
                np.r_[edges, np.nextafter(edges, 0), np.nextafter(edges, np.inf)]):
        for p in (0.975, 0.9995):
            whole = t_quantile(dof, p)
            alone = [t_quantile_scalar(d, p) for d in dof.tolist()]
            assert packed(whole) == packed(alone)


def test_snapshot_and_restore_give_back_the_same_bits():
    """A snapshot shares the arrays and leaves out the prediction caches; restored after
    further updates, the posterior predicts (caches rebuilt) and learns as it did then.
    The reference is the same posterior's own output before the later updates."""
    rng = np.random.default_rng(21)
    post = Posterior(5, **POSTERIORS["learned"])
    for k in range(8):
        post.update(np.r_[1.0, rng.standard_normal(4)], float(rng.normal()), float(k))
    P = np.c_[np.ones(6), rng.standard_normal((6, 4))]
    ts = [post.t_last + d for d in (0.0, 1.0, 50.0, 0.5, 2.0, 9.0)]
    before = post.predict_rows(P, ts, 0.95)  # fills the caches the snapshot leaves out
    snap = post.snapshot()
    assert snap["_cache"] is None and snap["_m_cache"] is None
    phi = np.r_[1.0, rng.standard_normal(4)]
    post.update(phi, 0.3, 8.0)
    learned = packed(post.predict(P, t=np.array(ts)).mean)
    post.update(np.r_[1.0, rng.standard_normal(4)], -1.0, 9.0)
    post.restore(snap)
    assert packed(*post.predict_rows(P, ts, 0.95)) == packed(*before)
    post.update(phi, 0.3, 8.0)
    assert packed(post.predict(P, t=np.array(ts)).mean) == learned
    post.restore(snap)  # twice: the snapshot is unchanged by the first restore
    assert packed(*post.predict_rows(P, ts, 0.95)) == packed(*before)
