"""Gains on the board: read, apply and roll back, through one bounds-checked path.

Every write of gains — a candidate applied by autotune, by ``tune --apply`` or from the console,
and every rollback — goes through :func:`write_gains`: each value is checked against the board's
bounds before the first write, and what is recorded is what the board returned.
"""

from __future__ import annotations

from ..errors import LinkError
from ..plan import LoopPlan
from ..session import SessionError
from ..stand import Stand
from .results import LoopResult, LoopStatus, Progress, ProgressFn, Stage, quiet

GAIN_KEYS = ("kp", "ki", "kd", "tf", "b", "i_limit")


def gains_of(cand, lp: LoopPlan, operating_point: float = 0.0,
             stand: Stand | None = None) -> dict[str, float]:
    """The board settings for a candidate.

    With setpoint weight b < 1 the board's proportional term is kp*(b*r - y), so at an operating
    point r0 away from zero (a height on the rail) the integrator must hold kp*(1-b)*r0 on top of
    the trim: the integrator limit is raised to cover that plus the output limit (the board's own
    anti-windup still stops integration while the output saturates), within the board's bounds.
    """
    p = f"{lp.axis}.{lp.loop}."
    i_limit = float(cand.i_limit)
    if operating_point and cand.b < 1.0:
        out_limit = stand.session.values.get(p + "out_limit", 0.0) if stand else 0.0
        i_limit = max(i_limit, out_limit + cand.kp * (1.0 - cand.b) * abs(operating_point))
        if stand is not None and p + "i_limit" in stand.session.settings:
            i_limit = min(i_limit, stand.session.setting(p + "i_limit").maximum)
    return {p + "kp": float(cand.kp), p + "ki": float(cand.ki), p + "kd": float(cand.kd),
            p + "tf": float(cand.tf_s), p + "b": float(cand.b), p + "i_limit": i_limit}


def current_gains(stand: Stand, lp: LoopPlan) -> dict[str, float]:
    """The loop's gains as read from the board now (only the settings the board has)."""
    out = {}
    for k in GAIN_KEYS:
        name = f"{lp.axis}.{lp.loop}.{k}"
        if name in stand.session.settings:
            out[name] = stand.session.read(name)
    return out


def write_gains(stand: Stand, gains: dict[str, float], *, key: str | None, event: str,
                progress: ProgressFn = quiet, stage: Stage = Stage.APPLY,
                **log_fields) -> dict[str, float]:
    """Write a set of gains: all checked against the board's bounds before the first write.

    Settings the board does not have are left out. The session log gets ``event`` with the
    values the board returned.

    Raises
    ------
    SessionError
        A value out of bounds (nothing written) or a refused write.
    LinkError
        The link failed during the writes.
    """
    present = {k: v for k, v in gains.items() if k in stand.session.settings}
    for name, value in present.items():
        stand.session.setting(name).check(value)
    written = stand.session.write_many(present)
    stand.log_event(event, loop=key, gains=written, **log_fields)
    progress(Progress(stage, f"{key}: gains written " +
                      ", ".join(f"{k.split('.')[-1]}={v:.4g}" for k, v in written.items()), key))
    return written


def apply_gains(stand: Stand, gains: dict[str, float], progress: ProgressFn = quiet,
                key: str | None = None) -> dict[str, float]:
    """Write a candidate's gains (see :func:`write_gains`); returns the values written."""
    return write_gains(stand, gains, key=key, event="gains_applied", progress=progress)


def rollback(stand: Stand, res: LoopResult, progress: ProgressFn = quiet,
             why: str | None = None, gains: dict[str, float] | None = None) -> bool:
    """Restore the loop's previous gains (or ``gains``) through the bounds-checked path.

    Sets ``res.status`` to ROLLED_BACK, or ROLLBACK_FAILED when the write could not be done;
    ``res.message`` says why. Returns True when the gains were restored.
    """
    res.message = why if why is not None else (
        "; ".join(res.verification.get("problems", [])) if res.verification else "")
    target = gains if gains is not None else res.previous_gains
    res.status = LoopStatus.ROLLED_BACK
    if not target:
        return True
    try:
        written = write_gains(stand, target, key=res.key, event="rollback", progress=quiet,
                              why=res.message)
    except (SessionError, LinkError) as exc:
        res.status = LoopStatus.ROLLBACK_FAILED
        # what the board holds, as read back (the write set's error says it when it got that
        # far; else the host's record, which holds only read-back values)
        board = getattr(exc, "board", None)
        held = board.describe() if board is not None else ", ".join(
            f"{k}={stand.session.values[k]:.6g}" if k in stand.session.values else f"{k} unknown"
            for k in target if k in stand.session.settings)
        text = str(exc) if board is not None else f"{exc}; the board holds {held}"
        res.message = f"ROLLBACK FAILED: {text}" + (f" (rolling back: {res.message})"
                                                     if res.message else "")
        stand.log_event("rollback_failed", loop=res.key, error=str(exc), board=held)
        progress(Progress(Stage.ROLLBACK, f"{res.key}: ROLLBACK FAILED: {text}", res.key))
        return False
    res.applied_gains = written
    progress(Progress(Stage.ROLLBACK, f"{res.key}: rolled back to the previous gains "
                      f"({res.message})", res.key))
    return True
