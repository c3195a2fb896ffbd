"""Reading what engineers export: layouts, text cells, repeated times, epoch units, and the
account of every lab result from the file to the backtest's scores (daemon/workbench/historian.py,
backtest.load_history and feed_messages, the tune/backtest commands).

The four exports in tests/data are INVENTED (a fictitious spray dryer, written by
tests/data/make_invented_exports.py). Reference values here are computed without the reader:
the csv module, float(), calendar.timegm and the daylight-saving rules written out by hand.
"""

from __future__ import annotations

import calendar
import csv
import math
import os
import re

import numpy as np
import pytest

from daemon.cli import main
from daemon.config import load
from daemon.exitcodes import EXIT_OK, EXIT_USAGE
from daemon.workbench import backtest
from daemon.workbench.historian import epoch_unit, read_csv, reading_text, split_header

DATA = os.path.join(os.path.dirname(__file__), "data")
STEP = 1200.0
N = 450
SPOILT_ROWS = {10, 11, 27, 45, 51, 99, 147, 200, 201, 333}
REPEATED = (123, 279)
# the generator's schedule: rows every 20 minutes from these instants (its docstring)
START_EU = float(calendar.timegm((2026, 10, 22, 0, 0, 0)))
START_US = float(calendar.timegm((2026, 3, 5, 6, 0, 0)))

# EU summer time ends at 01:00 UTC on the last Sunday of October, 25 October 2026 (Directive
# 2000/84/EC; from memory): Berlin is UTC+2 before, UTC+1 after.
EU_CHANGE = float(calendar.timegm((2026, 10, 25, 1, 0, 0)))
# US daylight time starts at 02:00 local standard time on the second Sunday of March, 8 March
# 2026 (Energy Policy Act of 2005; from memory): Chicago is UTC-6 before, UTC-5 after.
US_CHANGE = float(calendar.timegm((2026, 3, 8, 8, 0, 0)))

VARIANTS = {
    "documented": {"args": [], "target": "AX-410", "start": START_EU},
    "european": {"args": ["--tz", "Europe/Berlin"], "target": "AX-410", "start": START_EU},
    "us": {"args": ["--tz", "America/Chicago"], "target": "Residual Moisture",
           "start": START_US},
    "epoch-ms": {"args": [], "target": "AX-410", "start": START_EU},
}


def path_of(name):
    return os.path.join(DATA, f"spray-dryer-invented-{name}.csv")


def write(path, text):
    path.write_text(text, encoding="utf-8")
    return path


def _num(cell, decimal):
    """A reading by hand: float() after swapping the decimal mark; None if not a number."""
    c = cell.strip()
    if decimal == ",":
        c = c.replace(",", ".")
    try:
        v = float(c)
    except ValueError:
        return None
    return v if math.isfinite(v) else None


def by_hand(name):
    """(times, X, lab {row: value}) of an invented export, with the csv module only.

    Rows with the time of the row before are merged by hand: blank cells filled from the
    later row, the first row's reading kept otherwise, a lab value kept if the first had none.
    """
    sep, decimal, skip = {"european": (";", ",", 2)}.get(name, (",", ".", 1))
    with open(path_of(name), encoding="utf-8", newline="") as f:
        lines = [ln for ln in csv.reader(f, delimiter=sep) if ln and not ln[0].startswith("#")]
    stamps, xs, ys = [], [], []
    for cells in lines[skip:]:
        x = [_num(c, decimal) for c in cells[1:5]]
        y = _num(cells[5], decimal) if cells[5].strip() else None
        if stamps and cells[0] == stamps[-1]:
            prev = xs[-1]
            xs[-1] = [p if p is not None else v for p, v in zip(prev, x, strict=True)]
            if ys[-1] is None:
                ys[-1] = y
            continue
        stamps.append(cells[0])
        xs.append(x)
        ys.append(y)
    X = np.array([[np.nan if v is None else v for v in x] for x in xs])
    lab = {k: y for k, y in enumerate(ys) if y is not None}
    return stamps, X, lab


