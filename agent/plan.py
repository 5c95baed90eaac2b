"""Tuning plans: which loops to tune, how, and within which limits (TOML on disk).

A plan file looks like this (every key optional except the loops)::

    [stand]
    controller = "pid"        # pi | pid | pd, default for every loop
    rule = "recommended"      # or a rule name, see `tetherloop tune --help`
    ms_target = 1.4           # robustness target of the constrained design
    relay_target = 0.3        # relay oscillation amplitude as a fraction of the kill threshold
    verify = true             # step test after applying; a miss tries the most conservative
                              # candidate once (rule "recommended" only), then rolls back
    verify_overshoot_margin = 0.15  # measured overshoot may exceed the predicted by this
                              # (plus 2 sigma/step for the loop's own measured spread)
    verify_time_factor = 2.5  # measured rise time within [1/f, f] x the predicted
    output_noise_fraction = 0.1  # output deviation the measurement noise may cause, as a
                              # fraction of the loop's output limit (bounds kp and the
                              # derivative filter of every design)
    apply = true              # write the chosen gains to the board
    persist = false           # store them in the board's non-volatile memory at the end

    [limits]                  # kill thresholds (host monitor AND device), operator units
    angle_deg = 30
    rate_deg_s = 400
    heave_m = 0.25
    climb_rate_m_s = 1.0
    saturation_s = 1.5
    max_experiment_s = 120

    [[loop]]
    axis = "roll"             # roll | pitch | yaw | heave
    loop = "rate"             # rate | angle (roll, pitch, yaw) | heave (heave axis)
    controller = "pid"        # optional, overrides [stand]
    max_amplitude = 0.3       # optional relay amplitude ceiling, loop output units

The cascade order is enforced whatever the file's order: rate loops first, then angle loops, the
heave axis last (its rate loop, then height).
"""

from __future__ import annotations

import math
import tomllib
from dataclasses import asdict, dataclass, field, replace
from pathlib import Path

from .safety import Limits

AXES = ("roll", "pitch", "yaw", "heave")
LOOPS = ("rate", "angle", "heave")
CONTROLLERS = ("pi", "pid", "pd")

_LIMIT_RANGES = {  # key: (low, high, unit text) — operator units
    "angle_deg": (1.0, 90.0, "degrees"),
    "rate_deg_s": (10.0, 2000.0, "degrees per second"),
    "heave_m": (0.02, 2.0, "metres"),
    "climb_rate_m_s": (0.05, 5.0, "metres per second"),
    "saturation_s": (0.05, 10.0, "seconds"),
    "max_experiment_s": (1.0, 600.0, "seconds"),
}


def known_rules() -> tuple[str, ...]:
    """Names of the tuning rules the analysis offers (late import keeps plan loading light)."""
    from .analysis.tuning import RULES
    names: list[str] = []
    for per_controller in RULES.values():
        names += [r for r in per_controller if r not in names]
    return tuple(names)


from .errors import PlanError  # noqa: E402  (re-exported: agent.plan.PlanError)


@dataclass(frozen=True)
class LoopPlan:
    axis: str
    loop: str
    controller: str = "pid"
    rule: str = "recommended"
    ms_target: float = 1.4
    max_amplitude: float | None = None  # None: half the loop's output limit on the board

    @property
    def key(self) -> str:
        return f"{self.axis}.{self.loop}"


@dataclass(frozen=True)
class Plan:
    loops: tuple[LoopPlan, ...]
    limits: Limits = field(default_factory=Limits)
    max_experiment_s: float = 120.0
    relay_target: float = 0.3
    verify: bool = True
    apply: bool = True
    persist: bool = False
    verify_overshoot_margin: float = 0.15  # measured overshoot may exceed predicted by this
    verify_time_factor: float = 2.5  # measured rise time within [1/f, f] x predicted
    output_noise_fraction: float = 0.1  # noise-caused output deviation / output limit

    def as_dict(self) -> dict:
        d = asdict(self)
        d["loops"] = [asdict(lp) for lp in self.loops]
        d["limits"] = asdict(self.limits)
        return d


