"""The in-process Service over real sockets: predictions, lab matching, bad input, control.

The service runs in a thread on its own ZeroMQ context; the test publishes the feed on an
XPUB, reads predictions on a SUB, sends commands on a REQ and scrapes /metrics over HTTP
(helpers in conftest.py). Predictions are checked against ``recursive.Posterior`` run
directly on the same samples (built by the same ``ModelConfig.build_posterior()``), the
published intervals against ``scipy.stats.t``, and a posterior learned without forgetting
against scikit-learn's ``Ridge`` and numpy's linear algebra.
"""

from __future__ import annotations

import math
import time
import urllib.request
from pathlib import Path

import msgpack
import numpy as np
import pytest
import zmq
from conftest import (
    MODEL,
    PROBE,
    TIMEOUT,
    Control,
    Recorder,
    ServiceHarness,
    c301_model,
    metric,
    rejected,
    toml_config,
    wait_until,
)
from prometheus_client import CollectorRegistry
from scipy import stats
from sklearn.linear_model import Ridge

from daemon.config import loads
from daemon.runtime.service import Service
from daemon.workbench import plant
from recursive import _linalg

RTOL = 1e-9
PRED = f"pred/{MODEL}"
FIT = f"fit/{MODEL}"


# ---------------------------------------------------------------------------------- reference
class Reference:
    """The model run directly on a Posterior: what the daemon must publish."""

    def __init__(self, cfg):
        self.cfg = cfg
        self.basis = cfg.build_basis()
        self.post = cfg.build_posterior(self.basis)
        self.last_lab_t = None
        self.frozen = False

    def status(self, t: float) -> str:
        if not self.post.identified:
            return "unidentified"
        if self.frozen:
            return "frozen"
        if self.last_lab_t is None or t - self.last_lab_t > self.cfg.stale_after:
            return "stale"
        return "learning"

    def predict(self, t: float, x, ident=None) -> dict:
        phi = self.basis(np.asarray(x, dtype=float))
        p = self.post.predict(phi, t=t)
        lo, hi = p.interval(self.cfg.level)
        out = {"t": t, "mean": p.mean, "std": p.std, "var": p.var, "dof": p.dof, "lo": lo,
               "hi": hi, "level": self.cfg.level, "status": self.status(t),
               "var_at_last_update": self.post.predict(phi).var}
        if ident is not None:
            out["id"] = ident
        return out

    def learn(self, t: float, x, y: float, ident=None) -> dict:
        step = self.post.update(self.basis(np.asarray(x, dtype=float)), y, t)
        if step.accepted:
            self.last_lab_t = t
        fit = {"t": t, "y": y, "pred_mean": step.mean, "pred_std": step.std,
               "resid": step.innovation, "z": step.z, "accepted": step.accepted,
               "reason": step.reason, "n": step.n_updates}
        if ident is not None:
            fit["id"] = ident
        return fit


NUMERIC = ("mean", "std", "var", "dof", "lo", "hi")


def assert_preds(got: list[dict], want: list[dict]) -> None:
    assert len(got) == len(want)
    for name in NUMERIC:
        np.testing.assert_allclose([g[name] for g in got], [w[name] for w in want],
                                   rtol=RTOL, atol=0, equal_nan=True, err_msg=name)
    for name in ("t", "status", "level"):
        assert [g[name] for g in got] == [w[name] for w in want], name
    assert [g.get("id") for g in got] == [w.get("id") for w in want]


def assert_fits(got: list[dict], want: list[dict]) -> None:
    assert len(got) == len(want)
    for name in ("pred_mean", "pred_std", "resid", "z"):
        np.testing.assert_allclose([g[name] for g in got], [w[name] for w in want],
                                   rtol=RTOL, atol=1e-12, equal_nan=True, err_msg=name)
    for name in ("t", "y", "accepted", "reason", "n"):
        assert [g[name] for g in got] == [w[name] for w in want], name
    assert [g.get("id") for g in got] == [w.get("id") for w in want]


def assert_intervals_are_student_t(preds: list[dict]) -> None:
    """lo/hi = mean -/+ t_{dof}(0.5 + level/2) * scale, scale^2 = var (dof - 2) / dof.

    Reference: the Student-t quantile of scipy.stats.t.ppf and the variance of a
    Student-t, scale^2 dof / (dof - 2); with known noise (dof = inf), scipy.stats.norm.
    """
    checked = 0
    for p in preds:
        dof = p["dof"]
        if not (dof > 2.0):
            continue
        if math.isinf(dof):
            half = stats.norm.ppf(0.5 + p["level"] / 2.0) * math.sqrt(p["var"])
        else:
            half = stats.t.ppf(0.5 + p["level"] / 2.0, dof) * math.sqrt(
                p["var"] * (dof - 2.0) / dof)
        assert p["lo"] == pytest.approx(p["mean"] - half, rel=1e-10, abs=1e-9)
        assert p["hi"] == pytest.approx(p["mean"] + half, rel=1e-10, abs=1e-9)
        checked += 1
    assert checked > 0


def split(out: list) -> tuple[list[dict], list[dict]]:
    preds = [b for topic, b in out if topic == PRED]
    fits = [b for topic, b in out if topic == FIT]
    assert len(preds) + len(fits) == len(out), [m[0] for m in out]
    return preds, fits


def unblock(blocks: list[dict]) -> list[dict]:
    """Block prediction messages as one dict per row."""
    rows = []
    for b in blocks:
        k = len(b["t"])
        for name in ("t", *NUMERIC, "status"):
            assert len(b[name]) == k, name
        for i in range(k):
            row = {name: b[name][i] for name in ("t", *NUMERIC, "status")}
            row["level"] = b["level"]
            if "id" in b:
                row["id"] = b["id"][i]
            rows.append(row)
    return rows


def f8(values) -> bytes:
    """Values as a packed field: little-endian float64, row-major."""
    return np.asarray(values, dtype="<f8").tobytes()


PACKED = ("t", *NUMERIC)


def unpack_block(body: dict) -> dict:
    """A packed prediction block with its bins read back as lists of floats."""
    assert body["packed"] is True
    k = len(body["status"])
    out = dict(body)
    for name in PACKED:
        assert isinstance(body[name], bytes) and len(body[name]) == 8 * k, name
        out[name] = np.frombuffer(body[name], dtype="<f8").tolist()
    del out["packed"]
    return out