def local_stamp(name, t):
    """The text the export should hold for UTC instant t, by the rules written out above."""
    if name == "european":
        off = 7200 if t < EU_CHANGE else 3600
        return _fmt(t + off, "%d.%m.%Y %H:%M:%S")
    off = -6 * 3600 if t < US_CHANGE else -5 * 3600
    return _fmt(t + off, "%m/%d/%Y %I:%M:%S %p")


def _fmt(t, fmt):
    y, mo, d, h, mi, s = _civil(int(t))
    return (fmt.replace("%d", f"{d:02d}").replace("%m", f"{mo:02d}").replace("%Y", f"{y}")
            .replace("%H", f"{h:02d}").replace("%M", f"{mi:02d}").replace("%S", f"{s:02d}")
            .replace("%I", f"{(h % 12) or 12:02d}").replace("%p", "AM" if h < 12 else "PM"))


def _civil(t):
    """UTC calendar fields of epoch seconds by counting days (no datetime)."""
    days, rest = divmod(t, 86400)
    y = 1970
    while True:
        n = 366 if (y % 4 == 0 and (y % 100 or y % 400 == 0)) else 365
        if days < n:
            break
        days -= n
        y += 1
    month_days = [31, 29 if n == 366 else 28, 31, 30, 31, 30, 31, 31, 30, 31, 30, 31]
    for month, md in enumerate(month_days, 1):
        if days < md:
            return y, month, days + 1, rest // 3600, rest % 3600 // 60, rest % 60
        days -= md
    raise AssertionError("past December")


# ------------------------------------------------------------------- the four exports, read
@pytest.mark.parametrize("name", list(VARIANTS))
def test_invented_export_reads_as_by_hand(name):
    v = VARIANTS[name]
    tz = v["args"][1] if v["args"] else None
    h = backtest.load_history(path_of(name), target=v["target"], tz=tz)
    stamps, X, lab = by_hand(name)
    # times: the generator's regular schedule, checked against the file's own text
    expected_t = v["start"] + STEP * np.arange(N)
    np.testing.assert_array_equal(h.t, expected_t)
    if name in ("european", "us"):
        assert stamps == [local_stamp(name, t) for t in expected_t]
    elif name == "epoch-ms":
        assert [int(s) / 1000.0 for s in stamps] == expected_t.tolist()
    else:
        assert [calendar.timegm(tuple(map(int, re.split(r"[-T:+]", s)[:6])))
                for s in stamps] == expected_t.tolist()
    np.testing.assert_array_equal(h.X, X)  # nan where the file has no number
    assert h.lab_t.tolist() == [expected_t[k] for k in sorted(lab)]
    assert h.lab_y.tolist() == [lab[k] for k in sorted(lab)]
    s = h.summary
    assert s["lab_cells"] == s["lab_read"] == len(lab) == 75
    assert s["bad"] == 0 and s["merged"] == 2
    # a spoilt input on a lab row cost a reading, not the lab value
    assert all(k in lab for k in (51, 147, 333))
    assert np.isnan(h.X[51]).sum() == 1 and np.isnan(h.X[147]).sum() == 2


def test_european_layout_detected():
    h = backtest.load_history(path_of("european"), target="AX-410", tz="Europe/Berlin")
    s = h.summary
    assert (s["delimiter"], s["decimal"], s["time_column"]) == (";", ",", "Zeitstempel")
    assert s["time_format"] == "%d.%m.%Y %H:%M:%S" and s["time_format_detected"]
    assert h.tags == ("TI-101", "TI-102", "FI-201", "SI-301") and h.target == "AX-410"
    assert s["units"] == {"TI-101": "degC", "TI-102": "degC", "FI-201": "kg/h",
                          "SI-301": "rpm", "AX-410": "%"}
    assert s["units_line"] == 2
    assert s["descriptions"]["FI-201"] == "Zulauf Menge"
    assert s["missing_texts"]["FI-201"]["I/O Timeout"] == 1
    text = "\n".join(reading_text(s))
    assert "'FI-201 Zulauf Menge' -> FI-201" in text and "AX-410 %" in text
    assert "separator ';', decimal ','" in text and "local times in Europe/Berlin" in text
    assert "lines 127, 284" in text  # the repeated times, by their line in the file


