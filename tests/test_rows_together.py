"""Short visits of many models computed together against each model's own short path.

`stabilized_rows_many`, `predict_rows_many` and `runner.predict_few_together` promise each
row the bits it gets when its model is computed alone; the references are those single-model
functions (`stabilized_rows`, `Posterior.predict_rows`, `ModelRunner._predict_few`), which
test_kernel.py and test_short_path.py check against numpy and the general array path. The
comparisons go through MessagePack, the published encoding (nan bits included).
"""

from __future__ import annotations

import msgpack
import numpy as np
import pytest
from conftest import Recorder, toml_config
from prometheus_client import CollectorRegistry

from daemon.config import loads
from daemon.runtime.runner import predict_few_together
from daemon.runtime.service import Service
from recursive import Posterior, Stabilized, _givens, _linalg
from recursive.posterior import predict_rows_many

try:
    from recursive import _kernel
except ImportError:  # the Python twin is still compared with the single-model function
    _kernel = None


def packed(*values) -> bytes:
    return msgpack.packb([np.asarray(v, dtype=float).tolist() for v in values])


@pytest.fixture(params=["c", "py"])
def K(request):
    if request.param == "c":
        if _kernel is None or not hasattr(_kernel, "stabilized_rows_many"):
            pytest.skip("recursive._kernel is not built")
        return _kernel
    return _givens


def test_stabilized_rows_many_gives_each_row_its_own_models_result(K):
    rng = np.random.default_rng(31)
    G, n, k = 5, 4, 40
    M = rng.normal(size=(G, n, n))
    kappa = rng.uniform(0.0, 3.0, (G, n))
    kappa[2, 1] = 0.0  # a direction without prior information: infinite leverage far out
    c0, dc = rng.normal(size=(G, n)), rng.normal(size=(G, n))
    hl = rng.uniform(10.0, 500.0, G)
    P, dt = rng.normal(size=(k, n)), rng.uniform(0.0, 2000.0, k)
    dt[:3] = (0.0, 1e6, 1e9)
    owner = rng.integers(0, G, k)
    owner[:3] = 2
    out = np.full((3, k), np.nan)
    K.stabilized_rows_many(out, M.reshape(G * n, n), kappa, c0, dc, hl, P, dt,
                           owner.astype(float))
    for j in range(k):
        g = owner[j]
        ref = np.full((3, 1), np.nan)
        K.stabilized_rows(ref, M[g], kappa[g], c0[g], dc[g], P[j:j + 1], dt[j:j + 1],
                          float(hl[g]))
        assert packed(out[:, j]) == packed(ref[:, 0]), j
    assert np.isinf(out[1, 1]) or np.isinf(out[1, 2])


@pytest.mark.parametrize(("owner", "match"), [([0.0, 2.0], "owner"), ([0.5, 0.0], "owner"),
                                              ([-1.0, 0.0], "owner")])
def test_stabilized_rows_many_refuses_a_bad_owner(K, owner, match):
    G, n = 2, 2
    with pytest.raises(ValueError, match=match):
        K.stabilized_rows_many(np.empty((3, 2)), np.ones((G * n, n)), np.ones((G, n)),
                               np.ones((G, n)), np.ones((G, n)), np.ones(G), np.ones((2, n)),
                               np.ones(2), np.array(owner))


def _posteriors(rng):
    """Posteriors of 5 terms in different states: learned noise, a flat constant, young."""
    out = []
    for g in range(6):
        kw = dict(noise_prior=(0.5, 2.0), forgetting=Stabilized(20.0 + 15.0 * g))
        if g == 3:
            kw["alpha"] = np.r_[0.0, np.ones(4)]
            kw["noise_prior"] = (0.5, 0.0)
        post = Posterior(5, **kw)
        for i in range(8 + 4 * g):
            phi = np.r_[1.0, rng.standard_normal(4)]
            post.update(phi, float(phi.sum() + 0.3 * rng.standard_normal()), float(i * 3))
        assert post.rows_together
        out.append(post)
    return out


