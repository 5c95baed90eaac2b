"""Tuning plans: which loops to tune, how, and within which limits (TOML on disk).

:data:`SCHEMA` is the one definition of every plan key: one :class:`Field` row per key with its
section, type, default, range, unit, label and help. Everything else is derived from it: the
defaults of :class:`Plan`, :class:`LoopPlan` and :class:`agent.safety.Limits`; the strict
validation of :func:`plan_from_dict`; the console's Plan-tab fields (:func:`fields`); the range
of command-line options that set a plan key (``agent.cli.validate``); and the commented example
printed by ``tetherloop plan --example`` (:func:`example_plan`).

A plan file has three sections: ``[stand]`` (defaults for every loop and the run's switches),
``[limits]`` (kill thresholds in operator units: degrees, metres, seconds) and one ``[[loop]]``
table per loop to tune (``axis`` and ``loop`` required; ``controller``, ``rule`` and
``ms_target`` override ``[stand]``). Validation is strict: a boolean must be a TOML boolean (a
quoted "false" is refused, not read as true), a section must be a table, a number must be a
number within its range, and an unknown key or section is named. The cascade order is enforced
whatever the file's order: rate loops first, then angle loops, the heave axis last (its rate
loop, then height).

What depends on the board is checked after connecting and before anything is armed
(:func:`check_against_device`, :func:`check_against_board`): the loops exist, a relay ceiling
does not exceed the loop's output limit, the limits lie within the board's ``kill.*`` bounds.
"""

from __future__ import annotations

import math
import textwrap
import tomllib
from dataclasses import asdict, dataclass, field as dc_field, replace
from pathlib import Path
from typing import Any, Callable, Mapping

from .errors import PlanError  # re-exported: agent.plan.PlanError
from .safety import Limits

AXES = ("roll", "pitch", "yaw", "heave")
LOOPS = ("rate", "angle", "heave")
CONTROLLERS = ("pi", "pid", "pd")
SECTIONS = ("stand", "limits", "loop")


def known_rules() -> tuple[str, ...]:
    """Names of the tuning rules the analysis offers (late import keeps plan loading light)."""
    from .analysis.tuning import RULES
    names: list[str] = []
    for per_controller in RULES.values():
        names += [r for r in per_controller if r not in names]
    return tuple(names)


def _rule_choices() -> tuple[str, ...]:
    return ("recommended",) + known_rules()


@dataclass(frozen=True)
class Field:
    """One plan key.

    ``section`` is where it is written ("stand", "limits" or "loop"); ``per_loop`` marks a
    [stand] key that a [[loop]] entry may override. ``type`` is bool, float or str. ``default``
    is in the file's (operator) units; None means no fixed default (required, or derived from the
    board). A float's ``range`` is inclusive, in the same units. A str has ``choices`` (or
    ``choices_from``, a function naming them when asked). ``attr`` is the attribute the value
    sets on ``owner`` ("plan", "loop" or "limits"), multiplied by ``si_scale`` (operator to SI
    units).
    """

    name: str
    section: str
    type: type
    default: Any
    range: tuple[float, float] | None = None
    unit: str = ""
    label: str = ""
    help: str = ""
    choices: tuple[str, ...] = ()
    choices_from: Callable[[], tuple[str, ...]] | None = None
    per_loop: bool = False
    required: bool = False
    owner: str = "plan"
    attr: str = ""
    si_scale: float = 1.0

    @property
    def minimum(self) -> float | None:
        return self.range[0] if self.range else None

    @property
    def maximum(self) -> float | None:
        return self.range[1] if self.range else None

    @property
    def key_attr(self) -> str:
        """The dataclass attribute this key sets."""
        return self.attr or self.name

    def allowed(self) -> tuple[str, ...]:
        """The accepted values of a str key."""
        return self.choices_from() if self.choices_from else self.choices

    def expected(self) -> str:
        """What a valid value looks like, for messages and help."""
        if self.type is bool:
            return "true or false (a TOML boolean, without quotes)"
        if self.type is float:
            unit = f" {self.unit}" if self.unit else ""
            return f"a number from {self.minimum:g} to {self.maximum:g}{unit}"
        return "one of " + ", ".join(self.allowed())


