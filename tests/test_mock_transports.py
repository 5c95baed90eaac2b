"""The mock as a user meets it: over a real pseudo-terminal with pyserial, over TCP, in-process,
and the ``tetherloop mock`` command. No timed asserts: waits have generous time-outs only."""

from __future__ import annotations

import os
import signal
import subprocess
import sys
import time

import pytest
import serial

from mock_device.faults import FaultConfig
from mock_device.hostclient import HostClient
from mock_device.runner import parse_speed, start_mock
from protocol import messages as M
from protocol.messages import EventKind as EK


def _session(port_obj, relay_axis=M.Axis.ROLL):
    """identify, discover settings, arm, relay with telemetry, disarm; returns the client."""
    c = HostClient(port_obj)
    hello = c.request(M.Hello(host_name="pytest"))
    assert isinstance(hello.msg, M.HelloReply)
    names = [c.request(M.SettingDescribe(index=i)).msg.name
             for i in range(hello.msg.setting_count)]
    assert "roll.rate.kp" in names and "watchdog_s" in names
    assert isinstance(c.arm().msg, M.Ack)
    assert isinstance(c.request(M.TelemetryConfig(rate_hz=200, axis_mask=1 << relay_axis,
                                                  loop=0)).msg, M.Ack)
    r = c.request(M.ExperimentStart(tag=21, kind=M.ExperimentKind.RELAY, axis=relay_axis,
                                    loop=M.Loop.RATE, amplitude=0.1, duration_s=0.6))
    assert isinstance(r.msg, M.Ack)
    fin = None
    end = time.monotonic() + 20
    while fin is None and time.monotonic() < end:
        c.send(M.Keepalive(host_time_ms=0))
        c.poll(0.05)
        fin = next((e for e in c.events if e.kind == EK.EXPERIMENT_FINISHED), None)
    assert fin is not None and fin.reason == M.FinishReason.DURATION_LIMIT and fin.tag == 21
    relay_samples = [t for t in c.telemetry if t.tag == 21]
    assert len(relay_samples) > 20
    assert {s.axes[0].relay for s in relay_samples} == {1, -1}
    assert isinstance(c.request(M.Disarm()).msg, M.Ack)
    kinds = [e.kind for e in c.events]
    assert kinds[:3] == [EK.STATE_CHANGED, EK.EXPERIMENT_STARTED, EK.STATE_CHANGED]
    return c


def test_pyserial_session_over_a_real_pty():
    with start_mock("gimbal-quad", transport="pty", speed=2.0, seed=1) as h:
        assert h.port.startswith("/dev/")
        with serial.Serial(h.port, 115200, timeout=0.05) as s:
            _session(s)
        assert h.firmware.state == M.DeviceState.DISARMED
        assert h.error is None


def test_raw_pty_passes_every_byte_value_untouched():
    # bytes 0x00, 0x11, 0x13, CR, LF must pass a raw pty (common practice, no source)
    with start_mock("single-axis", transport="pty", speed=1.0) as h:
        with serial.Serial(h.port, 115200, timeout=0.05) as s:
            c = HostClient(s)
            # a host name full of bytes a cooked tty would eat or translate
            r = c.request(M.Hello(host_name="\r\n\x11\x13\x03\x04\x1a\x7f"))
            assert isinstance(r.msg, M.HelloReply)
            assert h.firmware.server.decoder.stats.bad == 0


def test_session_over_tcp():
    with start_mock("single-axis", transport="tcp", speed=5.0, seed=2) as h:
        assert h.port.startswith("socket://127.0.0.1:")
        s = serial.serial_for_url(h.port, timeout=0.05)
        try:
            _session(s)
        finally:
            s.close()


def test_session_in_process():
    with start_mock("single-axis", transport="inproc", speed=5.0, seed=3) as h:
        _session(h.port)


def test_pty_with_nobody_reading_never_blocks_the_tick():
    with start_mock("gimbal-quad", transport="pty", speed="max") as h:
        h.firmware.configure_telemetry(1000)  # about 50 kB/s of device time, nobody reads
        end = time.monotonic() + 30
        while h.firmware.tick_count < 20_000 and time.monotonic() < end:
            time.sleep(0.05)
        assert h.firmware.tick_count >= 20_000
        assert h.stats["bytes_dropped"] > 0
        assert h.running and h.error is None


def test_kill_button_through_the_runner():
    with start_mock("single-axis", transport="inproc", speed=1.0) as h:
        h.firmware.press_kill_button()
        c = HostClient(h.port)
        ev = c.wait_event(EK.KILL_TRIPPED, timeout_s=10)
        assert ev.reason == M.KillReason.KILL_BUTTON
        assert h.firmware.state == M.DeviceState.KILLED