# ---------------------------------------------------------------------------------- scenario
SCENARIO = plant.Scenario(seed=17, days=2.0, sample_period_s=300.0, blunders=1)


@pytest.fixture(scope="module")
def run():
    return plant.simulate(SCENARIO)


def sample_id(k: int) -> str:
    return f"S-{k:05d}"


def test_scenario_has_late_lab_results(run):
    # each result arrives after at least 12 newer feature samples (1 to 3 h late at 5 min)
    newer = np.searchsorted(run.t, run.lab_arrival) - run.lab_index - 1
    assert newer.min() >= 12 and len(run.lab_t) >= 10
    assert run.lab_blunder.sum() == 1


def test_single_messages_equal_the_posterior_run_directly(start_service, run):
    h = start_service([c301_model()])
    ref = Reference(h.model_config())
    index = {t: k for k, t in enumerate(run.t.tolist())}
    x_at = run.X.tolist()
    want_preds, want_fits = [], []
    n_lab = 0
    for ev in plant.events(run):
        if ev[0] == "x":
            _, t, row = ev
            ident = sample_id(index[t])
            h.feed.send(MODEL, {"t": t, "x": list(row), "id": ident})
            want_preds.append(ref.predict(t, row, ident))
        else:
            _, t, y, _arrival = ev
            k = index[t]
            if n_lab % 2:  # every other result names its sample by id only
                h.feed.send(MODEL, {"id": sample_id(k), "y": y})
                want_fits.append(ref.learn(t, x_at[k], y, sample_id(k)))
            else:
                h.feed.send(MODEL, {"t": t, "y": y})
                want_fits.append(ref.learn(t, x_at[k], y))
            n_lab += 1
    preds, fits = split(h.barrier())
    assert_preds(preds, want_preds)
    assert_fits(fits, want_fits)
    assert_intervals_are_student_t(preds)
    assert [f["accepted"] for f in fits].count(False) >= 1  # the blunder is gated
    # forgetting widened the predictions between lab results: without t they would differ
    widened = [p["var"] > p["var_at_last_update"] * (1 + 1e-6) for p in want_preds
               if p["dof"] > 2]
    assert sum(widened) > len(widened) / 2

    post = h.posterior()
    np.testing.assert_allclose(post["mean"], ref.post.mean, rtol=RTOL)
    np.testing.assert_allclose(post["cov"], ref.post.cov, rtol=1e-8)
    assert (post["updates"], post["t_last"]) == (ref.post.n_updates, ref.post.t_last)
    assert post["terms"] == list(ref.basis.names)

    m = h.scrape()
    assert metric(m, "posteriord_feature_samples_total", model=MODEL) == len(run.t)
    assert metric(m, "posteriord_predictions_published_total", model=MODEL) == len(run.t)
    assert metric(m, "posteriord_lab_results_received_total", model=MODEL) == len(run.lab_t)
    assert metric(m, "posteriord_lab_results_learned_total", model=MODEL) == \
        sum(f["accepted"] for f in want_fits)
    assert rejected(m, MODEL, "gated") == sum(not f["accepted"] for f in want_fits)
    assert metric(m, "posteriord_model_updates", model=MODEL) == ref.post.n_updates
    assert metric(m, "posteriord_model_identified", model=MODEL) == 1.0
    assert metric(m, "posteriord_model_predictive_std", model=MODEL) == \
        pytest.approx(preds[-1]["std"], rel=RTOL)
    assert metric(m, "posteriord_models") == 2  # the model and the probe

    # a result for a sample older than the 12 h buffer, by time and by a remembered id;
    # one for a time with no features near it; one for an id never seen
    before = h.posterior()
    h.feed.send(MODEL, {"t": run.t[0], "y": 150.0})
    h.feed.send(MODEL, {"id": sample_id(0), "y": 150.0})
    h.feed.send(MODEL, {"t": run.t[-1] + 3600.0, "y": 150.0})
    h.feed.send(MODEL, {"id": "S-unknown", "y": 150.0})
    assert h.barrier() == []
    assert h.posterior() == before
    m2 = h.scrape()
    assert rejected(m2, MODEL, "lab_too_old") == 2
    assert rejected(m2, MODEL, "lab_unmatched") == 2


def feature_blocks(run, size: int):
    """The run's events as block messages: features up to ``size`` rows per block, cut
    where lab results arrive; consecutive lab results share one lab-only block."""
    index = {t: k for k, t in enumerate(run.t.tolist())}
    out, rows, labs = [], [], []

    def cut():
        if rows:
            out.append(("x", list(rows)))
            rows.clear()
        if labs:
            out.append(("y", list(labs)))
            labs.clear()

    for ev in plant.events(run):
        if ev[0] == "x":
            if labs or len(rows) == size:
                cut()
            rows.append((ev[1], ev[2], index[ev[1]]))
        else:
            if rows:
                cut()
            labs.append((ev[1], ev[2], index[ev[1]]))
    cut()
    return out


def test_blocks_equal_the_posterior_run_directly(start_service, run):
    h = start_service([c301_model()])
    ref = Reference(h.model_config())
    x_at = run.X.tolist()
    want_preds, want_fits, sizes = [], [], []
    for kind, items in feature_blocks(run, size=12):
        if kind == "x":
            h.feed.send(MODEL, {"t": [t for t, _, _ in items],
                                "x": [list(r) for _, r, _ in items],
                                "id": [sample_id(k) for _, _, k in items]})
            want_preds += [ref.predict(t, r, sample_id(k)) for t, r, k in items]
            sizes.append(len(items))
        else:
            h.feed.send(MODEL, {"t": [t for t, _, _ in items], "y": [y for _, y, _ in items]})
            want_fits += [ref.learn(t, x_at[k], y) for t, y, k in items]
    blocks, fits = split(h.barrier())
    assert [len(b["t"]) for b in blocks] == sizes  # one prediction message per block
    preds = unblock(blocks)
    assert_preds(preds, want_preds)
    assert_fits(fits, want_fits)
    assert_intervals_are_student_t(preds)
    post = h.posterior()
    np.testing.assert_allclose(post["mean"], ref.post.mean, rtol=RTOL)
    assert post["updates"] == ref.post.n_updates


