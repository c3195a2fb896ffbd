"""Report: pictures of how a model did, from a predictions CSV or a recorded stream.

Page 1 (the file named): over time, (1) the prediction with its interval band, the lab
results (learned, and rejected by the gate) and the periods the model was in caution or
untrusted; (2) the standardized residual z of each lab result with the two-sided CUSUM on z
(the mean-shift detector of the trust monitor, recomputed from the learned z with its k and
h) and the alerts; (3) the predictive standard deviation and the lab staleness (time since
the newest learned lab sample was drawn, as known to the model at that moment).

Page 2 (``<name>-calibration.<ext>``): the histogram of the probability integral transform
(PIT, ``Phi(z)``: uniform for a calibrated model) and the coverage of central intervals of
every probability, against the nominal one.

When the file holds them (a backtest's predictions file), page 1 also draws the references of
the backtest at each lab sample, the static model plus a lab bias update and persistence (the
last lab value known then), and its title line gives the RMSE at the lab results of the
prediction published for each sample's own time against those of the references
(`reference_scores`), every result counted, rejected ones too.

``z`` maps the predictive CDF at the lab value to a standard normal quantile, so the PIT is
``Phi(z)`` exactly and a lab value lies in the central interval of probability p exactly when
``|z| <= Phi^-1((1 + p) / 2)``, whatever the predictive's degrees of freedom.
"""

from __future__ import annotations

import math
import os
from pathlib import Path

import numpy as np
from scipy import special

from daemon.workbench.backtest import Track, collect, coverage_verdict, read_predictions
from recursive.detect import Cusum

__all__ = ["calibration", "coverage_verdict", "cusum_path", "load_track", "reference_scores",
           "report", "staleness", "summary_text"]

_STATE_COLOR = {"caution": "#f2b134", "untrusted": "#d64541"}
_MAX_POINTS = 6000


def load_track(path, model: str | None = None, *, level: float | None = None) -> Track:
    """A `Track` from a predictions CSV (`backtest`) or a record file (`live`)."""
    with open(path, "rb") as fh:
        head = fh.read(64)
    from daemon.workbench import live

    if head.startswith(live.FORMAT.encode()):
        msgs = [(topic, body) for _, topic, body in live.RecordReader(path)]
        names = sorted({topic.partition("/")[2] for topic, _ in msgs if "/" in topic})
        if model is None:
            if len(names) != 1:
                raise ValueError(f"{path} holds models {names}; choose one with --model")
            model = names[0]
        elif model not in names:
            raise ValueError(f"{path}: no messages of model {model!r} (models: {names})")
        described = live.RecordReader(path).models.get(model)
        meta = dict(described) if isinstance(described, dict) else {}
        track = collect(msgs, model, {**meta, "model": model,
                                      "source": os.path.basename(path)})
    else:
        track = read_predictions(path)
        if model is not None and track.model and track.model != model:
            raise ValueError(f"{path} holds predictions of {track.model!r}, not {model!r}")
    if level is not None:
        track.meta["level"] = level
    return track


def cusum_path(z, learned, k: float = 0.5, h: float = 5.0):
    """The two-sided CUSUM over the learned lab results, as the trust monitor runs it.

    Returns ``(upper, lower, signal)`` arrays over all lab results (nan where a result was
    not learned), with the sums reached at each step (before a restart after a signal).
    """
    c = Cusum(k, h)
    n = len(z)
    up = np.full(n, np.nan)
    lo = np.full(n, np.nan)
    sig = np.zeros(n, dtype=int)
    for i in range(n):
        if learned[i] and math.isfinite(z[i]):
            s = c.step(z[i])
            up[i], lo[i], sig[i] = s.upper, s.lower, s.signal
    return up, lo, sig


def staleness(pred_t, lab_t, seen, learned) -> np.ndarray:
    """Seconds since the newest learned lab sample was drawn, as known at each ``pred_t``.

    A lab result is known from ``seen`` on (when it reached the model); nan before the
    first one.
    """
    pred_t = np.asarray(pred_t, dtype=float)
    lab_t = np.asarray(lab_t, dtype=float)[learned]
    seen = np.asarray(seen, dtype=float)[learned]
    seen = np.where(np.isfinite(seen), seen, lab_t)
    order = np.argsort(seen, kind="stable")
    seen, drawn = seen[order], np.maximum.accumulate(lab_t[order]) if lab_t.size else lab_t
    j = np.searchsorted(seen, pred_t, side="right") - 1
    out = np.full(pred_t.shape, np.nan)
    ok = j >= 0
    out[ok] = pred_t[ok] - drawn[j[ok]]
    return out


