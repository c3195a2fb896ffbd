"""Lab results that arrive in any order are learned as in drawn-time order, to the last bit.

A model's runner is fed the features of a simulated plant, then a batch of lab results in
every order of arrival; its whole state (posterior, detectors, gate run, counters, the
snapshots it keeps for later late results) must be the same bytes as after arrival in
drawn-time order. The in-order run itself is checked against ``recursive.Posterior`` updated
directly in drawn-time order on the dead-time-aligned features (`apply_dead_time`).
"""

from __future__ import annotations

import itertools

import msgpack
import numpy as np
import pytest
from conftest import Recorder, c301_model, toml_config

from daemon.config import loads
from daemon.runtime.alignment import apply_dead_time
from daemon.runtime.runner import MAX_REWIND, ModelRunner, Rejected
from daemon.runtime.service import Service
from daemon.workbench import plant

NAME = "c301.order"


def config(**tables):
    m = c301_model(NAME, **tables)
    return loads(toml_config({"publish": "inproc://x", "metrics": ""}, [m]), "<test>").models[0]


@pytest.fixture(scope="module")
def run():
    return plant.simulate(plant.Scenario(seed=31, days=3.0, sample_period_s=300.0,
                                         lab_period_h=1.0))


def fed(cfg, run, until: float, labs=()) -> ModelRunner:
    """A runner holding the features up to ``until`` and the lab results ``labs`` learned,
    each in the given order half an hour after it was drawn (or at ``until``)."""
    r = ModelRunner(cfg)
    todo = list(labs)
    for t, row in zip(run.t.tolist(), run.X.tolist(), strict=True):
        if t > until:
            break
        r.add_features(t, row, None)
        while todo and todo[0][0] + 1800.0 <= t:
            r.learn(*todo.pop(0), None)
    for lab in todo:
        r.learn(*lab, None)
    return r


def lab_results(run) -> list[tuple[float, float]]:
    return [(float(t), float(y)) for t, y in zip(run.lab_t, run.lab_y, strict=True)]


def _unclocked(mon: dict | None) -> None:
    if mon is not None:
        mon.pop("clock")
        mon["drift"].pop("last_t")
        # the lab delays are arrival clocks; commissioning starts at the first feed time
        mon["lab_interval"].pop("delays")
        mon["commissioning"].pop("start")


def state(r: ModelRunner, clocks: bool = True) -> bytes:
    """All of the runner's state that learning decides, as bytes (nan compares equal).

    ``clocks=False`` leaves out the detectors' clock (the feed time the results arrived at,
    which differs between runs whose results arrive at different times).
    """
    st = r.to_state()
    for k in ("last_fit", "n_late"):
        st.pop(k)
    st["counters"].pop("n_predictions")
    if not clocks:
        _unclocked(st["monitor"])
        for e in st["offered"]:
            e[4] = None
            _unclocked(e[7]["monitor"])
    return msgpack.packb(st, use_bin_type=True)


def copy(r: ModelRunner) -> ModelRunner:
    return ModelRunner.from_state(r.to_state())


def batch_setup(run, k: int, blunder: bool = True):
    labs = lab_results(run)
    start = 30
    history, batch = labs[:start], labs[start:start + k]
    if blunder:
        # one result far off: gated, so the gate's run and the counters take part
        t, y = batch[1]
        batch[1] = (t, y + 400.0)
    until = batch[-1][0] + 3600.0
    return history, batch, until


def test_in_order_run_matches_a_direct_posterior(run):
    cfg = config()
    history, batch, until = batch_setup(run, 5)
    r = fed(cfg, run, until, history + batch)
    # reference: recursive.Posterior updated in drawn-time order on apply_dead_time's rows
    t_lab = np.array([t for t, _ in history + batch])
    vals, ok = apply_dead_time(run.t, run.X, t_lab, [0.0] * len(cfg.inputs),
                               tolerance_s=cfg.tolerance)
    assert ok.all()
    basis = cfg.build_basis()
    post = cfg.build_posterior(basis)
    steps = [post.update(basis(v), y, t)
             for v, (t, y) in zip(vals, history + batch, strict=True)]
    assert r.post.to_state() == post.to_state()
    assert r.n_learned == sum(s.accepted for s in steps) and r.rejected["gated"] == 1


def test_every_order_of_five_gives_the_in_order_bits(run):
    cfg = config()
    history, batch, until = batch_setup(run, 5)
    base = fed(cfg, run, until, history)
    ref = copy(base)
    for t, y in batch:
        ref.learn(t, y, None)
    want = state(ref)
    assert ref.monitor is not None and ref.rejected["gated"] == 1
    for perm in itertools.permutations(range(5)):
        r = copy(base)
        fits = [r.learn(batch[i][0], batch[i][1], None)[0] for i in perm]
        assert state(r) == want, perm
        late = [i for n, i in enumerate(perm) if i < max(perm[:n], default=-1)]
        assert r.n_late == len(late) and [f.get("late", False) for f in fits] == \
            [i in late for i in perm]
        assert r.n_lab == ref.n_lab and r.n_learned == ref.n_learned