_DEG = math.pi / 180.0

#: The plan keys, in the order the example plan and the console show them.
SCHEMA: tuple[Field, ...] = (
    Field("controller", "stand", str, "pid", choices=CONTROLLERS, per_loop=True,
          label="controller", help="controller form"),
    Field("rule", "stand", str, "recommended", choices_from=_rule_choices, per_loop=True,
          label="rule / design",
          help="tuning rule, or 'recommended' (the robustness-constrained design, with a "
               "fallback)"),
    Field("ms_target", "stand", float, 1.4, (1.1, 2.5), per_loop=True,
          label="Ms target (robustness)",
          help="largest sensitivity peak the constrained design may reach; lower is more "
               "robust and slower"),
    Field("relay_target", "stand", float, 0.3, (0.05, 0.8),
          label="relay target (fraction of kill limit)",
          help="relay oscillation amplitude as a fraction of the loop's kill threshold"),
    Field("verify", "stand", bool, True, label="verify with a step",
          help="step test after applying; a miss tries the most conservative candidate once "
               "(rule 'recommended' only), then rolls back"),
    Field("verify_overshoot_margin", "stand", float, 0.15, (0.0, 1.0),
          label="verify: overshoot margin",
          help="measured overshoot may exceed the predicted by this (plus 2 sigma/step for the "
               "loop's own measured spread)"),
    Field("verify_time_factor", "stand", float, 2.5, (1.0, 10.0),
          label="verify: rise-time factor",
          help="measured rise time must lie within [1/f, f] times the predicted"),
    Field("output_noise_fraction", "stand", float, 0.1, (0.005, 1.0),
          label="output noise allowance",
          help="output deviation the measurement noise may cause, as a fraction of the loop's "
               "output limit (bounds kp and the derivative filter of every design)"),
    Field("apply", "stand", bool, True, label="write the gains",
          help="write the chosen gains to the board"),
    Field("persist", "stand", bool, False, label="persist on the board",
          help="store the gains in the board's non-volatile memory at the end"),
    Field("angle_deg", "limits", float, 30.0, (1.0, 90.0), "deg", "kill: angle",
          "largest |angle| of a rotation axis (host monitor and board)",
          owner="limits", attr="angle_rad", si_scale=_DEG),
    Field("rate_deg_s", "limits", float, 400.0, (10.0, 2000.0), "deg/s", "kill: rate",
          "largest |rate| of a rotation axis (host monitor and board)",
          owner="limits", attr="rate_rad_s", si_scale=_DEG),
    Field("heave_m", "limits", float, 0.25, (0.02, 2.0), "m", "kill: heave excursion",
          "largest height change from the start of an experiment",
          owner="limits", attr="heave_m"),
    Field("climb_rate_m_s", "limits", float, 1.0, (0.05, 5.0), "m/s", "kill: climb rate",
          "largest |vertical speed| (host monitor)", owner="limits", attr="climb_rate_m_s"),
    Field("saturation_s", "limits", float, 1.5, (0.05, 10.0), "s", "kill: output saturated",
          "longest time a loop's output may stay at its limit",
          owner="limits", attr="saturation_s"),
    Field("max_experiment_s", "limits", float, 120.0, (1.0, 600.0), "s",
          "longest experiment", "an experiment running longer than this is stopped"),
    Field("axis", "loop", str, None, choices=AXES, required=True, owner="loop", label="axis",
          help="the axis"),
    Field("loop", "loop", str, None, choices=LOOPS, required=True, owner="loop", label="loop",
          help="the loop level: rate and angle on roll, pitch and yaw; rate and heave (height) "
               "on the heave axis"),
    Field("max_amplitude", "loop", float, None, (1e-6, 1e6), "loop output units",
          "relay amplitude ceiling",
          "largest relay amplitude; at most the loop's output limit on the board (default: "
          "half of it)", owner="loop"),
)


def field(name: str, section: str | None = None) -> Field:
    """The schema row of a plan key.

    Parameters
    ----------
    name : str
        The key as written in a plan file (``ms_target``, ``angle_deg``, ...).
    section : str, optional
        "stand", "limits" or "loop"; a per-loop [stand] key is found under "loop" too.

    Raises
    ------
    KeyError
        No such key (in that section).
    """
    for f in SCHEMA:
        if f.name == name and (section is None or f.section == section
                               or (section == "loop" and f.per_loop)):
            return f
    raise KeyError(f"no plan key {name!r}" + (f" in [{section}]" if section else ""))


