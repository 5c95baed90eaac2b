"""Operator commands outside a run, as a user types them, against the simulated board on a
pty: status, disarm, kill-clear, gains --export, settings --apply, restore."""

from __future__ import annotations

import json

import pytest

from agent.settingsfile import FORMAT_NAME, format_settings, parse_settings
from agent.errors import UserError
from protocol.messages import DeviceState
from tests.conftest import run_cli, wait_for




def test_status_reports_state_and_read_back_gains(mock_pty):
    h = mock_pty("single-axis", speed=5.0)
    r = run_cli("status", "--port", h.port, "--json")
    assert r.returncode == 0, r.stderr
    st = json.loads(r.stdout)
    assert st["state"] == "disarmed" and st["device_id"] == h.firmware.scenario.device_id
    assert st["gains"]["roll.rate"]["kp"] == pytest.approx(
        h.firmware.settings.values["roll.rate.kp"])


def test_kill_clear_needs_the_cautions_and_clears(mock_pty):
    h = mock_pty("single-axis", speed=5.0)
    h.firmware.press_kill_button()  # taken at the board's next tick
    assert wait_for(lambda: h.firmware.state == DeviceState.KILLED, 10)
    r = run_cli("kill-clear", "--port", h.port)  # no terminal, no --confirm-safe
    assert r.returncode == 2 and "confirmation" in r.stderr
    assert h.firmware.state == DeviceState.KILLED
    r = run_cli("status", "--port", h.port)
    assert "KILLED" in r.stdout and "kill-clear" in r.stdout
    r = run_cli("kill-clear", "--port", h.port, "--confirm-safe")
    assert r.returncode == 0, r.stderr
    assert h.firmware.state == DeviceState.DISARMED
    assert "Eye protection" in r.stdout or "eye protection" in r.stdout.lower()


def test_disarm_from_the_command_line(mock_pty):
    h = mock_pty("single-axis", speed=5.0)
    r = run_cli("disarm", "--port", h.port)
    assert r.returncode == 0 and "disarmed" in r.stdout
    assert h.firmware.state == DeviceState.DISARMED


def test_exported_gains_apply_back_all_or_nothing(mock_pty, tmp_path):
    h = mock_pty("single-axis", speed=5.0)
    out = tmp_path / "gains.toml"
    r = run_cli("gains", "--port", h.port, "--export", str(out))
    assert r.returncode == 0, r.stderr
    doc = parse_settings(out.read_text())
    assert doc.values["roll.rate.kp"] == pytest.approx(h.firmware.settings.values["roll.rate.kp"],
                                                       rel=1e-6)  # float32 on the wire
    # change one gain on the board, then put the file back
    original = h.firmware.settings.values["roll.rate.kp"]
    assert run_cli("settings", "--port", h.port, "--set",
                   f"roll.rate.kp={original * 2}").returncode == 0
    r = run_cli("settings", "--port", h.port, "--apply", str(out))
    assert r.returncode == 0, r.stderr
    assert h.firmware.settings.values["roll.rate.kp"] == pytest.approx(original)
    # a file with one value out of bounds writes nothing
    bad = dict(doc.values)
    bad["roll.rate.kp"] = 1e9
    bad["roll.rate.ki"] = doc.values["roll.rate.ki"] * 3
    path = tmp_path / "bad.toml"
    path.write_text(format_settings(doc.device_id, bad))
    r = run_cli("settings", "--port", h.port, "--apply", str(path))
    assert r.returncode == 2 and "nothing was written" in r.stderr and "roll.rate.kp" in r.stderr
    assert h.firmware.settings.values["roll.rate.ki"] == pytest.approx(doc.values["roll.rate.ki"])
    # refusing to overwrite an existing export
    r = run_cli("gains", "--port", h.port, "--export", str(out))
    assert r.returncode == 2 and "exists" in r.stderr


def test_a_settings_file_from_another_board_is_refused(mock_pty, tmp_path):
    h = mock_pty("single-axis", speed=5.0)
    path = tmp_path / "other.toml"
    path.write_text(format_settings("some-other-board", {"roll.rate.kp": 0.1}))
    r = run_cli("settings", "--port", h.port, "--apply", str(path))
    assert r.returncode == 2 and "some-other-board" in r.stderr


def test_restore_writes_back_what_a_session_started_from(mock_pty, tmp_path):
    h = mock_pty("single-axis", speed=5.0)
    start = dict(h.firmware.settings.values)
    r = run_cli("tune", "--port", h.port, "--axis", "roll", "--loop", "rate", "--apply",
                "--confirm-safe", "--json", log_dir=tmp_path)
    assert r.returncode == 0, r.stderr
    session = json.loads(r.stdout)["session"]
    assert h.firmware.settings.values["roll.rate.kp"] != start["roll.rate.kp"]
    r = run_cli("restore", session, "--port", h.port, "--json", log_dir=tmp_path)
    assert r.returncode == 0, r.stderr
    for k in ("kp", "ki", "kd"):
        assert h.firmware.settings.values[f"roll.rate.{k}"] == pytest.approx(start[f"roll.rate.{k}"])
    assert "roll.rate.kp" in json.loads(r.stdout)["written"]


def test_settings_files_are_checked_before_anything():
    with pytest.raises(UserError, match="not a tetherloop settings file"):
        parse_settings('format = "x"\n')
    with pytest.raises(UserError, match="not a finite number"):
        parse_settings(f'format = "{FORMAT_NAME}"\nformat_version = 1\n[settings]\n"a.b" = nan\n')
    text = format_settings("b1", {"roll.rate.kp": 0.123456789012345})
    assert parse_settings(text).values == {"roll.rate.kp": 0.123456789012345}
