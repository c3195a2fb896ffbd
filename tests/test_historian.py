"""Tests of historian CSV reading/writing and of dead-time alignment (runtime/alignment.py)."""

import calendar
import io
import json
import math
import sys
import tracemalloc

import numpy as np
import pytest

from daemon.runtime.alignment import Aligner, apply_dead_time
from daemon.workbench.historian import Row, read_csv, write_csv
from daemon.workbench.plant import TAGS, TARGET, Scenario, basis, simulate


def utc(*fields):
    """Epoch seconds of a UTC calendar time, by calendar.timegm (independent of zoneinfo)."""
    return float(calendar.timegm(fields))


def write(path, text):
    path.write_text(text, encoding="utf-8")
    return path


@pytest.fixture(scope="module")
def small_run():
    return simulate(Scenario(seed=21, days=3, blunders=2))


def read_all(path, **kw):
    reader = read_csv(path, **kw)
    return reader, list(reader)


# -- round trip --------------------------------------------------------------------------------


@pytest.mark.parametrize(
    "fmt, tz",
    [("iso", None), ("epoch", None), ("iso", "Europe/Amsterdam"), ("iso", "America/New_York")],
)
def test_round_trip_exact(tmp_path, small_run, fmt, tz):
    run = small_run
    path = tmp_path / "run.csv"
    n = write_csv(path, run, time_format=fmt, tz=tz)
    assert n == run.t.size
    first = path.read_text(encoding="utf-8").splitlines()[0]
    assert first.startswith("#")
    assert "simulated data from a fictitious unit" in first
    reader, rows = read_all(path)
    assert reader.tags == TAGS and reader.target == TARGET
    assert reader.n_bad == 0 and reader.n_good == run.t.size
    np.testing.assert_array_equal([r.t for r in rows], run.t)
    np.testing.assert_array_equal(np.array([r.x for r in rows]), run.X)
    y = [r.y for r in rows]
    lab = dict(zip(run.lab_index.tolist(), run.lab_y.tolist(), strict=True))
    assert [k for k, v in enumerate(y) if v is not None] == sorted(lab)
    assert all(y[k] == v for k, v in lab.items())
    assert [r.line for r in rows][:2] == [reader.header_line + 1, reader.header_line + 2]


def test_iso_written_with_offset(tmp_path, small_run):
    path = tmp_path / "ams.csv"
    write_csv(path, small_run, tz="Europe/Amsterdam")
    lines = [ln for ln in path.read_text().splitlines() if not ln.startswith("#")]
    assert lines[0] == "time,TI-104,FI-201,PI-110,AI-305,AX-350"
    # 2026-01-05T00:00Z is 01:00 in Amsterdam in winter (CET = UTC+1, EU rule; from memory)
    assert lines[1].startswith("2026-01-05T01:00:00+01:00,")
    write_csv(path, small_run)
    lines = [ln for ln in path.read_text().splitlines() if not ln.startswith("#")]
    assert lines[1].startswith("2026-01-05T00:00:00+00:00,")


def test_write_rejects_bad_format(tmp_path, small_run):
    with pytest.raises(ValueError, match="'excel'"):
        write_csv(tmp_path / "x.csv", small_run, time_format="excel")
    with pytest.raises(ValueError, match="Mars/Olympus"):
        write_csv(tmp_path / "x.csv", small_run, tz="Mars/Olympus")


# -- time formats and daylight saving ------------------------------------------------------------
# EU summer time (Directive 2000/84/EC; from memory): clocks change at 01:00 UTC on the last
# Sunday of March and of October. In 2026 these are 29 March and 25 October. Amsterdam is
# UTC+1 in winter, UTC+2 in summer.


@pytest.mark.parametrize("time_format", ["iso", "%Y-%m-%d %H:%M:%S", "auto"])
def test_spring_gap_is_bad_row(tmp_path, time_format):
    path = write(
        tmp_path / "spring.csv",
        "time,a\n"
        "2026-03-29 01:30:00,1\n"
        "2026-03-29 01:59:00,2\n"
        "2026-03-29 02:30:00,3\n"
        "2026-03-29 03:00:00,4\n"
        "2026-03-29 03:30:00,5\n",
    )
    reader, rows = read_all(path, tz="Europe/Amsterdam", time_format=time_format)
    assert [r.t for r in rows] == [
        utc(2026, 3, 29, 0, 30, 0),
        utc(2026, 3, 29, 0, 59, 0),
        utc(2026, 3, 29, 1, 0, 0),
        utc(2026, 3, 29, 1, 30, 0),
    ]
    assert [r.x for r in rows] == [(1.0,), (2.0,), (4.0,), (5.0,)]
    assert reader.bad == [(4, "nonexistent_time")]
    assert reader.bad_counts == {"nonexistent_time": 1}


