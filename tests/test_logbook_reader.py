"""Logbook reader: truncated, corrupted and wrong-version files give data back or clear messages;
the telemetry CSV opens with numpy and the csv module as FORMAT.md says."""

from __future__ import annotations

import csv
import json
from pathlib import Path

import numpy as np
import pytest

from agent.logbook import (Logbook, LogbookError, LogbookVersionError, list_sessions,
                           read_session)
from protocol.messages import AxisSample, Telemetry


def f32(x: float) -> float:
    return float(np.float32(x))


def tel(k: int) -> Telemetry:
    return Telemetry(time_us=500 * k, counter=k, state=2, tag=1,
                     axes=(AxisSample(0, 1, 0.0, f32(np.cos(k / 7.0)), f32(k / 3.0), 1),))


def make_session(tmp_path: Path, rows: int = 100, name: str = "s1", close: bool = True):
    book = Logbook(tmp_path, min_free_bytes=0)
    s = book.open_session(device={"device_id": "rdr", "firmware_version": "1"},
                          settings_before={}, plan={}, tool_version="0.1",
                          protocol_version="1.0", name=name)
    e = s.experiment("e01", {"kind": "relay", "axis": 0, "loop": 1, "axis_name": "roll",
                             "loop_name": "angle"})
    for k in range(rows):
        e.append(100.0 + k / 1000, tel(k))
    s.event("note", text="hello")
    if close:
        s.close("completed")
    else:
        e.flush()
    return s.path


def tel_file(path: Path) -> Path:
    return path / "e01" / "telemetry.csv"


def test_truncated_last_row_is_dropped_and_reported(tmp_path):
    p = make_session(tmp_path)
    with open(tel_file(p), "ab") as fh:
        fh.write(b"100.2,50000,100,2,1,0,1,0,0.12")  # a row cut by a crash
    r = read_session(p)
    x = r.experiments["e01"]
    assert x.recovered_rows == 100
    assert any("last row was cut off" in n for n in x.notes)
    assert any("last row was cut off" in n for n in r.notes)


def test_truncated_last_event_line_is_dropped_and_reported(tmp_path):
    p = make_session(tmp_path, close=False)
    with open(p / "events.jsonl", "ab") as fh:
        fh.write(b'{"seq": 9, "kind": "kill_tri')
    r = read_session(p)
    assert [e["kind"] for e in r.events] == ["session_opened", "experiment_opened", "note"]
    assert any("events: the last line was cut off" in n for n in r.notes)
    assert any("not closed" in n for n in r.notes)


def test_zero_filled_tail_after_power_loss(tmp_path):
    p = make_session(tmp_path)
    with open(tel_file(p), "ab") as fh:
        fh.write(b"\x00" * 4096)
    with open(p / "events.jsonl", "ab") as fh:
        fh.write(b"\x00" * 512)
    r = read_session(p)
    assert r.experiments["e01"].recovered_rows == 100
    assert len(r.events) == 4


def test_corrupted_rows_in_the_middle_are_skipped_with_line_numbers(tmp_path):
    p = make_session(tmp_path)
    lines = tel_file(p).read_bytes().split(b"\n")
    lines[10] = b"garbage,not,a,row"
    lines[20] = lines[20][:5] + b"\xff\xfe" + lines[20][7:]
    tel_file(p).write_bytes(b"\n".join(lines))
    x = read_session(p).experiments["e01"]
    assert x.recovered_rows == 98
    assert any("2 damaged row(s) skipped (file line 11, 21)" in n for n in x.notes)
    assert 8 not in x.columns["counter"] and 18 not in x.columns["counter"]


def test_corrupted_event_line_is_skipped(tmp_path):
    p = make_session(tmp_path)
    lines = (p / "events.jsonl").read_text().split("\n")
    lines[1] = "{not json"
    (p / "events.jsonl").write_text("\n".join(lines))
    r = read_session(p)
    assert len(r.events) == 3
    assert any("1 damaged line(s) skipped (line 2)" in n for n in r.notes)


@pytest.mark.parametrize("version", ["2.0", "0.9"])
def test_unknown_major_version_is_refused(tmp_path, version):
    p = make_session(tmp_path)
    m = json.loads((p / "manifest.json").read_text())
    m["format_version"] = version
    (p / "manifest.json").write_text(json.dumps(m))
    with pytest.raises(LogbookVersionError) as err:
        read_session(p)
    msg = str(err.value)
    assert f"format {version}" in msg and "reads format 1.x only" in msg


def test_newer_minor_version_is_read_with_a_note(tmp_path):
    p = make_session(tmp_path)
    m = json.loads((p / "manifest.json").read_text())
    m["format_version"] = "1.7"
    (p / "manifest.json").write_text(json.dumps(m))
    r = read_session(p)
    assert r.experiments["e01"].recovered_rows == 100
    assert any("newer than this reader" in n for n in r.notes)


