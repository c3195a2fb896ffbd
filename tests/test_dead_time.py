"""Dead time on both sides: the prediction published for time t uses each input at
t - dead_time, the same rows learning matches lab results with.

The reference is computed outside the daemon: `apply_dead_time` (the batch alignment the
backtest uses) picks the rows, and ``recursive.Posterior`` (built by the same
``ModelConfig.build_posterior()``) learns the published lab results and predicts.
"""

from __future__ import annotations

import math
from dataclasses import replace

import msgpack
import numpy as np
import pytest
from conftest import MODEL, Recorder, c301_model, toml_config

from daemon.config import loads
from daemon.runtime.alignment import apply_dead_time
from daemon.runtime.runner import STATUSES, ModelRunner
from daemon.runtime.service import Service
from daemon.workbench import backtest, historian, plant

DEAD = {"FI-201": "19m"}
DEAD_S = 19 * 60.0


def delayed_model(name: str = MODEL, dead=None) -> dict:
    dead = DEAD if dead is None else dead
    inputs = [{"tag": tag, "lo": lo, "hi": hi, **({"dead_time": dead[tag]} if tag in dead
                                                  else {})}
              for tag, (lo, hi) in plant.RANGES.items()]
    return c301_model(name, inputs=inputs)


def service(models: list[dict]) -> Service:
    svc = Service(loads(toml_config({"publish": "inproc://x", "metrics": ""}, models),
                        "<test>"))
    svc.pub = Recorder()
    return svc


@pytest.fixture(scope="module")
def run():
    return plant.simulate(replace(plant.Scenario.drifting(days=3.0, seed=12),
                                  sample_period_s=120.0))


def live_outputs(svc: Service, run) -> list[tuple[str, dict]]:
    """Feed a plant run one message per wake-up; the published messages in order."""
    for ev in plant.events(run):
        body = {"t": ev[1], "x": list(ev[2])} if ev[0] == "x" else {"t": ev[1], "y": ev[2]}
        svc.process([[MODEL.encode(), msgpack.packb(body)]])
    return svc.pub.out


def test_published_mean_is_the_posterior_at_the_dead_time_aligned_inputs(run):
    svc = service([delayed_model()])
    cfg = svc.runners[MODEL].cfg
    dead = [i.dead_time for i in cfg.inputs]
    assert dead == [0.0, DEAD_S, 0.0, 0.0]
    out = live_outputs(svc, run)
    basis = cfg.build_basis()
    post = cfg.build_posterior(basis)
    n_pred = n_waiting = n_far = 0
    t0 = float(run.t[0])
    for topic, body in out:
        if topic.startswith("fit/"):
            # the learning side: the lab result learned on its aligned row
            (row,), ok = apply_dead_time(run.t, run.X, np.array([body["t"]]), dead,
                                         tolerance_s=cfg.tolerance)
            assert ok[0]
            step = post.update(basis(row), body["y"], body["t"])
            assert step.mean == body["pred_mean"] or math.isnan(body["pred_mean"])
            continue
        if not topic.startswith("pred/"):
            continue
        t = body["t"]
        (row,), ok = apply_dead_time(run.t, run.X, np.array([t]), dead,
                                     tolerance_s=cfg.tolerance)
        if not ok[0]:
            # the delayed input is not buffered yet: no prediction
            assert t < t0 + DEAD_S and body["status"] == "waiting"
            assert math.isnan(body["mean"]) and math.isnan(body["std"])
            n_waiting += 1
            continue
        assert body["status"] != "waiting"
        p = post.predict(basis(row), t=t)
        if not p.identified:
            assert math.isnan(body["mean"])
            continue
        n_pred += 1
        np.testing.assert_allclose([body["mean"], body["std"]], [p.mean, p.std],
                                   rtol=1e-12, atol=0)
        # the sample's own readings would have given another prediction
        k = int(np.searchsorted(run.t, t))
        own = post.predict(basis(run.X[k]), t=t)
        if abs(own.mean - p.mean) > 0.05 * p.std:
            n_far += 1
    # the samples (every 2 min) drawn less than the dead time after the first one
    assert n_waiting == math.ceil(DEAD_S / 120.0)
    assert n_pred > 1000 and n_far > 100