def test_predict_rows_many_has_the_bits_of_each_posteriors_predict_rows():
    rng = np.random.default_rng(8)
    posts = _posteriors(rng)
    levels = [0.9, 0.95, 0.9, 0.99, 0.5, 0.95]
    # before, at and after each model's last update, and so far after that most is forgotten
    offsets = [-1.0, 0.0, 0.5, 3.0, 400.0, 1e5, 1e7]
    owner, ts = [], []
    for g, post in enumerate(posts):
        for off in rng.permutation(offsets)[:1 + g]:
            owner.append(g)
            ts.append(post.t_last + float(off))
    owner = np.array(owner)
    P = np.ones((len(ts), 5))
    P[:, 1:] = rng.standard_normal((len(ts), 4))
    many = predict_rows_many(posts, P, np.array(ts), owner, levels)
    assert many is not None
    for j, g in enumerate(owner.tolist()):
        alone = posts[g].predict_rows(P[j:j + 1], [ts[j]], levels[g])
        assert packed(*[a[j:j + 1] for a in many]) == packed(*alone), (j, g, ts[j])
    # the run reached the cases it was built for: finite, infinite and nan variances
    var = many[2]
    assert np.isfinite(var).any() and (np.isinf(var) | np.isnan(var)).any()
    # what a posterior keeps for these calls follows its learning: one learns, one is
    # restored from an older snapshot, and the next call again has each one's own bits
    snap = posts[4].snapshot()
    posts[4].update(np.r_[1.0, rng.standard_normal(4)], 2.0, posts[4].t_last + 7.0)
    before = predict_rows_many(posts, P, np.array(ts), owner, levels)
    posts[1].update(np.r_[1.0, rng.standard_normal(4)], -3.0, posts[1].t_last + 2.0)
    posts[4].restore(snap)
    after = predict_rows_many(posts, P, np.array(ts), owner, levels)
    for j, g in enumerate(owner.tolist()):
        alone = posts[g].predict_rows(P[j:j + 1], [ts[j]], levels[g])
        assert packed(*[a[j:j + 1] for a in after]) == packed(*alone), (j, g, ts[j])
    assert packed(*before) != packed(*after)


def test_predict_rows_many_declines_a_time_that_is_not_finite():
    posts = _posteriors(np.random.default_rng(2))[:2]
    P = np.ones((2, 5))
    assert predict_rows_many(posts, P, np.array([1.0, np.nan]), np.array([0, 1]),
                             [0.9, 0.9]) is None


# ------------------------------------------------------------------ the service
def _model(name: str, basis: dict, **extra) -> dict:
    m = {"name": name, "level": extra.pop("level", 0.95),
         "inputs": extra.pop("inputs", [{"tag": "a", "lo": -3, "hi": 3},
                                        {"tag": "b", "lo": -2, "hi": 5},
                                        {"tag": "c", "lo": -3, "hi": 3}]),
         "basis": basis,
         "prior": {"alpha": 1.0},
         "noise": extra.pop("noise", {"guess": 0.5, "strength": 2.0}),
         "forgetting": {"policy": "stabilized", "half_life": "2h"},
         "lab": {"stale_after": "30m"},
         "alerts": {"region_limit": 2.5, "clear_count": 3, "clear_time": "2m",
                    "commissioning_labs": 5}}
    m.update(extra)
    return m


MODELS = [
    *[_model(f"p{i}", {"kind": "polynomial", "degree": 1}, level=0.9 + 0.02 * i)
      for i in range(4)],
    *[_model(f"i{i}", {"kind": "identity"}) for i in range(2)],
    _model("known", {"kind": "polynomial", "degree": 1}, noise={"std": 0.3}),
    _model("quad", {"kind": "polynomial", "degree": 2}),
    _model("two", {"kind": "polynomial", "degree": 1},
           inputs=[{"tag": "a", "lo": -3, "hi": 3}, {"tag": "b", "lo": -3, "hi": 3}]),
]


def _service() -> Service:
    svc = Service(loads(toml_config({"metrics": ""}, MODELS), "<test>"),
                  registry=CollectorRegistry())
    svc.pub = Recorder()
    return svc


def _feed() -> list[list]:
    """Rounds of one sample per model (now and then two, or a lab result), interleaved."""
    rng = np.random.default_rng(13)
    w = rng.standard_normal(3)
    frames = []
    for r in range(160):
        t = 60.0 * r
        for m in MODELS:
            d = len(m["inputs"])
            for k in range(1 + (rng.random() < 0.2)):
                x = rng.standard_normal(d) * (3.0 if rng.random() < 0.03 else 1.0)
                if 90 < r < 110:
                    x[0] += 1.5  # away from the learned region
                body = {"t": t + k, "x": x.tolist()}
                frames.append([m["name"].encode(), msgpack.packb(body)])
            # lab results, with an outage that makes the models stale
            if r % 3 == 0 and not 50 < r < 100:
                y = float(x[:3] @ w[:d] + 0.2 * rng.standard_normal())
                frames.append([m["name"].encode(), msgpack.packb({"t": t + k, "y": y})])
    return frames


