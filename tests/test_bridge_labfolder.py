"""Lab results from a watched folder of CSV files, through a real in-process daemon."""

from __future__ import annotations

import asyncio
import shutil

import pytest
from bridge_support import T0, TWO, BridgedService
from conftest import ipc, recv_until

from daemon.bridges.labfolder import BadFile, LabFolder, read_lab_file
from daemon.config.loader import loads_bridge


def test_read_lab_file_rows_and_refusals():
    rows = read_lab_file(b"Drawn,model,value,id\n2026-01-01T00:00:10+00:00,two,2.5,L-1\n"
                         b"1767225620,two,3,\n\n", {"two"})
    # 2026-01-01T00:00:10Z is 1767225610 s after 1970 (datetime, standard library)
    assert rows == [("two", {"t": 1767225610.0, "y": 2.5, "id": "L-1"}),
                    ("two", {"t": 1767225620.0, "y": 3.0})]
    bad = {b"": "empty", b"model,value\n": "header", b"model,drawn,value\nx,1,2\n": "row 2",
           b"model,drawn,value\ntwo,soon,2\n": "row 2", b"model,drawn,value\ntwo,1,nan\n":
           "row 2", b"model,drawn,value\ntwo,2026-01-01T00:00:00,2\n": "UTC offset",
           b"model,drawn,value\ntwo,1,2,3\n": "fields", b"\xff\xfe": "UTF-8",
           b"model,drawn,value\n": "no result"}
    for data, why in bad.items():
        with pytest.raises(BadFile, match=why):
            read_lab_file(data, {"two"})


def test_lab_folder_to_daemon_once(sock_dir, tmp_path):
    feed = ipc(sock_dir, "lab-feed")
    svc = BridgedService(sock_dir, [TWO], [feed])
    folder = tmp_path / "lab"
    folder.mkdir()
    cfg = loads_bridge(svc.toml + f'[lab_folder]\nfolder = "{folder}"\nfeed = "{feed}"\n',
                       "lab_folder")
    for k, x in enumerate([[1.0, 2.0], [3.0, 1.0], [2.0, 5.0]]):
        svc.feed.send("two", {"t": T0 + 10 * (k + 1), "x": x})
    svc.barrier()
    (folder / "good.csv").write_text("model,drawn,value\ntwo,1767225610,5.0\n"
                                     "two,2026-01-01T00:00:20Z,5.1\n")
    (folder / "bad.csv").write_text("model,drawn,value\ntwo,1767225630,5.0\ntwo,1767225640,x\n")
    (folder / "notes.txt").write_text("not a lab file")

    async def scan_with_new_bridge():
        bridge = LabFolder(cfg)
        try:
            return await asyncio.wait_for(bridge.scan(), 10)
        finally:
            await bridge.aclose()

    assert asyncio.run(scan_with_new_bridge()) == 2
    fits = recv_until(svc.out, lambda m: m[0] == "fit/two" and m[1]["t"] == T0 + 20)
    assert [m[1]["t"] for m in fits if m[0] == "fit/two"] == [T0 + 10, T0 + 20]
    assert (folder / "done" / "good.csv").exists()
    reason = (folder / "rejected" / "bad.csv.reason").read_text()
    assert "row 3" in reason and "not a finite number" in reason
    assert (folder / "notes.txt").exists()  # not a CSV file: left alone
    learned = svc.ctl("status")
    # a crash between the send and the move: the file comes again after the restart
    shutil.copy(folder / "done" / "good.csv", folder / "good.csv")
    assert asyncio.run(scan_with_new_bridge()) == 1
    svc.barrier()
    assert (folder / "done" / "good.1.csv").exists()
    again = svc.ctl("status")["models"]["two"]
    before = learned["models"]["two"]
    # nothing learned twice: the repeated results are refused as out of order
    assert before["learned"] >= 1 and again["learned"] == before["learned"]
    assert again["lab_results"] == before["lab_results"] + 2
    assert again["rejected"].get("lab_out_of_order", 0) == \
        before["rejected"].get("lab_out_of_order", 0) + 2