def test_block_with_lab_values_on_feature_rows(start_service, run):
    """Rows carrying x and y are learned directly, each predicted before it is learned;
    the block still gets one prediction message."""
    h = start_service([c301_model()])
    ref = Reference(h.model_config())
    lab_y = dict(zip(run.lab_index.tolist(), run.lab_y.tolist(), strict=True))
    t_all, x_all = run.t.tolist(), run.X.tolist()
    want_preds, want_fits, sizes = [], [], []
    for start in range(0, 288, 24):  # the first day in blocks of 2 h
        ks = range(start, start + 24)
        ys = [lab_y.get(k) for k in ks]
        h.feed.send(MODEL, {"t": [t_all[k] for k in ks], "x": [x_all[k] for k in ks],
                            "y": ys})
        for k, y in zip(ks, ys, strict=True):
            want_preds.append(ref.predict(t_all[k], x_all[k]))
            if y is not None:
                want_fits.append(ref.learn(t_all[k], x_all[k], y))
        sizes.append(24)
    blocks, fits = split(h.barrier())
    assert len(want_fits) >= 5
    assert [len(b["t"]) for b in blocks] == sizes
    assert_preds(unblock(blocks), want_preds)
    assert_fits(fits, want_fits)


def recording_service() -> Service:
    svc = Service(loads(toml_config({"metrics": ""}, [c301_model()]), "<test>"),
                  registry=CollectorRegistry())
    svc.pub = Recorder()
    return svc


def packed_and_list_feeds(run) -> list[tuple[dict, dict]]:
    """The run as pairs of the same message in list and packed form: feature blocks
    (with ids on every other one), lab-only blocks, blocks carrying lab values on feature
    rows, and a block whose first rows repeat times already sent."""
    lab_y = dict(zip(run.lab_index.tolist(), run.lab_y.tolist(), strict=True))
    t_all, x_all = run.t.tolist(), run.X.tolist()
    pairs = []

    def add(ks, *, ids=False, y=False):
        ts = [t_all[k] for k in ks]
        body = {"t": ts, "x": [x_all[k] for k in ks]}
        packed = {"t": f8(ts), "x": f8(body["x"])}
        if ids:
            body["id"] = packed["id"] = [sample_id(k) if k % 3 else None for k in ks]
        if y:
            ys = [lab_y.get(k) for k in ks]
            body["y"] = ys
            packed["y"] = f8([math.nan if v is None else v for v in ys])
        pairs.append((body, packed))

    n = len(t_all)
    # the first hours: nothing learned yet, every prediction unidentified (nan)
    for b, start in enumerate(range(0, 36, 12)):
        add(range(start, start + 12), ids=b % 2 == 1)
    # the rest of the first day (to row 276) with the lab values on their rows (the careful path)
    for start in range(36, 276, 24):
        add(range(start, start + 24), y=True)
    # features only, in blocks of 16, with the late lab results of that stretch as
    # lab-only blocks between them
    labs = [(k, y) for k, y in sorted(lab_y.items()) if 276 <= k < n]
    end = 276
    for b, start in enumerate(range(276, n - 32, 16)):
        end = start + 16
        add(range(start, end), ids=b % 2 == 0)
        done = [(k, y) for k, y in labs if k < end]
        if done:
            labs = labs[len(done):]
            ts, ys = [t_all[k] for k, _ in done], [y for _, y in done]
            pairs.append(({"t": ts, "y": ys}, {"t": f8(ts), "y": f8(ys)}))
    # a block overlapping the last one: its 4 repeated rows are rejected one by one (3 out
    # of order, 1 duplicate), the 8 new ones predicted
    add(range(end - 4, end + 8))
    return pairs


def test_packed_blocks_answer_in_kind_with_the_numbers_of_the_list_form(run):
    """Two identical services fed the same blocks, one in list form and one packed: the
    packed answers are bins that decode to exactly the list form's numbers (nan included),
    and the lab results learned, the rejections and the posteriors are the same."""
    lists, packed = recording_service(), recording_service()
    for body, pbody in packed_and_list_feeds(run):
        lists.process([[MODEL.encode(), msgpack.packb(body, use_bin_type=True)]])
        packed.process([[MODEL.encode(), msgpack.packb(pbody, use_bin_type=True)]])
    got, want = packed.pub.out, lists.pub.out
    assert [topic for topic, _ in got] == [topic for topic, _ in want]
    preds = [(g, w) for (topic, g), (_, w) in zip(got, want, strict=True) if topic == PRED]
    assert len(preds) > 20
    n_nan = n_learning = 0
    for g, w in preds:
        assert "packed" not in w
        assert set(g) == set(w) | {"packed"}
        plain = unpack_block(g)
        for name in PACKED:
            np.testing.assert_array_equal(plain[name], w[name], err_msg=name)
        for name in ("status", "level", "trust", "id"):
            assert plain.get(name) == w.get(name), name
        n_nan += sum(math.isnan(v) for v in plain["mean"])
        n_learning += plain["status"].count("learning")
    assert n_nan >= 36 and n_learning > 100  # unidentified rows carry nan
    assert len(preds[-1][0]["status"]) == 8
    # fit/ and alert/ messages byte for byte (nan == nan there)
    others = [[msgpack.packb(b) for topic, b in out if topic != PRED] for out in (got, want)]
    assert others[0] == others[1] and len(others[0]) > 10
    ra, rb = packed.runners[MODEL], lists.runners[MODEL]
    assert ra.rejected == rb.rejected
    assert (ra.rejected["out_of_order"], ra.rejected["duplicate"]) == (3, 1)
    assert ra.n_features == rb.n_features and ra.n_learned == rb.n_learned >= 5
    np.testing.assert_array_equal(ra.post.mean, rb.post.mean)
    np.testing.assert_array_equal(ra.aligner.rows(), rb.aligner.rows())