def test_us_layout_detected():
    h = backtest.load_history(path_of("us"), target="Residual Moisture", tz="America/Chicago")
    assert h.tags == ("Inlet_Temp", "Outlet_Temp", "Feed_Rate", "Atomizer_Speed")
    assert h.target == "Residual_Moisture"
    assert h.summary["time_format"] == "%m/%d/%Y %I:%M:%S %p"
    assert h.summary["mapping"]["Feed Rate"] == "Feed_Rate"
    texts = h.summary["missing_texts"]
    assert texts["Atomizer_Speed"] == {"Shutdown": 1, "": 2}
    assert texts["Feed_Rate"]["#N/A"] == 1 and texts["Inlet_Temp"]["NaN"] == 3
    # the tag or the header selects a column
    h2 = backtest.load_history(path_of("us"), ["Feed Rate", "Inlet_Temp"],
                               target="Residual_Moisture", tz="America/Chicago")
    assert h2.tags == ("Feed_Rate", "Inlet_Temp")
    np.testing.assert_array_equal(h2.X[:, 0], h.X[:, 2])


def test_epoch_milliseconds_read_from_the_magnitude():
    h = backtest.load_history(path_of("epoch-ms"), target="AX-410")
    assert h.summary["epoch_unit"] == "epoch_ms" and h.summary["time_format_detected"]
    assert "epoch milliseconds (detected from the magnitude)" in reading_text(h.summary)[0]
    # read as seconds they would fall in the year 58 7xx: refused with the unit to use
    with pytest.raises(ValueError, match="epoch_ms") as err:
        backtest.load_history(path_of("epoch-ms"), target="AX-410", time_format="epoch")
    year = 1970 + 1792627200000 / (365.2425 * 86400)  # mean Gregorian year
    assert f"year {int(year)}" in str(err.value)


# ------------------------------------------------------------- tune -> backtest, accounted
def _figures(err):
    """The lab account printed by backtest, as numbers."""
    m = re.search(r"lab results: (\d+) in the file, (\d+) read .*?; (\d+) matched to inputs, "
                  r"(\d+) unmatched", err)
    train, scored, gated = map(int, re.search(
        r"matched: (\d+) in the static model's training period .*?, (\d+) scored after it, "
        r"(\d+) of them gated", err).groups())
    other = re.search(r"(\d+) not scored", err)
    return (*map(int, m.groups()), train, gated, scored, int(other.group(1)) if other else 0)


def brute_matched(h, model):
    """Lab results with a row of finite model inputs at or before the drawn time within the
    tolerance (dead times are zero here), by a full scan."""
    X = h.columns([i.tag for i in model.inputs])
    keep = np.isfinite(X).all(axis=1)
    t = h.t[keep]
    n = 0
    for s in h.lab_t:
        before = t[t <= s]
        n += bool(before.size and s - before[-1] <= model.tolerance)
    return n


@pytest.mark.parametrize("name", list(VARIANTS))
def test_invented_export_through_tune_and_backtest(tmp_path, capsys, name):
    v = VARIANTS[name]
    cfg = tmp_path / "model.toml"
    common = [path_of(name), "--target", v["target"], *v["args"]]
    assert main(["tune", *common, "--burn-in", "10", "--until", "3d", "--out", str(cfg)]) \
        == EXIT_OK
    err = capsys.readouterr().err
    assert "lab column" in err and "75 values in the file = 75 read" in err
    model = load(str(cfg)).models[0]
    out = tmp_path / "pred.csv"
    assert main(["backtest", *common, "--config", str(cfg), "--train", "2d", "--out",
                 str(out)]) == EXIT_OK
    cap = capsys.readouterr()
    in_file, read, matched, unmatched, train, gated, scored, other = _figures(cap.err)
    assert in_file == read == 75
    assert matched + unmatched == read and train + scored + other == matched
    assert gated <= scored  # gated results are scored too
    # against the daemon's own outputs and an independent matching
    h = backtest.load_history(path_of(name), target=v["target"],
                              tz=v["args"][1] if v["args"] else None)
    res = backtest.backtest(h, model, train=2 * 86400.0)
    assert matched == len(res.track.fits) == brute_matched(h, model)
    assert scored == res.n_scored > 0 and gated == res.n_gated
    assert train == sum(1 for f in res.track.fits if f["t"] < res.train_end)
    assert "scored" in cap.out
    assert backtest.read_predictions(out).t.size > 0
    # ... and on to the report, with the target and its unit from the config tune wrote
    pytest.importorskip("matplotlib", reason="the plot extra (matplotlib) is not installed")
    picture = tmp_path / "report.png"
    assert main(["report", str(out), "--config", str(cfg), "--out", str(picture)]) == EXIT_OK
    assert picture.stat().st_size > 0 and str(picture) in capsys.readouterr().out