_REF_LABELS = (("published", "published"), ("noforget_mean", "no forgetting"),
               ("static_mean", "static"), ("bias_mean", "bias update"),
               ("persist", "persistence"))


def reference_scores(track: Track, *, without_gated: bool = False) -> dict:
    """RMSE at the lab results of the published prediction and of each reference the file
    holds: ``{label: (n, rmse)}`` over the same results (those where all of them exist).

    The published prediction for a lab sample is the one of the newest prediction time at or
    before the drawn time. In a backtest's file only the results after its training period
    count, as in its summary. ``without_gated``: leave out the results the model's gate
    rejected (a blunder ten times off dominates every model's RMSE alike).
    """
    start = float(track.meta.get("static_train_end", -math.inf))
    fits = [f for f in track.fits if math.isfinite(f.get("y", math.nan)) and f["t"] >= start
            and not (without_gated and f.get("reason") == "gated")]
    if not fits or track.t.size == 0:
        return {}
    order = np.argsort(track.t, kind="stable")
    ts = track.t[order]
    lab_t = np.array([f["t"] for f in fits], dtype=float)
    j = np.searchsorted(ts, lab_t, side="right") - 1
    cols = {"published": np.where(j >= 0, track.mean[order][np.maximum(j, 0)], np.nan)}
    for key, _ in _REF_LABELS[1:]:
        if any(key in f for f in fits):
            cols[key] = np.array([f.get(key, math.nan) for f in fits], dtype=float)
    y = np.array([f["y"] for f in fits], dtype=float)
    every = np.all([np.isfinite(v) for v in cols.values()], axis=0)
    n = int(every.sum())
    if n == 0:
        return {}
    label = dict(_REF_LABELS)
    return {label[k]: (n, float(np.sqrt(np.mean((y[every] - v[every]) ** 2))))
            for k, v in cols.items()}


def calibration(z, levels=None) -> dict:
    """PIT values and empirical coverage of central intervals from standardized residuals."""
    z = np.asarray(z, dtype=float)
    z = z[np.isfinite(z)]
    if levels is None:
        levels = np.array([0.1, 0.2, 0.3, 0.4, 0.5, 0.6, 0.7, 0.8, 0.9, 0.95, 0.99])
    q = special.ndtri(0.5 + np.asarray(levels) / 2)
    cover = np.array([np.mean(np.abs(z) <= qq) if z.size else np.nan for qq in q])
    return {"pit": special.ndtr(z), "levels": np.asarray(levels), "coverage": cover,
            "n": int(z.size)}


def _dates(t):
    return np.asarray(t, dtype=float).astype("datetime64[s]") if len(t) else np.array(
        [], dtype="datetime64[s]")


def _envelope(t, mean, lo, hi, std):
    """At most _MAX_POINTS points: per bucket the mean's mean, the band's outer edges and the
    largest std, so a decimated band never looks narrower than it was."""
    n = len(t)
    if n <= _MAX_POINTS:
        return t, mean, lo, hi, std
    edges = np.linspace(0, n, _MAX_POINTS + 1).astype(int)
    starts = edges[:-1]
    count = np.add.reduceat(np.isfinite(mean).astype(float), starts)
    with np.errstate(invalid="ignore", divide="ignore"):
        m = np.add.reduceat(np.where(np.isfinite(mean), mean, 0.0), starts) / count
    lo_r = np.fmin.reduceat(np.where(np.isfinite(lo), lo, np.nan), starts)
    hi_r = np.fmax.reduceat(np.where(np.isfinite(hi), hi, np.nan), starts)
    sd_r = np.fmax.reduceat(np.where(np.isfinite(std), std, np.nan), starts)
    return t[starts], m, lo_r, hi_r, sd_r


def _segments(t, trust):
    """Contiguous runs of caution / untrusted: (state, start, end)."""
    out = []
    cur, start = None, None
    for ti, s in zip(t, trust, strict=True):
        s = s if s in _STATE_COLOR else None
        if s != cur:
            if cur is not None:
                out.append((cur, start, ti))
            cur, start = s, ti
    if cur is not None and len(t):
        out.append((cur, start, t[-1]))
    return out