def fields(section: str | None = None) -> tuple[Field, ...]:
    """The schema rows of one section (all rows if None), in display order: what a form (the
    console's Plan tab) builds its inputs from (label, unit, help, range, default)."""
    return tuple(f for f in SCHEMA if section is None or f.section == section)


def _keys_in(section: str) -> tuple[str, ...]:
    return tuple(f.name for f in SCHEMA if f.section == section
                 or (section == "loop" and f.per_loop))


def limit_default_si(attr: str) -> float:
    """The default of a :class:`agent.safety.Limits` attribute in SI units, from the schema."""
    for f in SCHEMA:
        if f.owner == "limits" and f.key_attr == attr:
            return f.default * f.si_scale
    raise KeyError(f"no plan key sets Limits.{attr}")


def _default(name: str) -> Any:
    return field(name).default


# ---------------------------------------------------------------------------- the plan


@dataclass(frozen=True)
class LoopPlan:
    axis: str
    loop: str
    controller: str = _default("controller")
    rule: str = _default("rule")
    ms_target: float = _default("ms_target")
    max_amplitude: float | None = _default("max_amplitude")  # None: half the output limit

    @property
    def key(self) -> str:
        return f"{self.axis}.{self.loop}"


@dataclass(frozen=True)
class Plan:
    loops: tuple[LoopPlan, ...]
    limits: Limits = dc_field(default_factory=Limits)
    max_experiment_s: float = _default("max_experiment_s")
    relay_target: float = _default("relay_target")
    verify: bool = _default("verify")
    apply: bool = _default("apply")
    persist: bool = _default("persist")
    verify_overshoot_margin: float = _default("verify_overshoot_margin")
    verify_time_factor: float = _default("verify_time_factor")
    output_noise_fraction: float = _default("output_noise_fraction")

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


# ---------------------------------------------------------------------------- validation


def check_value(f: Field, value: Any, where: str) -> Any:
    """One value of key ``f`` checked strictly; returns it in the file's units (float for a
    number).

    Raises
    ------
    PlanError
        Naming ``where``, the key, the value and what is expected.
    """
    if f.type is bool:
        if not isinstance(value, bool):
            raise PlanError(f"{where}: {f.name} = {value!r} is not a boolean; expected "
                            f"{f.expected()}")
        return value
    if f.type is float:
        if isinstance(value, bool) or not isinstance(value, (int, float)) \
                or not math.isfinite(value):
            raise PlanError(f"{where}: {f.name} = {value!r} is not a number; expected "
                            f"{f.expected()}")
        if not f.minimum <= value <= f.maximum:
            unit = f" {f.unit}" if f.unit else ""
            raise PlanError(f"{where}: {f.name} = {value:g} is out of range; expected "
                            f"{f.minimum:g} to {f.maximum:g}{unit}")
        return float(value)
    allowed = f.allowed()
    if not isinstance(value, str) or value not in allowed:
        raise PlanError(f"{where}: {f.name} = {value!r} is not known; expected {f.expected()}")
    return value


def _table(data: Mapping, name: str, source: str) -> dict:
    value = data.get(name, {})
    if not isinstance(value, dict):
        raise PlanError(f"{source}: {name} = {value!r} is not a table; expected a section "
                        f"[{name}] with keys {', '.join(_keys_in(name))}")
    return value


def _section(table: dict, section: str, where: str, inherited: dict | None = None) -> dict:
    """The values of one section (unknown keys refused, defaults filled in)."""
    known = _keys_in(section)
    for key in table:
        if key not in known:
            raise PlanError(f"{where}: unknown key {key!r}; expected {', '.join(known)}")
    out = {}
    for key in known:
        f = field(key, section)
        if key in table:
            out[key] = check_value(f, table[key], where)
        elif f.required:
            raise PlanError(f"{where}: {key} is missing; expected {f.expected()}")
        else:
            out[key] = (inherited or {}).get(key, f.default)
    return out