def test_target_unit_from_the_units_row(tmp_path, capsys):
    cfg = tmp_path / "model.toml"
    assert main(["tune", path_of("european"), "--target", "AX-410", "--tz", "Europe/Berlin",
                 "--burn-in", "10", "--out", str(cfg)]) == EXIT_OK
    assert "noise guess [%]" in capsys.readouterr().out


# ---------------------------------------------------------------------------- single rules
def test_text_cells_are_missing_readings_and_lab_values_kept(tmp_path):
    path = write(tmp_path / "t.csv",
                 "time,a,b,lab\n"
                 "100,1,Bad,\n"             # 2
                 "200,I/O Timeout,2,7.5\n"  # 3 lab value on a row with a text cell
                 "300,#N/A,Shutdown,8.5\n"  # 4 no reading at all, lab value kept
                 "400,NaN,inf,oops\n")      # 5 lab cell not a number: counted
    r = read_csv(path, target="lab")
    rows = list(r)
    assert [row.y for row in rows] == [None, 7.5, 8.5, None]
    assert np.isnan(np.array([row.x for row in rows])).sum() == 6
    assert r.missing == {"a": 3, "b": 3}
    assert r.lab_cells == 3 and r.n_lab == 2 and r.lab_text == {"oops": 1}
    assert r.lab_text_lines == [5] and r.n_bad == 0


def test_repeated_time_merged_and_every_lab_value_accounted(tmp_path):
    path = write(tmp_path / "rep.csv",
                 "time,a,b,lab\n"
                 "100,1,,\n"       # 2
                 "100,,2,5.0\n"    # 3 merged into 2: fills b and the lab value
                 "200,3,4,6.0\n"   # 4
                 "200,3,9,6.5\n"   # 5 merged: b differs (first kept), second lab dropped
                 "150,1,1,7.0\n"   # 6 backwards: bad row, its lab value listed
                 "x,1,1,8.0\n")    # 7 bad time, lab value listed
    r = read_csv(path, target="lab")
    rows = list(r)
    assert [(row.line, row.t, row.x, row.y) for row in rows] == [
        (2, 100.0, (1.0, 2.0), 5.0), (4, 200.0, (3.0, 4.0), 6.0)]
    assert r.merged == [3, 5] and r.n_conflicts == 1
    assert r.lab_dropped == [(5, 6.5)]
    assert r.lab_in_bad == [(6, "backwards"), (7, "time")]
    assert r.lab_cells == 5 == r.n_lab + len(r.lab_dropped) + len(r.lab_in_bad)
    text = "\n".join(reading_text(r.summary()))
    assert "5 values in the file = 2 read + 2 on bad rows (lines 6, 7) + 1 dropped" in text
    assert "backwards 1 (line 6)" in text and "time 1 (line 7)" in text
    # sorted, the backwards row is kept
    r = read_csv(path, target="lab", sort=True)
    assert [row.t for row in r] == [100.0, 150.0, 200.0] and r.lab_in_bad == [(7, "time")]


@pytest.mark.parametrize("value, unit", [(1.7e9, "epoch_s"), (1.7e12, "epoch_ms"),
                                         (1.7e15, "epoch_us"), (1.7e18, "epoch_ns"),
                                         (0.0, "epoch_s"), (-5e12, "epoch_ms")])
def test_epoch_unit_from_magnitude(value, unit):
    assert epoch_unit(value) == unit


@pytest.mark.parametrize("scale, fmt", [(1, "epoch_s"), (1000, "epoch_ms"),
                                        (10 ** 6, "epoch_us"), (10 ** 9, "epoch_ns")])