@pytest.mark.parametrize("time_format", ["iso", "%d.%m.%Y %H:%M"])
def test_autumn_fold_monotone_export(tmp_path, time_format):
    local = [
        "01:30", "01:45", "02:00", "02:15", "02:30", "02:45",  # summer time, UTC+2
        "02:00", "02:15", "02:30", "02:45", "03:00", "03:15",  # winter time, UTC+1
    ]  # fmt: skip
    if time_format == "iso":
        stamps = [f"2026-10-25T{hm}:00" for hm in local]
    else:
        stamps = [f"25.10.2026 {hm}" for hm in local]
    path = write(
        tmp_path / "autumn.csv", "time,a\n" + "".join(f"{s},{i}\n" for i, s in enumerate(stamps))
    )
    reader, rows = read_all(path, tz="Europe/Amsterdam", time_format=time_format)
    assert reader.n_bad == 0
    start = utc(2026, 10, 24, 23, 30, 0)
    assert [r.t for r in rows] == [start + 900.0 * i for i in range(12)]


def test_isolated_ambiguous_time_is_earlier_instant(tmp_path):
    path = write(tmp_path / "fold.csv", "time,a\n2026-10-25 02:30:00,1\n")
    _, rows = read_all(path, tz="Europe/Amsterdam")
    assert rows[0].t == utc(2026, 10, 25, 0, 30, 0)  # fold=0: still summer time, UTC+2


def test_iso_offsets_and_z(tmp_path):
    path = write(
        tmp_path / "iso.csv",
        "time,a\n"
        "2026-03-29T01:59:00+01:00,1\n"
        "2026-03-29T03:00:00+02:00,2\n"
        "2026-03-29T01:30:00Z,3\n"
        "2026-03-29T01:30:00.250000+00:00,4\n",
    )
    # an offset wins over tz
    reader, rows = read_all(path, tz="America/New_York")
    assert [r.t for r in rows] == [
        utc(2026, 3, 29, 0, 59, 0),
        utc(2026, 3, 29, 1, 0, 0),
        utc(2026, 3, 29, 1, 30, 0),
        utc(2026, 3, 29, 1, 30, 0) + 0.25,
    ]
    assert reader.n_bad == 0


def test_naive_time_without_zone_is_bad(tmp_path):
    path = write(tmp_path / "naive.csv", "time,a\n2026-01-05 00:00:00,1\n2026-01-05T00:01:00Z,2\n")
    reader, rows = read_all(path)
    assert reader.bad == [(2, "naive_time")]
    assert [r.x for r in rows] == [(2.0,)]


def test_epoch_seconds(tmp_path):
    path = write(
        tmp_path / "epoch.csv",
        "# exported as epoch seconds\n"
        "time,a,b\n"
        "1767571200,1,2\n"
        "1767571260.5,3,4\n"
        "1.7675713e9,5,6\n"
        "2026-01-05T00:03:00Z,7,8\n"
        "inf,9,10\n",
    )
    reader, rows = read_all(path)  # auto: the first time cell is a number
    assert [r.t for r in rows] == [1767571200.0, 1767571260.5, 1767571300.0]
    assert reader.bad == [(6, "time"), (7, "non_finite")]
    reader, rows = read_all(path, time_format="epoch", tz="Europe/Amsterdam")
    assert len(rows) == 3


def test_strptime_formats(tmp_path):
    path = write(
        tmp_path / "fmt.csv",
        "stamp;a\n05/01/2026 00:00;1\n05/01/2026 00:01;2\n13/13/2026 00:02;3\n",
    )
    reader, rows = read_all(path, time_column="stamp", time_format="%d/%m/%Y %H:%M", tz="UTC",
                            delimiter=";")  # fmt: skip
    assert [r.t for r in rows] == [utc(2026, 1, 5, 0, 0, 0), utc(2026, 1, 5, 0, 1, 0)]
    assert reader.bad == [(4, "time")]
    path = write(tmp_path / "fmtz.csv", "time,a\n05.01.2026 01:00:00 +0100,1\n")
    _, rows = read_all(path, time_format="%d.%m.%Y %H:%M:%S %z")
    assert rows[0].t == utc(2026, 1, 5, 0, 0, 0)


