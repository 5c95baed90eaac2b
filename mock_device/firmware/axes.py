"""The board's axis controllers: one class per axis kind, and the one table of kill thresholds.

An axis controller owns its plant, its loop levels (inner first, then the outer level if there is
one), its actuator range and the output latched on the board's outputs. It knows what differs
between kinds of axis, so that the tick (``board.py``) never asks which kind it has:

* how its sensors are read into its levels' measurements (:meth:`AxisController.read`) and how a
  stuck-sensor fault freezes them (:meth:`AxisController.freeze_sensors`);
* which measurements the kill thresholds watch (``watch``: pairs of a level and a
  :class:`Threshold` of :data:`THRESHOLDS`), checked by the single :meth:`AxisController.tripped`;
* what it holds while ARMED and when an experiment on it ends (:meth:`hold_setpoints`,
  :meth:`resume_hold`), and where a height excursion is measured from
  (:meth:`mark_start_height`).

Kinds: :class:`RotationController` (roll, pitch, yaw: a rate level under an angle level, on a
gimbal), :class:`HeaveController` (a climb-rate level under a height level, on a vertical rail)
and :class:`TransferFunctionController` (one level on a generic plant of the scenario's
``[plant]`` table).

Kill thresholds: each :class:`Threshold` names the ``kill.*`` setting that gives its default, the
ExperimentStart field that may tighten it (0 keeps the setting; a larger value is capped at
the setting), the kill reason and the event text.
:func:`kill_limits` turns settings and the running experiment into the limits in force, a tuple in
the order of :data:`THRESHOLDS` (``Threshold.index``). The saturation-time threshold is in the
same table; the tick checks it after the control step, on the time the actuator has been at its
limit (:attr:`AxisController.sat_s`).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

from protocol.messages import Axis, KillReason, Loop

from ..pid import Pid
from ..plant import (Gauss, HeaveAxis, HeaveParams, RotationAxis, RotationParams,
                     TransferFunctionParams, TransferFunctionPlant)

STUCK_TICKS = 100  # identical readings of a noisy gyro for this many ticks = stuck sensor
NO_AXIS = 255  # the axis field of an event that concerns no axis

AXIS_ID = {"roll": Axis.ROLL, "pitch": Axis.PITCH, "yaw": Axis.YAW, "heave": Axis.HEAVE}
LOOP_ID = {"rate": Loop.RATE, "angle": Loop.ANGLE, "heave": Loop.HEAVE}
LOOP_NAME = {v: k for k, v in LOOP_ID.items()}


@dataclass(frozen=True, eq=False)
class Threshold:
    """One kill threshold of the board (protocol/SPEC.md 12.2)."""

    index: int  # position in THRESHOLDS and in the limits tuple
    setting: str  # the kill.* setting that gives the default
    experiment_field: str  # the ExperimentStart field that tightens it when > 0
    reason: KillReason
    text: str  # event text; {axis} is the axis name
    from_start_height: bool = False  # measured from the height at arming / experiment start


ANGLE = Threshold(0, "kill.angle_rad", "kill_angle_rad", KillReason.ANGLE_LIMIT,
                  "{axis} angle beyond the kill threshold")
RATE = Threshold(1, "kill.rate_rad_s", "kill_rate_rad_s", KillReason.RATE_LIMIT,
                 "{axis} rate beyond the kill threshold")
HEAVE = Threshold(2, "kill.heave_m", "kill_heave_m", KillReason.HEAVE_LIMIT,
                  "{axis} height excursion beyond the kill threshold", from_start_height=True)
SATURATION = Threshold(3, "kill.saturation_s", "kill_saturation_s", KillReason.SATURATION_TIME,
                       "{axis} actuator saturated too long")
THRESHOLDS = (ANGLE, RATE, HEAVE, SATURATION)
_BY_LOOP = {"rate": RATE, "angle": ANGLE, "heave": HEAVE}  # what a level's measurement is


def kill_limits(values: dict[str, float], exp=None) -> tuple[float, ...]:
    """The thresholds in force, in the order of THRESHOLDS (protocol/SPEC.md 12.2): the
    ``kill.*`` settings, or the running experiment's where it gives a tighter one (> 0). The
    settings are the board owner's ceiling: an experiment may tighten a threshold, never
    loosen it."""
    if exp is None:
        return tuple(values[t.setting] for t in THRESHOLDS)
    out = []
    for t in THRESHOLDS:
        own = values[t.setting]
        asked = getattr(exp, t.experiment_field)
        out.append(min(asked, own) if asked > 0 else own)
    return tuple(out)


class Level:
    """One loop level of one axis: its PID and last signals (setpoint, measurement, output)."""

    __slots__ = ("name", "loop_id", "pid", "r", "y", "u", "prefix")

    def __init__(self, name: str, pid: Pid, prefix: str):
        self.name = name
        self.loop_id = LOOP_ID[name]
        self.pid = pid
        self.prefix = prefix  # of its settings, e.g. "roll.rate."
        self.r = 0.0
        self.y = 0.0
        self.u = 0.0

    def load_gains(self, v: dict[str, float]) -> None:
        """Take the level's gains from the settings values, bumplessly on a running loop."""
        pid = self.pid
        pre = self.prefix
        # bumpless parameter change: the integrator absorbs the jump of the feed-forward and
        # proportional terms (with setpoint weight b = 0 on a height loop, kp * y alone is a
        # large offset), so writing gains to a running loop does not kick the output
        # (Astrom & Hagglund 1995, PID Controllers, bumpless parameter changes; value from
        # memory)
        before = pid.ff + pid.kp * (pid.b * self.r - self.y)
        pid.kp = v[pre + "kp"]
        pid.ki = v[pre + "ki"]
        pid.kd = v[pre + "kd"]
        pid.tf = v[pre + "tf"]
        pid.b = v[pre + "b"]
        pid.out_limit = v[pre + "out_limit"]
        pid.i_limit = v[pre + "i_limit"]
        pid.aw_mode = int(v[pre + "aw_mode"])
        pid.aw_tt = v[pre + "aw_tt"]
        pid.ff = v[pre + "ff"]
        pid.configure()
        if pid.running:  # the loop has run: keep its output continuous
            i = pid.i + before - (pid.ff + pid.kp * (pid.b * self.r - self.y))
            il = pid.i_limit
            pid.i = min(max(i, -il), il) if il > 0 else i