DELAYED_INPUTS = [{"tag": tag, "lo": lo, "hi": hi, "dead_time": "19m" if tag == "FI-201" else "0s"}
                  for tag, (lo, hi) in plant.RANGES.items()]


# adaptive noise and offset drift (recursive.adaptive): their state is rewound too; a short
# window so that the matched rate moves within the batch
ADAPTIVE = {"noise": {"guess": 10.0, "strength": 2.0, "adaptive": True,
                      "adaptive_half_life": "2d"},
            "forgetting": {"policy": "offset", "half_life": "1d", "offset_drift": "5 per 1h",
                           "adapt_offset": True, "adapt_window": 3}}


@pytest.mark.parametrize("tables", [{}, {"inputs": DELAYED_INPUTS},
                                    {"alerts": {"enabled": False}}, ADAPTIVE],
                         ids=["alerts", "dead_time", "no_alerts", "adaptive"])
def test_random_orders_of_eight_give_the_in_order_bits(run, tables):
    cfg = config(**tables)
    history, batch, until = batch_setup(run, 8)
    base = fed(cfg, run, until, history)
    ref = copy(base)
    ref_fits = [ref.learn(t, y, None)[0] for t, y in batch]
    want = state(ref)
    rng = np.random.default_rng(8)
    for _ in range(40):
        perm = rng.permutation(8).tolist()
        r = copy(base)
        fits = {}
        for i in perm:
            fits[i] = r.learn(batch[i][0], batch[i][1], None)[0]
        assert state(r) == want, perm
        # the published z of a late result is against the posterior before it in drawn
        # order among the results known then: what in-order arrival of those computes
        arrived: list[int] = []
        for i in perm:
            arrived.append(i)
            if not fits[i].get("late"):
                continue
            direct = copy(base)
            exp = {j: direct.learn(*batch[j], None)[0] for j in sorted(arrived)}[i]
            got = {k: v for k, v in fits[i].items() if k not in ("late", "trust")}
            exp.pop("trust", None)
            assert msgpack.packb(got) == msgpack.packb(exp), (perm, i)
        assert [f["z"] for f in ref_fits] != [fits[i]["z"] for i in range(8)] or \
            perm == sorted(perm)


def test_duplicates_and_results_too_old_are_refused(run):
    cfg = config()
    history, batch, until = batch_setup(run, 5, blunder=False)
    r = fed(cfg, run, until, history + batch)
    before = state(r)
    for t, y in [batch[2], batch[4], (batch[2][0], batch[2][1] + 1.0)]:
        with pytest.raises(Rejected) as exc:
            r.learn(t, y, None)
        assert exc.value.reason == "lab_out_of_order"
    # older than the feature buffer (12 h): not matched at all
    with pytest.raises(Rejected) as exc:
        r.learn(history[0][0], history[0][1], None)
    assert exc.value.reason == "lab_too_old"
    # nothing changed but the lab counter
    assert r.n_learned == len(history) + len(batch) and r.n_lab == r.n_learned + 4
    r.n_lab -= 4
    assert state(r) == before


def test_results_beyond_the_kept_snapshots_are_too_old(run):
    """At most MAX_REWIND results are kept; an older late one is refused, not misplaced."""
    cfg = config(lab={"keep": "3d", "keep_count": 5000, "tolerance": "2m",
                      "stale_after": "12h"})
    labs = lab_results(run)
    n = MAX_REWIND + 6
    skipped = labs[2]
    r = fed(cfg, run, labs[n][0] + 600.0, labs[:2] + labs[3:n])
    assert len(r.offered) == MAX_REWIND and r.lab_floor == labs[n - MAX_REWIND - 1][0]
    with pytest.raises(Rejected) as exc:
        r.learn(*skipped, None)
    assert exc.value.reason == "lab_too_old"
    late = labs[n - 3]
    r2 = fed(cfg, run, labs[n][0] + 600.0, labs[:n - 3] + labs[n - 2:n])
    r2.learn(*late, None)
    assert state(r2, False) == state(fed(cfg, run, labs[n][0] + 600.0, labs[:n]), False)


def test_acknowledge_puts_late_results_after_it(run):
    cfg = config()
    history, batch, until = batch_setup(run, 5, blunder=False)
    r = fed(cfg, run, until, history + batch[:2] + batch[3:])
    r.control("acknowledge")
    with pytest.raises(Rejected) as exc:
        r.learn(*batch[2], None)
    assert exc.value.reason == "lab_too_old"