def test_bad_time_format_and_zone():
    with pytest.raises(ValueError, match="'excel'"):
        read_csv("nowhere.csv", time_format="excel")
    with pytest.raises(ValueError, match="Mars/Olympus"):
        read_csv("nowhere.csv", tz="Mars/Olympus")


# -- bad cells, line numbers, comments ------------------------------------------------------------


def test_blank_bad_and_non_finite_cells(tmp_path):
    # a cell that is not a number is a missing reading of its tag only: the row, its other
    # readings and its lab value are kept
    text = (
        "# simulated data from a fictitious unit, not plant data\n"  # 1
        "time,TI-104,FI-201,AX-350\n"  # 2
        "1767571200,110.5,14.0,\n"  # 3 good, no lab value
        "1767571260,,14.1,187.0\n"  # 4 good, blank input
        "\n"  # 5 blank line
        "1767571320,abc,14.2,\n"  # 6 text: missing TI-104
        "# a comment in the middle\n"  # 7
        "1767571380,110.7,nan,\n"  # 8 nan: missing FI-201
        "1767571440,110.8,14.4,inf\n"  # 9 lab value not a number
        "1767571500,110.9,14.5\n"  # 10 too few columns
        "1767571560,111.0,14.6,,\n"  # 11 too many columns
        "1767571620,-Infinity,14.7,\n"  # 12 missing TI-104
        "17675716x0,111.1,14.7,\n"  # 13 bad time
        ",111.1,14.7,188\n"  # 14 blank time, with a lab value
        '"1767571680","111.2",14.8,"201.5"\n'  # 15 good, quoted
        "1767571740, 111.3 ,14.9, 12 \n"  # 16 good, spaces
        "1767571800,1.1e2,15,x\n"  # 17 lab value not a number
    )
    path = write(tmp_path / "cells.csv", text)
    reader, rows = read_all(path)
    nan = math.nan
    expected = [
        (3, 1767571200.0, (110.5, 14.0), None),
        (4, 1767571260.0, (nan, 14.1), 187.0),
        (6, 1767571320.0, (nan, 14.2), None),
        (8, 1767571380.0, (110.7, nan), None),
        (9, 1767571440.0, (110.8, 14.4), None),
        (12, 1767571620.0, (nan, 14.7), None),
        (15, 1767571680.0, (111.2, 14.8), 201.5),
        (16, 1767571740.0, (111.3, 14.9), 12.0),
        (17, 1767571800.0, (110.0, 15.0), None),
    ]
    assert len(rows) == len(expected)
    for row, (line, t, x, y) in zip(rows, expected, strict=True):
        assert (row.line, row.t, row.y) == (line, t, y)
        np.testing.assert_array_equal(row.x, x)  # nan == nan here
    assert reader.bad == [(10, "columns"), (11, "columns"), (13, "time"), (14, "time")]
    assert reader.bad_counts == {"columns": 2, "time": 2}
    assert reader.n_bad == 4 and reader.n_good == 9 and reader.n_rows == 13
    assert reader.n_comments == 1
    assert reader.missing == {"TI-104": 3, "FI-201": 1}
    assert reader.missing_texts == {"TI-104": {"": 1, "abc": 1, "-Infinity": 1},
                                    "FI-201": {"nan": 1}}
    # every lab cell accounted for: 3 read, 2 text, 1 on a bad row
    assert reader.lab_cells == 6 and reader.n_lab == 3
    assert reader.lab_text == {"inf": 1, "x": 1} and reader.lab_text_lines == [9, 17]
    assert reader.lab_in_bad == [(14, "time")]
    # line numbers point at the very lines of the file
    lines = text.splitlines()
    assert lines[6 - 1].startswith("1767571320,abc")
    assert lines[14 - 1].endswith(",188")
    summary = json.loads(json.dumps(reader.summary()))
    assert summary["bad_lines"][0] == [10, "columns"]