def plan_from_dict(data: dict, source: str = "plan") -> Plan:
    """A :class:`Plan` from a parsed plan file (or the console's fields), checked strictly.

    Raises
    ------
    PlanError
        The first problem found, naming the section, the key, the value and what is expected.
    """
    if not isinstance(data, dict):
        raise PlanError(f"{source}: expected a table of sections, got {data!r}")
    extra = set(data) - set(SECTIONS)
    if extra:
        raise PlanError(f"{source}: unknown section(s) {', '.join(sorted(extra))}; expected "
                        "[stand], [limits] and [[loop]]")
    stand = _section(_table(data, "stand", source), "stand", f"{source} [stand]")
    lim = _section(_table(data, "limits", source), "limits", f"{source} [limits]")
    loops_raw = data.get("loop", [])
    if isinstance(loops_raw, dict):
        raise PlanError(f"{source}: loop is a single table; expected an array of tables, each "
                        "written [[loop]] (two brackets)")
    if not isinstance(loops_raw, list) or not loops_raw:
        raise PlanError(f"{source}: no [[loop]] entries; add at least one, e.g.\n"
                        "  [[loop]]\n  axis = \"roll\"\n  loop = \"rate\"")
    loops = []
    seen = set()
    for i, entry in enumerate(loops_raw, 1):
        where = f"{source} [[loop]] #{i}"
        if not isinstance(entry, dict):
            raise PlanError(f"{where}: {entry!r} is not a table; expected a [[loop]] table "
                            "with axis and loop")
        values = _section(entry, "loop", where, inherited=stand)
        axis, loop = values["axis"], values["loop"]
        if axis == "heave" and loop == "angle" or axis != "heave" and loop == "heave":
            raise PlanError(f"{where}: axis {axis!r} has no {loop!r} loop; rotation axes have "
                            "rate and angle, the heave axis has rate and heave")
        if (axis, loop) in seen:
            raise PlanError(f"{where}: {axis}.{loop} is listed twice")
        seen.add((axis, loop))
        loops.append(LoopPlan(**{field(k, "loop").key_attr: v for k, v in values.items()}))
    limits = Limits(**{f.key_attr: lim[f.name] * f.si_scale for f in SCHEMA
                       if f.owner == "limits"})
    plan_values = {f.key_attr: v for f, v in
                   ((field(k), v) for k, v in {**stand, **lim}.items())
                   if f.owner == "plan" and not f.per_loop}
    return Plan(loops=in_cascade_order(loops), limits=limits, **plan_values)


def load_plan(path: str | Path) -> Plan:
    """Read and validate a plan file.

    Raises
    ------
    PlanError
        The file is missing, unreadable, not TOML, or fails validation.
    """
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
    found = {attr: float(vals[name]) for attr, name in KILL_SETTINGS.items()
             if name in vals and float(vals[name]) > 0}
    if found:
        limits = replace(limits, **found)
    return replace(Plan(loops=in_cascade_order(loops), limits=limits), **overrides)


# ---------------------------------------------------------------------------- board checks

#: Limits attribute -> the board setting holding the same kill threshold (SI units).
KILL_SETTINGS = {"angle_rad": "kill.angle_rad", "rate_rad_s": "kill.rate_rad_s",
                 "heave_m": "kill.heave_m", "saturation_s": "kill.saturation_s"}


def check_against_device(plan: Plan, device_axes: dict[str, tuple[str, ...]]) -> None:
    """Every loop of the plan exists on the board.

    Raises
    ------
    PlanError
        Naming the missing axis or loop and what the board has.
    """
    for lp in plan.loops:
        if lp.axis not in device_axes:
            raise PlanError(f"the board has no {lp.axis!r} axis; it has "
                            f"{', '.join(device_axes) or 'none'}")
        if lp.loop not in device_axes[lp.axis]:
            raise PlanError(f"the board's {lp.axis} axis has no {lp.loop!r} loop; it has "
                            f"{', '.join(device_axes[lp.axis])}")


