"""The mock board's settings table: names, types, units, bounds, defaults, flags.

Standard set (the host discovers it with SettingDescribe; ids are 1..N in table order)::

  Per loop level present on the board, named "{axis}.{loop}.{param}" with axis in
  roll|pitch|yaw|heave and loop in rate|angle|heave (e.g. "roll.rate.kp", "heave.heave.ki"):

  param      type    unit*        bounds                 meaning
  kp         float   out/meas     0 .. 1000              proportional gain
  ki         float   out/(meas s) 0 .. 10000             integral gain (I += ki*Ts*(r-y))
  kd         float   out s/meas   0 .. 100               derivative gain (on measurement)
  tf         float   s            0 .. 1                 derivative filter time constant
  b          float   -            0 .. 1                 setpoint weight of the P term
  out_limit  float   out          0 .. L                 output limit around ff (symmetric)
  i_limit    float   out          0 .. L                 integrator clamp, 0 = none
  aw_mode    choice  -            0 .. 1                 anti-windup: 0 clamping, 1 back-calc.
  aw_tt      float   s            0.001 .. 100           back-calculation tracking time
  ff         float   out          -L .. L                feed-forward / trim added to the output

  L (output range) is 1.0 (normalised actuator command) for the rate level of a rotation axis
  and of a generic plant; 1.0 for the heave rate level (thrust command 0..1, ff is the hover
  trim); 50 rad/s for an angle level (its output is a rate setpoint) and 5 m/s for the heave
  level (its output is a climb-rate setpoint).
  * "out" is the level's output unit, "meas" its measurement unit (rad/s, rad, m/s, m).

  Global:
  watchdog_s          float  s      0.05 .. 5      keepalive watchdog timeout (link time), 1 s
  kill.angle_rad      float  rad    0.01 .. 3.2    default |angle| kill threshold
  kill.rate_rad_s     float  rad/s  0.1 .. 60      default |rate| kill threshold
  kill.heave_m        float  m      0.01 .. 3      default |height - start height| threshold
  kill.saturation_s   float  s      0.01 .. 30     default time-at-saturation threshold
  telemetry.max_rate_hz int  Hz     read-only      highest telemetry rate (= loop rate)
  loop_rate_hz        int    Hz     read-only      control tick rate

All writable settings are refused outside [minimum, maximum]; "watchdog_s" may only be written
while disarmed. Experiment kill thresholds of 0 fall back to the kill.* settings.
"""

from __future__ import annotations

import math
import struct
from dataclasses import dataclass

from protocol.messages import SettingFlags, SettingType

PID_SPECS: tuple[tuple[str, SettingType, str, float, float | None], ...] = (
    # param, type, unit, min, max (None = the level's output range L)
    ("kp", SettingType.FLOAT, "", 0.0, 1000.0),
    ("ki", SettingType.FLOAT, "", 0.0, 10000.0),
    ("kd", SettingType.FLOAT, "", 0.0, 100.0),
    ("tf", SettingType.FLOAT, "s", 0.0, 1.0),
    ("b", SettingType.FLOAT, "", 0.0, 1.0),
    ("out_limit", SettingType.FLOAT, "", 0.0, None),
    ("i_limit", SettingType.FLOAT, "", 0.0, None),
    ("aw_mode", SettingType.CHOICE, "", 0.0, 1.0),
    ("aw_tt", SettingType.FLOAT, "s", 0.001, 100.0),
    ("ff", SettingType.FLOAT, "", None, None),
)

PID_DEFAULTS = {"kp": 0.0, "ki": 0.0, "kd": 0.0, "tf": 0.0, "b": 1.0, "out_limit": None,
                "i_limit": 0.0, "aw_mode": 0.0, "aw_tt": 0.05, "ff": 0.0}

GLOBAL_SPECS: tuple[tuple[str, SettingType, str, float, float, float, int], ...] = (
    ("watchdog_s", SettingType.FLOAT, "s", 0.05, 5.0, 1.0, SettingFlags.DISARMED_ONLY),
    ("kill.angle_rad", SettingType.FLOAT, "rad", 0.01, 3.2, 0.6, 0),
    ("kill.rate_rad_s", SettingType.FLOAT, "rad/s", 0.1, 60.0, 8.0, 0),
    ("kill.heave_m", SettingType.FLOAT, "m", 0.01, 3.0, 0.6, 0),
    ("kill.saturation_s", SettingType.FLOAT, "s", 0.01, 30.0, 1.5, 0),
)


def output_range(axis: str, loop: str, tf_plant: bool) -> float:
    """Largest magnitude of a level's output (see module docstring)."""
    if loop == "rate" or tf_plant:
        return 1.0
    return 50.0 if loop == "angle" else 5.0