def cascade_rank(lp: LoopPlan) -> tuple[int, int]:
    """Rate loops of the rotation axes, then their angle loops, then heave (rate, then height)."""
    axis_i = AXES.index(lp.axis)
    if lp.axis == "heave":
        return (2 + LOOPS.index(lp.loop) // 2, axis_i)
    return (0 if lp.loop == "rate" else 1, axis_i)


def in_cascade_order(loops) -> tuple[LoopPlan, ...]:
    return tuple(sorted(loops, key=cascade_rank))


def _num(table: dict, key: str, where: str, default: float, lo: float, hi: float,
         unit: str = "") -> float:
    value = table.get(key, default)
    if isinstance(value, bool) or not isinstance(value, (int, float)) or not math.isfinite(value):
        raise PlanError(f"{where}: {key} = {value!r} is not a number; expected a number "
                        f"between {lo:g} and {hi:g} {unit}".rstrip())
    if not lo <= value <= hi:
        raise PlanError(f"{where}: {key} = {value:g} is out of range; expected {lo:g} to {hi:g} "
                        f"{unit}".rstrip())
    return float(value)


def _choice(table: dict, key: str, where: str, default: str, choices) -> str:
    value = table.get(key, default)
    if value not in choices:
        raise PlanError(f"{where}: {key} = {value!r} is not known; expected one of "
                        f"{', '.join(choices)}")
    return value


_STAND_KEYS = ("controller", "rule", "ms_target", "relay_target", "verify",
               "verify_overshoot_margin", "verify_time_factor", "output_noise_fraction",
               "apply", "persist")


def plan_from_dict(data: dict, source: str = "plan") -> Plan:
    known_top = {"stand", "limits", "loop"}
    extra = set(data) - known_top
    if extra:
        raise PlanError(f"{source}: unknown section(s) {', '.join(sorted(extra))}; expected "
                        "[stand], [limits] and [[loop]]")
    stand = data.get("stand", {})
    lim = data.get("limits", {})
    for key in stand:
        if key not in _STAND_KEYS:
            raise PlanError(f"{source} [stand]: unknown key {key!r}; expected "
                            f"{', '.join(_STAND_KEYS)}")
    for key in lim:
        if key not in _LIMIT_RANGES:
            raise PlanError(f"{source} [limits]: unknown key {key!r}; expected "
                            f"{', '.join(_LIMIT_RANGES)}")
    rules = ("recommended",) + tuple(known_rules())
    controller = _choice(stand, "controller", f"{source} [stand]", "pid", CONTROLLERS)
    rule = _choice(stand, "rule", f"{source} [stand]", "recommended", rules)
    ms_target = _num(stand, "ms_target", f"{source} [stand]", 1.4, 1.1, 2.5)
    values = {k: _num(lim, k, f"{source} [limits]", d, *_LIMIT_RANGES[k])
              for k, d in (("angle_deg", 30.0), ("rate_deg_s", 400.0), ("heave_m", 0.25),
                           ("climb_rate_m_s", 1.0), ("saturation_s", 1.5),
                           ("max_experiment_s", 120.0))}
    limits = Limits(angle_rad=math.radians(values["angle_deg"]),
                    rate_rad_s=math.radians(values["rate_deg_s"]), heave_m=values["heave_m"],
                    climb_rate_m_s=values["climb_rate_m_s"], saturation_s=values["saturation_s"])
    loops_raw = data.get("loop", [])
    if not isinstance(loops_raw, list) or not loops_raw:
        raise PlanError(f"{source}: no [[loop]] entries; add at least one, e.g.\n"
                        "  [[loop]]\n  axis = \"roll\"\n  loop = \"rate\"")
    loops = []
    seen = set()
    for i, entry in enumerate(loops_raw, 1):
        where = f"{source} [[loop]] #{i}"
        for key in entry:
            if key not in ("axis", "loop", "controller", "rule", "ms_target", "max_amplitude"):
                raise PlanError(f"{where}: unknown key {key!r}")
        axis = _choice(entry, "axis", where, None, AXES)
        loop = _choice(entry, "loop", where, None, LOOPS)
        if axis == "heave" and loop == "angle" or axis != "heave" and loop == "heave":
            raise PlanError(f"{where}: axis {axis!r} has no {loop!r} loop; rotation axes have "
                            "rate and angle, the heave axis has rate and heave")
        if (axis, loop) in seen:
            raise PlanError(f"{where}: {axis}.{loop} is listed twice")
        seen.add((axis, loop))
        max_amp = entry.get("max_amplitude")
        if max_amp is not None:
            max_amp = _num(entry, "max_amplitude", where, 0.0, 1e-6, 1e6)
        loops.append(LoopPlan(axis, loop,
                              _choice(entry, "controller", where, controller, CONTROLLERS),
                              _choice(entry, "rule", where, rule, rules),
                              _num(entry, "ms_target", where, ms_target, 1.1, 2.5), max_amp))
    return Plan(loops=in_cascade_order(loops), limits=limits,
                max_experiment_s=values["max_experiment_s"],
                relay_target=_num(stand, "relay_target", f"{source} [stand]", 0.3, 0.05, 0.8),
                verify=bool(stand.get("verify", True)), apply=bool(stand.get("apply", True)),
                verify_overshoot_margin=_num(stand, "verify_overshoot_margin",
                                             f"{source} [stand]", 0.15, 0.0, 1.0),
                verify_time_factor=_num(stand, "verify_time_factor", f"{source} [stand]", 2.5,
                                        1.0, 10.0),
                output_noise_fraction=_num(stand, "output_noise_fraction", f"{source} [stand]",
                                           0.1, 0.005, 1.0),
                persist=bool(stand.get("persist", False)))


def load_plan(path: str | Path) -> Plan:
    p = Path(path)
    try:
        text = p.read_text(encoding="utf-8")
    except FileNotFoundError:
        raise PlanError(f"plan file {str(p)!r} does not exist") from None
    except (OSError, UnicodeDecodeError) as exc:
        raise PlanError(f"cannot read plan file {str(p)!r}: {exc}") from None
    try:
        data = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise PlanError(f"plan file {str(p)!r} is not valid TOML: {exc}") from None
    return plan_from_dict(data, source=p.name)


def default_plan(device_axes: dict[str, tuple[str, ...]], board_settings: dict | None = None,
                 **overrides) -> Plan:
    """Every loop the board offers, in cascade order. Without a plan file the kill thresholds are
    the board's own (its kill.* settings, as its owner configured them) where it has them."""
    loops = [LoopPlan(axis, loop) for axis, levels in device_axes.items() for loop in levels]
    limits = Limits()
    vals = board_settings or {}
    pick = {"angle_rad": "kill.angle_rad", "rate_rad_s": "kill.rate_rad_s",
            "heave_m": "kill.heave_m", "saturation_s": "kill.saturation_s"}
    found = {k: float(vals[name]) for k, name in pick.items()
             if name in vals and float(vals[name]) > 0}
    if found:
        limits = replace(limits, **found)
    return replace(Plan(loops=in_cascade_order(loops), limits=limits), **overrides)


def check_against_device(plan: Plan, device_axes: dict[str, tuple[str, ...]]) -> None:
    for lp in plan.loops:
        if lp.axis not in device_axes:
            raise PlanError(f"the board has no {lp.axis!r} axis; it has "
                            f"{', '.join(device_axes) or 'none'}")
        if lp.loop not in device_axes[lp.axis]:
            raise PlanError(f"the board's {lp.axis} axis has no {lp.loop!r} loop; it has "
                            f"{', '.join(device_axes[lp.axis])}")