def test_epoch_units_read(tmp_path, scale, fmt):
    base = 1767571200  # 2026-01-05T00:00:00Z, calendar.timegm((2026, 1, 5, 0, 0, 0))
    assert base == calendar.timegm((2026, 1, 5, 0, 0, 0))
    path = write(tmp_path / "e.csv", "time,a\n" + "".join(
        f"{(base + 60 * k) * scale},{k}\n" for k in range(3)))
    for time_format in ("auto", fmt):
        r = read_csv(path, time_format=time_format)
        assert [row.t for row in r] == [base + 60.0 * k for k in range(3)]
        assert r.epoch_unit == fmt


def test_implausible_times_are_bad_rows_or_stop_with_a_hint(tmp_path):
    path = write(tmp_path / "i.csv", "time,a\n1767571200,1\n99999999999,2\n1767571260,3\n")
    r = read_csv(path)
    assert [row.t for row in r] == [1767571200.0, 1767571260.0]
    assert r.bad == [(3, "implausible_time")]
    path = write(tmp_path / "us.csv", "time,a\n1767571200000000,1\n")
    with pytest.raises(ValueError, match="epoch_us"):
        read_csv(path, time_format="epoch_ms")
    path = write(tmp_path / "y.csv", "time,a\n2250-01-01T00:00:00Z,1\n")
    with pytest.raises(ValueError, match="outside 1900-2199"):
        read_csv(path)


def test_ambiguous_or_unreadable_time_format_asks(tmp_path):
    one_day = "".join(f"01/02/2026 {h:02d}:00:00,{h}\n" for h in range(5))
    path = write(tmp_path / "amb.csv", "time,a\n" + one_day)
    with pytest.raises(ValueError, match="--time-format") as err:
        read_csv(path, tz="UTC")
    assert "%m/%d/%Y %H:%M:%S" in str(err.value) and "%d/%m/%Y %H:%M:%S" in str(err.value)
    r = read_csv(path, tz="UTC", time_format="%d/%m/%Y %H:%M:%S")
    assert next(iter(r)).t == calendar.timegm((2026, 2, 1, 0, 0, 0))
    # a day above 12 decides
    path = write(tmp_path / "dm.csv", "time,a\n13/02/2026 00:00:00,1\n14/02/2026 00:00:00,2\n")
    r = read_csv(path, tz="UTC")
    assert [row.t for row in r] == [calendar.timegm((2026, 2, d, 0, 0, 0)) for d in (13, 14)]
    path = write(tmp_path / "junk.csv", "time,a\nsoon,1\nlater,2\n")
    with pytest.raises(ValueError, match="cannot read time stamps like 'soon'"):
        read_csv(path)


def test_naive_times_without_zone_stop_early(tmp_path):
    path = write(tmp_path / "n.csv", "time,a\n05.01.2026 00:00:00,1\n05.01.2026 00:01:00,2\n")
    with pytest.raises(ValueError, match="--tz"):
        read_csv(path)
    # Berlin is UTC+1 in January (from memory)
    r = read_csv(path, tz="Europe/Berlin")
    assert [row.t for row in r] == [calendar.timegm((2026, 1, 4, 23, m, 0)) for m in (0, 1)]


def test_separators_decimal_marks_and_time_column(tmp_path):
    tab = write(tmp_path / "tab.tsv", "a\tDate/Time\tb\n1.5\t1767571200\t2\n")
    r = read_csv(tab)
    assert (r.delimiter, r.time_column, r.tags) == ("\t", "Date/Time", ("a", "b"))
    assert next(iter(r)).x == (1.5, 2.0)
    semi = write(tmp_path / "s.csv", "stamp;a;b\n1767571200;1.234,5;-0,25\n")
    r = read_csv(semi, time_column="stamp")
    assert (r.delimiter, r.decimal) == (";", ",")
    assert next(iter(r)).x == (1234.5, -0.25)
    r = read_csv(semi, time_column="stamp", delimiter=";", decimal=".")
    assert np.isnan(next(iter(r)).x).all()  # as asked: '1.234,5' is then not a number
    with pytest.raises(ValueError, match="'when'"):
        read_csv(semi, time_column="when")
    with pytest.raises(ValueError, match="decimal"):
        read_csv(semi, decimal=";")


