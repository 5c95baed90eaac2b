"""The mock board's non-volatile settings store, used as a user would: `tetherloop mock --store`
on a pty, `tetherloop settings --set ... --persist`, restart, read back."""

from __future__ import annotations

import json
import subprocess
import sys

import pytest

from mock_device.runner import start_mock
from mock_device.store import FORMAT, StoreError, load_store
from protocol.messages import RefuseCode
from tests.conftest import run_cli


def start_mock_cli(*args):
    """`tetherloop mock ... --pty` in a child process; returns (process, pty path)."""
    proc = subprocess.Popen([sys.executable, "-m", "agent.cli", "mock", "--pty", *args],
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    line = proc.stdout.readline().strip()
    if not line:
        proc.wait(10)
        raise AssertionError(proc.stderr.read())
    return proc, line


def stop(proc):
    proc.terminate()
    proc.wait(10)


def test_persisted_setting_survives_a_restart_of_the_mock(tmp_path):
    store = tmp_path / "board.json"
    proc, port = start_mock_cli("--scenario", "gimbal-quad", "--store", str(store))
    try:
        r = run_cli("settings", "--port", port, "--set", "roll.rate.kp=0.123", "--persist")
        assert r.returncode == 0, r.stderr
        assert "non-volatile" in r.stdout
    finally:
        stop(proc)
    doc = json.loads(store.read_text())
    assert doc["format"] == FORMAT and doc["device_id"] == "mock-gimbal-quad"
    assert doc["values"]["roll.rate.kp"] == pytest.approx(0.123)

    proc, port = start_mock_cli("--scenario", "gimbal-quad", "--store", str(store))
    try:
        r = run_cli("settings", "--port", port, "--json", "--filter", "roll.rate.kp")
        assert r.returncode == 0, r.stderr
        vals = {s["name"]: s["value"] for s in json.loads(r.stdout)["settings"]}
        assert vals["roll.rate.kp"] == pytest.approx(0.123)
    finally:
        stop(proc)


def test_written_but_not_persisted_is_lost_on_restart(tmp_path):
    store = tmp_path / "board.json"
    with start_mock("gimbal-quad", transport="pty", speed=1.0, store=store) as h:
        default = h.firmware.settings.values["roll.rate.kp"]
        r = run_cli("settings", "--port", h.port, "--set", "roll.rate.kp=0.2")
        assert r.returncode == 0, r.stderr
    assert not store.exists()
    with start_mock("gimbal-quad", transport="pty", speed=1.0, store=store) as h:
        assert h.firmware.settings.values["roll.rate.kp"] == default


@pytest.mark.parametrize("content, words", [
    ("{not json", "cannot be read as JSON"),
    ('{"format": "something-else"}', "not a tetherloop mock store"),
    (json.dumps({"format": FORMAT, "format_version": 1, "device_id": "mock-heave-rail",
                 "values": {}}), "one store file per scenario"),
    (json.dumps({"format": FORMAT, "format_version": 1, "device_id": "mock-gimbal-quad",
                 "values": {"roll.rate.kp": "fast"}}), "not a finite number"),
    (json.dumps({"format": FORMAT, "format_version": 1, "device_id": "mock-gimbal-quad",
                 "values": {"roll.rate.kp": 1e9}}), "roll.rate.kp"),
    (json.dumps({"format": FORMAT, "format_version": 1, "device_id": "mock-gimbal-quad",
                 "values": {"no.such.setting": 1.0}}), "no.such.setting"),
])
def test_bad_store_file_is_refused_and_left_untouched(tmp_path, content, words):
    store = tmp_path / "board.json"
    store.write_text(content)
    r = subprocess.run([sys.executable, "-m", "agent.cli", "mock", "--pty", "--scenario",
                        "gimbal-quad", "--store", str(store)], capture_output=True, text=True,
                       timeout=60)
    assert r.returncode == 2
    assert words in r.stderr and "error:" in r.stderr
    assert r.stdout == ""  # no port was offered
    assert store.read_text() == content


def test_load_store_of_a_missing_file_is_empty(tmp_path):
    assert load_store(tmp_path / "new.json", "mock-gimbal-quad") == {}
    with pytest.raises(StoreError):
        (tmp_path / "x.json").write_text("[]")
        load_store(tmp_path / "x.json", "mock-gimbal-quad")


def test_persist_that_cannot_write_is_refused_and_says_so(tmp_path):
    blocker = tmp_path / "file"
    blocker.write_text("")
    store = blocker / "board.json"  # its folder is a file: the write fails
    with start_mock("gimbal-quad", transport="pty", speed=1.0, store=store) as h:
        r = run_cli("settings", "--port", h.port, "--set", "roll.rate.kp=0.2", "--persist")
        assert r.returncode != 0
        assert "STORAGE" in r.stderr and "persist failed" in r.stderr
        assert h.firmware.persisted is None
        assert h.firmware.stats["refused"] >= 1
    assert RefuseCode.STORAGE == 15


def test_autotune_plan_with_persist_stores_the_verified_gains(tmp_path):
    store = tmp_path / "board.json"
    plan = tmp_path / "plan.toml"
    plan.write_text('[stand]\napply = true\npersist = true\n\n'
                    '[[loop]]\naxis = "roll"\nloop = "rate"\n')
    with start_mock("gimbal-quad", transport="pty", speed=10.0, seed=2, store=store) as h:
        r = run_cli("autotune", "--port", h.port, "--plan", str(plan), "--json",
                    "--confirm-safe", log_dir=tmp_path / "logs")
        assert r.returncode in (0, 4), r.stderr[-2000:]
        on_board = dict(h.firmware.settings.values)
    saved = load_store(store, "mock-gimbal-quad")
    assert saved, "the plan asked to persist but nothing was stored"
    for name in ("roll.rate.kp", "roll.rate.ki", "roll.rate.kd"):
        assert saved[name] == pytest.approx(on_board[name])
    events = [json.loads(line) for line in
              next((tmp_path / "logs").iterdir()).joinpath("events.jsonl").read_text().splitlines()]
    assert any(e["kind"] == "persisted" for e in events)