def test_packed_blocks_over_the_sockets(start_service, run):
    """A packed block through the running daemon is answered with packed predictions equal
    to the posterior run directly; the packed flag is set only on those."""
    h = start_service([c301_model()])
    ref = Reference(h.model_config())
    x_at = run.X.tolist()
    want_preds, want_fits, sizes = [], [], []
    for b, (kind, items) in enumerate(feature_blocks(run, size=12)):
        ts = [t for t, _, _ in items]
        if kind == "x":
            if b % 2:
                h.feed.send(MODEL, {"t": f8(ts), "x": f8([r for _, r, _ in items]),
                                    "id": [sample_id(k) for _, _, k in items]})
            else:
                h.feed.send(MODEL, {"t": ts, "x": [list(r) for _, r, _ in items],
                                    "id": [sample_id(k) for _, _, k in items]})
            want_preds += [ref.predict(t, r, sample_id(k)) for t, r, k in items]
            sizes.append((len(items), b % 2 == 1))
        else:
            h.feed.send(MODEL, {"t": f8(ts), "y": f8([y for _, y, _ in items])})
            want_fits += [ref.learn(t, x_at[k], y) for t, y, k in items]
    blocks, fits = split(h.barrier())
    assert [(len(b["status"]), b.get("packed", False)) for b in blocks] == sizes
    assert all("packed" not in b or b["packed"] is True for b in blocks)
    preds = unblock([unpack_block(b) if b.get("packed") else b for b in blocks])
    assert_preds(preds, want_preds)
    assert_fits(fits, want_fits)


def test_known_noise_without_forgetting_is_ridge_regression(start_service, run):
    """With known noise sigma, no forgetting and no gate, the posterior is ridge regression.

    Reference: the posterior mean is the ridge estimate with lambda = alpha sigma^2 and an
    unpenalized intercept (scikit-learn Ridge with fit_intercept=True); the covariance is
    (alpha D + Phi^T Phi / sigma^2)^-1 with D = diag(0, 1, ..., 1) and the predictive
    variance sigma^2 + phi^T C phi (Bishop, PRML, eqs. 3.53-3.54 and 3.58-3.59, equation
    numbers from memory), both with numpy.linalg. Late results are matched to the features
    of the time each was drawn.
    """
    sigma, alpha = 8.0, 1e-3
    h = start_service([c301_model(basis={"kind": "identity"}, prior={"alpha": alpha},
                                  noise={"std": sigma}, forgetting={"policy": "none"},
                                  gate={"k": 0})])
    assert h.model_config().build_basis().names == ("1", *plant.TAGS)
    for ev in plant.events(run):
        if ev[0] == "x":
            h.feed.send(MODEL, {"t": ev[1], "x": list(ev[2])})
        else:
            h.feed.send(MODEL, {"t": ev[1], "y": ev[2]})
    preds, fits = split(h.barrier())
    assert len(fits) == len(run.lab_t) and all(f["accepted"] for f in fits)

    X = run.X[run.lab_index]
    y = run.lab_y
    ridge = Ridge(alpha=alpha * sigma**2, fit_intercept=True, solver="cholesky").fit(X, y)
    post = h.posterior()
    np.testing.assert_allclose(post["mean"], [ridge.intercept_, *ridge.coef_], rtol=1e-7)
    Phi = np.column_stack([np.ones(len(y)), X])
    D = np.diag([0.0] + [1.0] * X.shape[1])
    C = np.linalg.inv(alpha * D + Phi.T @ Phi / sigma**2)
    np.testing.assert_allclose(post["cov"], C, rtol=1e-7)
    # features after the last lab result arrived: predicted with the final posterior
    last_arrival = run.lab_arrival.max()
    tail = [(p, k) for p, k in zip(preds, range(len(run.t)), strict=True)
            if run.t[k] > last_arrival]
    assert tail
    for p, k in tail:
        phi = np.concatenate([[1.0], run.X[k]])
        assert p["mean"] == pytest.approx(phi @ post["mean"], rel=1e-9)
        assert p["var"] == pytest.approx(sigma**2 + phi @ C @ phi, rel=1e-7)
        assert p["dof"] == math.inf
    assert_intervals_are_student_t(preds)


# ---------------------------------------------------------------------------------- bad input
MAX_BYTES = 4096
ROW = [110.0, 14.0, 1.2, 5.0]


@pytest.fixture(scope="module")
def learned(tmp_path_factory, run):
    """A daemon that has learned the first day of the run (shared by the bad-input tests,
    which compare counters and the posterior before and after)."""
    folder = tmp_path_factory.mktemp("bad")
    h = ServiceHarness(folder, [c301_model()], max_message_bytes=MAX_BYTES)
    day = run.t[0] + 86400.0
    for ev in plant.events(run):
        if ev[0] == "x" and ev[1] < day:
            h.feed.send(MODEL, {"t": ev[1], "x": list(ev[2])})
            h.clock = ev[1]
        elif ev[0] == "y" and ev[3] < day:
            h.feed.send(MODEL, {"t": ev[1], "y": ev[2]})
    h.barrier()
    assert h.posterior()["updates"] >= 4
    yield h
    h.stop()


def _m(body) -> list[bytes]:
    return [MODEL.encode(), msgpack.packb(body, use_bin_type=True)]


def _feature(h, **extra) -> dict:
    return {"t": h.clock + 60.0, "x": ROW, **extra}