def test_wrong_version_in_telemetry_header_is_refused(tmp_path):
    p = make_session(tmp_path)
    data = tel_file(p).read_bytes().replace(b"telemetry 1.0;", b"telemetry 3.1;", 1)
    tel_file(p).write_bytes(data)
    with pytest.raises(LogbookVersionError, match="format 3.1"):
        read_session(p)


def test_not_a_session_and_damaged_manifest(tmp_path):
    with pytest.raises(LogbookError, match="no session folder"):
        read_session(tmp_path / "nowhere")
    (tmp_path / "empty").mkdir()
    with pytest.raises(LogbookError, match="not a tetherloop session: it has no manifest"):
        read_session(tmp_path / "empty")
    p = make_session(tmp_path)
    (p / "manifest.json").write_text('{"format": "tetherloop-logbook", "format_v')
    with pytest.raises(LogbookError, match="damaged .*not valid JSON.*plain CSV"):
        read_session(p)
    (p / "manifest.json").write_text('{"format": "something-else", "format_version": "1.0"}')
    with pytest.raises(LogbookError, match="not a tetherloop logbook file"):
        read_session(p)


def test_missing_meta_or_damaged_results_still_give_telemetry(tmp_path):
    p = make_session(tmp_path)
    (p / "e01" / "meta.json").unlink()
    (p / "e01" / "results.json").write_text("{")
    x = read_session(p).experiments["e01"]
    assert x.recovered_rows == 100 and x.meta == {} and x.result is None
    assert any("meta.json is missing" in n for n in x.notes)
    assert any("results.json" in n and "damaged" in n for n in x.notes)


def test_empty_telemetry_file(tmp_path):
    p = make_session(tmp_path, rows=0)
    tel_file(p).write_bytes(b"")
    x = read_session(p).experiments["e01"]
    assert x.recovered_rows == 0 and any("empty" in n for n in x.notes)
    assert set(x.columns) >= {"time_us", "measurement"}


def test_header_cut_off_while_the_experiment_began(tmp_path):
    p = make_session(tmp_path, rows=0)
    tel_file(p).write_bytes(tel_file(p).read_bytes()[:70])
    x = read_session(p).experiments["e01"]
    assert x.recovered_rows == 0 and any("header was cut off" in n for n in x.notes)
    tel_file(p).write_bytes(b"time,value\n1,2\n")
    with pytest.raises(LogbookError, match="not a tetherloop telemetry file"):
        read_session(p)


def test_numpy_and_csv_module_read_the_file_as_documented(tmp_path):
    p = make_session(tmp_path)
    x = read_session(p).experiments["e01"]
    # the two reading recipes printed in FORMAT.md
    table = np.loadtxt(tel_file(p), delimiter=",", skiprows=2)
    assert table.shape == (100, 11)
    assert np.array_equal(table[:, 8].astype(np.float32), x.columns["measurement"])
    named = np.genfromtxt(tel_file(p), delimiter=",", names=True, skip_header=1)
    assert np.array_equal(named["counter"], np.arange(100))
    with open(tel_file(p), newline="") as fh:
        rows = list(csv.reader(fh))
    assert rows[1][:3] == ["host_time_s", "time_us", "counter"] and len(rows) == 102
    assert rows[0][0].startswith("# tetherloop-logbook telemetry 1.0")


def test_list_sessions_shows_what_and_how_it_ended(tmp_path):
    a = make_session(tmp_path, name="a")
    b = make_session(tmp_path, name="b", close=False)
    with open(b / "events.jsonl", "a") as fh:
        fh.write('{"seq": 5, "kind": "kill_tripped", "host_time_s": 1.0, "device_time_us": 9}\n'
                 '{"seq": 6, "kind": "kill_cleared", "host_time_s": 2.0, "device_time_us": 10}\n')
    (a / "e01" / "results.json").write_text(json.dumps(
        {"format": "tetherloop-logbook", "format_version": "1.0", "result": {"chosen": {"kp": 1}}}))
    (tmp_path / "c").mkdir()
    (tmp_path / "c" / "manifest.json").write_text("{broken")
    (tmp_path / "not-a-session").mkdir()
    found = {s.name: s for s in list_sessions(tmp_path)}
    assert set(found) == {"a", "b", "c"}
    assert found["a"].outcome == "completed" and found["a"].tuned == ["roll.angle"]
    assert found["a"].device == "rdr (1)" and found["a"].experiments == 1
    assert found["a"].kills == 0 and found["b"].kills == 1
    assert "not closed" in found["b"].outcome and found["b"].path == b
    assert found["b"].tuned == ["roll.angle (no gains)"]
    assert found["c"].problem and "damaged" in found["c"].problem
    with pytest.raises(LogbookError, match="does not exist"):
        list_sessions(tmp_path / "missing")
