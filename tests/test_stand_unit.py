"""Unit tests of agent.stand over the simulated board's in-process port (no pty): connecting,
arming behind the confirmation, kills from every side, and the experiment buffer."""

from __future__ import annotations

import dataclasses
import threading

import numpy as np
import pytest

from agent.session import SessionError
from agent.stand import Buffer, KillTripped, Notice, Stand
from mock_device.runner import start_mock
from protocol import messages as m
from protocol.messages import DeviceState, KillReason
from tests.test_link import wait_for


@pytest.fixture
def rig():
    """(stand, firmware, host port) of the single-axis simulated board, in-process."""
    h = start_mock("single-axis", transport="inproc", speed=1.0, seed=5)
    h.port.timeout = 0.01  # the link's reader wakes often, so closing it does not wait
    st = Stand.connect(h.port)
    try:
        yield st, h.firmware, h.port
    finally:
        st.close()
        h.stop()


def notices(st: Stand, kind: Notice) -> list:
    """Start collecting the payloads of ``kind`` that the stand emits."""
    got: list = []
    st.listeners.append(lambda k, payload: got.append(payload) if k == kind else None)
    return got


def kill_raised(st: Stand):
    """The KillTripped that check_kill raises now, or None."""
    try:
        st.check_kill()
    except KillTripped as exc:
        return exc
    return None


def test_connect_identifies_the_board_and_arms_nothing(rig):
    st, fw, _ = rig
    assert st.info.device_id == "mock-single-axis"
    assert "roll.rate.kp" in st.session.settings
    assert st.state == DeviceState.DISARMED and fw.state == DeviceState.DISARMED
    assert st.monitor is not None and not st.monitor.active
    assert st.monitor.kill == st.session.kill
    assert not st.killed and kill_raised(st) is None


def test_arm_needs_the_cautions_confirmed(rig):
    st, fw, _ = rig
    states = notices(st, Notice.STATE)
    with pytest.raises(SessionError, match="safety cautions have not been confirmed"):
        st.arm()
    assert fw.state == DeviceState.DISARMED and states == []
    st.confirmed = True
    st.arm()
    assert fw.state == DeviceState.ARMED and states == ["armed"]
    st.disarm()
    assert fw.state == DeviceState.DISARMED and states == ["armed", "disarmed"]


def test_a_kill_from_another_thread_stops_the_board_and_the_workflow(rig):
    st, fw, _ = rig
    kills = notices(st, Notice.KILL)
    st.confirmed = True
    st.arm()
    threading.Thread(target=st.kill, name="operator-key").start()
    assert wait_for(lambda: fw.state == DeviceState.KILLED)
    assert wait_for(lambda: st.killed)
    # the host's kill and the board's report of it are both recorded (in either order: the
    # report can reach the reader thread before the killing thread records its own)
    assert wait_for(lambda: len(st.kills) == 2)
    assert sorted((k["origin"], k["reason"]) for k in st.kills) == [
        ("device", "host_operator"), ("host", "host_operator")]
    assert kills == st.kills
    err = kill_raised(st)
    assert err is not None and str(err).startswith("KILL: host_operator")
    with pytest.raises(KillTripped):
        st.arm()  # arming checks for a kill first
    st.clear_kill()
    assert fw.state == DeviceState.DISARMED and not st.killed and kill_raised(st) is None


def test_the_boards_own_kill_reaches_the_stand(rig):
    st, fw, _ = rig
    st.confirmed = True
    st.arm()
    st.monitor.active = True
    fw.press_kill_button()
    assert wait_for(lambda: st.kills)
    assert st.kills[-1]["origin"] == "device" and st.kills[-1]["reason"] == "kill_button"
    assert wait_for(lambda: not st.monitor.active)  # nothing more to watch: already killed
    assert kill_raised(st) is not None


def test_the_host_monitor_kills_through_the_stand(rig):
    st, fw, _ = rig
    st.confirmed = True
    st.arm()
    st.monitor.limits = dataclasses.replace(st.monitor.limits, rate_rad_s=1e-9)  # any motion
    st.session.telemetry(200, [0], 0)
    st.monitor.active = True
    assert wait_for(lambda: fw.state == DeviceState.KILLED)
    assert wait_for(lambda: st.kills)
    info = st.kills[0]
    assert (info["origin"], info["reason"]) == ("host", "host_monitor")
    assert abs(info["value"]) > info["threshold"] == pytest.approx(1e-9)
    assert info["latency_ms"] >= 0.0