def test_the_kept_snapshots_survive_a_checkpoint(run):
    cfg = config()
    history, batch, until = batch_setup(run, 5)
    a = fed(cfg, run, until, history + batch[:2] + batch[3:])
    b = copy(a)
    assert state(b) == state(a)
    for r in (a, b):
        r.learn(*batch[2], None)
    assert state(b) == state(a)
    assert state(a, False) == state(fed(cfg, run, until, history + batch), False)


def service(cfg_models: list[dict]) -> Service:
    svc = Service(loads(toml_config({"publish": "inproc://x", "metrics": ""}, cfg_models),
                        "<test>"))
    svc.pub = Recorder()
    return svc


def test_service_publishes_one_fit_per_arrival_the_late_one_flagged(run):
    svc = service([c301_model(NAME)])
    history, batch, until = batch_setup(run, 5)
    todo = list(history)
    msg = [NAME.encode()]
    for t, row in zip(run.t.tolist(), run.X.tolist(), strict=True):
        if t > until:
            break
        svc.process([[*msg, msgpack.packb({"t": t, "x": row})]])
        while todo and todo[0][0] + 1800.0 <= t:
            lt, ly = todo.pop(0)
            svc.process([[*msg, msgpack.packb({"t": lt, "y": ly})]])
    order = (4, 0, 3, 1, 2)
    svc.process([[*msg, msgpack.packb({"t": batch[i][0], "y": batch[i][1]})] for i in order])
    fits = svc.pub.bodies("fit/")
    assert len(fits) == len(history) + 5
    assert [f.get("late", False) for f in fits[-5:]] == [False, True, True, True, True]
    assert [f["t"] for f in fits[-5:]] == [batch[i][0] for i in order]
    ref = fed(config(), run, until, history)
    for lab in batch:
        ref.learn(*lab, None)
    # the service's predictions also step the detectors; the posterior and counters are the
    # learning's alone
    got = svc.runners[NAME]
    assert msgpack.packb(got.to_state()["posterior"]) == msgpack.packb(ref.to_state()["posterior"])
    assert (got.n_learned, got.rejected["gated"]) == (ref.n_learned, ref.rejected["gated"])


@pytest.mark.parametrize("tables", [{}, ADAPTIVE], ids=["plain", "adaptive"])
def test_replay_of_the_log_goes_through_the_same_rewinds(tmp_path, run, tables):
    """A crash amid out-of-order arrivals: the checkpoint (with the kept snapshots) and the
    log's records, replayed in arrival order, give the learned state of the live run."""
    from test_durability import LAB_DRIVEN, bench, crash_copy

    def learned(r: ModelRunner) -> bytes:
        st = r.to_state()
        return msgpack.packb({
            "posterior": st["posterior"], "monitor": {k: st["monitor"][k] for k in LAB_DRIVEN},
            "offered": [[*e[:4], e[5], e[6], e[7]["posterior"], e[7]["last_lab_t"]]
                        for e in st["offered"]],
            "floor": st["lab_floor"], "n_learned": r.n_learned, "late": r.n_late,
            "gated": r.rejected["gated"], "last_lab_t": r.last_lab_t}, use_bin_type=True)

    m = c301_model(NAME, **tables)
    live = bench(tmp_path / "state", [m])
    history, batch, until = batch_setup(run, 6)
    todo = list(history)
    msg = [NAME.encode()]
    for t, row in zip(run.t.tolist(), run.X.tolist(), strict=True):
        if t > until:
            break
        live.process([[*msg, msgpack.packb({"t": t, "x": row})]])
        while todo and todo[0][0] + 1800.0 <= t:
            lt, ly = todo.pop(0)
            live.process([[*msg, msgpack.packb({"t": lt, "y": ly})]])
    order = (5, 2, 4, 0, 3, 1)
    for n, i in enumerate(order):
        if n == 2:
            live.checkpoint()  # two arrivals before it, four only in the log
        live.process([[*msg, msgpack.packb({"t": batch[i][0], "y": batch[i][1]})]])
        if n in (2, 4):
            back = bench(crash_copy(live, tmp_path / f"crash{n}"), [m])
            assert back.replayed == n - 1
            assert learned(back.runners[NAME]) == learned(live.runners[NAME]), n
            back.close()
    assert live.runners[NAME].n_late == 5
    if tables:
        # the adapted values took part: the rate moved off its start and is in the state
        st = live.runners[NAME].post.to_state()
        assert st["rate"]["n"] >= 10 and st["rate"]["q"] != 25.0 / 3600.0
    live.close()