@pytest.mark.parametrize("cell, expected", [
    ("TI-104", ("TI-104", None, "")),
    ("TI-104 (degC)", ("TI-104", "degC", "")),
    ("TI-104 [degC]", ("TI-104", "degC", "")),
    ("TI-104 Tray 12 temperature", ("TI-104", None, "Tray 12 temperature")),
    ("TI-104: Tray 12 temperature (degC)", ("TI-104", "degC", "Tray 12 temperature")),
    ("FIC101.PV Feed", ("FIC101.PV", None, "Feed")),
    ("Feed Temp", ("Feed_Temp", None, "")),
    ("  Feed   Temp  ", ("Feed_Temp", None, "")),
])
def test_split_header(cell, expected):
    assert split_header(cell) == expected


def test_units_and_descriptions_rows(tmp_path):
    path = write(tmp_path / "u.csv",
                 "time,TI-104,FI-201\n"
                 ",degC,t/h\n"
                 ",Tray 12 temperature at the top,Feed flow to the column\n"
                 "1767571200,1,2\n")
    r = read_csv(path)
    assert r.units == {"TI-104": "degC", "FI-201": "t/h"} and r.units_line == 2
    assert r.descriptions["FI-201"] == "Feed flow to the column"
    rows = list(r)
    assert [row.line for row in rows] == [4] and r.n_rows == 1


def test_headers_reading_as_one_tag_refused(tmp_path):
    path = write(tmp_path / "d.csv", "time,TI-104 top,TI-104 bottom\n1,1,2\n")
    with pytest.raises(ValueError, match="both read as tag 'TI-104'"):
        read_csv(path)
    r = read_csv(path, tags=["TI-104 bottom"])
    assert next(iter(r)).x == (2.0,)


# ---------------------------------------------------------------------- feed with gaps
def test_feed_messages_skip_rows_with_missing_readings_but_send_their_lab_values():
    h = backtest.load_history(path_of("documented"), target="AX-410")
    model = load_model_for(h)
    msgs = backtest.feed_messages(h, [model], lab_delay=3600.0, block=7)
    sent = [(t, x) for _, _, b in msgs if "x" in b for t, x in zip(b["t"], b["x"],
                                                                   strict=True)]
    finite = np.isfinite(h.X).all(axis=1)
    assert [t for t, _ in sent] == h.t[finite].tolist()
    assert all(math.isfinite(v) for _, x in sent for v in x)
    labs = [(b["t"], b["y"]) for _, _, b in msgs if "y" in b]
    assert labs == list(zip(h.lab_t.tolist(), h.lab_y.tolist(), strict=True))
    # one lab value sits on a row with a missing reading: still sent
    assert any(not finite[np.searchsorted(h.t, t)] for t, _ in labs)


def load_model_for(h):
    from daemon.config import loads

    inputs = ", ".join(f'{{ tag = "{t}", lo = 0, hi = 20000 }}' for t in h.tags)
    return loads(f'[[model]]\nname = "sd"\ninputs = [{inputs}]\n').models[0]


# ----------------------------------------------------------------------- no tracebacks
@pytest.mark.parametrize("text, args, message", [
    ("time,a,AX-350\n1792627200000,1,2\n", ["--time-format", "epoch"], "epoch_ms"),
    ("time,a,AX-350\n05.01.2026 00:00:00,1,2\n", [], "--tz"),
    ("time,a,AX-350\nsoon,1,2\n", [], "cannot read time stamps"),
    ("\x00\x01\x02 binary", [], "no lab column"),
    ("time,a,AX-350\n1767571200,1,\n", [], "lab results"),
])
def test_bad_data_is_one_line_and_usage_exit(tmp_path, capsys, text, args, message):
    path = write(tmp_path / "bad.csv", text)
    rc = main(["tune", str(path), *args])
    err = capsys.readouterr().err
    assert rc == EXIT_USAGE
    assert "Traceback" not in err
    last = err.strip().splitlines()[-1]
    assert last.startswith("posteriord tune: ") and message in last


