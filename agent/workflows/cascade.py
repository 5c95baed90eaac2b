"""The whole plan: every loop in cascade order, armed once, and the cascade's spacing checks."""

from __future__ import annotations

import threading

from protocol import messages as m
from protocol.messages import KillReason

from .. import analysis
from ..errors import Cancelled, DeviceError, LinkError, LogbookError, WorkflowError
from ..plan import LoopPlan, Plan, check_against_device
from ..stand import KillTripped, Notice, Stand
from .loop import tune_loop
from .results import (LoopResult, LoopStatus, Outcome, Progress, ProgressFn, Stage, StandResult,
                      finite, quiet)

# an inner loop in one of these states leaves its axis's outer loops nothing sound to stand on
_INNER_BLOCKS = (LoopStatus.FAILED, LoopStatus.ROLLBACK_FAILED, LoopStatus.KILLED)


def _skip_reason(lp: LoopPlan, done: list[LoopResult]) -> str | None:
    if lp.loop == "rate":
        return None
    inner = next((r for r in done if r.axis == lp.axis and r.loop == "rate"), None)
    if inner is not None and inner.status in _INNER_BLOCKS:
        return (f"not tuned: its inner loop {inner.key} {inner.status}"
                + (f" ({inner.message})" if inner.message else ""))
    return None


def autotune(stand: Stand, plan: Plan, progress: ProgressFn = quiet,
             stop: threading.Event | None = None) -> StandResult:
    """Tune every loop of the plan in cascade order, armed once.

    A loop whose step fails is recorded and the run goes on; an outer loop whose inner loop
    failed is SKIPPED; a kill ends the run (outcome KILLED); the operator's stop disarms
    (CANCELLED); a link or board error kills (FAILED). Any loop whose previous gains could not
    be restored makes the outcome ROLLBACK_FAILED.
    """
    check_against_device(plan, stand.info.axes)
    result = StandResult(loops=[], session_path=str(stand.log.path) if stand.log else None)
    if stand.monitor is not None:
        stand.monitor.limits = plan.limits
    total = len(plan.loops)
    progress(Progress(Stage.INFO, "arming (cautions confirmed)", fraction=0.0))
    stand.arm()
    try:
        for i, lp in enumerate(plan.loops):
            progress(Progress(Stage.INFO, f"loop {i + 1} of {total}: {lp.key}", lp.key,
                              fraction=i / total))
            skip = _skip_reason(lp, result.loops)
            if skip is not None:
                lr = LoopResult(lp.key, lp.axis, lp.loop, lp.controller,
                                status=LoopStatus.SKIPPED, message=skip)
                progress(Progress(Stage.INFO, f"{lp.key}: {skip}", lp.key))
            else:
                inner = next((r for r in result.loops if r.axis == lp.axis
                              and r.loop == "rate" and lp.loop != "rate"), None)
                try:
                    lr = tune_loop(stand, lp, plan, progress, stop, inner=inner)
                except LogbookError as exc:
                    result.loops.append(LoopResult(lp.key, lp.axis, lp.loop, lp.controller,
                                                   status=LoopStatus.FAILED, message=str(exc)))
                    raise
                except WorkflowError as exc:
                    if isinstance(exc, (KillTripped, Cancelled)):
                        raise
                    lr = LoopResult(lp.key, lp.axis, lp.loop, lp.controller,
                                    status=LoopStatus.FAILED, message=str(exc))
            result.loops.append(lr)
            stand.emit(Notice.LOOP, {"key": lp.key, "status": str(lr.status)})
            stand.log_event("loop_done", loop=lp.key, status=str(lr.status), message=lr.message)
            stand.check_kill()
        result.cascade = cascade_checks(result.loops)
        for c in result.cascade:
            progress(Progress(Stage.INFO, c["message"]))
        result.outcome = outcome_of(result.loops)
        stand.disarm()
        if plan.persist and plan.apply and stand.info.capabilities & m.Capability.PERSIST:
            stand.session.persist()
            stand.log_event("persisted")
    except KillTripped as exc:
        result.outcome, result.message = Outcome.KILLED, str(exc)
    except Cancelled as exc:
        result.outcome, result.message = Outcome.CANCELLED, str(exc)
        safe_disarm(stand)
    except LogbookError as exc:
        result.outcome, result.message = Outcome.FAILED, str(exc)
        safe_disarm(stand)
    except (DeviceError, LinkError) as exc:
        if stand.killed:  # e.g. a request refused because a kill had just latched
            info = stand.kills[-1] if stand.kills else {"reason": "device reports KILLED"}
            result.outcome, result.message = Outcome.KILLED, str(KillTripped(info))
        else:
            stand.kill(KillReason.HOST_LINK if isinstance(exc, LinkError)
                       else KillReason.HOST_ERROR)
            result.outcome, result.message = Outcome.FAILED, str(exc)
    except BaseException:
        stand.kill(KillReason.HOST_ERROR)
        raise
    if any(lr.status == LoopStatus.ROLLBACK_FAILED for lr in result.loops):
        result.outcome = Outcome.ROLLBACK_FAILED
    result.kills = list(stand.kills)
    progress(Progress(Stage.DONE, f"autotune {result.outcome}"
                      + (f": {result.message}" if result.message else ""), fraction=1.0))
    return result


def outcome_of(loops: list[LoopResult]) -> Outcome:
    """OK when every loop reached a good state, ROLLBACK_FAILED when a rollback could not be
    confirmed, else PARTIAL."""
    if any(lr.status == LoopStatus.ROLLBACK_FAILED for lr in loops):
        return Outcome.ROLLBACK_FAILED
    return Outcome.OK if all(LoopStatus(lr.status).good for lr in loops) else Outcome.PARTIAL


def safe_disarm(stand: Stand) -> None:
    """Disarm; if that fails, kill (the board must end safe either way)."""
    try:
        stand.disarm()
    except (DeviceError, LinkError):
        stand.kill(KillReason.HOST_ERROR)


def cascade_checks(loops: list[LoopResult]) -> list[dict]:
    """Bandwidth ratio of each axis's inner (rate) loop to its outer loop."""
    by_key = {lr.key: lr for lr in loops}
    out = []
    for lr in loops:
        if lr.loop == "rate" or lr.chosen is None:
            continue
        inner = by_key.get(f"{lr.axis}.rate")
        if inner is None or inner.chosen is None:
            continue
        if not (LoopStatus(inner.status).good and LoopStatus(lr.status).good):
            out.append({"axis": lr.axis, "inner": inner.key, "outer": lr.key, "ratio": None,
                        "ok": False, "message": f"{lr.axis}: bandwidth ratio not judged — "
                        f"{inner.key} is {inner.status}, {lr.key} is {lr.status}, so the gains "
                        "on the board are not the ones designed"})
            continue
        chk = analysis.cascade_check(inner.bandwidth_rad_s, lr.bandwidth_rad_s)
        out.append({"axis": lr.axis, "inner": inner.key, "outer": lr.key,
                    "ratio": finite(chk.ratio), "ok": bool(chk.ok),
                    "message": f"{lr.axis}: {chk.message}"})
    return out
