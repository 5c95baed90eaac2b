"""Host-side safety: the cautions shown before arming, and the telemetry monitor that kills.

The device has its own kill thresholds and watchdog; the host watches as well, because it sees
what the operator cares about and can stop everything from the keyboard. The monitor runs on the
link's reader thread: it checks every telemetry sample the moment it is decoded and writes the
Kill frame at once, without waiting for anything.
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
    return "\n".join(f"  {i}. {c}" for i, c in enumerate(CAUTIONS, 1))


@dataclass(frozen=True)
class Limits:
    """Kill thresholds, SI units. Angles and rates are absolute; heave is the excursion from the
    height at the start of the experiment."""

    angle_rad: float = math.radians(30.0)
    rate_rad_s: float = math.radians(400.0)
    heave_m: float = 0.25
    climb_rate_m_s: float = 1.0
    saturation_s: float = 1.5

    def threshold(self, axis: int, loop: int) -> float:
        if loop == Loop.ANGLE:
            return self.angle_rad
        if loop == Loop.HEAVE:
            return self.heave_m
        return self.climb_rate_m_s if axis == 3 else self.rate_rad_s


@dataclass(frozen=True)
class Trip:
    reason: int
    axis: int
    loop: int
    value: float
    threshold: float
    sample_time_s: float  # host time the offending sample arrived
    kill_sent_s: float  # host time the kill frame was written

    @property
    def latency_ms(self) -> float:
        return (self.kill_sent_s - self.sample_time_s) * 1000.0

    def as_dict(self) -> dict:
        return {"reason": KillReason(self.reason).name.lower(), "axis": self.axis,
                "loop": self.loop, "value": self.value, "threshold": self.threshold,
                "latency_ms": self.latency_ms}


@dataclass
class SafetyMonitor:
    """Watches telemetry and kills on a threshold crossing. ``kill(reason, value) -> time``
    writes the kill; ``on_trip`` subscribers hear about it (logbook, UI)."""

    kill: Callable[[int, float], float]
    limits: Limits = field(default_factory=Limits)
    references: dict = field(default_factory=dict)  # (axis, loop) -> reference value (heave)
    on_trip: list = field(default_factory=list)
    trips: list = field(default_factory=list)
    active: bool = False
    _lock: threading.Lock = field(default_factory=threading.Lock)

    def set_reference(self, axis: int, loop: int, value: float) -> None:
        self.references[(axis, loop)] = value

    def check(self, host_time_s: float, tel: Telemetry) -> Trip | None:
        if not self.active:
            return None
        for s in tel.axes:
            ref = self.references.get((s.axis, s.loop), 0.0) if s.loop == Loop.HEAVE else 0.0
            value = s.measurement - ref
            limit = self.limits.threshold(s.axis, s.loop)
            if not math.isfinite(value) or abs(value) > limit:
                return self.trip(KillReason.HOST_MONITOR, host_time_s, s.axis, s.loop,
                                 s.measurement, limit)
        return None

    def trip(self, reason: int, host_time_s: float, axis: int = 255, loop: int = 255,
             value: float = 0.0, threshold: float = 0.0) -> Trip | None:
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
            except Exception:
                pass
        return trip


def confirm_cautions(ask: Callable[[str], str], say: Callable[[str], None]) -> bool:
    """Show the cautions and ask for an explicit typed confirmation. Returns True only if the
    operator typed 'yes'."""
    say("SAFETY — before arming the motors:\n" + caution_text())
    answer = ask("Type 'yes' to confirm all of the above and arm, anything else to stop: ")
    return answer.strip().lower() == "yes"