_KP_UNIT = {("rot", "rate"): "s/rad", ("rot", "angle"): "1/s", ("heave", "rate"): "s/m",
            ("heave", "heave"): "1/s"}
_KI_UNIT = {"s/rad": "1/rad", "1/s": "1/s^2", "s/m": "1/m"}
_KD_UNIT = {"s/rad": "s^2/rad", "1/s": "", "s/m": "s^2/m"}


def _pid_unit(param: str, axis: str, loop: str, tf_plant: bool) -> str:
    """SI unit of a PID parameter: output unit per measurement unit (SPEC 13.4)."""
    out = "" if (loop == "rate" or tf_plant) else ("rad/s" if loop == "angle" else "m/s")
    if param in ("out_limit", "i_limit", "ff"):
        return out
    if tf_plant:
        return ""  # a generic plant's units are the scenario's own
    kp = _KP_UNIT[("heave" if axis == "heave" else "rot", loop)]
    return {"kp": kp, "ki": _KI_UNIT[kp], "kd": _KD_UNIT[kp]}.get(param, "")


@dataclass(frozen=True)
class SettingDef:
    setting_id: int
    index: int
    name: str
    type: SettingType
    unit: str
    minimum: float
    maximum: float
    default: float
    flags: int


class SettingsTable:
    """Definitions plus current values. ``check(id, value)`` returns an error text or None."""

    def __init__(self, scenario):
        defs: list[SettingDef] = []

        def add(name, typ, unit, lo, hi, default, flags):
            idx = len(defs)
            defs.append(SettingDef(idx + 1, idx, name, typ, unit, float(lo), float(hi),
                                   float(default), int(flags)))

        tf_axis = scenario.tf_plant[0] if scenario.tf_plant else None
        for axis, levels in scenario.axes.items():
            for loop in levels:
                rng = output_range(axis, loop, axis == tf_axis)
                given = scenario.default_gains(axis, loop)
                for param, typ, unit, lo, hi in PID_SPECS:
                    lo_v = -rng if lo is None else lo
                    hi_v = rng if hi is None else hi
                    d = given.get(param, PID_DEFAULTS[param])
                    if d is None:
                        d = rng if param == "out_limit" else 0.0
                    if not unit:
                        unit = _pid_unit(param, axis, loop, axis == tf_axis)
                    add(f"{axis}.{loop}.{param}", typ, unit, lo_v, hi_v, d, 0)
        for name, typ, unit, lo, hi, default, flags in GLOBAL_SPECS:
            add(name, typ, unit, lo, hi, scenario.settings.get(name, default), flags)
        rate = scenario.loop_rate_hz
        add("telemetry.max_rate_hz", SettingType.INT, "Hz", rate, rate, rate,
            SettingFlags.READ_ONLY)
        add("loop_rate_hz", SettingType.INT, "Hz", rate, rate, rate, SettingFlags.READ_ONLY)
        unknown = set(scenario.settings) - {d.name for d in defs}
        if unknown:
            from .scenarios import ScenarioError
            raise ScenarioError(f"scenario {scenario.name!r}: unknown setting(s) "
                                f"{', '.join(sorted(unknown))} in [settings]")
        for d in defs:
            if not d.minimum <= d.default <= d.maximum:
                from .scenarios import ScenarioError
                raise ScenarioError(f"scenario {scenario.name!r}: default {d.default} of "
                                    f"{d.name} outside its bounds [{d.minimum}, {d.maximum}]")
        self.defs = tuple(defs)
        self.by_id = {d.setting_id: d for d in defs}
        self.by_name = {d.name: d for d in defs}
        self.values = {d.name: d.default for d in defs}

    def __len__(self) -> int:
        return len(self.defs)

    def get(self, name: str) -> float:
        return self.values[name]

    def check(self, d: SettingDef, value: float) -> str | None:
        """Why ``value`` cannot be stored in ``d``, or None if it can."""
        if not math.isfinite(value):
            return f"{d.name}: value {value} is not a finite number"
        # the bounds as SettingInfo carries them (binary32) are accepted too
        lo, hi = struct.unpack("<2f", struct.pack("<2f", d.minimum, d.maximum))
        if not min(d.minimum, lo) <= value <= max(d.maximum, hi):
            return (f"{d.name}: value {value:g} outside [{d.minimum:g}, {d.maximum:g}]")
        if d.type in (SettingType.INT, SettingType.CHOICE, SettingType.BOOL) and value != int(value):
            return f"{d.name}: value {value:g} must be a whole number"
        return None

    def set(self, name: str, value: float) -> None:
        """Store a value without the protocol (tests, scenario setup); raises ValueError."""
        d = self.by_name.get(name)
        if d is None:
            raise ValueError(f"no setting named {name!r}")
        err = self.check(d, value)
        if err:
            raise ValueError(err)
        self.values[name] = float(value)