def test_status_waiting_is_a_listed_status_and_shown_by_the_status_view(run):
    assert "waiting" in STATUSES
    r = ModelRunner(service([delayed_model()]).runners[MODEL].cfg)
    r.add_features(float(run.t[0]), run.X[0].tolist(), None)
    assert r.status()["status"] == "waiting"
    batch = r.predict([float(run.t[0])], [run.X[0].tolist()], [None], singles=True)
    assert batch.status == ["waiting"] and math.isnan(batch.mean[0])


def test_no_dead_time_makes_no_lookup(run):
    r = ModelRunner(service([c301_model()]).runners[MODEL].cfg)
    assert not r.delayed
    r.aligner.lookup = None  # any call would fail
    for k in range(3):
        r.add_features(float(run.t[k]), run.X[k].tolist(), None)
    r.predict([float(t) for t in run.t[:3]], run.X[:3].tolist(), [None] * 3)


def test_backtest_equals_the_live_daemon_with_dead_times(tmp_path, start_service):
    # the same messages into a real daemon (in-process Service on real sockets) give the
    # same pred/ and fit/ messages, compared exactly after decoding
    path = tmp_path / "history.csv"
    historian.write_csv(path, plant.simulate(replace(plant.Scenario.drifting(days=4.0, seed=5),
                                                     blunders=1)))
    h = start_service([delayed_model(dead={"FI-201": "19m", "TI-104": "7m"})])
    model = h.model_config(MODEL)
    assert [i.dead_time for i in model.inputs] == [420.0, DEAD_S, 0.0, 0.0]
    hist = backtest.load_history(path)
    res = backtest.backtest(hist, model, train=2 * 86400.0, lab_delay=5400.0, block=30)
    for _, topic, body in backtest.feed_messages(hist, [model], lab_delay=5400.0, block=30):
        h.feed.send(topic, body)
    live = h.barrier(timeout=30.0)
    mine = [(t.decode(), msgpack.unpackb(p, raw=False)) for t, p in res.frames
            if t.decode() in (f"pred/{MODEL}", f"fit/{MODEL}")]
    assert len(live) == len(mine) > 100
    for (ta, ba), (tb, bb) in zip(live, mine, strict=True):
        assert ta == tb
        assert msgpack.packb(ba) == msgpack.packb(bb)
    statuses = [s for t, b in mine if t.startswith("pred/") for s in b["status"]]
    assert statuses[0] == "waiting" and "waiting" not in statuses[-100:]


def test_lookup_many_returns_the_floats_of_lookup():
    """The vectorized lookup used for batches of predictions against the one-row lookup
    (and against `apply_dead_time`, the backtest's batch alignment)."""
    from daemon.runtime.alignment import Aligner

    rng = np.random.default_rng(5)
    al = Aligner(["a", "b", "c"], [0.0, 300.0, 1140.0], 3600.0, tolerance_s=90.0,
                 max_rows=500)
    t, ts_all, X_all = 1000.0, [], []
    for k in range(40):
        n = int(rng.integers(1, 30))
        ts = (t + np.cumsum(rng.uniform(10.0, 200.0, n))).tolist()
        X = rng.normal(size=(n, 3))
        X[rng.random((n, 3)) < 0.05] = np.nan  # blank readings
        if k % 2:
            al.push_block_trusted(ts, X)
        else:
            al.push_many_trusted(ts, [tuple(r) for r in X.tolist()])
        ts_all += ts
        X_all.append(X)
        t = ts[-1]
        q = np.sort(rng.uniform(t - 5000.0, t + 100.0, 25))
        vals, ok = al.lookup_many(q)
        for i, tq in enumerate(q.tolist()):
            one = al.lookup(tq)
            assert ok[i] == (one is not None)
            if one is not None:
                assert msgpack.packb(vals[i].tolist()) == msgpack.packb(list(one))
        # apply_dead_time over the rows the buffer still holds agrees
        kept = np.asarray(ts_all[-len(al):])
        ref, ref_ok = apply_dead_time(kept, np.concatenate(X_all)[-len(al):], q,
                                      al.dead_times_s, tolerance_s=al.tolerance_s)
        assert (ref_ok == ok).all()
        assert msgpack.packb(ref[ok].tolist()) == msgpack.packb(vals[ok].tolist())
    assert al.lookup_many([])[0].shape == (0, 3)