def check_against_board(plan: Plan, device_axes: dict[str, tuple[str, ...]],
                        settings: Mapping[str, Any], values: Mapping[str, float]) -> None:
    """What depends on the board, checked after connecting and before anything is armed.

    A loop's relay ceiling (``max_amplitude``) must not exceed the loop's output limit
    (``{axis}.{loop}.out_limit``, where the board has one above 0): a larger relay saturates the
    output and the board kills. Each kill threshold of the plan must lie within the bounds the
    board declares for its ``kill.*`` setting (the board takes the thresholds with every
    experiment).

    Parameters
    ----------
    plan : Plan
    device_axes : dict
        Axis name -> its loop levels, as the board reported them.
    settings : mapping
        Setting name -> descriptor with ``.minimum``, ``.maximum`` and ``.unit``
        (``Session.settings``).
    values : mapping
        Setting name -> current value (``Session.values``).

    Raises
    ------
    PlanError
        Naming the plan key, its value, the board's bound and what to do.
    """
    check_against_device(plan, device_axes)
    for lp in plan.loops:
        if lp.max_amplitude is None:
            continue
        name = f"{lp.key}.out_limit"
        out_limit = values.get(name)
        if out_limit is not None and out_limit > 0 and lp.max_amplitude > out_limit:
            raise PlanError(f"[[loop]] {lp.key}: max_amplitude = {lp.max_amplitude:g} is above "
                            f"the loop's output limit on the board ({name} = {out_limit:g}); "
                            f"expected at most {out_limit:g}, or leave it out (default: half "
                            "the output limit)")
    by_attr = {f.key_attr: f for f in SCHEMA if f.owner == "limits"}
    for attr, name in KILL_SETTINGS.items():
        desc = settings.get(name)
        if desc is None:
            continue
        f = by_attr[attr]
        si = getattr(plan.limits, attr)
        lo, hi = float(desc.minimum), float(desc.maximum)
        if not lo <= si <= hi:
            unit = f" {f.unit}" if f.unit else ""
            raise PlanError(f"[limits] {f.name} = {si / f.si_scale:g}{unit} is outside the "
                            f"board's bounds for {name} ({lo:g} to {hi:g} "
                            f"{getattr(desc, 'unit', '') or 'SI units'}); expected "
                            f"{lo / f.si_scale:g} to {hi / f.si_scale:g}{unit}")


# ---------------------------------------------------------------------------- example


def _toml_value(value: Any) -> str:
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, str):
        return f'"{value}"'
    return repr(float(value))


def _comment(f: Field) -> list[str]:
    """The comment lines above a key in the example: its help, then its range or choices."""
    bits = [f.help]
    if f.type is float and f.range:
        bits.append(f"{f.minimum:g} to {f.maximum:g}" + (f" {f.unit}" if f.unit else ""))
    elif f.type is str:
        bits.append(" | ".join(f.allowed()))
    elif f.type is bool:
        bits.append("true | false")
    return textwrap.wrap("; ".join(bits), 96, initial_indent="# ", subsequent_indent="#   ")


def example_plan() -> str:
    """A commented plan file holding every key at its default (``tetherloop plan --example``).

    Loading it back gives the default plan for its two loops (roll rate, then roll angle); the
    optional per-loop keys are shown commented out.
    """
    lines = ["# tetherloop plan: every key at its default (`tetherloop plan --example`).",
             "# Only the [[loop]] tables are needed; a key left out takes the value shown.", ""]
    headers = {"stand": "[stand]   # defaults for every loop, and the run's switches",
               "limits": "[limits]  # kill thresholds: host monitor and board, operator units"}
    for section in ("stand", "limits"):
        lines.append(headers[section])
        for f in fields(section):
            lines += _comment(f)
            lines.append(f"{f.name} = {_toml_value(f.default)}")
        lines.append("")
    for axis, loop in (("roll", "rate"), ("roll", "angle")):
        lines.append("[[loop]]  # one per loop; tuned in cascade order whatever the file's order")
        for f, value in ((field("axis", "loop"), axis), (field("loop", "loop"), loop)):
            lines += _comment(f)
            lines.append(f"{f.name} = {_toml_value(value)}")
        for f in (x for x in SCHEMA if x.per_loop):
            lines.append(f"# {f.name} = {_toml_value(f.default)}   # overrides [stand]")
        lines.append("# max_amplitude = 0.3   # (example value; default: half the output limit)")
        lines.append("")
    return "\n".join(lines)
