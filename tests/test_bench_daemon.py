"""tools/bench_daemon.py --quick --scaling runs end to end and prints its tables.

Only that it completes: the figures of a quick run mean nothing and timing is never asserted
(speed is measured by the tool, as ratios against a baseline of the same run). It starts a
few dozen daemons, so it runs in CI only (CI=true), like the short soak.
"""

from __future__ import annotations

import os
import pathlib
import subprocess
import sys

import pytest

ROOT = pathlib.Path(__file__).resolve().parents[1]


@pytest.mark.skipif(os.environ.get("CI") != "true", reason="starts a few dozen daemons: CI only")
def test_quick_benchmark_completes_and_prints_both_tables():
    env = dict(os.environ, OPENBLAS_NUM_THREADS="1")
    proc = subprocess.run([sys.executable, str(ROOT / "tools" / "bench_daemon.py"), "--quick",
                           "--scaling"], capture_output=True, text=True, env=env, timeout=600,
                          cwd=ROOT)
    assert proc.returncode == 0, proc.stdout[-4000:] + proc.stderr[-4000:]
    out = proc.stdout
    head = "| case | result (median) | baseline (median) | ratio | ratio spread (runs) | bar |"
    assert out.count(head) == 2, out[-4000:]
    for case in ("1 model x 8 inputs: throughput", "models interleaved: throughput",
                 "CPU per message at 5 000 msg/s paced", "latency at 5 000 msg/s",
                 "blocks of 256 (packed)", "memory per model, full buffers",
                 "checkpoint command of", "restart after", "50 models: start to ready",
                 "terms", "fsync always vs group"):
        rows = [line for line in out.splitlines() if line.startswith("| ") and case in line]
        assert rows, f"no row for {case!r}:\n{out[-4000:]}"
    # every row has the table's six cells
    for line in out.splitlines():
        if line.startswith("| ") and "---" not in line:
            assert line.count(" | ") == 5, line
