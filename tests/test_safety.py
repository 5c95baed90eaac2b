"""Unit tests of agent.safety: the cautions, their confirmation, and the host's kill monitor."""

from __future__ import annotations

import math
import re
import threading

import pytest

from agent.link import Link
from agent.safety import CAUTIONS, Limits, SafetyMonitor, Trip, caution_text, confirm_cautions
from protocol import codec
from protocol import messages as m
from protocol.messages import Axis, KillReason, Loop
from tests.test_link import FakePeer, wait_for

# ---------------------------------------------------------------- cautions

# every caution the design guide asks for before arming (its "Safety wording")
REQUIRED = {
    "propellers off or guarded": r"propellers off.*guarded",
    "stand and tether secured": r"stand and the tether are secured",
    "people clear": r"everyone is clear",
    "eye protection": r"eye protection",
    "hardware kill within reach": r"hardware kill.*within reach",
    "local rules and licensed practice prevail": r"local rules and licensed practice prevail",
}


@pytest.mark.parametrize("what", sorted(REQUIRED))
def test_the_caution_text_states_every_caution(what):
    assert re.search(REQUIRED[what], caution_text(), re.IGNORECASE | re.DOTALL), what


def test_the_caution_text_numbers_each_caution_on_its_own_line():
    lines = caution_text().splitlines()
    assert len(lines) == len(CAUTIONS)
    assert [ln.split(".", 1)[0].strip() for ln in lines] == [str(i + 1) for i in range(len(lines))]


@pytest.mark.parametrize("answer", ["yes", "YES", "Yes", "  yes\n"])
def test_confirm_cautions_accepts_an_explicit_yes(answer):
    said = []
    assert confirm_cautions(lambda prompt: answer, said.append) is True
    assert caution_text() in said[0]


@pytest.mark.parametrize("answer", ["", "y", "ye", "ok", "no", "yes please", "yes!", "sure",
                                    "oui", "1", "true", "y e s"])
def test_confirm_cautions_refuses_anything_but_yes(answer):
    assert confirm_cautions(lambda prompt: answer, lambda text: None) is False


def test_the_cautions_are_shown_before_the_question():
    order = []
    confirm_cautions(lambda prompt: order.append(("ask", prompt)) or "no",
                     lambda text: order.append(("say", text)))
    assert [kind for kind, _ in order] == ["say", "ask"]
    assert "yes" in order[1][1]


# ---------------------------------------------------------------- the monitor

def sample(axis: int, loop: int, measurement: float) -> m.AxisSample:
    return m.AxisSample(int(axis), int(loop), 0.0, measurement, 0.0, 0)


def tel(*samples: m.AxisSample) -> m.Telemetry:
    return m.Telemetry(time_us=0, counter=0, state=int(m.DeviceState.RUNNING), tag=1,
                       axes=tuple(samples))


class Killer:
    """Stands in for Session.kill: records each call and returns a host time."""

    def __init__(self, fail: bool = False):
        self.calls: list[tuple[int, float, str]] = []
        self.fail = fail

    def __call__(self, reason: int, value: float) -> float:
        self.calls.append((reason, value, threading.current_thread().name))
        if self.fail:
            raise ConnectionError("link lost")
        return 10.004


LIMITS = Limits(angle_rad=0.5, rate_rad_s=4.0, heave_m=0.2, climb_rate_m_s=0.8)


@pytest.mark.parametrize("axis, loop, limit", [
    (Axis.ROLL, Loop.RATE, LIMITS.rate_rad_s),
    (Axis.PITCH, Loop.ANGLE, LIMITS.angle_rad),
    (Axis.HEAVE, Loop.RATE, LIMITS.climb_rate_m_s),
    (Axis.HEAVE, Loop.HEAVE, LIMITS.heave_m),
])
@pytest.mark.parametrize("sign", [1.0, -1.0])
def test_the_monitor_trips_just_beyond_the_threshold_not_at_it(axis, loop, limit, sign):
    kill = Killer()
    mon = SafetyMonitor(kill=kill, limits=LIMITS, active=True)
    assert mon.check(1.0, tel(sample(axis, loop, sign * limit))) is None
    assert kill.calls == [] and mon.active
    beyond = sign * math.nextafter(limit, math.inf)
    trip = mon.check(10.0, tel(sample(axis, loop, beyond)))
    assert trip == Trip(int(KillReason.HOST_MONITOR), int(axis), int(loop), beyond, limit,
                        10.0, 10.004)
    assert kill.calls == [(KillReason.HOST_MONITOR, beyond, threading.current_thread().name)]
    assert trip.latency_ms == pytest.approx(4.0)
    assert mon.trips == [trip]


