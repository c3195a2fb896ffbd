"""Feature buffer speed: the float64 ring buffer against the list-based buffer it replaced.

Both are timed in the same run, interleaved (old, new, old, new, ...), on the same stream:
4 inputs with dead times, one row a second, a buffer of 12 h (43 200 rows) filled and then
wrapped. Cases: single rows pushed (the live feed), blocks of 256 rows, one-row lookups (a lab
result, or a single sample's delayed inputs) and lookups of 64 instants (a block's delayed
inputs). Prints each case's rate for both and the ratio new / old (above 1: the ring buffer is
faster), median and range over the repeats.

    OPENBLAS_NUM_THREADS=1 PYTHONPATH=. .venv/bin/python tools/bench_buffer.py [--repeats 5]
"""

from __future__ import annotations

import argparse
import statistics
import sys
import time
import tracemalloc
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "tests"))
from aligner_reference import ListAligner  # noqa: E402  (the test's reference buffer)

from daemon.runtime.alignment import Aligner  # noqa: E402

TAGS = ("a", "b", "c", "d")
DEAD = (0.0, 60.0, 300.0, 1200.0)
ROWS = 43_200
T0 = 1.767e9


def make(cls):
    return cls(TAGS, DEAD, 12 * 3600.0, tolerance_s=120.0, max_rows=ROWS)


def filled(cls, X):
    al = make(cls)
    al.push_block_trusted((T0 + np.arange(ROWS)).tolist(), X)
    return al


def case_push(cls, X, rows):
    al = filled(cls, X)
    ts = (T0 + ROWS + np.arange(rows)).tolist()
    xs = [tuple(r) for r in X[:rows].tolist()]  # the runner pushes a tuple of floats
    start = time.perf_counter()
    for t, x in zip(ts, xs, strict=True):
        al.push_trusted(t, x)
    return rows / (time.perf_counter() - start)


def case_block(cls, X, rows):
    al = filled(cls, X)
    k = 256
    blocks = [((T0 + ROWS + j + np.arange(k)).tolist(), X[j:j + k].copy())
              for j in range(0, rows, k)]
    start = time.perf_counter()
    for ts, B in blocks:
        al.push_block_trusted(ts, B)
    return len(blocks) * k / (time.perf_counter() - start)


def case_lookup(cls, X, rows):
    al = filled(cls, X)
    q = (T0 + np.random.default_rng(1).uniform(3600.0, ROWS, size=rows)).tolist()
    start = time.perf_counter()
    for s in q:
        al.lookup(s)
    return rows / (time.perf_counter() - start)


def case_lookup_many(cls, X, rows):
    al = filled(cls, X)
    rng = np.random.default_rng(2)
    qs = [np.sort(T0 + rng.uniform(3600.0, ROWS, size=64)) for _ in range(rows // 64)]
    start = time.perf_counter()
    for q in qs:
        al.lookup_many(q)
    return len(qs) * 64 / (time.perf_counter() - start)


CASES = {"push one row": case_push, "push blocks of 256": case_block,
         "lookup one instant": case_lookup, "lookup 64 instants": case_lookup_many}


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--repeats", type=int, default=5)
    ap.add_argument("--rows", type=int, default=20_000, help="operations per timing")
    args = ap.parse_args(argv)
    X = np.random.default_rng(0).normal(size=(ROWS, len(TAGS)))
    print(f"{'case':<20} {'old rows/s':>12} {'new rows/s':>12}   new/old median (range)")
    for name, fn in CASES.items():
        old, new = [], []
        for _ in range(args.repeats):
            old.append(fn(ListAligner, X, args.rows))
            new.append(fn(Aligner, X, args.rows))
        ratios = [n / o for n, o in zip(new, old, strict=True)]
        print(f"{name:<20} {statistics.median(old):>12,.0f} {statistics.median(new):>12,.0f}"
              f"   {statistics.median(ratios):.2f} ({min(ratios):.2f}-{max(ratios):.2f})")
    print(f"\nmemory, {len(TAGS)} inputs x {ROWS} rows (12 h at 1 s), measured by tracemalloc; "
          f"bar {1.1 * 8 * len(TAGS) * ROWS:,.0f} B ({1.1 * 8 * len(TAGS):.1f} B a row)")
    for name, cls, jitter in (("list buffer", ListAligner, False),
                              ("ring, regular clock", Aligner, False),
                              ("ring, 10 ms jitter", Aligner, True)):
        b = memory(cls, X, jitter)
        print(f"  {name:<20} {b:>12,} B  {b / ROWS:6.1f} B a row  "
              f"{b / (8 * len(TAGS) * ROWS):.2f} x 8 B x inputs x rows")
    return 0


def memory(cls, X, jitter: bool) -> int:
    t = T0 + np.arange(ROWS, dtype=float)
    if jitter:
        t += np.random.default_rng(4).uniform(0.0, 0.01, ROWS)
    ts = t.tolist()
    tracemalloc.start()
    try:
        before = tracemalloc.get_traced_memory()[0]
        al = make(cls)
        for k, tk in enumerate(ts):
            # as ModelRunner.add_features does, with floats of its own (decoded ones)
            al.push_trusted(tk, tuple(X[k].tolist()))
        return tracemalloc.get_traced_memory()[0] - before
    finally:
        tracemalloc.stop()


if __name__ == "__main__":
    raise SystemExit(main())