def test_silence_while_recording_is_a_kill_and_idle_silence_is_not(rig):
    st, fw, _ = rig
    st.telemetry_timeout_s = 1.0
    st.last_telemetry_s -= 10.0  # nothing for 10 s, but no experiment records
    assert kill_raised(st) is None and fw.state == DeviceState.DISARMED
    st.buffer.start()
    st.buffer.started_s -= 10.0  # an experiment has recorded for 10 s without a sample
    err = kill_raised(st)
    assert err is not None and err.info["reason"] == "host_link"
    assert wait_for(lambda: fw.state == DeviceState.KILLED)


def test_a_lost_link_is_a_kill(rig):
    st, _, port = rig
    kills = notices(st, Notice.KILL)
    port.is_open = False  # the port fails as an unplugged adapter does
    assert wait_for(lambda: st.killed)
    err = kill_raised(st)
    assert err is not None and err.info["reason"] == "host_link"
    assert "read failed" in err.info["text"] and kills == [err.info]


def test_close_disarms_an_armed_board(rig):
    st, fw, _ = rig
    st.confirmed = True
    st.arm()
    st.close()
    assert fw.state == DeviceState.DISARMED
    st.close()  # a second close does nothing


def test_the_buffer_fills_with_the_boards_telemetry(rig):
    st, _, _ = rig
    st.session.telemetry(200, [0], 0)
    st.buffer.start()
    assert wait_for(lambda: len(st.buffer.columns()["time_us"]) >= 20)
    cols = st.buffer.columns()
    assert tuple(cols) == Buffer.COLUMNS
    n = len(cols["time_us"])
    assert all(len(v) == n for v in cols.values())
    assert np.all(np.diff(cols["time_us"]) > 0) and np.all(np.diff(cols["host_time_s"]) >= 0)
    assert np.all(cols["axis"] == 0) and np.all(cols["loop"] == 0)
    assert len(st.buffer.axis(0)["time_us"]) >= n
    st.stop_recording()
    assert not st.buffer.recording and st.experiment_log is None


# ---------------------------------------------------------------- the buffer alone

def two_axis_sample(i: int) -> m.Telemetry:
    return m.Telemetry(time_us=i, counter=i, state=2, tag=7, axes=(
        m.AxisSample(0, 0, 0.5, float(i), -1.0, 1), m.AxisSample(3, 2, 0.0, -float(i), 0.25, 0)))


def test_the_buffer_keeps_rows_only_while_recording_and_grows_past_its_first_block():
    buf = Buffer(live_len=10)
    buf.add(0.0, two_axis_sample(0))
    assert len(buf.live) == 1 and len(buf.columns()["time_us"]) == 0
    buf.start()
    for i in range(1, 3001):
        buf.add(float(i), two_axis_sample(i))
    first = buf.axis(3)
    assert len(first["time_us"]) == 3000
    for i in range(3001, 5001):  # 10,000 rows in all: beyond the first 4096-row block
        buf.add(float(i), two_axis_sample(i))
    cols = buf.columns()
    assert len(cols["time_us"]) == 10_000 and len(buf.live) == 10
    roll = buf.axis(0)
    assert np.array_equal(roll["time_us"], np.arange(1, 5001))
    assert np.array_equal(roll["measurement"], np.arange(1, 5001, dtype=float))
    assert set(roll["setpoint"]) == {0.5} and set(roll["relay"]) == {1.0}
    heave = buf.axis(3)
    assert np.array_equal(heave["measurement"][:3000], first["measurement"])
    assert set(heave["loop"]) == {2.0} and set(heave["tag"]) == {7.0}
    buf.stop()
    buf.add(9999.0, two_axis_sample(9999))
    assert len(buf.columns()["time_us"]) == 10_000
    buf.start()  # a new experiment starts empty
    assert len(buf.columns()["time_us"]) == 0


def test_a_stand_kill_without_a_monitor_still_latches(rig):
    st, fw, _ = rig
    st.monitor = None
    st.kill(KillReason.HOST_ERROR)
    assert st.killed
    assert wait_for(lambda: fw.state == DeviceState.KILLED)
    err = kill_raised(st)
    assert err is not None