class AxisController:
    """An axis of the board: plant, levels (inner first), actuator range and latched output."""

    coupled = False  # rotation axes exchange torque through the scenario's coupling matrix
    holds_height = False  # holds the height at arming (else setpoint 0)

    def __init__(self, name: str, plant, levels: list[Level], act_lo: float, act_hi: float,
                 noisy: bool):
        self.name = name
        self.axis_id = AXIS_ID[name]
        self.plant = plant
        self.levels = {lv.name: lv for lv in levels}
        self.inner = levels[0]
        self.outer = levels[1] if len(levels) > 1 else None
        self.act_lo = act_lo
        self.act_hi = act_hi
        self.noisy = noisy  # a noisy sensor that repeats a reading exactly is stuck
        self.cmd = 0.0  # computed this tick, latched at the next
        self.latched = 0.0  # applied to the plant now
        self.sat_s = 0.0  # time the command has been at an actuator limit
        self.stuck_n = 0
        self.prev_y = math.nan
        self.hold_ref = 0.0  # setpoint of the outermost level while holding
        self.hold_ref_height = 0.0  # origin of the height-excursion threshold
        # (level, threshold) pairs the kill check watches, in the order they are checked
        self.watch = tuple((lv, _BY_LOOP[lv.name]) for lv in levels)
        self.height_level = next((lv for lv, t in self.watch if t.from_start_height), None)

    # -- sensors

    def read(self) -> None:
        """Sample the plant's sensors into the levels' measurements."""
        raise NotImplementedError

    def freeze_sensors(self) -> None:
        """Stuck-sensor fault: the plant repeats its present readings from now on."""
        raise NotImplementedError

    def sensor_stuck(self) -> bool:
        """Count identical readings of the inner sensor; True from STUCK_TICKS in a row."""
        y = self.inner.y
        if y == self.prev_y:
            self.stuck_n += 1
        else:
            self.stuck_n = 0
        self.prev_y = y
        return self.stuck_n >= STUCK_TICKS

    # -- safety

    def tripped(self, limits: tuple[float, ...]) -> tuple[Threshold, float, float] | None:
        """The first watched measurement beyond its limit: (threshold, value, limit), or None."""
        for lv, th in self.watch:
            y = lv.y - self.hold_ref_height if th.from_start_height else lv.y
            lim = limits[th.index]
            if y > lim or y < -lim:
                return th, y, lim
        return None

    # -- holding

    def hold_setpoints(self) -> None:
        """On arming: hold level (0), or the height where the body is now."""
        h = self.height_level
        if h is not None:
            self.hold_ref_height = h.y
        self.hold_ref = self.hold_ref_height if self.holds_height else 0.0

    def mark_start_height(self) -> None:
        """An experiment starts on this axis: height excursions count from here."""
        h = self.height_level
        if h is not None:
            self.hold_ref_height = h.y

    def resume_hold(self) -> None:
        """An experiment on this axis ended and the board holds again."""

    def hold_command(self) -> float:
        """One tick of holding ``hold_ref`` with every level closed; returns the command."""
        o = self.outer
        i = self.inner
        if o is not None:
            o.r = self.hold_ref
            o.u = o.pid.update(o.r, o.y)
            i.r = o.u
        else:
            i.r = self.hold_ref
        i.u = i.pid.update(i.r, i.y)
        return i.u

    def actuate(self, cmd: float, ts: float) -> None:
        """Clip the command to the actuator range (it is latched at the next tick) and count
        the time spent at a limit."""
        if cmd >= self.act_hi:
            cmd = self.act_hi
            self.sat_s += ts
        elif cmd <= self.act_lo:
            cmd = self.act_lo
            self.sat_s += ts
        else:
            self.sat_s = 0.0
        self.cmd = cmd

    def zero(self) -> None:
        """Outputs to zero now, signals cleared (kill, disarm)."""
        self.cmd = 0.0
        self.latched = 0.0
        self.sat_s = 0.0
        for lv in self.levels.values():
            lv.u = 0.0
            lv.r = 0.0