# name -> (frames to send given the harness, model label, reason, count); reason None means
# nothing at all may be counted
BAD_INPUT = {
    "topic not subscribed": (lambda h: [[b"c302.other", _m(_feature(h))[1]]], "", None, 0),
    "topic extends a model name": (
        lambda h: [[(MODEL + "_x").encode(), _m(_feature(h))[1]]], "", "unknown_model", 1),
    "malformed msgpack": (lambda h: [[MODEL.encode(), b"\xc1\x00"]], MODEL, "msgpack", 1),
    "truncated msgpack": (lambda h: [[MODEL.encode(), b"\x82\xa1t"]], MODEL, "msgpack", 1),
    "one frame": (lambda h: [[MODEL.encode()]], MODEL, "frames", 1),
    "three frames": (lambda h: [_m(_feature(h)) + [b"extra"]], MODEL, "frames", 1),
    "non-map payload": (lambda h: [_m([h.clock + 60.0, ROW])], MODEL, "not_a_map", 1),
    "missing t": (lambda h: [_m({"x": ROW})], MODEL, "bad_time", 1),
    "non-finite t": (lambda h: [_m({"t": math.nan, "x": ROW}), _m({"t": math.inf, "x": ROW}),
                                _m({"t": -math.inf, "y": 1.0})], MODEL, "bad_time", 3),
    "x wrong length": (lambda h: [_m(_feature(h, x=ROW[:3])), _m(_feature(h, x=ROW * 2))],
                       MODEL, "bad_x", 2),
    "unknown tag": (lambda h: [_m(_feature(h, x={**dict(zip(plant.TAGS, ROW, strict=True)),
                                                 "TI-999": 1.0}))], MODEL, "bad_x", 1),
    "non-finite x": (lambda h: [_m(_feature(h, x=[math.nan, 14.0, 1.2, 5.0])),
                                _m(_feature(h, x=[110.0, math.inf, 1.2, 5.0])),
                                _m(_feature(h, x={"TI-104": 110.0, "FI-201": 14.0,
                                                  "PI-110": -math.inf, "AI-305": 5.0}))],
                     MODEL, "bad_x", 3),
    "non-finite y": (lambda h: [_m({"t": h.clock - 600.0, "y": math.nan}),
                                _m({"t": h.clock - 600.0, "y": math.inf})], MODEL, "bad_y", 2),
    "bad id type": (lambda h: [_m(_feature(h, id=1.5)), _m(_feature(h, id=True)),
                               _m(_feature(h, id=["S-1"])), _m({"id": 2.5, "y": 100.0})],
                    MODEL, "bad_id", 4),
    "bad seq type": (lambda h: [_m(_feature(h, seq="7"))], MODEL, "bad_id", 1),
    "out-of-order sample": (lambda h: [_m({"t": h.clock - 300.0, "x": ROW})], MODEL,
                            "out_of_order", 1),
    "duplicate sample": (lambda h: [_m({"t": h.clock, "x": ROW})], MODEL, "duplicate", 1),
    "oversize message": (lambda h: [_m(_feature(h, pad="p" * MAX_BYTES))], MODEL,
                         "too_large", 1),
    "msgpack ext type": (lambda h: [_m(_feature(h, note=msgpack.ExtType(9, b"x")))], MODEL,
                         "msgpack", 1),
    "msgpack timestamp": (lambda h: [_m({"t": msgpack.Timestamp(1767571200), "x": ROW})],
                          MODEL, "msgpack", 1),
    "bad block lengths": (lambda h: [_m({"t": [h.clock + 60, h.clock + 120], "x": [ROW]}),
                                     _m({"t": [h.clock + 60], "x": [ROW], "y": [None, 1.0]}),
                                     _m({"t": [h.clock + 60], "x": [ROW], "id": []}),
                                     _m({"t": [], "x": []})], MODEL, "bad_block", 4),
    "bad packed block sizes": (lambda h: [
        _m({"t": f8(h.clock + 60.0 * np.arange(1, 3))[:-1], "x": f8([ROW, ROW])}),
        _m({"t": f8(h.clock + 60.0 * np.arange(1, 3)), "x": f8([ROW, ROW])[:-8]}),
        _m({"t": f8(h.clock + 60.0 * np.arange(1, 3)), "x": f8([ROW, ROW, ROW])}),
        _m({"t": b"", "x": b""}),
        _m({"t": f8([h.clock + 60.0]), "x": f8([ROW]), "y": f8([1.0, 2.0])})],
        MODEL, "bad_block", 5),
    "non-finite packed x": (lambda h: [
        _m({"t": f8(h.clock + 60.0 * np.arange(1, 3)),
            "x": f8([ROW, [110.0, 14.0, math.nan, 5.0]])}),
        _m({"t": [h.clock + 60.0], "x": f8([[math.inf, 14.0, 1.2, 5.0]])})],
        MODEL, "bad_x", 2),
    "non-finite packed t": (lambda h: [
        _m({"t": f8([h.clock + 60.0, math.nan]), "x": f8([ROW, ROW])}),
        _m({"t": f8([math.inf]), "x": [ROW]})], MODEL, "bad_time", 2),
    "infinite packed y": (lambda h: [_m({"t": f8([h.clock - 600.0]), "y": f8([math.inf])})],
                          MODEL, "bad_y", 1),
    "lab result too old": (lambda h: [_m({"t": h.clock - 86400.0, "y": 100.0})], MODEL,
                           "lab_too_old", 1),
    "lab result with no features near": (lambda h: [_m({"t": h.clock + 3600.0, "y": 100.0})],
                                         MODEL, "lab_unmatched", 1),
}


UNKNOWN = "posteriord_unknown_topic_messages_total"


def _rejections(m: dict) -> dict:
    """Rejections per (model, reason); model "" for messages that name no model."""
    out = {labels: v for (name, labels), v in m.items() if name == "posteriord_rejected_total"}
    out.update({labels | {("model", "")}: v for (name, labels), v in m.items()
                if name == UNKNOWN})
    return out


def _received(m: dict) -> dict:
    """Messages received per model label, the probe's left out (the barrier uses it);
    model "" for messages that name no model."""
    out = {labels: v for (name, labels), v in m.items()
           if name == "posteriord_messages_received_total"
           and labels != frozenset({("model", PROBE)})}
    out[frozenset({("model", "")})] = sum(v for (name, _l), v in m.items() if name == UNKNOWN)
    return out


@pytest.mark.parametrize("case", list(BAD_INPUT))
def test_bad_input_is_counted_and_changes_nothing(learned, case):
    build, label, reason, count = BAD_INPUT[case]
    h = learned
    before_post, before = h.posterior(), h.scrape()
    messages = build(h)
    for frames in messages:
        h.feed.send_frames(frames)
    assert h.barrier() == []  # nothing published for it, and the loop still runs
    assert h.alive() and h.ctl("ping") == {"ok": True}
    after = h.scrape()
    assert h.posterior() == before_post
    rej_before, rej_after = _rejections(before), _rejections(after)
    delta = {k: v - rej_before.get(k, 0.0) for k, v in rej_after.items()
             if v != rej_before.get(k, 0.0)}
    received = _received(after)[frozenset({("model", label)})] - \
        _received(before)[frozenset({("model", label)})]
    if reason is None:
        assert delta == {} and received == 0
        assert _received(after) == _received(before)
    else:
        assert delta == {frozenset({("model", label), ("reason", reason)}): count}
        assert received == len(messages)