def _span_text(*times) -> str:
    t = np.concatenate([np.asarray(x, dtype=float) for x in times])
    t = t[np.isfinite(t)]
    if not t.size:
        return ""
    a, b = (np.array([t.min(), t.max()]).astype("datetime64[s]").astype(str))
    return f"{a[:16].replace('T', ' ')} .. {b[:16].replace('T', ' ')}"


def summary_text(track: Track) -> str:
    """The report in words: the gain over the references and the calibration verdict."""
    level = track.level
    lab = track.lab_arrays()
    gated = np.array([r == "gated" for r in lab["reason"]], dtype=bool)
    start = float(track.meta.get("static_train_end", -math.inf))
    keep = np.isfinite(lab["z"]) & ~gated & (lab["t"] >= start)
    lines = []
    refs = reference_scores(track)
    if refs:
        n = next(iter(refs.values()))[0]
        lines.append(f"RMSE at {n} lab results (as published at sample time): "
                     + ", ".join(f"{k} {r:#.4g}" for k, (_, r) in refs.items()))
        if "bias update" in refs and refs["bias update"][1] > 0:
            ratio = refs["published"][1] / refs["bias update"][1]
            lines.append(f"  published / bias update = {ratio:.3g} "
                         + ("(the model wins)" if ratio < 1 else "(the bias update wins)"))
        accepted = reference_scores(track, without_gated=True)
        if accepted and next(iter(accepted.values()))[0] < n:
            m = next(iter(accepted.values()))[0]
            lines.append(f"  without the {n - m} the gate rejected: "
                         + ", ".join(f"{k} {r:#.4g}" for k, (_, r) in accepted.items()))
    v = coverage_verdict(lab["z"][keep], level)
    pct = f"{100 * level:g}%"
    if v["n"]:
        lo, hi = v["band"]
        where = ("inside" if v["inside"] else
                 "BELOW" if v["coverage"] < lo else "ABOVE")
        lines.append(f"coverage of the {pct} interval: {100 * v['coverage']:.1f}% of {v['n']} "
                     f"lab results, {where} the band {100 * lo:.1f} .. {100 * hi:.1f}% of a "
                     "calibrated model")
        if not v["inside"]:
            lines.append("  the intervals are " + ("too narrow: the model is more sure than "
                                                  "the lab results allow" if where == "BELOW"
                                                  else "too wide: the noise is overestimated"))
        if v["biased"]:
            side = "above" if v["mean_z"] > 0 else "below"
            lines.append(f"  mean z {v['mean_z']:+.2f} (band +-{v['mean_band']:.2f}): the lab "
                         f"results sit {side} the predictions, a bias")
    else:
        lines.append("coverage: no scored lab result")
    return "\n".join(lines)


def _legend_above(ax, ncol: int) -> None:
    ax.legend(loc="lower left", bbox_to_anchor=(0.0, 1.0), ncol=ncol, fontsize=8.5,
              frameon=False, borderaxespad=0.2, handletextpad=0.4, columnspacing=1.2)


