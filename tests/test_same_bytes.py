"""Every published byte is a function of the feed alone, never of how it was batched.

The same feed is processed in one wake-up (a burst), one message per wake-up (paced), and in
random wake-ups of 1 to 40 messages; the messages published (pred/, fit/ and alert/, in
their order) must be the same bytes. The simulated run is chosen so that trust changes
inside a wake-up (an excursion out of the instrument range, a lab outage that makes the model
stale, a step that the CUSUM catches) and forgetting moves the degrees of freedom from row to
row (so the interval quantiles of a batch span several values).
"""

from __future__ import annotations

import msgpack
import numpy as np
import pytest
from conftest import MODEL, Recorder, c301_model, toml_config
from prometheus_client import CollectorRegistry

from daemon.config import loads
from daemon.runtime.service import Service
from daemon.workbench import plant

SCENARIO = plant.Scenario(seed=23, days=3.0, sample_period_s=120.0, lab_period_h=2.0,
                          excursion_day=1.2, excursion_hours=3.0, excursion_degC=25.0,
                          outage_days=(1.7, 2.1), step_day=2.3, step_size=40.0, blunders=2)

POLICIES = {
    "stabilized": {"policy": "stabilized", "half_life": "12h"},
    "exponential": {"policy": "exponential", "half_life": "12h"},
    "random_walk": {"policy": "random_walk", "q": 1e-6, "half_life": "2d"},
}


@pytest.fixture(scope="module")
def feed():
    run = plant.simulate(SCENARIO)
    frames = []
    seq = 0
    for ev in plant.events(run):
        seq += 1
        if ev[0] == "x":
            body = {"t": ev[1], "x": list(ev[2]), "seq": seq}
        else:
            body = {"t": ev[1], "y": ev[2], "seq": seq}
        frames.append([MODEL.encode(), msgpack.packb(body)])
    return frames


def service(policy: str) -> Service:
    model = c301_model(forgetting=POLICIES[policy.removesuffix("+dead time")],
                       lab={"keep": "12h", "keep_count": 5000, "tolerance": "4m",
                            "stale_after": "3h"})
    if policy.endswith("+dead time"):
        # predictions then use each input as it was 19 min earlier (and wait for it)
        model["inputs"][2]["dead_time"] = "19m"
    svc = Service(loads(toml_config({"metrics": ""}, [model]), "<test>"),
                  registry=CollectorRegistry())
    svc.pub = Recorder()
    return svc


def published(svc: Service) -> list[tuple[str, bytes]]:
    return [(topic, msgpack.packb(body)) for topic, body in svc.pub.out]


def three_ways(feed: list, make, seed: int, most: int) -> tuple:
    """Three services from ``make()`` fed ``feed``: in one wake-up (a burst), one message per
    wake-up (paced), and in random wake-ups of 1 to ``most`` messages."""
    burst, paced, chunked = make(), make(), make()
    burst.process(feed)
    for frames in feed:
        paced.process([frames])
    rng = np.random.default_rng(seed)
    i = 0
    while i < len(feed):
        k = int(rng.integers(1, most + 1))
        chunked.process(feed[i:i + k])
        i += k
    return burst, paced, chunked


@pytest.mark.parametrize("policy", [*sorted(POLICIES), "stabilized+dead time"])
def test_burst_paced_and_random_wake_ups_publish_the_same_bytes(feed, policy):
    burst, paced, chunked = three_ways(feed, lambda: service(policy), seed=4, most=40)
    want = published(paced)
    preds = [b for t, b in paced.pub.out if t.startswith("pred/")]
    # the run must exercise what batching used to change: several trust states, and
    # degrees of freedom that differ between neighbouring rows
    assert {p["trust"] for p in preds} >= {"normal", "caution"}
    assert sum(1 for t, _ in want if t.startswith("alert/")) >= 1
    dofs = [p["dof"] for p in preds if p["dof"] == p["dof"]]
    assert len(set(dofs)) > len(dofs) // 2
    assert published(burst) == want
    assert published(chunked) == want


def test_rowwise_region_distances_do_not_depend_on_the_batch():
    """The distance a single sample's step uses has the same bits alone, in pairs or in a
    batch of 300, and equals InputRegion.distance (one solve per row) to rounding."""
    from recursive.detect import InputRegion

    rng = np.random.default_rng(0)
    region = InputRegion(8, 100.0, 5.0)
    for _ in range(50):
        region.update(rng.normal(size=8))
    X = rng.normal(size=(300, 8)) * 3
    whole = region.distances(X, rowwise=True)
    alone = np.concatenate([region.distances(X[i:i + 1], rowwise=True) for i in range(300)])
    pairs = np.concatenate([region.distances(X[i:i + 2], rowwise=True)
                            for i in range(0, 300, 2)])
    assert whole.tobytes() == alone.tobytes() == pairs.tobytes()
    np.testing.assert_allclose(whole, [region.distance(x) for x in X], rtol=1e-13)


@pytest.fixture(scope="module")
def block_feed():
    """The same run sent as blocks of 1 to 40 rows between lab results, alternately as
    lists and packed, so that one wake-up holds many blocks predicted together."""
    run = plant.simulate(SCENARIO)
    rng = np.random.default_rng(9)
    frames, rows = [], []

    def flush():
        while rows:
            k = min(len(rows), int(rng.integers(1, 41)))
            part, rows[:] = rows[:k], rows[k:]
            t = np.array([r[0] for r in part])
            X = np.array([r[1] for r in part], dtype=float)
            if len(frames) % 2:
                body = {"t": t.astype("<f8").tobytes(), "x": X.astype("<f8").tobytes()}
            else:
                body = {"t": t.tolist(), "x": X.tolist()}
            frames.append([MODEL.encode(), msgpack.packb(body)])

    hi0 = next(iter(plant.RANGES.values()))[1]
    for n, ev in enumerate(plant.events(run)):
        if ev[0] == "x":
            x = list(ev[2])
            if n % 150 == 7:
                x[0] = hi0 + 5.0  # a reading beyond its instrument range, now and then
            rows.append((ev[1], x))
        else:
            flush()
            frames.append([MODEL.encode(), msgpack.packb({"t": ev[1], "y": ev[2]})])
    flush()
    return frames


def block_service(policy: str) -> Service:
    svc = service(policy.removesuffix("+degree 1"))
    if policy.endswith("+degree 1"):
        # the affine basis, whose terms of many rows come from one kernel call
        model = c301_model(forgetting=POLICIES[policy.removesuffix("+degree 1")],
                           basis={"kind": "polynomial", "degree": 1},
                           lab={"keep": "12h", "keep_count": 5000, "tolerance": "4m",
                                "stale_after": "3h"})
        svc = Service(loads(toml_config({"metrics": ""}, [model]), "<test>"),
                      registry=CollectorRegistry())
        svc.pub = Recorder()
    return svc


@pytest.mark.parametrize("policy", [*sorted(POLICIES), "stabilized+degree 1"])
def test_blocks_publish_the_same_bytes_in_one_wake_up_or_many(block_feed, policy):
    # many blocks of a wake-up are predicted in one call, with their intervals and the
    # detectors' checks (largest leverage and distance, rows out of range) computed over
    # all their rows at once; each answer must be the one its block gets alone
    burst, paced, chunked = three_ways(block_feed, lambda: block_service(policy), seed=5,
                                       most=29)
    want = published(paced)
    alerts = [b for t, b in paced.pub.out if t.startswith("alert/")]
    reasons = {r["name"] for a in alerts for r in a.get("reasons", ())}
    assert "out_of_range" in reasons
    assert published(burst) == want
    assert published(chunked) == want