def test_rejected_packed_block_buffers_nothing(learned):
    """After bad packed blocks, a good one at the same times is taken whole: none of the
    bad ones reached the feature buffer."""
    h = learned
    ts = (h.clock + 60.0 * np.arange(1, 9)).tolist()
    X = [[110.0 + i, 14.0, 1.2, 5.0] for i in range(8)]
    before_post, before = h.posterior(), h.scrape()
    bad_x = [row[:] for row in X]
    bad_x[5][3] = math.nan
    h.feed.send(MODEL, {"t": f8(ts), "x": f8(bad_x)})
    h.feed.send(MODEL, {"t": f8(ts), "x": f8(X)[:-8]})
    h.feed.send(MODEL, {"t": f8(ts[:4] + [math.inf] + ts[5:]), "x": f8(X)})
    assert h.barrier() == []
    assert h.posterior() == before_post
    mid = h.scrape()
    for name in ("posteriord_feature_samples_total", "posteriord_predictions_published_total"):
        assert metric(mid, name, model=MODEL) == metric(before, name, model=MODEL), name
    h.feed.send(MODEL, {"t": f8(ts), "x": f8(X)})
    h.clock = ts[-1]
    preds, fits = split(h.barrier())
    assert fits == [] and len(preds) == 1 and preds[0]["packed"] is True
    assert unpack_block(preds[0])["t"] == ts
    after = h.scrape()
    assert metric(after, "posteriord_feature_samples_total", model=MODEL) == \
        metric(before, "posteriord_feature_samples_total", model=MODEL) + len(ts)
    delta = {k: v - _rejections(before).get(k, 0.0) for k, v in _rejections(after).items()
             if v != _rejections(before).get(k, 0.0)}
    assert delta == {frozenset({("model", MODEL), ("reason", "bad_x")}): 1,
                     frozenset({("model", MODEL), ("reason", "bad_block")}): 1,
                     frozenset({("model", MODEL), ("reason", "bad_time")}): 1}


@pytest.mark.filterwarnings("ignore:overflow encountered:RuntimeWarning")
def test_features_whose_basis_overflows_cannot_be_learned(learned):
    """Finite but absurd readings: the prediction is published, the lab result matched to
    them is rejected (bad_x) and the loop goes on."""
    h = learned
    t = h.clock + 60.0
    before_post, before = h.posterior(), h.scrape()
    h.feed.send(MODEL, {"t": t, "x": [1e200, 14.0, 1.2, 5.0]})
    h.feed.send(MODEL, {"t": t, "y": 100.0})
    h.clock = t
    out = h.barrier()
    assert [topic for topic, _ in out] == [PRED]
    assert h.alive() and h.ctl("ping") == {"ok": True}
    assert h.posterior() == before_post
    assert rejected(h.scrape(), MODEL, "bad_x") - rejected(before, MODEL, "bad_x") == 1


def test_seq_gaps_are_counted(learned):
    h = learned
    before = h.scrape()
    seqs = [1001, 1002, 1005, 1006, 1010]
    for s in seqs:
        h.clock += 60.0
        h.feed.send(MODEL, {"t": h.clock, "x": ROW, "seq": s})
    preds, _ = split(h.barrier())
    assert len(preds) == len(seqs)
    after = h.scrape()
    for name, want in (("posteriord_feed_gaps_total", 2), ("posteriord_feed_lost_messages_total",
                                                          2 + 3)):
        assert metric(after, name, model=MODEL) - metric(before, name, model=MODEL) == want


def test_bad_control_requests_get_ok_false(learned):
    h = learned
    bad = [
        [b"\xc1"],                                        # not msgpack
        [msgpack.packb(["status"])],                      # not a map
        [msgpack.packb({"command": "status"})],           # no cmd
        [msgpack.packb({"cmd": 7})],                      # cmd not a string
        [msgpack.packb({"cmd": "status"}), b"more"],      # two frames
    ]
    for frames in bad:
        reply = h.ctl.raw(frames)
        assert reply["ok"] is False and reply["error"], frames
    reply = h.ctl("explode")
    assert reply["ok"] is False and "unknown command 'explode'" in reply["error"]
    for cmd in ("posterior", "freeze", "resume", "reset"):
        assert h.ctl(cmd)["ok"] is False                  # no model
        assert h.ctl(cmd, model="c301.nothing")["ok"] is False
    assert h.ctl("ping") == {"ok": True}


def test_oversize_control_request_drops_that_client_only(learned):
    """The control socket's ZMQ_MAXMSGSIZE (64 KiB) makes libzmq drop the connection of a
    client sending more: that request gets no reply, other clients are served."""
    h = learned
    big = Control(h.ctx, h.ctl.sock.getsockopt_string(zmq.LAST_ENDPOINT), timeout=0.5)
    try:
        with pytest.raises(AssertionError, match="no reply"):
            big("status", pad="p" * 70000)
    finally:
        big.sock.close(linger=0)
    assert h.ctl("ping") == {"ok": True}
    assert h.alive()


def test_reload_without_a_config_file(learned):
    def count():
        return metric(learned.scrape(), "posteriord_config_reloads_total",
                      result="unavailable")

    before = count()
    reply = learned.ctl("reload")
    assert reply["ok"] is False and "no config file" in reply["error"]
    assert count() == before + 1


def test_checkpoint_reply(learned):
    reply = learned.ctl("checkpoint")
    if reply["ok"]:
        state_dir = Path(learned.config.daemon.state_dir)
        assert any(p.is_file() for p in state_dir.rglob("*"))
    else:
        assert "unavailable" in reply["error"]


def test_message_far_over_the_size_limit_drops_and_restores_the_feed(start_service):
    """ZMQ_MAXMSGSIZE (twice max_message_bytes) bounds the memory one message can take:
    libzmq drops a connection that exceeds it and would not reconnect by itself, so the
    daemon watches its feed socket and reconnects; the drop is counted per feed endpoint."""
    h = start_service([c301_model()], max_message_bytes=MAX_BYTES)
    h.feed.send(MODEL, {"t": 1000.0, "x": ROW})
    assert len(h.barrier()) == 1
    before_post, before = h.posterior(), h.scrape()
    h.feed.drain_events()
    h.feed.send(MODEL, {"t": 1060.0, "x": ROW, "pad": "p" * (64 * MAX_BYTES)})
    # the daemon's subscription arrives again over the new connection
    h.feed.wait_event("sub", MODEL)
    wait_until(lambda: metric(h.scrape(), "posteriord_feed_disconnects_total",
                              endpoint=h.feed.endpoint) == 1, what="the drop to be counted")
    h.feed.send(MODEL, {"t": 1120.0, "x": ROW})
    preds, _ = split(h.barrier())
    assert [p["t"] for p in preds] == [1120.0]
    assert h.posterior() == before_post
    after = h.scrape()
    assert metric(after, "posteriord_messages_received_total", model=MODEL) == \
        metric(before, "posteriord_messages_received_total", model=MODEL) + 1