# ---------------------------------------------------------------- commissioning window
def _ranges(out):
    line = next(ln for ln in out.splitlines() if ln.startswith("no config given"))
    return {tag: (float(lo), float(hi)) for tag, lo, hi in
            re.findall(r"(\S+) (-?[\d.e+]+)\.\.(-?[\d.e+]+)", line)}


def test_tune_commissions_on_the_window_and_says_what_is_in_sample(tmp_path, capsys):
    common = ["tune", path_of("documented"), "--target", "AX-410", "--burn-in", "5"]
    assert main([*common, "--until", "2d"]) == EXIT_OK
    cap = capsys.readouterr()
    window = _ranges(cap.out)
    assert "ranges from the data before --until" in cap.out
    assert "commissioning window 2026-10-22 00:00 to 2026-10-24 00:00 UTC (144 of 450 rows)" \
        in cap.err and "in-sample" not in cap.err
    assert main(common) == EXIT_OK
    cap = capsys.readouterr()
    full = _ranges(cap.out)
    assert "scores below are in-sample" in cap.err
    _, X, _ = by_hand("documented")
    first = X[:144]  # 2 days of 20-minute rows
    for k, tag in enumerate(("TI-101", "TI-102", "FI-201", "SI-301")):
        lo, hi = window[tag]
        assert lo <= np.nanmin(first[:, k]) and hi >= np.nanmax(first[:, k])
    assert window != full  # the later rows moved the ranges of the full file


def test_unmatched_lab_results_get_a_tolerance_hint_that_works(tmp_path, capsys):
    cfg = tmp_path / "model.toml"
    common = [path_of("documented"), "--target", "AX-410"]
    assert main(["tune", *common, "--burn-in", "10", "--out", str(cfg)]) == EXIT_OK
    capsys.readouterr()
    assert main(["backtest", *common, "--config", str(cfg), "--train", "2d"]) == EXIT_OK
    err = capsys.readouterr().err
    assert 'lab.tolerance = "20m" would match' in err
    # the lab results on rows with a missing reading are matched to the row before, but for
    # one whose row before misses the reading too (rows 200 and 201 of the generator)
    cfg.write_text(cfg.read_text().replace('tolerance = "2m"', 'tolerance = "20m"'))
    assert main(["backtest", *common, "--config", str(cfg), "--train", "2d"]) == EXIT_OK
    err = capsys.readouterr().err
    assert "75 read (the rest above); 74 matched to inputs, 1 unmatched" in err
    h = backtest.load_history(path_of("documented"), target="AX-410")
    assert brute_matched(h, load(str(cfg)).models[0]) == 74


def test_cp1252_export_and_utc_named_in_the_time_header(tmp_path):
    path = tmp_path / "w.csv"
    path.write_bytes("Time (UTC);TI-104 (\u00b0C);AX-350\n05.01.2026 00:00:00;1,5;2\n"
                     .encode("cp1252"))
    r = read_csv(path)
    assert r.encoding == "cp1252" and r.units == {"TI-104": "\u00b0C"}
    row = next(iter(r))
    assert row.t == calendar.timegm((2026, 1, 5, 0, 0, 0)) and row.x == (1.5,)
    assert "times in UTC (from the header)" in reading_text(r.summary())[0]


@pytest.mark.parametrize("text", [
    "Date,Time,TI-104\n05/01/2026,13:20:00,1.5\n06/01/2026,01:00:00,2\n",
    "Time;Datum;TI-104\n13:20:00;05/01/2026;1,5\n01:00:00;06/01/2026;2\n",
])
def test_separate_date_and_clock_columns(tmp_path, text):
    path = write(tmp_path / "dc.csv", text)
    r = read_csv(path, tz="UTC")
    assert r.tags == ("TI-104",) and "+" in r.time_column
    rows = list(r)
    # 05/01 then 06/01 through one night: day first and month first are both in order, but
    # month first jumps a month; so read day first
    assert [row.t for row in rows] == [calendar.timegm((2026, 1, 5, 13, 20, 0)),
                                       calendar.timegm((2026, 1, 6, 1, 0, 0))]
