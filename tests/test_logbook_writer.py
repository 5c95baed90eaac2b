"""Logbook writer: layout, exact round trip, flush/fsync policy, refusals before arming."""

from __future__ import annotations

import errno
import json
import os
from pathlib import Path

import numpy as np
import pytest

from agent.logbook import (Logbook, LogbookError, default_log_dir, read_session)
from agent.logbook import writer as writer_mod
from protocol.messages import AxisSample, Event, EventKind, KillReason, Telemetry


def f32(x: float) -> float:
    return float(np.float32(x))


def tel(k: int, n_axes: int = 2) -> Telemetry:
    axes = tuple(AxisSample(a, 0, f32(0.1 * a), f32(np.sin(0.01 * k + a) / 3.0),
                            f32(-0.25 + 1e-7 * k), 1 if (k // 10) % 2 else -1)
                 for a in range(n_axes))
    return Telemetry(time_us=1_000_000 + 500 * k, counter=k, state=2, tag=7, axes=axes)


def open_session(tmp_path: Path, **book_kw):
    book = Logbook(tmp_path / "logs", min_free_bytes=0, **book_kw)
    return book.open_session(
        device={"device_id": "test-board", "firmware_version": "t-1"},
        settings_before={"roll.rate.kp": 0.05}, plan={"axes": ["roll"], "limit_rad": 0.5},
        tool_version="9.9.9", protocol_version="1.0", name="s1",
        confirmations={"props_off": True})


def test_layout_manifest_events_and_exact_round_trip(tmp_path):
    s = open_session(tmp_path)
    e = s.experiment("e01", {"kind": "relay", "axis": 0, "loop": 0, "axis_name": "roll",
                             "loop_name": "rate"})
    sent = [tel(k) for k in range(1234)]
    for k, t in enumerate(sent):
        e.append(1_700_000_000.0 + k * 5e-4, t)
    s.event("kill_tripped", device_time_us=1_300_000, reason="rate_limit", value=9.5)
    e.result({"identification": {"ku": 1.25}, "chosen": {"kp": 0.1}})
    e.close()
    s.update_manifest(settings_after={"roll.rate.kp": 0.1})
    s.close("completed")

    assert sorted(p.name for p in s.path.iterdir()) == ["e01", "events.jsonl", "manifest.json"]
    assert sorted(p.name for p in (s.path / "e01").iterdir()) == [
        "meta.json", "results.json", "telemetry.csv"]
    r = read_session(s.path)
    assert r.notes == []
    m = r.manifest
    assert (m["tool_version"], m["protocol_version"], m["outcome"]) == ("9.9.9", "1.0",
                                                                         "completed")
    assert m["settings_before"] == {"roll.rate.kp": 0.05}
    assert m["settings_after"] == {"roll.rate.kp": 0.1}
    assert m["plan"]["limit_rad"] == 0.5 and m["confirmations"] == {"props_off": True}
    assert m["experiments"] == [{"id": "e01", "kind": "relay", "axis_name": "roll",
                                 "loop_name": "rate", "closed": True, "rows": 2468}]
    kinds = [ev["kind"] for ev in r.events]
    assert kinds == ["session_opened", "experiment_opened", "kill_tripped", "session_closed"]
    kill = r.events[2]
    assert kill["device_time_us"] == 1_300_000 and kill["reason"] == "rate_limit"
    assert isinstance(kill["host_time_s"], float)
    assert [ev["seq"] for ev in r.events] == [1, 2, 3, 4]

    x = r.experiments["e01"]
    assert x.recovered_rows == 2468 and x.meta["loop_name"] == "rate"
    assert x.result == {"identification": {"ku": 1.25}, "chosen": {"kp": 0.1}}
    roll = x.axis(0)
    # every f32 from the wire comes back bit-exact (common practice, no source: '%.9g' holds
    # any binary32 exactly)
    want = np.array([t.axes[0].measurement for t in sent])
    assert np.array_equal(roll["measurement"], want)
    assert np.array_equal(roll["output"], [t.axes[0].output for t in sent])
    assert np.array_equal(roll["counter"], np.arange(1234))
    assert np.array_equal(roll["time_us"], [t.time_us for t in sent])
    assert np.array_equal(x.axis(1)["setpoint"], np.full(1234, f32(0.1)))
    assert roll["relay"].dtype == np.int64 and set(roll["relay"]) == {-1, 1}
    assert np.allclose(roll["host_time_s"], 1_700_000_000.0 + np.arange(1234) * 5e-4,
                       atol=1e-6, rtol=0)


def test_default_log_dir_follows_env_then_xdg_then_home(monkeypatch, tmp_path):
    monkeypatch.setenv("TETHERLOOP_LOG_DIR", str(tmp_path / "a"))
    monkeypatch.setenv("XDG_DATA_HOME", str(tmp_path / "x"))
    assert default_log_dir() == tmp_path / "a"
    monkeypatch.delenv("TETHERLOOP_LOG_DIR")
    assert default_log_dir() == tmp_path / "x" / "tetherloop" / "logs"
    monkeypatch.setenv("XDG_DATA_HOME", "relative/ignored")  # XDG: relative paths are invalid
    monkeypatch.setenv("HOME", str(tmp_path / "h"))
    assert default_log_dir() == tmp_path / "h" / ".local" / "share" / "tetherloop" / "logs"
    monkeypatch.delenv("XDG_DATA_HOME")
    assert default_log_dir() == tmp_path / "h" / ".local" / "share" / "tetherloop" / "logs"


def test_existing_session_folder_is_refused_and_left_alone(tmp_path):
    s = open_session(tmp_path)
    s.close("completed")
    before = (s.path / "manifest.json").read_bytes()
    with pytest.raises(LogbookError, match="already exists.*never overwritten"):
        open_session(tmp_path)
    assert (s.path / "manifest.json").read_bytes() == before


def test_default_names_never_collide(tmp_path):
    book = Logbook(tmp_path, min_free_bytes=0)
    kw = dict(device={"device_id": "b/1 x"}, settings_before={}, plan={}, tool_version="0",
              protocol_version="1.0")
    a = book.open_session(**kw)
    b = book.open_session(**kw)
    assert a.path != b.path and a.path.parent == b.path.parent == tmp_path
    assert "b-1-x" in a.name  # the device id made folder-safe
    a.close("completed")
    b.close("completed")


def test_unwritable_log_folder_is_refused_with_a_sentence(tmp_path):
    blocker = tmp_path / "file"
    blocker.write_text("not a folder")
    with pytest.raises(LogbookError) as err:
        Logbook(blocker / "logs", min_free_bytes=0).check_ready()
    assert str(blocker / "logs") in str(err.value) and "--log-dir" in str(err.value)
    with pytest.raises(LogbookError, match="not a folder"):
        Logbook(blocker, min_free_bytes=0).check_ready()


def test_permission_denied_is_explained(tmp_path, monkeypatch):
    real_open = os.open

    def deny(path, flags, *a):
        if ".write-probe" in str(path):
            raise PermissionError(errno.EACCES, "Permission denied")
        return real_open(path, flags, *a)
    monkeypatch.setattr(writer_mod.os, "open", deny)
    with pytest.raises(LogbookError, match="not writable"):
        Logbook(tmp_path, min_free_bytes=0).check_ready()


def test_too_little_free_space_is_refused_before_anything(tmp_path):
    book = Logbook(tmp_path / "logs", min_free_bytes=1 << 62)
    with pytest.raises(LogbookError, match="MB are free.*needs at least"):
        book.open_session(device={}, settings_before={}, plan={}, tool_version="0",
                          protocol_version="1.0", name="x")
    assert not (tmp_path / "logs" / "x").exists()


def test_disk_full_mid_run_keeps_written_rows_whole(tmp_path, monkeypatch):
    s = open_session(tmp_path, flush_rows=10)
    e = s.experiment("e01", {"kind": "hold"})
    for k in range(50):
        e.append(1.0 + k, tel(k))  # 100 rows, flushed every 10
    real = writer_mod._write_all

    def full(fd, data):
        os.write(fd, data[: len(data) // 2])  # the disk takes half a buffer, then fills up
        raise OSError(errno.ENOSPC, "No space left on device")
    monkeypatch.setattr(writer_mod, "_write_all", full)
    with pytest.raises(LogbookError, match="disk is full"):
        for k in range(50, 60):
            e.append(1.0 + k, tel(k))
    with pytest.raises(LogbookError, match="disk is full"):  # and stays failed
        e.append(99.0, tel(99))
    monkeypatch.setattr(writer_mod, "_write_all", real)
    s.event("experiment_aborted", why="disk full")  # events still go out
    with pytest.raises(LogbookError):
        s.close("aborted: disk full")
    r = read_session(s.path)
    x = r.experiments["e01"]
    assert x.recovered_rows == 100 and not any("cut off" in n for n in r.notes)
    assert np.array_equal(x.axis(0)["counter"], np.arange(50))
    assert r.manifest["outcome"] == "aborted: disk full"


def test_buffer_is_written_after_the_interval_without_new_samples(tmp_path, monkeypatch):
    s = open_session(tmp_path, flush_rows=10_000, flush_interval_s=0.1)
    e = s.experiment("e01", {"kind": "hold"})
    clock = [1000.0]
    monkeypatch.setattr(writer_mod.time, "monotonic", lambda: clock[0])
    e.append(1.0, tel(0))
    e.append(1.0, tel(1))
    size = (e.path / "telemetry.csv").stat().st_size
    e._flush_if_due()  # what the background flusher calls
    assert (e.path / "telemetry.csv").stat().st_size == size  # not due yet
    clock[0] += 0.1
    e._flush_if_due()
    assert read_session(s.path).experiments["e01"].recovered_rows == 4
    s.close("completed")


def test_append_writes_when_the_interval_has_passed(tmp_path, monkeypatch):
    s = open_session(tmp_path, flush_rows=10_000, flush_interval_s=0.1)
    e = s.experiment("e01", {"kind": "hold"})
    s._stop.set()  # only append's own check runs here (no background flusher)
    s._flusher.join()
    clock = [5.0]
    monkeypatch.setattr(writer_mod.time, "monotonic", lambda: clock[0])
    e.append(1.0, tel(0))
    clock[0] += 0.05
    e.append(1.0, tel(1))
    assert read_session(s.path).experiments["e01"].recovered_rows == 0
    clock[0] += 0.06
    e.append(1.0, tel(2))
    assert read_session(s.path).experiments["e01"].recovered_rows == 6
    s.close("completed")


def test_kill_event_flushes_and_fsyncs_first(tmp_path, monkeypatch):
    s = open_session(tmp_path, flush_rows=10_000, flush_interval_s=60.0, fsync_interval_s=60.0)
    e = s.experiment("e01", {"kind": "relay"})
    for k in range(20):
        e.append(1.0, tel(k))
    synced = []
    real_fsync = os.fsync
    monkeypatch.setattr(writer_mod.os, "fsync", lambda fd: (synced.append(fd), real_fsync(fd)))
    s.event("state_changed", state="armed")
    assert synced == [] and read_session(s.path).experiments["e01"].recovered_rows == 0
    s.event("kill_tripped", device_time_us=123, reason="angle_limit")
    assert len(synced) == 2  # the telemetry file and the event stream
    r = read_session(s.path)
    assert r.experiments["e01"].recovered_rows == 40 and r.events[-1]["kind"] == "kill_tripped"
    s.close("killed")


def test_device_event_names_kinds_and_reasons(tmp_path):
    s = open_session(tmp_path)
    ev = Event(time_us=42, kind=EventKind.KILL_TRIPPED, state=3, reason=KillReason.RATE_LIMIT,
               axis=0, value=f32(7.5), threshold=f32(6.0), tag=3, text="rate over limit")
    s.device_event(ev, host_time_s=12.5)
    s.close("killed")
    got = read_session(s.path).events[1]
    assert got["kind"] == "kill_tripped" and got["reason"] == "rate_limit"
    assert got["state"] == "killed" and got["device_time_us"] == 42
    assert (got["value"], got["threshold"], got["host_time_s"]) == (7.5, 6.0, 12.5)


def test_bad_input_gets_clear_errors(tmp_path):
    s = open_session(tmp_path)
    with pytest.raises(LogbookError, match="folder name"):
        s.experiment("../escape", {})
    s.experiment("e1", {})
    with pytest.raises(LogbookError, match="already exists"):
        s.experiment("e1", {})
    with pytest.raises(LogbookError, match="reserved"):
        s.event("note", seq=3)
    with pytest.raises(LogbookError, match="JSON"):
        s.event("note", thing=object())
    with pytest.raises(LogbookError, match="managed by the logbook"):
        s.update_manifest(experiments=[])
    with pytest.raises(LogbookError, match="folder name"):
        Logbook(tmp_path, min_free_bytes=0).open_session(
            device={}, settings_before={}, plan={}, tool_version="0", protocol_version="1",
            name="a/b")
    s.close("completed")
    with pytest.raises(LogbookError, match="closed"):
        s.event("late")


def test_manifest_updates_are_atomic_replacements(tmp_path):
    s = open_session(tmp_path)
    ino = (s.path / "manifest.json").stat().st_ino
    s.update_manifest(outcome_hint="x", settings_after={"a": 1.0})
    assert (s.path / "manifest.json").stat().st_ino != ino  # replaced, never rewritten in place
    assert not list(s.path.glob(".*tmp"))
    assert json.loads((s.path / "manifest.json").read_text())["settings_after"] == {"a": 1.0}
    s.close("completed")


def test_context_manager_records_an_abort(tmp_path):
    with pytest.raises(RuntimeError):
        with open_session(tmp_path) as s:
            raise RuntimeError("link lost")
    assert read_session(s.path).manifest["outcome"] == "aborted: RuntimeError: link lost"