def test_the_heave_limit_applies_to_the_excursion_from_the_reference():
    kill = Killer()
    mon = SafetyMonitor(kill=kill, limits=LIMITS, active=True)
    mon.set_reference(Axis.HEAVE, Loop.HEAVE, 1.0)
    assert mon.check(0.0, tel(sample(Axis.HEAVE, Loop.HEAVE, 1.15))) is None  # 0.15 m up
    trip = mon.check(0.1, tel(sample(Axis.HEAVE, Loop.HEAVE, 0.75)))  # 0.25 m down
    assert trip is not None
    # the value reported (and sent with the kill) is the one compared with the threshold,
    # the excursion, as the board reports its own heave kills
    assert trip.value == pytest.approx(-0.25) and trip.threshold == LIMITS.heave_m
    assert kill.calls[0][1] == pytest.approx(-0.25)


@pytest.mark.parametrize("bad", [math.nan, math.inf, -math.inf])
def test_a_measurement_that_is_not_finite_trips(bad):
    kill = Killer()
    mon = SafetyMonitor(kill=kill, limits=LIMITS, active=True)
    trip = mon.check(0.0, tel(sample(Axis.ROLL, Loop.RATE, 0.1), sample(Axis.PITCH, Loop.ANGLE,
                                                                        bad)))
    assert trip is not None and trip.axis == Axis.PITCH
    assert kill.calls[0][:2] == (KillReason.HOST_MONITOR, 0.0)  # the wire value stays finite


def test_an_inactive_monitor_never_kills_and_one_trip_kills_once():
    kill = Killer()
    mon = SafetyMonitor(kill=kill, limits=LIMITS)
    assert mon.check(0.0, tel(sample(Axis.ROLL, Loop.RATE, 100.0))) is None
    assert kill.calls == []
    mon.active = True
    assert mon.check(0.0, tel(sample(Axis.ROLL, Loop.RATE, 100.0))) is not None
    assert not mon.active  # the workflow re-arms it for the next experiment
    assert mon.check(0.0, tel(sample(Axis.ROLL, Loop.RATE, 100.0))) is None
    assert len(kill.calls) == 1 and len(mon.trips) == 1


def test_an_operator_kill_goes_out_even_when_the_monitor_is_off():
    kill = Killer()
    mon = SafetyMonitor(kill=kill, limits=LIMITS)
    trip = mon.trip(KillReason.HOST_OPERATOR, 3.0)
    assert trip is not None and trip.reason == KillReason.HOST_OPERATOR
    assert kill.calls[0][0] == KillReason.HOST_OPERATOR


def test_a_kill_that_cannot_be_sent_is_still_recorded_and_reported():
    kill = Killer(fail=True)
    heard = []

    def broken(trip):
        raise RuntimeError("a listener's bug")

    mon = SafetyMonitor(kill=kill, limits=LIMITS, active=True, on_trip=[broken, heard.append])
    trip = mon.check(2.0, tel(sample(Axis.ROLL, Loop.RATE, 9.0)))
    assert trip is not None and math.isnan(trip.kill_sent_s)
    assert heard == [trip] and mon.trips == [trip]
    record = trip.as_dict()
    assert math.isnan(record.pop("latency_ms"))
    assert record == {"reason": "host_monitor", "axis": 0, "loop": 0, "value": 9.0,
                      "threshold": 4.0}


def test_the_monitor_on_a_link_kills_from_the_reader_thread():
    peer = FakePeer()
    with Link(peer, keepalive_s=30.0) as link:
        kill = Killer()

        def send(reason, value):
            kill(reason, value)
            return link.send_kill(reason, value)

        mon = SafetyMonitor(kill=send, limits=LIMITS, active=True)
        link.on_telemetry(mon.check)
        peer.push(codec.encode(tel(sample(Axis.ROLL, Loop.RATE, 5.0)), 1))
        assert wait_for(lambda: peer.of_type(m.Kill))
        assert peer.of_type(m.Kill)[0].msg == m.Kill(reason=int(KillReason.HOST_MONITOR),
                                                     value=5.0)
        assert kill.calls[0][2] == "tetherloop-reader"
        assert wait_for(lambda: mon.trips)  # recorded just after the kill is written
        assert mon.trips[0].kill_sent_s >= mon.trips[0].sample_time_s