# ---------------------------------------------------------------------------------- control
def test_freeze_resume_reset(start_service, run):
    h = start_service([c301_model(lab={"keep": "24h", "keep_count": 5000, "tolerance": "2m",
                                       "stale_after": "36h"})])
    cfg = h.model_config()
    ref = Reference(cfg)
    x_at = run.X.tolist()
    t_all = run.t.tolist()
    # every feature sample of the run, and all but the last four lab results (drawn in the
    # last day, so still in the 24 h buffer)
    labs = [ev for ev in plant.events(run) if ev[0] == "y"]
    held = labs[-4:]
    assert all(ev[1] >= t_all[-1] - 86400.0 for ev in held)
    for ev in plant.events(run):
        if ev[0] == "x":
            h.feed.send(MODEL, {"t": ev[1], "x": list(ev[2])})
            ref.predict(ev[1], ev[2])
        elif ev not in held:
            h.feed.send(MODEL, {"t": ev[1], "y": ev[2]})
            ref.learn(ev[1], x_at[t_all.index(ev[1])], ev[2])
    h.barrier()
    status = h.ctl("status")["models"][MODEL]
    assert status["status"] == ref.status(t_all[-1]) == "learning"
    assert status["frozen"] is False

    assert h.ctl("freeze", model=MODEL) == {"ok": True, "model": MODEL, "command": "freeze"}
    assert h.ctl("status")["models"][MODEL]["frozen"] is True
    frozen_post = h.posterior()
    _, t1, y1, _ = held[0]
    h.feed.send(MODEL, {"t": t1, "y": y1})
    ref.frozen = True
    extra_t = [t_all[-1] + 300.0 * (i + 1) for i in range(3)]
    for t in extra_t:
        h.feed.send(MODEL, {"t": t, "x": x_at[-1]})
    preds, fits = split(h.barrier())
    assert fits == []
    assert_preds(preds, [ref.predict(t, x_at[-1]) for t in extra_t])
    assert {p["status"] for p in preds} == {"frozen"}
    assert h.posterior() == frozen_post
    assert rejected(h.scrape(), MODEL, "frozen") == 1
    assert h.ctl("status")["models"][MODEL]["status"] == "frozen"

    assert h.ctl("resume", model=MODEL)["ok"] is True
    ref.frozen = False
    _, t2, y2, _ = held[1]
    h.feed.send(MODEL, {"t": t2, "y": y2})
    h.feed.send(MODEL, {"t": extra_t[-1] + 300.0, "x": x_at[-1]})
    want_fit = ref.learn(t2, x_at[t_all.index(t2)], y2)
    want_pred = ref.predict(extra_t[-1] + 300.0, x_at[-1])
    preds, fits = split(h.barrier())
    assert_fits(fits, [want_fit])
    assert_preds(preds, [want_pred])
    assert fits[0]["accepted"] and want_pred["status"] == "learning"
    assert h.posterior()["updates"] == frozen_post["updates"] + 1

    assert h.ctl("reset", model=MODEL)["ok"] is True
    fresh = Reference(cfg)
    post = h.posterior()
    assert post["updates"] == 0 and post["t_last"] is None
    assert post["mean"] == [None] * len(fresh.basis.names)  # nan (not identified) -> nil
    assert post["noise_var"] == fresh.post.noise_var and post["dof"] == fresh.post.dof
    assert h.ctl("status")["models"][MODEL]["status"] == "unidentified"
    # the feature buffer and the feed clock go too: results for samples drawn before the
    # reset have nothing to match (counted), and a sample older than the last one before the
    # reset is accepted again (a publisher's wrong clock no longer blocks the model)
    before = h.ctl("status")["models"][MODEL]
    for _, t, y, _ in held[2:]:
        h.feed.send(MODEL, {"t": t, "y": y})
    t_back = extra_t[-1] - 3600.0
    h.feed.send(MODEL, {"t": t_back, "x": x_at[-1]})
    h.feed.send(MODEL, {"t": t_back, "y": 150.0})
    want = [fresh.predict(t_back, x_at[-1])]
    want_fits = [fresh.learn(t_back, x_at[-1], 150.0)]
    preds, fits = split(h.barrier())
    assert preds[0]["status"] == "unidentified" and math.isnan(preds[0]["mean"])
    assert_preds(preds, want)
    assert_fits(fits, want_fits)
    after = h.ctl("status")["models"][MODEL]
    assert after["rejected"].get("lab_unmatched", 0) - before["rejected"].get(
        "lab_unmatched", 0) == len(held) - 2
    assert h.posterior()["updates"] == fresh.post.n_updates == 1


def test_status_field(start_service, run):
    h = start_service([c301_model(lab={"keep": "12h", "keep_count": 5000, "tolerance": "2m",
                                       "stale_after": "2h"})])
    ref = Reference(h.model_config())
    t_all, x_all = run.t.tolist(), run.X.tolist()
    assert h.ctl("status")["models"][MODEL]["status"] == "unidentified"
    for k in range(12):
        h.feed.send(MODEL, {"t": t_all[k], "x": x_all[k]})
    preds, _ = split(h.barrier())
    assert {p["status"] for p in preds} == {"unidentified"}
    assert h.ctl("status")["models"][MODEL]["status"] == "unidentified"

    # one lab result for the sample at index 6: learning until 2 h after it was drawn
    h.feed.send(MODEL, {"t": t_all[6], "y": float(run.truth_y[6])})
    ref.learn(t_all[6], x_all[6], float(run.truth_y[6]))
    for k in range(12, 25):
        h.feed.send(MODEL, {"t": t_all[k], "x": x_all[k]})
    h.feed.send(MODEL, {"t": t_all[25:37], "x": x_all[25:37]})  # a block across the limit
    out = h.barrier()
    preds, fits = split(out)
    assert fits[0]["accepted"] and preds[-1]["t"] == t_all[25:37]
    rows = [*preds[:-1], *unblock(preds[-1:])]
    want = [ref.predict(t_all[k], x_all[k]) for k in range(12, 37)]
    assert_preds(rows, want)
    status = {t: s for t, s in zip(t_all[12:37], [r["status"] for r in rows], strict=True)}
    # Reference: the stale rule t - t_lab > stale_after, t_lab = t_all[6], 2 h = 24 samples
    for k in range(12, 37):
        assert status[t_all[k]] == ("stale" if k - 6 > 24 else "learning"), k
    assert h.ctl("status")["models"][MODEL]["status"] == "stale"
    assert metric(h.scrape(), "posteriord_model_lab_age_seconds", model=MODEL) == \
        t_all[36] - t_all[6]