def test_selected_columns_and_target(tmp_path):
    path = write(tmp_path / "sel.csv", "time,a,b,c,lab\n1,1,2,3,\n2,4,5,6,7\n")
    reader, rows = read_all(path, tags=["c", "a"], target="lab")
    assert rows == [Row(2, 1.0, (3.0, 1.0), None), Row(3, 2.0, (6.0, 4.0), 7.0)]
    # without a target argument and no AX-350 column every column is an input
    reader, rows = read_all(path)
    assert reader.target is None and reader.tags == ("a", "b", "c", "lab")
    assert rows[1].x == (4.0, 5.0, 6.0, 7.0) and rows[1].y is None


def test_missing_column_error_names_file_and_column(tmp_path):
    path = write(tmp_path / "cols.csv", "# header follows\ntime,TI-104\n1,2\n")
    with pytest.raises(ValueError, match="cols.csv") as err:
        read_csv(path, tags=["TI-104", "FI-201"])
    assert "'FI-201'" in str(err.value)
    with pytest.raises(ValueError, match="'AX-350'"):
        read_csv(path, target="AX-350")
    with pytest.raises(ValueError, match="'timestamp'"):
        read_csv(path, time_column="timestamp")
    with pytest.raises(ValueError, match="no header"):
        read_csv(write(tmp_path / "empty.csv", "# nothing\n\n"))


def test_bad_list_capped_counts_complete(tmp_path):
    body = "".join(f"{'x' if i % 2 else i},{i}\n" for i in range(1, 61))
    path = write(tmp_path / "many.csv", "time,a\n0,0\n" + body)
    reader, rows = read_all(path, max_bad=10)
    assert len(rows) == 31
    assert reader.n_bad == 30 and reader.bad_counts == {"time": 30}
    assert reader.bad == [(i + 2, "time") for i in range(1, 20, 2)]


def test_reiteration_resets_counters(tmp_path):
    path = write(tmp_path / "again.csv", "time,a\n1,1\nx,2\n3,3\n")
    reader = read_csv(path)
    assert [r.t for r in reader] == [1.0, 3.0]
    assert [r.t for r in reader] == [1.0, 3.0]
    assert reader.n_bad == 1 and reader.bad == [(3, "time")]


# -- ordering ------------------------------------------------------------------------------------

UNSORTED = (
    "time,a\n"  # 1
    "100,1\n"  # 2
    "200,2\n"  # 3
    "150,3\n"  # 4 backwards
    "300,4\n"  # 5
    "300,5\n"  # 6 repeated time: merged into line 5
    "250,6\n"  # 7 backwards
    "400,7\n"  # 8
    "oops,8\n"  # 9 bad time
)


def test_unsorted_rows_are_bad_when_streaming(tmp_path):
    path = write(tmp_path / "unsorted.csv", UNSORTED)
    reader, rows = read_all(path)
    assert [(r.t, r.x[0]) for r in rows] == [(100, 1), (200, 2), (300, 4), (400, 7)]
    assert reader.bad == [(4, "backwards"), (7, "backwards"), (9, "time")]
    assert reader.merged == [6] and reader.n_conflicts == 1  # 4 and 5 differ: the first kept


def test_sort_option_fixes_order(tmp_path):
    path = write(tmp_path / "unsorted.csv", UNSORTED)
    reader, rows = read_all(path, sort=True)
    # the first of two rows with the same time (in file order) is kept
    assert [(r.t, r.x[0], r.line) for r in rows] == [
        (100, 1, 2), (150, 3, 4), (200, 2, 3), (250, 6, 7), (300, 4, 5), (400, 7, 8),
    ]  # fmt: skip
    assert reader.bad == [(9, "time")]
    assert reader.merged == [6] and reader.n_conflicts == 1
    assert reader.n_good == 6


# -- progress bar --------------------------------------------------------------------------------


class _FakeTerminal(io.StringIO):
    def isatty(self):
        return True


def test_progress_bar_only_on_terminal(tmp_path, small_run, monkeypatch):
    path = tmp_path / "p.csv"
    write_csv(path, small_run)
    expected = [r.t for r in read_csv(path)]
    fake = _FakeTerminal()
    monkeypatch.setattr(sys, "stderr", fake)
    assert [r.t for r in read_csv(path, progress=True)] == expected
    assert "B" in fake.getvalue()  # tqdm wrote a bar counting bytes
    pipe = io.StringIO()
    monkeypatch.setattr(sys, "stderr", pipe)
    assert [r.t for r in read_csv(path, progress=True)] == expected
    assert pipe.getvalue() == ""
    # tqdm not installed: no bar, no error
    monkeypatch.setattr(sys, "stderr", fake)
    monkeypatch.setitem(sys.modules, "tqdm", None)
    fake.seek(0)
    fake.truncate()
    assert [r.t for r in read_csv(path, progress=True)] == expected
    assert fake.getvalue() == ""


