"""Kills from every source, over a real pty against the mock board."""

from __future__ import annotations

import math
import time

import pytest

from agent.safety import Limits
from agent.stand import KillTripped, Stand
from protocol.messages import DeviceState, ExperimentKind, KillReason


def wait_for(cond, timeout=10.0):
    end = time.monotonic() + timeout
    while time.monotonic() < end:
        if cond():
            return True
        time.sleep(0.005)
    return False


@pytest.fixture
def stand(mock_pty):
    h = mock_pty("gimbal-quad", speed=2.0)
    st = Stand.connect(h.port)
    st.confirmed = True
    st.mock_handle = h
    yield st
    st.close()


def relay(stand, **kill):
    params = dict(kill_angle_rad=3.0, kill_rate_rad_s=50.0, kill_heave_m=5.0,
                  kill_saturation_s=10.0)
    params.update(kill)
    stand.session.telemetry(1000, [0, 1, 2], 0)
    return stand.session.start_experiment(kind=ExperimentKind.RELAY, axis=0, loop=0,
                                          amplitude=0.4, hysteresis=0.03, bias=0.0,
                                          setpoint=0.0, duration_s=30.0, **params)


def test_host_monitor_kills_on_threshold(stand):
    fw = stand.mock_handle.firmware
    stand.monitor.limits = Limits(rate_rad_s=0.08)  # the host's limit is the tighter one
    stand.arm()
    stand.buffer.start()
    relay(stand)  # the device's own thresholds are far away
    stand.monitor.active = True
    assert wait_for(lambda: fw.state == DeviceState.KILLED)
    trip = stand.monitor.trips[-1]
    assert trip.reason == KillReason.HOST_MONITOR and abs(trip.value) > 0.08
    assert trip.latency_ms < 50  # written within the same reader callback (figure: bench)
    assert [e for e in fw.events if e.kind == 4][-1].reason == KillReason.HOST_MONITOR
    with pytest.raises(KillTripped):
        stand.check_kill()


def test_device_kills_on_threshold_and_outputs_go_to_zero(stand):
    fw = stand.mock_handle.firmware
    stand.monitor.limits = Limits(rate_rad_s=100.0)
    stand.arm()
    relay(stand, kill_rate_rad_s=0.08)
    assert wait_for(lambda: fw.state == DeviceState.KILLED)
    assert all(v == 0.0 for v in fw.outputs.values())
    assert wait_for(lambda: stand.kills)
    k = stand.kills[-1]
    assert k["origin"] == "device" and k["reason"] == "rate_limit"
    assert abs(k["value"]) > k["threshold"] == pytest.approx(0.08, rel=1e-6)


def test_device_kill_button_reaches_the_host(stand):
    stand.arm()
    stand.mock_handle.firmware.press_kill_button()
    assert wait_for(lambda: stand.kills)
    assert stand.kills[-1]["reason"] == "kill_button"
    assert stand.killed


@pytest.mark.parametrize("state", ["disarmed", "armed", "running", "killed"])
def test_operator_kill_works_in_every_state(stand, state):
    fw = stand.mock_handle.firmware
    if state in ("armed", "running", "killed"):
        stand.arm()
    if state == "running":
        relay(stand)
        assert wait_for(lambda: fw.state == DeviceState.RUNNING)
    if state == "killed":
        stand.kill()
        assert wait_for(lambda: fw.state == DeviceState.KILLED)
    n_before = len([e for e in fw.events if e.kind == 4])
    stand.kill(KillReason.HOST_OPERATOR)
    assert wait_for(lambda: fw.state == DeviceState.KILLED)
    assert wait_for(lambda: len([e for e in fw.events if e.kind == 4]) == n_before + 1)
    # latched: arming is refused until the kill is cleared
    from agent.session import SessionError
    with pytest.raises((SessionError, KillTripped)):
        stand.arm()
    stand.clear_kill()
    assert wait_for(lambda: fw.state == DeviceState.DISARMED)