# ---------------------------------------------------------------------------------- shutdown
def test_shutdown_order_with_own_context_and_metrics(start_service):
    h = start_service([c301_model()])
    address = h.metrics_address
    assert h.stop() == ["feed", "control", "state", "publish", "metrics", "context"]
    with pytest.raises(OSError):
        urllib.request.urlopen(f"http://{address[0]}:{address[1]}/metrics", timeout=TIMEOUT)


def test_shutdown_order_with_a_shared_context_and_no_metrics(start_service):
    h = start_service([c301_model()], metrics=False, own_context=False)
    assert h.metrics_address is None
    assert h.stop() == ["feed", "control", "state", "publish"]


def _queued_sub(messages):
    """A real SUB socket with ``messages`` (lists of frames) queued in it, and its context.

    Over inproc a message sent after the subscription has reached the publisher is in the
    subscriber's queue when ``send`` returns; probes are sent until one arrives, so it has.
    """
    ctx = zmq.Context()
    pub, sub = ctx.socket(zmq.PUB), ctx.socket(zmq.SUB)
    for s in (pub, sub):
        s.setsockopt(zmq.LINGER, 0)
    pub.setsockopt(zmq.SNDHWM, 0)
    sub.setsockopt(zmq.RCVHWM, 0)
    sub.setsockopt(zmq.SUBSCRIBE, b"")
    pub.bind("inproc://drain-test")
    sub.connect("inproc://drain-test")
    deadline = time.monotonic() + 10
    while not sub.poll(20):
        assert time.monotonic() < deadline, "the subscription never reached the publisher"
        pub.send(b"probe")
    while sub.poll(0):
        sub.recv()
    for frames in messages:
        pub.send_multipart(frames)
    return ctx, pub, sub


@pytest.mark.parametrize(("limit", "budget", "sizes"), [
    (16384, 64 << 20, [10]),         # everything queued, in one batch
    (4, 64 << 20, [4, 4, 2]),        # the count limit
    (16384, 1000, [4, 4, 2]),        # the byte budget: ends after the message crossing it
])
def test_drain_takes_what_is_queued_up_to_the_limits(limit, budget, sizes):
    svc = Service(loads(toml_config({"metrics": "", "batch_limit": limit,
                                     "batch_bytes": budget}, [c301_model()]), "<test>"),
                  registry=CollectorRegistry())
    svc.pub = Recorder()
    payload = msgpack.packb({"t": 1.0, "pad": "x" * 290})
    assert 290 < len(payload) < 334  # four cross 1000 bytes, three do not
    ctx, pub, svc.sub = _queued_sub([[b"C-301", payload]] * 10)
    try:
        seen = []
        svc.process = lambda batch: seen.append(len(batch))
        for _ in range(len(sizes) + 1):
            svc.drain()
        assert seen == sizes + [0]
    finally:
        ctx.destroy(linger=0)


def test_drain_keeps_each_message_whole_whatever_its_number_of_frames():
    # one, two and three frames, and a lone message (the drain asks whether a second one
    # is queued before it tries to receive it)
    messages = [[b"C-301"], [b"C-301", b"a"], [b"C-301", b"b", b"c"], [b"x", b""]]
    svc = Service(loads(toml_config({"metrics": ""}, [c301_model()]), "<test>"),
                  registry=CollectorRegistry())
    svc.pub = Recorder()
    seen = []
    svc.process = lambda batch: seen.append(batch)
    for queued, want in ((messages, [messages]), (messages[1:2], [messages[1:2]]), ([], [[]])):
        ctx, pub, svc.sub = _queued_sub(queued)
        try:
            seen.clear()
            svc.drain()
            assert seen == want
            assert not svc.sub.poll(0)  # nothing left behind
        finally:
            ctx.destroy(linger=0)


def test_blocks_of_one_wake_up_are_predicted_together_and_answered_one_by_one(run):
    """A whole feed in one process() call (so runs of feature blocks of the model are
    predicted in one call) gives the same messages, byte for byte and in the same order,
    as one call per message: predictions, trust states, alerts and fits."""
    feed = [[MODEL.encode(), msgpack.packb(pb if k % 2 else body, use_bin_type=True)]
            for k, (body, pb) in enumerate(packed_and_list_feeds(run))]
    one, together = recording_service(), recording_service()
    assert together.runners[MODEL].post.rowwise == _linalg.HAVE_KERNEL
    calls = {"one": 0, "together": 0}
    for name, svc in (("one", one), ("together", together)):
        runner = svc.runners[MODEL]

        def counted(*args, _predict=runner.predict, _name=name, **kw):
            calls[_name] += 1
            return _predict(*args, **kw)
        runner.predict = counted
    for frames in feed:
        one.process([frames])
    together.process(feed)
    if _linalg.HAVE_KERNEL:
        assert calls["together"] < calls["one"] - 5  # runs of feature blocks went together
    got, want = together.pub.out, one.pub.out
    assert len(got) == len(want) > 40
    assert sum(topic == PRED for topic, _ in got) > 20
    assert [(t, msgpack.packb(b)) for t, b in got] == [(t, msgpack.packb(b)) for t, b in want]
    ra, rb = together.runners[MODEL], one.runners[MODEL]
    assert ra.rejected == rb.rejected and ra.n_learned == rb.n_learned >= 5
    np.testing.assert_array_equal(ra.post.mean, rb.post.mean)
