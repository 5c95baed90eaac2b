"""Host-side safety: the cautions shown before arming, and the telemetry monitor that kills.

The device has its own kill thresholds and watchdog; the host watches as well, because it sees
what the operator cares about and can stop everything from the keyboard. The monitor runs on the
link's reader thread: it checks every telemetry sample the moment it is decoded and writes the
Kill frame at once, without waiting for anything (a reply would have to come through the very
thread that is waiting for it).
"""

from __future__ import annotations

import math
import threading
from dataclasses import dataclass, field
from typing import Callable

from protocol.messages import KillReason, Loop, Telemetry

CAUTIONS = (
    "Propellers OFF, or fully guarded, for every test that can spin a motor.",
    "The stand and the tether are secured; the frame cannot leave its travel.",
    "Everyone is clear of the rotor plane and the stand's reach.",
    "Eye protection is worn by everyone near the stand.",
    "A hardware kill (power cut-off) is within reach of the operator.",
    "Local rules and licensed practice prevail over this tool: if they forbid a test, don't run it.",
)


def caution_text() -> str:
    """The cautions as numbered lines, one per caution, for a terminal or a dialog."""
    return "\n".join(f"  {i}. {c}" for i, c in enumerate(CAUTIONS, 1))


def _schema_default(attr: str) -> float:
    from .plan import limit_default_si  # late: agent.plan imports this module
    return limit_default_si(attr)


@dataclass(frozen=True)
class Limits:
    """Kill thresholds, SI units. Angles and rates are absolute; heave is the excursion from the
    height at the start of the experiment.

    The defaults are the plan schema's (``agent.plan.SCHEMA``, the [limits] keys converted to
    SI): one definition for plan files, the console and the host monitor. They are read when a
    Limits is made, so that this module and agent.plan may import each other in either order.
    """

    angle_rad: float = field(default_factory=lambda: _schema_default("angle_rad"))
    rate_rad_s: float = field(default_factory=lambda: _schema_default("rate_rad_s"))
    heave_m: float = field(default_factory=lambda: _schema_default("heave_m"))
    climb_rate_m_s: float = field(default_factory=lambda: _schema_default("climb_rate_m_s"))
    saturation_s: float = field(default_factory=lambda: _schema_default("saturation_s"))

    def threshold(self, axis: int, loop: int) -> float:
        if loop == Loop.ANGLE:
            return self.angle_rad
        if loop == Loop.HEAVE:
            return self.heave_m
        return self.climb_rate_m_s if axis == 3 else self.rate_rad_s


@dataclass(frozen=True)
class Trip:
    """One kill the host sent: why, where, and the value compared with the threshold (for heave,
    the excursion from the reference, as the board reports its own heave kills)."""

    reason: int
    axis: int
    loop: int
    value: float
    threshold: float
    sample_time_s: float  # host time the offending sample arrived
    kill_sent_s: float  # host time the kill frame was written

    @property
    def latency_ms(self) -> float:
        """From the offending sample's arrival to the kill frame's write; NaN if not written."""
        return (self.kill_sent_s - self.sample_time_s) * 1000.0

    def as_dict(self) -> dict:
        """The trip for the session log (reason by name)."""
        return {"reason": KillReason(self.reason).name.lower(), "axis": self.axis,
                "loop": self.loop, "value": self.value, "threshold": self.threshold,
                "latency_ms": self.latency_ms}


@dataclass
class SafetyMonitor:
    """Watches telemetry and kills on a threshold crossing.

    ``kill(reason, value) -> host time`` writes the kill (``Session.kill``: it must not wait);
    ``on_trip`` subscribers hear about each trip (stand, logbook, UI) on the thread that
    tripped, after the kill is written. The monitor checks only while ``active``; a trip
    switches it off (one kill per crossing) and the workflow switches it on again for the next
    experiment. Thread-safe: ``check`` runs on the reader thread, ``trip`` from any thread.
    """

    kill: Callable[[int, float], float]
    limits: Limits = field(default_factory=Limits)
    references: dict = field(default_factory=dict)  # (axis, loop) -> reference value (heave)
    on_trip: list = field(default_factory=list)
    trips: list = field(default_factory=list)
    active: bool = False
    _lock: threading.Lock = field(default_factory=threading.Lock)

    def set_reference(self, axis: int, loop: int, value: float) -> None:
        """The height (m) from which a heave loop's excursion is measured (the start of the
        experiment); other loops are limited in absolute value."""
        self.references[(axis, loop)] = value

    def check(self, host_time_s: float, tel: Telemetry) -> Trip | None:
        """Check one telemetry sample (a link subscriber: reader thread).

        Every reported axis is compared with its limit (``Limits.threshold``); a value beyond it,
        or one that is not finite (a broken sensor must not pass), trips with HOST_MONITOR.

        Returns
        -------
        Trip or None
            The trip, if this sample caused one.
        """
        if not self.active:
            return None
        for s in tel.axes:
            ref = self.references.get((s.axis, s.loop), 0.0) if s.loop == Loop.HEAVE else 0.0
            value = s.measurement - ref
            limit = self.limits.threshold(s.axis, s.loop)
            if not math.isfinite(value) or abs(value) > limit:
                return self.trip(KillReason.HOST_MONITOR, host_time_s, s.axis, s.loop,
                                 value, limit)
        return None

    def trip(self, reason: int, host_time_s: float, axis: int = 255, loop: int = 255,
             value: float = 0.0, threshold: float = 0.0) -> Trip | None:
        """Kill now and record why; any thread. Never raises.

        A HOST_MONITOR trip happens only while active (the first of two racing samples wins);
        any other reason (operator, link, error) always kills. If writing the kill fails (the
        link is lost), the trip is recorded with ``kill_sent_s`` NaN: the board's watchdog kills
        when the host falls silent.

        Returns
        -------
        Trip or None
            None only for a HOST_MONITOR trip while inactive.
        """
        with self._lock:
            if not self.active and reason == KillReason.HOST_MONITOR:
                return None
            self.active = False  # one kill per trip; re-armed by the workflow
            try:
                sent = self.kill(int(reason), float(value) if math.isfinite(value) else 0.0)
            except Exception:  # link lost: the device watchdog will kill; still record the trip
                sent = float("nan")
        trip = Trip(int(reason), axis, loop, value, threshold, host_time_s, sent)
        self.trips.append(trip)
        for fn in tuple(self.on_trip):
            try:
                fn(trip)
            except Exception:  # noqa: BLE001 - a listener's bug must not hide the trip from others
                pass
        return trip


def confirm_cautions(ask: Callable[[str], str], say: Callable[[str], None]) -> bool:
    """Show the cautions with ``say``, then ask with ``ask`` for a typed confirmation.

    Returns
    -------
    bool
        True only if the answer is the word 'yes' (any case, surrounding blanks ignored); 'y',
        an empty answer or anything else is a refusal.
    """
    say("SAFETY — before arming the motors:\n" + caution_text())
    answer = ask("Type 'yes' to confirm all of the above and arm, anything else to stop: ")
    return answer.strip().lower() == "yes"
