"""What the cyclic garbage collector has to visit, and when it runs.

A full collection visits every tracked object of every model: with thousands of trained
models that is seconds of a stalled loop. A wake-up runs no collection (its working objects
would be promoted to the oldest generation and count toward the next full one), and the
snapshots kept for re-ordering late lab results hold the detectors' state as one string,
not as a tree of lists and dicts per result.
"""

from __future__ import annotations

import gc
import math

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


def _trained_with_a_burst(n: int):
    """``n`` models taught 12 lab results each, and a burst of 40 rounds of samples."""
    svc = _service(n)
    rng = np.random.default_rng(5)
    for r in range(12):
        svc.process(_round(n, -1000.0 + r, rng, lab=True))
    return svc, rng, [f for r in range(40) for f in _round(n, 10.0 + r, rng)]


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
    svc, rng, batch = _trained_with_a_burst(n)
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
    svc, _rng, batch = _trained_with_a_burst(60)
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
    # nor the posterior's prediction caches (n x n arrays at hundreds of terms), which are
    # rebuilt from the factor when needed: test_lab_order.py checks that a late result
    # learned through a snapshot gives the bits of the same results in order
    assert all(e.before[0]["_cache"] is None and e.before[0]["_m_cache"] is None
               for e in runner.offered)
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


def _ids_collected() -> set[int]:
    return {id(o) for o in gc.get_objects()}


def test_state_that_lives_until_a_checkpoint_leaves_the_collections(tmp_path):
    from test_durability import bench, model_a

    svc = bench(tmp_path / "state", [model_a()], checkpoint_every="1h")
    try:
        rng = np.random.default_rng(3)
        runner = next(iter(svc.runners.values()))
        tags = runner.tags
        for r in range(30):
            body = {"t": 100.0 + r, "x": rng.uniform(0.0, 1.0, len(tags)).tolist(),
                    "y": float(rng.normal())}
            svc.process([[runner.name.encode(), msgpack.packb(body)]])
        learned = runner.offered[-1]  # made after start-up, by learning
        assert id(learned) in _ids_collected()
        frozen = gc.get_freeze_count()
        svc._dirty, svc._last_checkpoint = True, -1e9  # a periodic checkpoint is due
        svc._housekeeping()
        assert svc.store.checkpoint_running
        assert gc.get_freeze_count() > frozen
        assert id(learned) not in _ids_collected()
        svc._checkpoint_polled(svc.store.wait_checkpoint())
    finally:
        gc.unfreeze()  # the other tests' garbage is collected as usual
        svc.close()


def test_the_feed_and_lab_paths_make_no_cyclic_garbage():
    """What the freeze above relies on: everything they drop is freed by reference
    counting, rejected messages and late lab results included."""
    n = 20
    svc = _service(n)
    rng = np.random.default_rng(9)
    for r in range(12):
        svc.process(_round(n, -1000.0 + r, rng, lab=True))
    gc.collect()
    enabled = gc.isenabled()
    gc.disable()
    try:
        for r in range(10):
            batch = [f for k in range(5) for f in _round(n, 10.0 * r + k, rng)]
            for i in range(n):
                name = f"m{i}".encode()
                batch += [[name, msgpack.packb({"t": 10.0 * r + 3.5, "y": 1.0})],
                          [name, msgpack.packb({"t": 10.0 * r + 1.5, "y": 2.0})],  # late
                          [name, msgpack.packb({"t": "soon", "y": 2.0})],
                          [name, msgpack.packb({"t": 10.0 * r + 2.5, "y": math.nan})],
                          [name, b"\xc1"], [b"nobody", msgpack.packb({"t": 1.0})]]
            svc.process(batch)
        assert svc.runners["m0"].n_late > 0  # the late ones were put in order
        assert gc.collect() == 0
    finally:
        if enabled:
            gc.enable()