def report(track: Track, path, *, unit: str | None = None, title: str | None = None,
           note: str | None = None, cusum_k: float | None = None, cusum_h: float | None = None,
           stale_after: float | None = None, dpi: int = 110) -> list[str]:
    """Draw the two pages (module docstring); returns the paths written.

    The format follows the suffix of ``path`` (``.png``, ``.svg``, ``.pdf``...); the second
    page goes next to it as ``<stem>-calibration<suffix>``.
    """
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.dates as mdates
    import matplotlib.pyplot as plt

    path = Path(path)
    if not path.suffix:
        raise ValueError(f"{path}: give the picture a suffix such as .png or .svg")
    meta = track.meta
    unit = meta.get("unit", "") if unit is None else unit
    u = f" [{unit}]" if unit else ""
    target = meta.get("target") or "target"
    k = float(meta.get("cusum_k", 0.5) if cusum_k is None else cusum_k)
    h = float(meta.get("cusum_h", 5.0) if cusum_h is None else cusum_h)
    stale_after = meta.get("stale_after") if stale_after is None else stale_after
    level = track.level
    lab = track.lab_arrays()
    if track.t.size == 0 and lab["t"].size == 0:
        raise ValueError("nothing to draw: no predictions and no lab results")
    learned = lab["learned"]
    gated = np.array([r == "gated" for r in lab["reason"]], dtype=bool)
    title = title or f"{track.model}: predictions and lab results"
    if meta.get("source"):
        title += f"  ({meta['source']})"

    plt.rcParams.update({"font.size": 10, "axes.titlesize": 11, "axes.labelsize": 10})
    fig, axes = plt.subplots(3, 1, figsize=(14, 10), sharex=True,
                             gridspec_kw={"height_ratios": [3.2, 2.0, 1.6]})
    ax1, ax2, ax3 = axes
    tt, mm, lo, hi, sd = _envelope(track.t, track.mean, track.lo, track.hi, track.std)
    d = _dates(tt)
    pct = f"{100 * level:g}%"
    ax1.fill_between(d, lo, hi, color="#4c8bd6", alpha=0.25, linewidth=0,
                     label=f"{pct} prediction interval")
    ax1.plot(d, mm, color="#1f4e8c", linewidth=0.9, label="prediction (mean)")
    ld = _dates(lab["t"])
    ok = learned & np.isfinite(lab["y"])
    ax1.plot(ld[ok], lab["y"][ok], "o", color="black", markersize=3.2,
             label="lab result, learned")
    other = ~learned & ~gated & np.isfinite(lab["y"])
    if other.any():
        ax1.plot(ld[other], lab["y"][other], "o", mfc="none", color="gray", markersize=3.5,
                 label="lab result, not predicted yet")
    # blunders can be ten times the usual values: draw them at the edge, not off the scale
    finite = np.concatenate([lo[np.isfinite(lo)], hi[np.isfinite(hi)], lab["y"][ok]])
    if finite.size:
        lo_q, hi_q = np.percentile(finite, [0.5, 99.5])
        pad = 0.15 * (hi_q - lo_q or 1.0)
        ylim = (lo_q - pad, hi_q + pad)
        ax1.set_ylim(*ylim)
    else:
        ylim = None
    if gated.any():
        yg = lab["y"][gated]
        if ylim is not None:
            yg = np.clip(yg, ylim[0] + 0.02 * (ylim[1] - ylim[0]),
                         ylim[1] - 0.02 * (ylim[1] - ylim[0]))
        ax1.plot(ld[gated], yg, "x", color="#d64541", markersize=7, markeredgewidth=2,
                 label="lab result rejected by the gate (drawn at the edge if off scale)")
    refs = reference_scores(track)
    # the references at each lab sample, drawn as lines so the gain over them shows
    for key, style, color, label in (
            ("static_mean", "--", "#7f8c8d", "static model (fitted once)"),
            ("bias_mean", "-", "#e67e22", "static + lab bias update"),
            ("persist", "+", "#6c3483", "persistence (last lab known)")):
        v = np.array([f.get(key, math.nan) for f in track.fits], dtype=float)
        has_v = np.isfinite(v)
        if has_v.any():
            if style == "+":
                ax1.plot(ld, v, style, color=color, markersize=6, markeredgewidth=1.2,
                         label=f"reference: {label}")
            else:
                ax1.plot(ld[has_v], v[has_v], style, color=color, linewidth=1.0, alpha=0.9,
                         drawstyle="steps-post" if key == "bias_mean" else "default",
                         label=f"reference: {label}")
    if refs:
        n = next(iter(refs.values()))[0]
        text = ", ".join(f"{k} {r:#.4g}" for k, (_, r) in refs.items())
        ax1.text(0.995, 0.98, f"RMSE at {n} lab results, as published at sample time: {text}",
                 transform=ax1.transAxes, ha="right", va="top", fontsize=8.5, color="#333",
                 bbox={"facecolor": "white", "alpha": 0.85, "edgecolor": "#bbb"})
    train_end = meta.get("static_train_end")
    t_first = float(np.nanmin(np.concatenate([track.t, lab["t"]])))
    if train_end is not None and math.isfinite(float(train_end)) and float(train_end) > t_first:
        for ax in axes:
            ax.axvspan(*_dates([t_first, float(train_end)]), facecolor="none",
                       edgecolor="#95a5a6", hatch="//", linewidth=0, alpha=0.35)
        ax1.fill_between([], [], [], facecolor="none", edgecolor="#95a5a6", hatch="//",
                         label="training period (references fitted; not scored)")
    segs = _segments(track.t, track.trust)
    for ax in axes:
        for state, a, b in segs:
            ax.axvspan(*_dates([a, b]), color=_STATE_COLOR[state], alpha=0.18, linewidth=0)
    for state, color in _STATE_COLOR.items():
        if any(s == state for s, _, _ in segs):
            ax1.fill_between([], [], [], color=color, alpha=0.3, label=f"trust: {state}")
    ax1.set_ylabel(f"{target}{u}")
    fig.suptitle(title, x=0.01, ha="left", fontweight="bold", fontsize=12)
    _legend_above(ax1, ncol=4)
    ax1.grid(alpha=0.3)

    # residuals and the mean-shift CUSUM
    z = lab["z"]
    up, dn, sig = cusum_path(z, learned, k, h)
    zc = np.clip(z, -8, 8)
    ax2.axhspan(-1.96, 1.96, color="#4c8bd6", alpha=0.08, linewidth=0,
                label="|z| < 1.96: 95% of a calibrated model's results")
    ax2.plot(ld[learned], zc[learned], "o", color="#1f4e8c", markersize=2.8,
             label="z of a learned lab result")
    if gated.any():
        ax2.plot(ld[gated], zc[gated], "x", color="#d64541", markersize=6, markeredgewidth=1.8,
                 label="z of a rejected one (clipped to ±8)")
    has = np.isfinite(up)
    ax2.step(ld[has], up[has], where="post", color="#8e44ad", linewidth=1.2,
             label=f"CUSUM S+ (k={k:g})")
    ax2.step(ld[has], -dn[has], where="post", color="#16a085", linewidth=1.2,
             label="CUSUM -S-")
    ax2.axhline(h, color="#8e44ad", linestyle="--", linewidth=0.8)
    ax2.axhline(-h, color="#16a085", linestyle="--", linewidth=0.8)
    ax2.text(0.002, h, f" upper limit h = {h:g}", transform=ax2.get_yaxis_transform(),
             va="bottom", fontsize=8, color="#8e44ad")
    ax2.text(0.002, -h, f" lower limit -h = {-h:g}", transform=ax2.get_yaxis_transform(),
             va="top", fontsize=8, color="#16a085")
    if (sig != 0).any():
        s = sig != 0
        ax2.plot(ld[s], np.where(sig[s] > 0, up[s], -dn[s]), "v", color="#d64541",
                 markersize=8, label="mean-shift signal")
    alerts = [a for a in track.alerts if a.get("kind") == "state" and a.get("t") is not None]
    for a in alerts:
        if a.get("new") in _STATE_COLOR:
            ax2.axvline(_dates([a["t"]])[0], color=_STATE_COLOR[a["new"]], linewidth=0.8,
                        alpha=0.7)
    ax2.set_ylim(-max(8, h + 2), max(8, h + 2))
    ax2.set_ylabel("z  [standard deviations]")
    _legend_above(ax2, ncol=3)
    ax2.text(1.0, 1.02, "one step ahead, before learning; vertical lines: trust alerts",
             transform=ax2.transAxes, ha="right", va="bottom", fontsize=8.5, color="#555")
    ax2.grid(alpha=0.3)

    # uncertainty and staleness
    ax3.plot(d, sd, color="#c0392b", linewidth=1.0, label="predictive std")
    ax3.set_ylabel(f"predictive std{u}", color="#c0392b")
    ax3.tick_params(axis="y", colors="#c0392b")
    if np.isfinite(sd).any():
        top = np.percentile(sd[np.isfinite(sd)], 99.5)  # an infinite std (few dof) is off scale
        ax3.set_ylim(0, 1.15 * top if top > 0 else 1)
    ax3.grid(alpha=0.3)
    ax4 = ax3.twinx()
    if track.t.size:
        stale = staleness(track.t, lab["t"], [f.get("seen", math.nan) for f in track.fits],
                          learned) / 3600.0
        ts, _, _, _, st = _envelope(track.t, stale, stale, stale, stale)
        ax4.plot(_dates(ts), st, color="#7f8c8d", linewidth=1.0,
                 label="lab staleness (newest learned sample)")
        if stale_after:
            # in hours since the lab sample: the right axis, with the staleness it bounds
            ax4.axhline(stale_after / 3600.0, color="#555", linestyle=":", linewidth=1.2,
                        label=f"stale after {stale_after / 3600:.3g} h (right axis)")
            ax4.text(0.995, stale_after / 3600.0, f"stale after {stale_after / 3600:.3g} h \u2192",
                     transform=ax4.get_yaxis_transform(), ha="right", va="bottom", fontsize=8,
                     color="#555")
        if np.isfinite(st).any():
            ax4.set_ylim(0, max(np.nanmax(st), (stale_after or 0) / 3600.0) * 1.15)
    ax4.set_ylabel("hours since lab sample (right axis)", color="#555")
    ax4.tick_params(axis="y", colors="#555")
    lines = ax3.get_lines()[:1] + ax4.get_lines()[:2]
    ax3.legend(lines, [ln.get_label() for ln in lines], loc="lower left",
               bbox_to_anchor=(0.0, 1.0), ncol=3, fontsize=8.5, frameon=False)
    # dates with the year on every major tick: a report is read months later
    locator = mdates.AutoDateLocator(minticks=5, maxticks=12)
    ax3.xaxis.set_major_locator(locator)
    ax3.xaxis.set_major_formatter(mdates.DateFormatter("%Y-%m-%d"))
    ax3.set_xlabel(f"time (UTC), {_span_text(track.t, lab['t'])}")
    if note:
        fig.text(0.995, 0.003, note, ha="right", va="bottom", fontsize=8, color="#555")
    fig.tight_layout()
    written = [str(path)]
    fig.savefig(path, dpi=dpi)
    plt.close(fig)

    # page 2: calibration
    keep = np.isfinite(z) & ~gated
    cal = calibration(z[keep])
    fig, (a1, a2) = plt.subplots(1, 2, figsize=(13, 5.2))
    n = cal["n"]
    bins = 10 if n < 200 else 20
    if n:
        a1.hist(cal["pit"], bins=bins, range=(0, 1), density=True, color="#4c8bd6",
                edgecolor="white", label="lab results")
        p = 1.0 / bins
        half = 1.96 * math.sqrt(n * p * (1 - p)) / (n * p)
        a1.axhspan(1 - half, 1 + half, color="gray", alpha=0.25, zorder=3, linewidth=0,
                   label="95% band for a calibrated model")
    a1.axhline(1.0, color="black", linewidth=1.0, zorder=4, label="uniform (calibrated)")
    a1.set_xlim(0, 1)
    a1.set_xlabel("PIT = predictive CDF at the lab value")
    a1.set_ylabel("density")
    a1.set_title(f"PIT histogram, {n} lab results (rejected ones left out)", loc="left")
    a1.legend(loc="upper left", fontsize=8.5, framealpha=0.95)
    a1.grid(alpha=0.3)
    lv = cal["levels"]
    a2.plot([0, 1], [0, 1], color="black", linewidth=1.0, label="nominal")
    if n:
        band = 1.96 * np.sqrt(lv * (1 - lv) / n)
        a2.fill_between(lv, lv - band, lv + band, color="gray", alpha=0.15,
                        label="95% band for a calibrated model")
        a2.plot(lv, cal["coverage"], "o-", color="#1f4e8c", label="observed")
        zq = special.ndtri(0.5 + level / 2)
        here = float(np.mean(np.abs(z[keep]) <= zq))
        a2.plot([level], [here], "s", color="#d64541", markersize=8,
                label=f"published {100 * level:g}% interval: {100 * here:.1f}%")
    a2.set_xlim(0, 1)
    a2.set_ylim(0, 1)
    a2.set_xlabel("nominal probability of the central interval")
    a2.set_ylabel("share of lab results inside")
    a2.set_title("interval coverage", loc="left")
    a2.legend(loc="upper left", fontsize=8.5)
    a2.grid(alpha=0.3)
    fig.suptitle(f"{track.model}: calibration of the one-step-ahead predictions",
                 x=0.01, ha="left", fontweight="bold")
    if note:
        fig.text(0.995, 0.003, note, ha="right", va="bottom", fontsize=8, color="#555")
    fig.tight_layout()
    second = path.with_name(f"{path.stem}-calibration{path.suffix}")
    fig.savefig(second, dpi=dpi)
    plt.close(fig)
    written.append(str(second))
    return written