# -- memory --------------------------------------------------------------------------------------


def test_large_file_streams_in_bounded_memory(tmp_path):
    run = simulate(Scenario(seed=3, days=30))
    path = tmp_path / "large.csv"
    write_csv(path, run)
    size = path.stat().st_size
    assert size > 2_000_000
    tracemalloc.start()
    try:
        reader = read_csv(path)
        n = 0
        total = 0.0
        for row in reader:
            n += 1
            total += row.x[0]
        _, peak = tracemalloc.get_traced_memory()
    finally:
        tracemalloc.stop()
    assert n == run.t.size
    assert total == pytest.approx(float(np.sum(run.X[:, 0])), rel=1e-12)
    assert peak < size / 5, (peak, size)


# -- dead time alignment -------------------------------------------------------------------------


def brute_force(t, X, s, tol):
    """Last row at or before s within tol, by a full numpy scan; None if there is none."""
    idx = np.nonzero(t <= s)[0]
    if idx.size == 0 or s - t[idx[-1]] > tol:
        return None
    return idx[-1]


def test_aligner_matches_brute_force_on_random_data():
    rng = np.random.default_rng(1234)
    n, k = 3, 3000
    gaps = rng.choice([60.0, 120.0, 900.0], p=[0.9, 0.08, 0.02], size=k) + rng.uniform(
        -5, 5, size=k
    )
    t = 1.0e9 + np.cumsum(gaps)
    X = rng.normal(size=(k, n))
    dead = rng.uniform(0, 1800, size=n)
    tol, history = 200.0, 4 * 3600.0
    al = Aligner(["a", "b", "c"], dead.tolist(), history, tolerance_s=tol)
    checked = found = 0
    for j in range(k):
        al.push(t[j], X[j])
        if j % 7:
            continue
        keep = t[: j + 1] >= t[j] - history  # what the aligner still remembers
        tk, Xk = t[: j + 1][keep], X[: j + 1][keep]
        for lab in rng.uniform(t[j] - 5 * 3600, t[j] + 600, size=3):
            got = al.lookup(lab)
            want = [brute_force(tk, Xk, lab - d, tol) for d in dead]
            checked += 1
            if any(w is None for w in want):
                assert got is None
            else:
                found += 1
                assert got == tuple(Xk[w, i] for i, w in enumerate(want))
    assert found > 0.2 * checked and checked - found > 0.1 * checked


def test_apply_dead_time_matches_brute_force():
    rng = np.random.default_rng(99)
    k, n = 2000, 4
    t = np.cumsum(rng.choice([30.0, 60.0, 600.0], p=[0.49, 0.5, 0.01], size=k))
    X = rng.normal(size=(k, n))
    lab_t = np.sort(rng.uniform(t[0] - 3000, t[-1] + 3000, size=400))
    dead = [0.0, 90.0, 1200.0, 45.0]
    values, ok = apply_dead_time(t, X, lab_t, dead, tolerance_s=120.0)
    for m, s in enumerate(lab_t):
        want = [brute_force(t, X, s - d, 120.0) for d in dead]
        if any(w is None for w in want):
            assert not ok[m] and np.all(np.isnan(values[m]))
        else:
            assert ok[m]
            np.testing.assert_array_equal(values[m], [X[w, i] for i, w in enumerate(want)])
    assert 0.2 < ok.mean() < 0.95
    # same answers as the streaming class with a long enough history
    al = Aligner(list("abcd"), dead, history_s=t[-1] - t[0] + 1e4, tolerance_s=120.0)
    for tj, xj in zip(t, X, strict=True):
        al.push(tj, xj)
    for m, s in enumerate(lab_t):
        got = al.lookup(s)
        assert (got is None) == (not ok[m])
        if got is not None:
            assert got == tuple(values[m])


