"""Writes the four invented spray-dryer exports in this folder (run from the repository root).

INVENTED DATA: a fictitious spray dryer, simulated with a seeded random generator; no plant
data. The four files hold the same run in the layouts an engineer's historian client might
write: the documented layout, a European spreadsheet export, a US export and epoch
milliseconds. Rows every 20 minutes from START; a lab sample (residual moisture, %) is drawn
every 2 hours. Some cells are spoilt on purpose (text, blanks, a repeated time stamp).

    python tests/data/make_invented_exports.py
"""

from __future__ import annotations

import calendar
import os
from datetime import UTC, datetime
from zoneinfo import ZoneInfo

import numpy as np

HERE = os.path.dirname(os.path.abspath(__file__))
STEP = 1200  # seconds between rows
N = 450
LAB_EVERY = 6  # rows: a lab sample every 2 hours
TAGS = ("TI-101", "TI-102", "FI-201", "SI-301")
TARGET = "AX-410"
UNITS = ("degC", "degC", "kg/h", "rpm", "%")


def simulate(start: float):
    """Inputs (N, 4), lab values by row index, and the times; one seeded run."""
    rng = np.random.default_rng(20261022)
    t = start + STEP * np.arange(N, dtype=float)
    k = np.arange(N)
    inlet = 185.0 + 6.0 * np.sin(2 * np.pi * k / 72.0) + rng.normal(0, 0.8, N)
    feed = 120.0 + 15.0 * np.sin(2 * np.pi * k / 110.0 + 1.0) + rng.normal(0, 1.5, N)
    outlet = 88.0 + 0.35 * (inlet - 185.0) - 0.12 * (feed - 120.0) + rng.normal(0, 0.4, N)
    speed = 14500.0 + 300.0 * np.sin(2 * np.pi * k / 200.0) + rng.normal(0, 40.0, N)
    X = np.column_stack([inlet, outlet, feed, speed])
    moisture = (3.2 - 0.09 * (outlet - 88.0) + 0.012 * (feed - 120.0)
                + rng.normal(0, 0.06, N))
    lab = {int(i): float(moisture[i]) for i in range(3, N, LAB_EVERY)}
    return t, X, lab


# row index -> column index -> text written instead of the reading
SPOILT = {
    10: {0: "{bad}"}, 11: {0: "{bad}"}, 27: {2: "{bad}"}, 45: {1: ""},
    # a lab row with a spoilt input: the lab value must survive
    51: {1: "{bad}"}, 99: {3: "{other}"}, 147: {0: "{bad}", 1: "{bad}"},
    200: {2: ""}, 201: {2: "{other2}"}, 333: {1: "{bad}"},
}
REPEATED = (123, 279)  # written twice: the second copy holds the lab value, the first a blank


def _rows(t, X, lab, stamp, num, bad, other, other2):
    """(stamp, cells) per written row, with the spoilt cells and the repeated rows."""
    out = []
    for i in range(N):
        cells = [num(v) for v in X[i]]
        for j, text in SPOILT.get(i, {}).items():
            cells[j] = text.format(bad=bad, other=other, other2=other2)
        y = lab.get(i)
        ycell = "" if y is None else num(round(y, 3))
        if i in REPEATED:
            out.append((stamp(t[i]), cells[:2] + ["", cells[3]], ""))
            out.append((stamp(t[i]), ["", cells[1], cells[2], ""], ycell))
        else:
            out.append((stamp(t[i]), cells, ycell))
    return out


def main() -> None:
    # documented layout, UTC
    start = float(calendar.timegm((2026, 10, 22, 0, 0, 0)))
    t, X, lab = simulate(start)
    with open(os.path.join(HERE, "spray-dryer-invented-documented.csv"), "w",
              encoding="utf-8", newline="") as f:
        f.write("# INVENTED spray dryer export (simulated, no plant data), documented layout\n")
        f.write("time," + ",".join(TAGS) + f",{TARGET}\n")
        for stamp, cells, y in _rows(t, X, lab, lambda s: datetime.fromtimestamp(s, UTC)
                                     .isoformat(), lambda v: f"{v:.3f}", "", "", ""):
            f.write(",".join([stamp, *cells, y]) + "\n")

    # European spreadsheet: ';', decimal comma, quoted headers with descriptions, units row,
    # local times in Berlin through the autumn change (25 October 2026), 'Bad' cells
    berlin = ZoneInfo("Europe/Berlin")
    desc = ("Einlasslufttemperatur", "Ablufttemperatur", "Zulauf Menge",
            "Zerstaeuber Drehzahl", "Restfeuchte Labor")
    with open(os.path.join(HERE, "spray-dryer-invented-european.csv"), "w",
              encoding="utf-8", newline="") as f:
        f.write('"Zeitstempel";' + ";".join(f'"{tag} {d}"' for tag, d in
                                            zip((*TAGS, TARGET), desc, strict=True)) + "\n")
        f.write('"Einheit";' + ";".join(f'"{u}"' for u in UNITS) + "\n")

        def num(v):
            return f"{v:.3f}".replace(".", ",")

        for stamp, cells, y in _rows(t, X, lab, lambda s: datetime.fromtimestamp(s, berlin)
                                     .strftime("%d.%m.%Y %H:%M:%S"), num, "Bad", "Bad",
                                     "I/O Timeout"):
            f.write(";".join([stamp, *cells, y]) + "\n")

    # US: MM/DD/YYYY hh:mm:ss AM/PM local times in Chicago (through the spring change,
    # 8 March 2026), tags with spaces, NaN and text cells
    start_us = float(calendar.timegm((2026, 3, 5, 6, 0, 0)))
    t_us, X_us, lab_us = simulate(start_us)
    chicago = ZoneInfo("America/Chicago")
    with open(os.path.join(HERE, "spray-dryer-invented-us.csv"), "w", encoding="utf-8",
              newline="") as f:
        f.write("Timestamp,Inlet Temp,Outlet Temp,Feed Rate,Atomizer Speed,Residual Moisture\n")
        for stamp, cells, y in _rows(t_us, X_us, lab_us, lambda s: datetime.fromtimestamp(
                s, chicago).strftime("%m/%d/%Y %I:%M:%S %p"), lambda v: f"{v:.3f}", "NaN",
                "Shutdown", "#N/A"):
            f.write(",".join([stamp, *cells, y]) + "\n")

    # epoch milliseconds
    with open(os.path.join(HERE, "spray-dryer-invented-epoch-ms.csv"), "w", encoding="utf-8",
              newline="") as f:
        f.write("# INVENTED spray dryer export (simulated, no plant data), epoch milliseconds\n")
        f.write("time," + ",".join(TAGS) + f",{TARGET}\n")
        for stamp, cells, y in _rows(t, X, lab, lambda s: str(int(s) * 1000),
                                     lambda v: f"{v:.3f}", "nan", "", ""):
            f.write(",".join([stamp, *cells, y]) + "\n")


if __name__ == "__main__":
    main()
