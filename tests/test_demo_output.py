"""Issue 14 item 14: the demo's lab lines, its last words, and a clean install.

The lab line is checked on hand-made ``fit/`` bodies; the install check runs only where
``POSTERIORD_CHECK_INSTALL`` names a fresh virtual environment's python (it needs the
network for the build requirements): ``pip install -e .`` must print no setuptools warning.
"""

from __future__ import annotations

import math
import os
import subprocess
import tomllib
from pathlib import Path

import pytest

from daemon.workbench import demo, plant

ROOT = Path(__file__).resolve().parents[1]


def _tally():
    run = plant.simulate(plant.Scenario.stationary(days=1.0, seed=0))
    return demo.Tally(run)


def _fit(**kw):
    body = {"t": 1767571200.0, "y": 150.0, "pred_mean": 148.0, "pred_std": 9.0, "z": 0.22,
            "accepted": True, "reason": "ok", "n": 5}
    body.update(kw)
    return body


def test_lab_line_shows_drawn_time_and_arrival():
    line = _tally().line(_fit(), arrived=1767571200.0 + 2.5 * 3600.0)
    assert line.startswith("drawn 2026-01-05 00:00 in  +2.5h")
    assert "z +0.22" in line
    # a note printed before the lines says they come in arrival order
    assert "not in order" in demo.LAB_LINES_NOTE and "drawn" in demo.LAB_LINES_NOTE


def test_infinite_std_shows_no_z():
    line = _tally().line(_fit(pred_std=math.inf, z=0.0))
    assert "± inf" in line and "z   -" in line and "+0.00" not in line
    line = _tally().line(_fit(pred_std=None, pred_mean=None, z=None))
    assert "no prediction yet" in line and "z   -" in line


def test_what_next_names_the_report_and_the_commands():
    text = demo.what_next("/tmp/o", "/tmp/o/r.png", "/tmp/o/h.csv", "/tmp/o/m.toml")
    assert "What next" in text and "/tmp/o/r.png" in text
    for cmd in ("posteriord tune", "posteriord backtest", "posteriord report",
                "posteriord run"):
        assert cmd in text


def test_pyproject_uses_an_spdx_license_and_no_experimental_tables():
    meta = tomllib.loads((ROOT / "pyproject.toml").read_text())
    assert meta["project"]["license"] == "Apache-2.0"  # an SPDX expression (PEP 639)
    assert "ext-modules" not in meta["tool"]["setuptools"]
    req = meta["build-system"]["requires"]
    assert any(r.replace(" ", "").startswith("setuptools>=77") for r in req), req
    assert "Extension(\"recursive._kernel\"" in (ROOT / "setup.py").read_text()


@pytest.mark.skipif(not os.environ.get("POSTERIORD_CHECK_INSTALL"),
                    reason="set POSTERIORD_CHECK_INSTALL to a fresh venv's python")
def test_editable_install_prints_no_warning():
    py = os.environ["POSTERIORD_CHECK_INSTALL"]
    out = subprocess.run([py, "-m", "pip", "install", "-e", str(ROOT)], capture_output=True,
                         text=True, check=True)
    text = out.stdout + out.stderr
    for word in ("SetuptoolsDeprecationWarning", "_BetaConfiguration", "experimental",
                 "deprecated"):
        assert word not in text, text
