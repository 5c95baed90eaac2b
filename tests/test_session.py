"""Unit tests of agent.session over the simulated board's in-process port (no pty), and over a
scripted peer where a board that misbehaves on purpose is simpler."""

from __future__ import annotations

import math
import re

import pytest

from agent.link import Link
from agent.session import HELLO_RETRIES, DeviceRefused, Session, SessionError
from mock_device.runner import start_mock
from protocol import codec
from protocol import messages as m
from protocol.messages import DeviceState, ExperimentKind, RefuseCode
from tests.test_link import FakePeer, ack, reply, wait_for


@pytest.fixture
def board():
    """(session, firmware) of the single-axis simulated board, connected in-process."""
    h = start_mock("single-axis", transport="inproc", speed=1.0, seed=2)
    h.port.timeout = 0.01  # the link's reader wakes often, so closing it does not wait
    link = Link(h.port)
    session = Session(link)
    try:
        session.connect()
        yield session, h.firmware
    finally:
        link.close()
        h.stop()


def f32(x: float) -> float:
    return codec.struct.unpack("<f", codec.struct.pack("<f", x))[0]


# ---------------------------------------------------------------- handshake

def test_connect_identifies_the_board_and_discovers_its_settings(board):
    session, fw = board
    info = session.info
    assert info.device_id == "mock-single-axis"
    assert info.protocol == f"{m.PROTOCOL_MAJOR}.{m.PROTOCOL_MINOR}"
    assert info.loop_rate_hz == fw.loop_rate_hz
    assert info.axes == dict(fw.axes)
    defs = fw.settings.defs
    assert list(session.settings) == [d.name for d in defs]
    for d in defs:
        s = session.settings[d.name]
        assert (s.setting_id, s.index, s.unit, s.flags) == (d.setting_id, d.index, d.unit,
                                                           int(d.flags))
        assert (s.minimum, s.maximum) == (f32(d.minimum), f32(d.maximum))
        assert session.values[d.name] == f32(fw.settings.values[d.name])
    assert session.gains("roll", "rate")["kp"] == session.values["roll.rate.kp"]
    assert set(session.gains("roll", "angle")) == {n.split(".")[-1] for n in session.settings
                                                   if n.startswith("roll.angle.")}


def scripted(hello: bytes | None = None, **by_type):
    """A respond() for FakePeer: Hello gets ``hello`` (bytes, or a HelloReply), other types
    the reply message given by class name (TelemetryConfig is acknowledged unless given);
    everything else is left unanswered."""
    by_type.setdefault("TelemetryConfig", ack)

    def respond(frame):
        msg = frame.msg
        if isinstance(msg, m.Hello):
            if hello is None:
                return ()
            return [hello(frame)] if callable(hello) else [reply(frame, hello)]
        answer = by_type.get(type(msg).__name__)
        if answer is None:
            return ()
        return [answer(frame) if callable(answer) else reply(frame, answer)]

    return respond


def hello_reply(major: int = m.PROTOCOL_MAJOR, setting_count: int = 0) -> m.HelloReply:
    return m.HelloReply(device_id="peer-1", firmware_version="0.0", protocol_major=major,
                        protocol_minor=0, loop_rate_hz=500, capabilities=0,
                        setting_count=setting_count,
                        axes=(m.AxisInfo(0, 0b011), m.AxisInfo(3, 0b101), m.AxisInfo(9, 1)))


@pytest.fixture
def peer_session():
    """Factory: a Session over a FakePeer running ``respond``; closed at the end."""
    links = []

    def make(respond) -> tuple[Session, FakePeer]:
        peer = FakePeer(respond)
        link = Link(peer, timeout_s=0.05, retries=1)
        links.append(link)
        return Session(link), peer

    yield make
    for link in links:
        link.close()


def test_connect_maps_the_axes_and_skips_unknown_ones(peer_session):
    session, _ = peer_session(scripted(hello_reply()))
    info = session.connect()
    assert info.axes == {"roll": ("rate", "angle"), "heave": ("rate", "heave")}
    assert info.loop_rate_hz == 500 and session.settings == {}


