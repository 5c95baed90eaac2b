"""On-board experiments: what an ExperimentStart asks for, its checks, and the experiment level's
output each tick.

Relay output (protocol/SPEC.md 13.1): ``bias + s*amplitude`` (s = +1/-1) replaces the level's PID
output, so on a loaded loop (heave rate: gravity) the host centres the relay on the trim with
``bias``. The relay switches to +1 when the error (setpoint - measurement) rises above
``hysteresis`` and to -1 when it falls below ``-hysteresis``; a negative hysteresis switches
early. It starts at +1 if the error is >= 0. A step adds ``amplitude`` to the setpoint from
``step_at_s`` on; a hold keeps the setpoint. An outer level's output is the inner level's
setpoint (the inner level stays closed on its current gains); an inner level's output is clipped
to the actuator range by the tick.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

from protocol import messages as M
from protocol.messages import ExperimentKind, RefuseCode

from .axes import LOOP_NAME, AxisController


@dataclass
class Experiment:
    """A running on-board experiment (device side)."""

    tag: int
    kind: ExperimentKind
    axis: str
    loop: str
    amplitude: float
    hysteresis: float
    bias: float
    setpoint: float
    step_at_s: float
    duration_s: float
    kill_angle_rad: float
    kill_rate_rad_s: float
    kill_heave_m: float
    kill_saturation_s: float
    start_tick: int = 0
    relay_state: int = 0

    @classmethod
    def from_request(cls, msg: M.ExperimentStart, axis: AxisController,
                     tick: int) -> Experiment:
        """The experiment a checked request starts at ``tick`` (see :func:`check_request`)."""
        loop = LOOP_NAME[msg.loop]
        e = cls(tag=msg.tag, kind=ExperimentKind(msg.kind), axis=axis.name, loop=loop,
                amplitude=msg.amplitude, hysteresis=msg.hysteresis, bias=msg.bias,
                setpoint=msg.setpoint, step_at_s=msg.step_at_s, duration_s=msg.duration_s,
                kill_angle_rad=msg.kill_angle_rad, kill_rate_rad_s=msg.kill_rate_rad_s,
                kill_heave_m=msg.kill_heave_m, kill_saturation_s=msg.kill_saturation_s,
                start_tick=tick)
        e.relay_state = 1 if (e.setpoint - axis.levels[loop].y) >= 0 else -1
        return e


def check_request(msg: M.ExperimentStart,
                  axes: dict[int, AxisController]) -> tuple[RefuseCode | None, str]:
    """Refusal code and text for an ExperimentStart this board cannot run, or (None, "").
    ``axes`` maps axis ids to the board's axes. The state is checked elsewhere."""
    try:
        kind = ExperimentKind(msg.kind)
    except ValueError:
        return RefuseCode.UNSUPPORTED, f"unknown experiment kind {msg.kind}"
    a = axes.get(msg.axis)
    if a is None:
        return RefuseCode.UNSUPPORTED, (f"axis {msg.axis} not on this board; axes: "
                                        f"{', '.join(x.name for x in axes.values())}")
    loop = LOOP_NAME.get(msg.loop)
    if loop not in a.levels:
        return RefuseCode.UNSUPPORTED, (f"{a.name} has no loop level {msg.loop}; levels: "
                                        f"{', '.join(a.levels)}")
    if msg.tag == 0:
        return RefuseCode.BAD_PARAMETER, "tag must be non-zero"
    vals = (msg.amplitude, msg.hysteresis, msg.bias, msg.setpoint, msg.step_at_s,
            msg.duration_s, msg.kill_angle_rad, msg.kill_rate_rad_s, msg.kill_heave_m,
            msg.kill_saturation_s)
    if not all(math.isfinite(v) for v in vals):
        return RefuseCode.BAD_PARAMETER, "experiment parameters must be finite numbers"
    if msg.duration_s <= 0:
        return RefuseCode.BAD_PARAMETER, "duration_s must be > 0"
    if kind == ExperimentKind.RELAY and msg.amplitude <= 0:
        return RefuseCode.BAD_PARAMETER, "relay amplitude must be > 0"
    if kind == ExperimentKind.STEP and not 0 <= msg.step_at_s < msg.duration_s:
        return RefuseCode.BAD_PARAMETER, "step_at_s must be in [0, duration_s)"
    if min(msg.kill_angle_rad, msg.kill_rate_rad_s, msg.kill_heave_m,
           msg.kill_saturation_s) < 0:
        return RefuseCode.BAD_PARAMETER, "kill thresholds must be >= 0"
    return None, ""


def check_adjust(msg: M.ExperimentAdjust, e: Experiment | None) -> tuple[RefuseCode | None, str]:
    """Refusal code and text for an ExperimentAdjust of the running experiment, or (None, "")."""
    if e is None or msg.tag != e.tag:
        return RefuseCode.BAD_PARAMETER, f"tag {msg.tag} is not the running experiment"
    if not all(math.isfinite(v) for v in (msg.amplitude, msg.hysteresis, msg.bias)) \
            or msg.amplitude <= 0:
        return RefuseCode.BAD_PARAMETER, "amplitude must be > 0, all finite"
    if e.kind != ExperimentKind.RELAY:
        return RefuseCode.UNSUPPORTED, "the running experiment is not a relay"
    return None, ""


def experiment_command(a: AxisController, e: Experiment, t: float) -> float:
    """One tick of the experiment on its level of axis ``a``, ``t`` seconds after its start;
    returns the actuator command (before the actuator's clipping)."""
    lv = a.levels[e.loop]
    r = e.setpoint
    if e.kind == ExperimentKind.RELAY:
        err = r - lv.y
        s = e.relay_state
        if s > 0:
            if err < -e.hysteresis:
                s = -1
        elif err > e.hysteresis:
            s = 1
        e.relay_state = s
        out = e.bias + s * e.amplitude
        lv.u = out
    else:
        if e.kind == ExperimentKind.STEP and t >= e.step_at_s:
            r += e.amplitude
        out = lv.u = lv.pid.update(r, lv.y)
    lv.r = r
    if lv is a.outer:
        i = a.inner
        i.r = out
        out = i.u = i.pid.update(out, i.y)
    return out