class RotationController(AxisController):
    """Roll, pitch or yaw on a gimbal: rate level (gyro) under an angle level (estimate)."""

    coupled = True

    def __init__(self, name: str, p: RotationParams, ts: float, gauss: Gauss):
        lim = p.output_limit
        super().__init__(name, RotationAxis(p, ts, gauss),
                         [Level("rate", Pid(ts, -lim, lim), f"{name}.rate."),
                          Level("angle", Pid(ts), f"{name}.angle.")],
                         -lim, lim, p.gyro_noise_std > 0)

    def read(self) -> None:
        p = self.plant
        p.sample()
        self.inner.y = p.y_rate
        self.outer.y = p.y_angle

    def freeze_sensors(self) -> None:
        p = self.plant
        p.stuck_at = (p.y_rate, p.y_angle)


class HeaveController(AxisController):
    """A frame on a vertical rail: climb-rate level (thrust 0..1) under a height level."""

    holds_height = True

    def __init__(self, p: HeaveParams, ts: float, gauss: Gauss):
        super().__init__("heave", HeaveAxis(p, ts, gauss),
                         [Level("rate", Pid(ts, 0.0, 1.0), "heave.rate."),
                          Level("heave", Pid(ts), "heave.heave.")],
                         0.0, 1.0, p.climb_noise_std > 0)
        self.watch = ((self.outer, HEAVE),)  # the climb rate has no kill threshold

    def read(self) -> None:
        p = self.plant
        p.sample()
        self.inner.y = p.y_rate
        self.outer.y = p.y_height

    def freeze_sensors(self) -> None:
        p = self.plant
        p.stuck_at = (p.y_rate, p.y_height)

    def resume_hold(self) -> None:
        self.hold_ref = self.hold_ref_height = self.outer.y


class TransferFunctionController(AxisController):
    """One level on a generic transfer-function plant; it holds setpoint 0."""

    def __init__(self, name: str, loop: str, p: TransferFunctionParams, ts: float, gauss: Gauss):
        lim = p.output_limit
        super().__init__(name, TransferFunctionPlant(p, ts, gauss),
                         [Level(loop, Pid(ts, -lim, lim), f"{name}.{loop}.")],
                         -lim, lim, p.noise_std > 0)

    def read(self) -> None:
        p = self.plant
        p.sample()
        self.inner.y = p.y

    def freeze_sensors(self) -> None:
        self.plant.stuck_at = self.plant.y


def build_axes(sc, ts: float, gauss: Gauss) -> list[AxisController]:
    """The scenario's axes in board order (roll, pitch, yaw, heave, then a generic plant); the
    plants draw their noise from ``gauss`` in this order."""
    axes: list[AxisController] = [RotationController(name, sc.rotation[name], ts, gauss)
                                  for name in ("roll", "pitch", "yaw") if name in sc.rotation]
    if sc.heave is not None:
        axes.append(HeaveController(sc.heave, ts, gauss))
    if sc.tf_plant is not None:
        name, loop, p = sc.tf_plant
        axes.append(TransferFunctionController(name, loop, p, ts, gauss))
    return axes