@pytest.mark.parametrize("hello, text", [
    (hello_reply(major=2), r"board speaks protocol 2\.0.*Major versions must match"),
    (lambda f: codec.encode(hello_reply(), f.seq, m.FLAG_REPLY, version=0x21),
     r"board answers in protocol 2\.1.*Major versions must match"),
    (lambda f: reply(f, m.Refuse(refused_type=1, code=int(RefuseCode.VERSION), detail=0,
                                 text="device speaks 3.0")),
     r"another major version of the protocol \(device speaks 3\.0\)"),
    # an Ack is no answer to Hello (the message table lists only HelloReply): ignored, and
    # named when the request gives up
    (lambda f: ack(f), r"no reply to Hello from fake-peer after 3 tries.*: 3 replies with "
                       r"its sequence number were of another kind \(Ack of 0x01\)"),
])
def test_connect_refuses_a_board_of_another_protocol_major(peer_session, hello, text):
    session, _ = peer_session(scripted(hello))
    with pytest.raises(SessionError, match=text):
        session.connect()
    assert session.info is None


def test_connect_turns_another_refusal_into_device_refused(peer_session):
    refuse = m.Refuse(refused_type=1, code=int(RefuseCode.BUSY), detail=0, text="busy now")
    session, _ = peer_session(scripted(refuse))
    with pytest.raises(DeviceRefused, match="refused identify: BUSY — busy now") as err:
        session.connect()
    assert err.value.code == RefuseCode.BUSY and err.value.refuse == refuse


def test_connect_to_a_silent_port_says_nothing_answered(peer_session):
    session, peer = peer_session(scripted(None))
    with pytest.raises(SessionError, match="no reply to Hello from fake-peer "
                       ".*nothing arrived at all: is the board powered"):
        session.connect()
    # a silent port is given up after HELLO_SILENT_S, before every resend was spent
    hellos = peer.of_type(m.Hello)
    assert 2 <= len(hellos) < HELLO_RETRIES + 1 and len({f.seq for f in hellos}) == 1


# ---------------------------------------------------------------- settings

def test_write_and_read_a_setting(board):
    session, fw = board
    assert session.write("roll.rate.kp", 0.42) == f32(0.42)
    assert fw.settings.values["roll.rate.kp"] == pytest.approx(0.42, rel=1e-6)
    assert session.values["roll.rate.kp"] == f32(0.42)
    assert session.read("roll.rate.kp") == f32(0.42)


@pytest.mark.parametrize("value", [-1.0, 1e9, math.nan])
def test_a_value_outside_the_bounds_is_refused_before_anything_is_sent(board, value):
    session, fw = board
    s = session.setting("roll.rate.kp")
    before = fw.settings.values["roll.rate.kp"]
    text = (rf"roll\.rate\.kp = {re.escape(f'{value:g}')} is outside the board's bounds "
            rf"\[{s.minimum:g}, {s.maximum:g}\] s/rad; nothing was written")
    with pytest.raises(SessionError, match=text):
        session.write("roll.rate.kp", value)
    assert fw.settings.values["roll.rate.kp"] == before


def test_write_many_writes_nothing_unless_every_value_is_in_bounds(board):
    session, fw = board
    good = {"roll.rate.kp": 0.31, "roll.rate.ki": 1.4}
    with pytest.raises(SessionError, match="roll.angle.kp"):
        session.write_many({**good, "roll.angle.kp": -5.0})
    with pytest.raises(SessionError, match="no setting named 'roll.rate.zz'"):
        session.write_many({**good, "roll.rate.zz": 1.0})
    assert fw.settings.values["roll.rate.kp"] != pytest.approx(0.31)
    assert fw.settings.values["roll.rate.ki"] != pytest.approx(1.4)
    assert session.write_many(good) == {k: f32(v) for k, v in good.items()}
    assert fw.settings.values["roll.rate.kp"] == pytest.approx(0.31, rel=1e-6)
    assert fw.settings.values["roll.rate.ki"] == pytest.approx(1.4, rel=1e-6)


def test_unknown_names_are_refused_by_the_host(board):
    session, _ = board
    for call in (lambda: session.read("pitch.rate.kp"), lambda: session.write("x", 1.0)):
        with pytest.raises(SessionError, match="the board has no setting named"):
            call()


def test_a_refused_write_raises_device_refused_with_the_code(board):
    session, _ = board
    rate = session.values["loop_rate_hz"]
    with pytest.raises(DeviceRefused, match="refused write loop_rate_hz = .*: READ_ONLY") as err:
        session.write("loop_rate_hz", rate)  # within its bounds, but read-only
    assert err.value.code == RefuseCode.READ_ONLY


def test_a_refusal_code_this_host_does_not_know_is_shown_by_number(peer_session):
    refuse = m.Refuse(refused_type=0x15, code=99, detail=0, text="new reason")
    session, _ = peer_session(scripted(hello_reply(), SettingsPersist=refuse))
    session.connect()
    with pytest.raises(DeviceRefused, match=r"refused persist settings: code 99 — new reason"):
        session.persist()


# ---------------------------------------------------------------- arming and kill