def test_a_wake_up_of_many_models_publishes_the_bytes_of_one_message_at_a_time():
    feed = _feed()
    paced, rounds = _service(), _service()
    for frames in feed:
        paced.process([frames])  # every visit alone: each model's own short path
    per_round = len(feed) // 160
    for i in range(0, len(feed), per_round):
        rounds.process(feed[i:i + per_round])
    # each model's messages in their order (models' messages interleave by wake-up)
    want, got = {}, {}
    for out, rec in ((want, paced.pub), (got, rounds.pub)):
        for topic, body in rec.out:
            out.setdefault(topic, []).append(msgpack.packb(body))
    assert got == want
    # the run went through trust changes and stale rows
    bodies = paced.pub.bodies("pred/")
    assert {"learning", "stale"} <= {b["status"] for b in bodies}
    assert {"normal", "caution"} <= {b["trust"] for b in bodies}


@pytest.mark.skipif(not _linalg.HAVE_KERNEL, reason="rows are shared with the C kernel only")
def test_visits_are_grouped_by_shape_and_the_others_left_to_their_own_path():
    svc = _service()
    feed = _feed()
    svc.process(feed[:len(feed) // 2])
    runners = svc.runners
    visits = []
    for name, r in runners.items():
        ts = [1e4 + 1.0]
        rows = [[0.1] * len(r.tags)]
        r.add_features(ts[0], rows[0], None)
        if r.few_together(ts):
            visits.append((name, r, ts, rows))
    eligible = {v[0] for v in visits}
    # degree 2 (not affine) and known noise take their own short path
    assert eligible == {"p0", "p1", "p2", "p3", "i0", "i1", "two"}
    shared = predict_few_together(visits)
    # "two" has no other model of its shape: nothing to share
    assert set(shared) == {"p0", "p1", "p2", "p3", "i0", "i1"}
    for name in sorted(shared):
        r = runners[name]
        alone = r.post.predict_rows(r.basis.row_terms([0.1] * 3), [1e4 + 1.0], r.cfg.level)
        xs, a, std, lev = shared[name]
        assert packed(*a[1:], lev) == packed(*alone[:6], alone[6]), name


# ------------------------------------------------------------------ held reasons, quiet rows
HELD_TOML = """
[[model]]
name = "m"
inputs = [{ tag = "a", lo = -3, hi = 3 }, { tag = "b", lo = -3, hi = 3 }]
[model.basis]
kind = "polynomial"
degree = 1
[model.noise]
guess = 0.5
strength = 2.0
[model.forgetting]
policy = "stabilized"
half_life = "%(half_life)s"
[model.lab]
stale_after = "20m"
[model.alerts]
region_limit = 2.5
commissioning_labs = 4
clear_count = %(count)d
clear_time = "%(clear)s"
"""


@pytest.mark.parametrize(("count", "clear", "half_life"),
                         [(3, "5m", "1h"), (1, "0s", "1h"), (40, "1m", "1h"), (3, "2h", "1d")])
def test_visits_of_many_rows_step_held_reasons_as_rows_one_at_a_time(count, clear, half_life):
    """A model in caution: the rows of a visit that make nothing active are stepped in runs
    (`Trust.advance_quiet`); the trust of each row, the alerts and the detector state must be
    those of the same rows as single visits (each stepped alone: the reference)."""
    from daemon.runtime.runner import ModelRunner
    cfg = loads(HELD_TOML % {"count": count, "clear": clear, "half_life": half_life}).models[0]
    many, ones = ModelRunner(cfg), ModelRunner(cfg)
    rng = np.random.default_rng(21)
    t = 0.0
    seen = set()
    for v in range(120):
        k = int(rng.integers(5, 40))
        ts, xs = [], []
        for _ in range(k):
            t += 7.0
            x = rng.standard_normal(2) * (4.0 if rng.random() < 0.02 else 1.0)
            for r in (many, ones):
                r.add_features(t, x.tolist(), None)
            ts.append(t)
            xs.append(x.tolist())
        if v % 3 == 0 and not 60 < v < 80:
            y = float(np.array(xs[-1]).sum() + 0.2 * rng.standard_normal())
            for r in (many, ones):
                r.learn(ts[-1], y, None)
            continue
        a = many.predict(ts, xs, [None] * k, singles=True)
        singles = [ones.predict([ts[i]], [xs[i]], [None], singles=True) for i in range(k)]
        trust_a = [many.trust] * k if a.trust is None else a.trust
        trust_b = [s.trust[0] if s.trust is not None else ones.trust for s in singles]
        assert trust_a == trust_b, v
        marks_b = [(i, s.marks[0][1]) for i, s in enumerate(singles) if s.marks]
        assert msgpack.packb(list(a.marks)) == msgpack.packb(marks_b), v
        assert msgpack.packb(many.monitor.to_state()) == msgpack.packb(ones.monitor.to_state())
        seen.update(trust_a)
        seen.add(("marks", bool(marks_b)))
    assert {"caution", ("marks", True)} <= seen