def test_aligner_dead_times_by_hand():
    al = Aligner(["T", "A"], {"A": 600.0}, history_s=3600.0, tolerance_s=90.0)
    for i in range(20):
        al.push(60.0 * i, (float(i), 100.0 + i))
    # T at 900 s (row 15), A at 900 - 600 = 300 s (row 5)
    assert al.lookup(900.0) == (15.0, 105.0)
    # between samples: the earlier one
    assert al.lookup(930.0) == (15.0, 105.0)
    # T: latest row (19 at 1140 s) is 60 s older than 1200 s, within tolerance
    assert al.lookup(1200.0) == (19.0, 110.0)
    # T: 1140 s is 100 s before 1240 s, beyond the tolerance
    assert al.lookup(1240.0) is None
    # A needs the input at -60 s: before the first row
    assert al.lookup(540.0) is None
    assert al.lookup(600.0) == (10.0, 100.0)


def test_aligner_forgets_old_rows_and_memory_is_bounded():
    al = Aligner(TAGS, (0.0, 0.0, 300.0, 600.0), history_s=3600.0, tolerance_s=120.0)
    for i in range(100_000):
        al.push(60.0 * i, (1.0 * i, 2.0, 3.0, 4.0))
        assert al.n_stored <= 61 + 256 + 1
    assert len(al) == 61
    assert al.oldest == 60.0 * (100_000 - 61) and al.newest == 60.0 * 99_999
    now = 60.0 * 99_999
    assert al.lookup(now)[0] == 99_999.0
    assert al.lookup(now - 3000.0) is not None
    assert al.lookup(now - 3600.0) is None  # A-305 would need a row 4200 s back: forgotten
    assert al.lookup(now - 1.0e6) is None
    capped = Aligner(["a"], [0.0], history_s=1e9, max_rows=50)
    for i in range(1000):
        capped.push(float(i), [float(i)])
    assert len(capped) == 50 and capped.n_stored <= 50 + 256 + 1
    assert capped.lookup(949.0) is None and capped.lookup(950.0) == (950.0,)


def test_aligner_rejects_bad_input():
    with pytest.raises(ValueError, match="-5"):
        Aligner(["a"], [-5.0], 100.0)
    with pytest.raises(ValueError, match="'zz'"):
        Aligner(["a"], {"zz": 1.0}, 100.0)
    with pytest.raises(ValueError, match="50.0"):
        Aligner(["a", "b"], [0.0, 600.0], 50.0, tolerance_s=10.0)
    with pytest.raises(ValueError, match="need 2"):
        Aligner(["a", "b"], [0.0], 1000.0)
    al = Aligner(["a"], [0.0], 1000.0)
    al.push(10.0, [1.0])
    with pytest.raises(ValueError, match="t=10.0"):
        al.push(10.0, [2.0])
    with pytest.raises(ValueError, match="2 values"):
        al.push(11.0, [1.0, 2.0])
    with pytest.raises(ValueError, match="nan"):
        al.lookup(float("nan"))
    with pytest.raises(ValueError, match="t\\[2\\]=1.0"):
        apply_dead_time([0.0, 2.0, 1.0], np.zeros((3, 1)), [1.0], [0.0], tolerance_s=1.0)


def test_aligner_state_round_trip():
    al = Aligner(["a", "b"], [0.0, 120.0], 600.0, tolerance_s=60.0)
    for i in range(40):
        al.push(30.0 * i, [float(i), -float(i)])
    state = json.loads(json.dumps(al.to_state()))
    assert state["schema"] == "historian.aligner/1"
    again = Aligner.from_state(state)
    assert len(again) == len(al)
    for s in np.arange(0.0, 1300.0, 7.0):
        assert again.lookup(s) == al.lookup(s)
    with pytest.raises(ValueError, match="schema"):
        Aligner.from_state({**state, "schema": "x/0"})


def test_simulated_dead_times_line_up(tmp_path):
    # the simulator's dead times, undone by apply_dead_time, give back the true relation
    dead = (300.0, 0.0, 0.0, 1200.0)
    run = simulate(Scenario(seed=13, days=4, dead_times_s=dead))
    path = tmp_path / "dead.csv"
    write_csv(path, run, time_format="epoch")
    rows = list(read_csv(path))
    t = np.array([r.t for r in rows])
    X = np.array([r.x for r in rows])
    lab = [(r.t, r.y) for r in rows if r.y is not None]
    lab_t = np.array([a for a, _ in lab])
    values, ok = apply_dead_time(t, X, lab_t, dead, tolerance_s=0.0)
    assert ok.all()
    pred = np.sum(basis(values) * run.coef[run.lab_index], axis=1)
    np.testing.assert_allclose(pred, run.truth_y[run.lab_index], rtol=1e-12)