def test_arm_needs_the_operators_confirmation(board):
    session, fw = board
    with pytest.raises(SessionError, match="confirmation of the safety cautions"):
        session.arm(operator_confirmed=False)
    assert fw.state == DeviceState.DISARMED
    session.arm(operator_confirmed=True)
    assert fw.state == DeviceState.ARMED and session.state == DeviceState.ARMED
    with pytest.raises(DeviceRefused, match="refused arm request: WRONG_STATE") as err:
        session.arm(operator_confirmed=True)
    assert err.value.code == RefuseCode.WRONG_STATE
    session.disarm()
    assert fw.state == DeviceState.DISARMED and session.state == DeviceState.DISARMED


def test_arm_answers_the_challenge_with_the_complement_of_its_token(peer_session):
    challenge = m.ArmChallenge(token=0x12345678, valid_ms=500)
    session, peer = peer_session(scripted(
        hello_reply(), ArmRequest=challenge,
        ArmConfirm=lambda f: ack(f, DeviceState.ARMED)))
    session.connect()
    session.arm(operator_confirmed=True)
    assert [f.msg for f in peer.of_type(m.ArmConfirm)] == [
        m.ArmConfirm(response=0xEDCBA987, operator_confirmed=1)]
    assert session.state == DeviceState.ARMED


def test_a_kill_is_latched_until_cleared(board):
    session, fw = board
    session.arm(operator_confirmed=True)
    session.kill(m.KillReason.HOST_OPERATOR)
    assert wait_for(lambda: fw.state == DeviceState.KILLED)
    assert wait_for(lambda: session.state == DeviceState.KILLED)  # from the board's event
    with pytest.raises(DeviceRefused, match="KILL_LATCHED") as err:
        session.arm(operator_confirmed=True)
    assert err.value.code == RefuseCode.KILL_LATCHED
    session.clear_kill()
    assert fw.state == DeviceState.DISARMED and session.state == DeviceState.DISARMED


# ---------------------------------------------------------------- experiments

HOLD = dict(kind=ExperimentKind.HOLD, axis=0, loop=0, amplitude=0.0, hysteresis=0.0, bias=0.0,
            setpoint=0.0, step_at_s=0.0, duration_s=30.0, kill_angle_rad=0.0,
            kill_rate_rad_s=0.0, kill_heave_m=0.0, kill_saturation_s=0.0)


def test_an_experiment_runs_and_the_board_refuses_writes_meanwhile(board):
    session, fw = board
    session.telemetry(100, [0], 0)
    session.arm(operator_confirmed=True)
    tag = session.start_experiment(**HOLD)
    assert tag != 0 and fw.state == DeviceState.RUNNING and session.state == DeviceState.RUNNING
    with pytest.raises(DeviceRefused, match="BUSY") as err:
        session.write("roll.rate.kp", 0.3)
    assert err.value.code == RefuseCode.BUSY
    with pytest.raises(DeviceRefused, match="relay adjustment: BAD_PARAMETER") as err:
        session.adjust(tag, 0.1, 0.0, 0.0)  # a hold is not a relay
    assert err.value.code == RefuseCode.BAD_PARAMETER
    session.stop_experiment(tag)
    assert fw.state == DeviceState.ARMED and session.state == DeviceState.ARMED
    assert session.start_experiment(**HOLD, tag=77) == 77
    session.disarm()


def test_experiment_tags_are_never_zero(peer_session):
    session, _ = peer_session(scripted(None))
    session._tag = 65534
    assert [session.next_tag() for _ in range(3)] == [65535, 1, 2]


def test_a_latched_kill_refusal_names_the_kill_the_board_reported(peer_session):
    watchdog = m.Event(time_us=1, kind=int(m.EventKind.KILL_TRIPPED),
                       state=int(DeviceState.KILLED), reason=int(m.KillReason.WATCHDOG),
                       axis=255, value=1.3, threshold=1.0, text="keepalive watchdog expired")
    latched = m.Refuse(refused_type=0x30, code=int(RefuseCode.KILL_LATCHED), detail=3,
                       text="a kill is latched")
    session, peer = peer_session(scripted(hello_reply(), ExperimentStart=latched))
    session.connect()
    peer.push(codec.encode(watchdog, 1))
    assert wait_for(lambda: session.link.last_kill is not None)
    with pytest.raises(DeviceRefused, match=r"refused experiment start: KILL_LATCHED — a kill is "
                       r"latched \(the board killed: its watchdog: no frame from the host "
                       r"reached it") as err:
        session.start_experiment(**HOLD)
    assert err.value.code == RefuseCode.KILL_LATCHED and session.state == DeviceState.KILLED
