"""What the cyclic garbage collector has to visit, and when it runs.

A full collection visits every tracked object of every model: with thousands of trained
models that is seconds of a stalled loop. A wake-up runs no collection (its working objects
would be promoted to the oldest generation and count toward the next full one), and the
snapshots kept for re-ordering late lab results hold the detectors' state as one string,
not as a tree of lists and dicts per result.
"""

from __future__ import annotations

import gc

import msgpack
import numpy as np
import pytest
from conftest import Recorder, toml_config
from prometheus_client import CollectorRegistry

from daemon.config import loads
from daemon.runtime.service import Service


def _models(n: int) -> list[dict]:
    return [{"name": f"m{i}", "inputs": [{"tag": t, "lo": -3, "hi": 3} for t in "abcd"],
             "basis": {"kind": "polynomial", "degree": 1}, "prior": {"alpha": 1.0},
             "noise": {"guess": 0.5, "strength": 2.0}, "lab": {"stale_after": "30d"}}
            for i in range(n)]


def _service(n: int) -> Service:
    svc = Service(loads(toml_config({"metrics": ""}, _models(n)), "<test>"),
                  registry=CollectorRegistry())
    svc.pub = Recorder()
    return svc


def _round(n: int, t: float, rng, lab: bool = False) -> list[list]:
    out = []
    for i in range(n):
        body = {"t": t, "x": rng.standard_normal(4).tolist()}
        if lab:
            body["y"] = float(sum(body["x"]) + 0.1 * rng.standard_normal())
        out.append([f"m{i}".encode(), msgpack.packb(body)])
    return out


@pytest.fixture
def collections():
    """The generations of the collections that start while the test runs."""
    seen: list[int] = []

    def note(phase, info):
        if phase == "start":
            seen.append(info["generation"])
    gc.callbacks.append(note)
    try:
        yield seen
    finally:
        gc.callbacks.remove(note)


def test_a_wake_up_of_many_models_runs_no_collection_and_leaves_the_collector_as_it_was(
        collections):
    n = 60
    svc = _service(n)
    rng = np.random.default_rng(5)
    for r in range(12):
        svc.process(_round(n, -1000.0 + r, rng, lab=True))
    batch = [f for r in range(40) for f in _round(n, 10.0 + r, rng)]
    assert gc.isenabled()
    collections.clear()
    svc.process(batch)
    # 2 400 messages allocate far more than the youngest generation's threshold (700 by
    # default: the CPython gc module documentation), so without the pause some would run
    assert collections == []
    assert gc.isenabled()
    assert len(svc.pub.bodies("pred/")) >= len(batch)
    gc.disable()
    try:
        svc.process(_round(n, 100.0, rng))
        assert not gc.isenabled()  # a caller's choice is kept
    finally:
        gc.enable()


def test_without_the_pause_the_same_wake_up_would_collect(collections):
    """The check above can fail: the same work, with the collector on, does collect."""
    n = 60
    svc = _service(n)
    rng = np.random.default_rng(5)
    for r in range(12):
        svc.process(_round(n, -1000.0 + r, rng, lab=True))
    batch = [f for r in range(40) for f in _round(n, 10.0 + r, rng)]
    collections.clear()
    svc._process(batch)  # the body of process(), without its pause
    assert collections


def _tracked(obj) -> int:
    """Tracked objects reachable from ``obj`` (shared ones counted once)."""
    seen, stack = set(), [obj]
    while stack:
        o = stack.pop()
        if id(o) in seen or not gc.is_tracked(o) or isinstance(o, type):
            continue
        seen.add(id(o))
        stack.extend(gc.get_referents(o))
    return len(seen)


def test_snapshots_for_late_results_hold_the_detectors_as_one_string():
    svc = _service(1)
    rng = np.random.default_rng(7)
    for r in range(30):
        svc.process(_round(1, -1000.0 + r, rng, lab=True))
    runner = svc.runners["m0"]
    assert len(runner.offered) >= 20
    mon = [e.before[1] for e in runner.offered]
    assert all(type(m) is bytes for m in mon)
    # the posterior's attribute table is shared with the model's, most of it with the
    # other snapshots: a few new objects per result, where the detectors' state as lists
    # and dicts was about forty
    model = _tracked(runner.post) + _tracked(runner.monitor)
    per_result = (_tracked([runner.offered, runner.post, runner.monitor]) - model) \
        / len(runner.offered)
    assert per_result < 12, per_result
    # the checkpoint still holds each snapshot's detectors as plain data, and a runner
    # restored from it keeps them as strings again
    st = runner.to_state()
    assert all(isinstance(e[7]["monitor"], dict) for e in st["offered"])
    again = type(runner).from_state(st)
    assert [e.before[1] for e in again.offered] == mon
