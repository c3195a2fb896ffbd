"""The feature buffer as a ring buffer of float64 (`daemon.runtime.alignment.Aligner`).

The reference is the list-based buffer it replaced (`aligner_reference.ListAligner`, whose
answers the older tests in test_historian.py check against a brute-force numpy scan): on
random streams the ring buffer must answer every lookup with the same floats, forget the same
rows and write the same state bytes. Memory: the arrays' size is deterministic, so the
estimate is checked against the allocation tracemalloc sees.
"""

from __future__ import annotations

import math
import re
import tracemalloc

import msgpack
import numpy as np
import pytest
from aligner_reference import ListAligner

from daemon.runtime.alignment import Aligner


def same(a, b) -> bool:
    """Equal to the last bit, nan included (msgpack writes float64 bytes as they are)."""
    return msgpack.packb(a) == msgpack.packb(b)


def random_stream(rng, n_inputs: int, steps: int, clock: str = "irregular"):
    """Pushes (single, many or block) with gaps from sub-second to far beyond the history.

    ``clock``: "irregular" times; "regular", on a clock of one period from a start time
    (``t0 + k * period``, as a publisher that counts its samples computes them), with missed
    samples and restarts at new start times; "drifting": regular stretches and irregular ones.
    """
    t = float(rng.uniform(-1e3, 2e9))
    # a decimal period (0.1 s) is a regular clock only from the run's first sample (the
    # publisher's start): after a gap the runs break up, and the times go to an array
    period = float(rng.choice([1.0, 0.25, 5.0, 60.0] if clock == "regular" else [1.0, 0.1]))
    t0, count = t, 0
    for step in range(steps):
        kind = rng.choice(["one", "trusted", "many", "block"], p=[0.2, 0.4, 0.2, 0.2])
        k = 1 if kind in ("one", "trusted") else int(rng.integers(1, 90))
        regular = clock == "regular" or (clock == "drifting" and (step // 40) % 2 == 0)
        ts = []
        if regular:
            for _ in range(k):
                r = rng.random()
                if r < 0.001:  # the publisher restarts: a new start time
                    t0, count = t + float(rng.uniform(1.0, 5e3)), 0
                elif r < 0.005:  # missed samples
                    count += int(rng.integers(1, 2000))
                nxt = t0 + count * period
                count += 1
                if nxt <= t:
                    t0, count = t + period, 1
                    nxt = t0
                t = nxt
                ts.append(t)
        else:
            gaps = rng.choice([0.25, 1.0, 7.0, 60.0, 900.0, 5e4], p=[.1, .4, .2, .2, .08, .02],
                              size=k) * rng.uniform(0.5, 1.5, size=k)
            for g in gaps:
                nxt = t + float(g)
                if nxt <= t:  # at 2e9 s a tiny gap may round away
                    nxt = math.nextafter(t, math.inf)
                t = nxt
                ts.append(t)
            t0, count = t + period, 0
        X = rng.normal(size=(k, n_inputs)) * 10.0 ** rng.integers(-3, 4)
        X[rng.random(X.shape) < 0.05] = np.nan  # blank readings
        yield kind, ts, X, t


@pytest.mark.parametrize("clock", ["irregular", "regular", "drifting"])
@pytest.mark.parametrize("seed", range(8))
def test_ring_buffer_answers_as_the_list_buffer_on_random_streams(seed, clock):
    rng = np.random.default_rng([seed, len(clock)])
    n = int(rng.integers(1, 6))
    max_rows = int(rng.choice([1, 2, 3, 63, 64, 65, 100, 257, 5000]))
    dead = [0.0] * n if max_rows <= 3 else \
        (rng.choice([0.0, 1.0, 60.0, 600.0], size=n) * rng.uniform(0.9, 1.1, size=n)).tolist()
    tol = float(rng.choice([0.0, 0.5, 30.0, 120.0, 600.0], p=[.1, .2, .2, .3, .2]))
    if tol < 1.0:  # rows of unequal delays seldom line up within such a tolerance
        dead = [dead[0]] * n
    history = max(dead) + tol + float(rng.choice([0.0, 10.0, 600.0, 3600.0, 86400.0]))
    tags = [f"x{i}" for i in range(n)]
    ring = Aligner(tags, dead, history, tolerance_s=tol, max_rows=max_rows)
    ref = ListAligner(tags, dead, history, tolerance_s=tol, max_rows=max_rows)
    assert ring.lookup(0.0) is None and ring.oldest is None and len(ring) == 0
    checked = found = 0
    modes = set()
    for step, (kind, ts, X, t) in enumerate(random_stream(rng, n, 400, clock)):
        for al in (ring, ref):
            if kind == "one":
                al.push(ts[0], X[0].tolist())
            elif kind == "trusted":
                al.push_trusted(ts[0], tuple(X[0].tolist()))
            elif kind == "many":
                al.push_many_trusted(list(ts), [tuple(r) for r in X.tolist()])
            else:
                al.push_block_trusted(list(ts), X.copy())
        assert len(ring) == len(ref) <= max_rows
        assert ring.oldest == ref.oldest and ring.newest == ref.newest == t
        assert ring.capacity <= max_rows
        modes.add(ring.regular)
        # lookups around the whole span, on rows exactly, and beyond both ends
        span = history + max(dead) + 2 * tol + 10.0
        q = rng.uniform(t - span, t + tol + 10.0, size=12).tolist()
        kept = ref.rows()
        times = np.asarray(ref._t[ref._head:])
        q += (times[rng.integers(0, len(times), size=4)] + max(dead)
              + rng.uniform(0, tol, size=4)).tolist()
        q.append(t)
        for s in q:
            got, want = ring.lookup(s), ref.lookup(s)
            checked += 1
            found += want is not None
            assert (got is None) == (want is None), (s, got, want)
            if want is not None:
                assert same(list(got), list(want)), (s, got, want)
        qs = np.sort(np.asarray(q))
        vals, ok = ring.lookup_many(qs)
        rvals, rok = ref.lookup_many(qs)
        assert (ok == rok).all()
        assert same(vals.tolist(), rvals.tolist())
        assert same(ring.rows().tolist(), kept.tolist())
        if step % 50 == 0:
            state = ring.to_state()
            assert same(state, ref.to_state())
            back = Aligner.from_state(msgpack.unpackb(msgpack.packb(state)))
            assert same(back.to_state(), state)
            assert all(same(back.lookup(s), ring.lookup(s)) for s in q)
    assert checked > 1000 and 0 < found < checked  # both answers were compared
    # the times were kept as runs (a regular clock) all along, or went to an array
    if clock == "regular":
        assert modes == {True}
    elif max_rows > 16:  # fewer rows are never more than 8 runs
        assert False in modes


def test_ring_buffer_reads_the_state_the_list_buffer_wrote():
    # the state format is unchanged (schema historian.aligner/1): a checkpoint written
    # before the ring buffer loads into it and answers the same
    rng = np.random.default_rng(77)
    ref = ListAligner(["a", "b"], [0.0, 300.0], 3600.0, tolerance_s=60.0, max_rows=500)
    for kind, ts, X, _ in random_stream(rng, 2, 60):
        if kind == "block":
            ref.push_block_trusted(list(ts), X)
        else:
            ref.push_many_trusted(list(ts), [tuple(r) for r in X.tolist()])
    old = msgpack.unpackb(msgpack.packb(ref.to_state()))
    ring = Aligner.from_state(old)
    assert same(ring.to_state(), ref.to_state())
    t = ref.newest
    for s in rng.uniform(t - 4000.0, t + 100.0, size=200).tolist():
        assert same(ring.lookup(s), ref.lookup(s))


def test_ring_buffer_wraps_around_and_grows_by_doubling():
    al = Aligner(["a", "b"], [0.0, 5.0], history_s=1e9, tolerance_s=0.0, max_rows=200)
    assert al.capacity == 0 and al.nbytes == 0  # a model that was never fed costs nothing
    caps = []
    for i in range(1000):
        al.push_trusted(float(i), (float(i), -float(i)))
        caps.append(al.capacity)
    assert sorted(set(caps)) == [64, 128, 200]  # doubled, then held at max_rows
    assert len(al) == 200 and al.oldest == 800.0 and al.newest == 999.0
    # times on a regular clock (one run): the readings' array only
    assert al.regular and al.nbytes == Aligner.estimate_bytes(2, 200) == 8 * 2 * 200
    # b is read 5 s earlier; rows are in slots wrapped around the end of the arrays
    assert al.lookup(999.0) == (999.0, -994.0)
    assert al.lookup(805.0) == (805.0, -800.0)
    assert al.lookup(804.0) is None  # b would need the row at 799 s, forgotten
    np.testing.assert_array_equal(al.times(), np.arange(800.0, 1000.0))
    np.testing.assert_array_equal(al.rows()[:, 0], np.arange(800.0, 1000.0))
    # a block longer than the buffer keeps its newest rows
    al.push_block_trusted([2000.0 + k for k in range(450)], np.ones((450, 2)) * 3.0)
    assert len(al) == 200 and al.oldest == 2250.0 and al.capacity == 200
    assert al.regular and al.lookup(2449.0) == (3.0, 3.0)
    # times off the clock: two rows a run (the second sets the step, the third misses it);
    # with more than 8 runs (the floor of one run per 64 rows) the times go to an array
    switched = []
    for i in range(20):
        al.push_trusted(3000.5 + i * i, (1.0, 2.0))
        switched.append(not al.regular)
    assert switched.index(True) == 14 and all(switched[14:])  # runs: 2 + i // 2 > 8
    assert al.nbytes == Aligner.estimate_bytes(2, 200, regular=False) == 8 * 3 * 200
    assert al.oldest == 2270.0 and al.lookup(3009.5) == (1.0, 2.0)  # b read at 3004.5
    assert al.lookup(3064.5) is None  # b: no row at 3059.5, and the tolerance is 0
    np.testing.assert_array_equal(al.times()[-20:], 3000.5 + np.arange(20.0) ** 2)
    np.testing.assert_array_equal(al.times()[:-20], np.arange(2270.0, 2450.0))


@pytest.mark.parametrize("n_inputs, period, hours, jitter",
                         [(4, 1.0, 12.0, False), (8, 5.0, 12.0, False), (4, 1.0, 12.0, True)])
def test_memory_estimate_matches_the_measured_allocation(n_inputs, period, hours, jitter):
    """The bar case of issue 13 (4 inputs, 12 h at 1 s, keep_count large enough to hold it:
    at most 8 B x inputs x rows + 10 %), an 8-input one, and the first with times off a
    regular clock (jitter of up to 10 ms). tracemalloc (which sees numpy's data buffers)
    measures what the filled buffer holds; the estimate must be within 10 % of it."""
    rows = int(hours * 3600 / period)
    rng = np.random.default_rng(3)
    X = rng.normal(size=(rows, n_inputs))
    t = 1.767e9 + period * np.arange(rows)
    if jitter:
        t += rng.uniform(0.0, 0.01, size=rows)
    ts, xs = t.tolist(), [tuple(r) for r in X.tolist()]
    tracemalloc.start()
    try:
        before = tracemalloc.get_traced_memory()[0]
        al = Aligner([f"x{i}" for i in range(n_inputs)], [0.0] * n_inputs, hours * 3600.0,
                     tolerance_s=2 * period, max_rows=rows)
        for tk, xk in zip(ts, xs, strict=True):
            al.push_trusted(tk, xk)
        measured = tracemalloc.get_traced_memory()[0] - before
    finally:
        tracemalloc.stop()
    assert len(al) == rows and al.regular == (not jitter)
    estimate = Aligner.estimate_bytes(n_inputs, rows, regular=not jitter)
    assert estimate == 8 * (n_inputs + jitter) * rows
    assert abs(measured - estimate) <= 0.10 * measured, (measured, estimate)
    if not jitter:
        assert measured <= 1.10 * 8 * n_inputs * rows  # the bar of issue 13
    assert al.lookup(ts[-1]) == xs[-1] and al.lookup(ts[0] - 1.0) is None


def test_check_config_prints_each_models_buffer_estimate_and_the_total(tmp_path, capsys):
    from conftest import c301_model, toml_config

    from daemon.cli import main
    from daemon.config import load

    path = tmp_path / "plant.toml"
    path.write_text(toml_config({"metrics": ""}, [
        c301_model("a", lab={"keep": "12h", "keep_count": 43200}),
        c301_model("b")]))
    assert main(["check-config", str(path)]) == 0
    out = capsys.readouterr().out
    models = load(path).models
    assert [len(m.inputs) for m in models] == [4, 4] and models[1].keep_count == 5000
    # 8 B x 4 inputs x 43 200 rows = 1 382 400 B = 1.3 MiB; x 5000 rows = 156.2 KiB;
    # off the clock 8 B x 5 per row: 1.6 MiB and 195.3 KiB; total 1 542 400 B = 1.5 MiB
    assert re.search(r"^  a +4 inputs x 43200 rows +1\.3 MiB +\(1\.6 MiB off the clock\)$",
                     out, re.M), out
    assert re.search(r"^  b +4 inputs x 5000 rows +156\.2 KiB +\(195\.3 KiB off the clock\)$",
                     out, re.M), out
    assert re.search(r"^  total +1\.5 MiB +\(1\.8 MiB off the clock\)$", out, re.M), out


def test_minus_zero_times_come_back_as_pushed():
    # -0.0 == 0.0, but a state holds the float's bytes: the time -0.0 is never computed as
    # a run's t0 + k * step (which gives +0.0) and comes back with its sign
    ts = [-2.0, -1.0, -0.0, 1.0, 2.0, 3.0]
    for block in (False, True):
        ring = Aligner(["a"], [0.0], 100.0, tolerance_s=0.5)
        ref = ListAligner(["a"], [0.0], 100.0, tolerance_s=0.5)
        for al in (ring, ref):
            if block:
                al.push_block_trusted(ts, np.arange(6.0).reshape(6, 1))
            else:
                for k, t in enumerate(ts):
                    al.push_trusted(t, (float(k),))
        assert same(ring.to_state(), ref.to_state())
        assert math.copysign(1.0, ring.times()[2]) == -1.0 and ring.lookup(0.2) == (2.0,)