def test_watchdog_runs_on_wall_time_even_at_max_speed():
    # an accelerated device must not expire the watchdog faster than the host's wall clock
    with start_mock("single-axis", transport="inproc", speed="max") as h:
        c = HostClient(h.port)
        assert isinstance(c.arm().msg, M.Ack)
        t_dev0 = h.firmware.device_time_s
        end = time.monotonic() + 0.2
        while time.monotonic() < end:
            c.send(M.Keepalive(host_time_ms=0))
            time.sleep(0.02)
        # many watchdog periods of device time passed, the link was never quiet
        assert h.firmware.device_time_s - t_dev0 > 2 * h.firmware.settings.get("watchdog_s")
        assert h.firmware.state == M.DeviceState.ARMED
        ev = c.wait_event(EK.KILL_TRIPPED, timeout_s=10)  # now the host is silent
        assert ev.reason == M.KillReason.WATCHDOG


def test_link_faults_corrupt_bytes_and_the_drop_cuts_the_link():
    cfg = FaultConfig(flip=0.02, drop_at_s=3.0)
    with start_mock("single-axis", transport="inproc", speed=5.0, seed=4, faults=cfg) as h:
        c = HostClient(h.port)
        c.send(M.TelemetryConfig(rate_hz=200, axis_mask=1, loop=0))
        end = time.monotonic() + 20
        while h.firmware.device_time_s < 3.5 and time.monotonic() < end:
            c.send(M.TelemetryConfig(rate_hz=200, axis_mask=1, loop=0))
            c.poll(0.05)
        assert h.firmware.device_time_s >= 3.5
        assert c.decoder.stats.bad > 0  # corrupted frames were seen and dropped
        c.poll(0.2)
        n = len(c.telemetry)
        time.sleep(0.3)
        c.poll(0.05)
        assert len(c.telemetry) == n  # after the drop nothing arrives


def test_faults_from_a_mapping_are_checked():
    with pytest.raises(ValueError, match="unknown fault key"):
        FaultConfig.from_mapping({"noise": 1})
    with pytest.raises(ValueError, match="probability"):
        FaultConfig(loss=2.0)


def test_speed_parsing():
    assert parse_speed("realtime") == 1.0
    assert parse_speed("10") == 10.0
    assert parse_speed("max") == float("inf")
    with pytest.raises(ValueError, match="expected 'realtime'"):
        parse_speed("fast-ish")


def _cli(*args, full=False):
    """``tetherloop mock ARGS`` (full=True: through the whole tetherloop CLI, slower to start),
    else the same subcommand through mock_device.cli's stand-alone entry."""
    mod = "agent.cli" if full else "mock_device.cli"
    return [sys.executable, "-m", mod, "mock", *args]


def test_cli_list():
    out = subprocess.run(_cli("--list"), capture_output=True, text=True, timeout=60)
    assert out.returncode == 0
    lines = out.stdout.strip().splitlines()
    assert any(line.startswith("gimbal-quad ") for line in lines)
    assert all("INVENTED" in line for line in lines)


def test_cli_bad_scenario_is_a_clear_error():
    out = subprocess.run(_cli("--scenario", "nope", "--pty"), capture_output=True, text=True,
                         timeout=60)
    assert out.returncode == 2
    assert "no scenario named 'nope'" in out.stderr and "Traceback" not in out.stderr


def test_cli_pty_prints_the_path_first_and_serves_until_interrupted():
    proc = subprocess.Popen(_cli("--scenario", "single-axis", "--pty", "--speed", "2", full=True),
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    try:
        path = proc.stdout.readline().strip()
        assert path.startswith("/dev/") and os.path.exists(path)
        with serial.Serial(path, 115200, timeout=0.05) as s:
            c = HostClient(s)
            r = c.request(M.Hello(host_name="cli test"), timeout_s=10)
            assert r.msg.device_id == "mock-single-axis"
        proc.send_signal(signal.SIGINT)
        assert proc.wait(timeout=20) == 0
        assert "stopped after" in proc.stderr.read()
    finally:
        if proc.poll() is None:
            proc.kill()
            proc.wait()


def test_a_slow_reader_slows_an_accelerated_clock_instead_of_losing_frames():
    from protocol import codec
    with start_mock("gimbal-quad", transport="pty", speed="max") as h:
        with serial.Serial(h.port, 115200, timeout=0) as s:
            dec = codec.StreamDecoder()
            h.firmware.configure_telemetry(1000)
            counters = []
            while len(counters) < 3000:
                data = s.read(2048)  # a deliberately slow reader: 2 kB per 5 ms
                counters += [f.msg.counter for f in dec.feed(data)
                             if isinstance(f.msg, M.Telemetry)]
                time.sleep(0.005)
        assert h.stats["backpressure_pauses"] > 0
        assert h.stats["bytes_dropped"] == 0
        assert counters == list(range(counters[0], counters[0] + len(counters)))
