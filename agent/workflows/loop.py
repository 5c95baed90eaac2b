"""One loop end to end: hold, relay, identification and design; apply, verify, fall back or
roll back, as the plan says."""

from __future__ import annotations

import math
import threading
from dataclasses import replace

from .. import analysis
from ..errors import LinkError, WorkflowError
from ..logbook.records import AnalysisInput, relay_record_from_rows, tune_kwargs
from ..plan import LoopPlan, Plan, check_against_device
from ..session import SessionError
from ..stand import KillTripped, Notice, Stand
from .gains import apply_gains, current_gains, gains_of, rollback
from .hold import lift_off, noise_check
from .relay import relay_experiment
from .results import LoopResult, LoopStatus, Progress, ProgressFn, Stage, quiet
from .verify import verify_step
from .worker import analyse

FALLBACK_MS = 1.2  # robustness target of the detuned design tried after a missed step
HYSTERESIS_SIGMAS = 3.0  # relay hysteresis in noise standard deviations (common practice)


def tune_loop(stand: Stand, lp: LoopPlan, plan: Plan, progress: ProgressFn = quiet,
              stop: threading.Event | None = None, inner: LoopResult | None = None) -> LoopResult:
    """Tune one loop: noise/trim hold, relay with ramp, identification, design; then apply and
    verify as the plan says, trying the most robust candidate once after a missed step and
    rolling back to the previous gains when that misses too.

    ``inner``, the result of this axis's rate loop when it was tuned in the same run, bounds an
    outer relay's amplitude. The stand must be armed.

    Raises
    ------
    WorkflowError
        A step could not complete (the loop's result is then not returned).
    KillTripped, Cancelled
        A kill or the operator's stop.
    """
    check_against_device(Plan(loops=(lp,)), stand.info.axes)
    res = LoopResult(lp.key, lp.axis, lp.loop, lp.controller)
    stand.emit(Notice.LOOP, {"key": lp.key, "status": str(LoopStatus.RUNNING)})
    if lp.axis == "heave":
        lift_off(stand, plan, progress, stop, for_loop=lp.loop)
    noise = noise_check(stand, lp, plan, progress, stop)
    res.experiments.append(f"{lp.axis}-{lp.loop}-hold")
    res.noise_std, res.trim = noise["noise_std"], noise["trim"]
    res.operating_point = noise["setpoint"]
    res.hysteresis = HYSTERESIS_SIGMAS * res.noise_std
    inner_amp = (inner.relay or {}).get("amplitude_seen") if inner is not None else None
    run = relay_experiment(stand, lp, plan, trim=res.trim, hysteresis=res.hysteresis,
                           setpoint=noise["setpoint"], inner_amplitude=inner_amp,
                           noise_std=res.noise_std, progress=progress, stop=stop)
    res.experiments.append(run.exp_id)
    res.relay, res.cross_coupling = run.relay, run.cross_coupling
    res.analysis_input = run.analysis_input
    progress(Progress(Stage.ANALYSIS, f"{lp.key}: identifying the loop", lp.key))
    # the same two calls the offline re-analysis makes, so a log reproduces this result
    record = relay_record_from_rows(run.columns, run.analysis_input)
    doc = {"analysis_input": run.analysis_input.to_dict(), "relay": res.relay,
           "cross_coupling": res.cross_coupling, "noise": noise}
    try:
        res.identification, res.tuning = analyse(stand, record,
                                                 tune_kwargs(run.analysis_input), stop)
    except analysis.RecordError as exc:
        run.experiment.finish({**doc, "error": str(exc)})
        res.status = LoopStatus.FAILED
        res.message = f"the relay record could not be analysed: {exc}"
        return res
    rule = res.tuning.recommended if lp.rule == "recommended" else lp.rule
    chosen = [c for c in res.tuning.candidates if c.rule == rule]
    if not chosen:
        run.experiment.finish(doc)
        raise WorkflowError(f"{lp.key}: the rule {rule!r} gave no candidate for a "
                            f"{lp.controller.upper()} controller")
    res.chosen = chosen[0]
    res.bandwidth_rad_s = analysis.loop_bandwidth(res.identification.model_loop, res.chosen)
    res.status = LoopStatus.TUNED
    doc.update({"identification": res.identification.to_dict(),
                "tuning": res.tuning.to_dict(), "chosen": res.chosen.to_dict()})
    run.experiment.finish(doc)
    ident = res.identification
    progress(Progress(Stage.ANALYSIS, f"{lp.key}: Ku {ident.best.ku:.4g}, Tu "
                      f"{ident.best.tu_s:.4g} s ({ident.best.method}); model {ident.model.kind};"
                      f" {rule}: kp {res.chosen.kp:.4g} ki {res.chosen.ki:.4g} "
                      f"kd {res.chosen.kd:.4g}", lp.key, data=res.to_dict()))
    if not plan.apply:
        return res
    stand.check_log()  # nothing is written to the board that the log could not record
    res.previous_gains = current_gains(stand, lp)
    try:
        res.applied_gains = apply_gains(stand, gains_of(res.chosen, lp, res.operating_point,
                                                        stand), progress, lp.key)
    except SessionError as exc:
        res.status, res.message = LoopStatus.FAILED, f"gains not applied: {exc}"
        return res
    res.status = LoopStatus.APPLIED
    if not plan.verify:
        return res
    verify_applied(stand, lp, plan, res, progress, stop)
    fallback = (fallback_candidate(res, run.analysis_input)
                if lp.rule == "recommended" and res.status != LoopStatus.VERIFIED else None)
    if res.status != LoopStatus.VERIFIED and fallback is not None:
        # The step missed the prediction made on the model (a loop the model describes less
        # well than its fit suggests: friction, a weak actuator). Before giving up, the most
        # conservative candidate (lowest Ms) gets one step test of its own; a kill or a second
        # miss rolls back to the previous gains (common practice, no source: detune, re-test).
        first = res.verification
        res.first_try = {"rule": res.chosen.rule, "gains": res.applied_gains,
                         "problems": first.get("problems", []) if first else []}
        progress(Progress(Stage.VERIFY, f"{lp.key}: {res.chosen.rule} missed its step "
                          f"({'; '.join(res.first_try['problems'])}); trying the more "
                          f"conservative {fallback.rule} (Ms {fallback.ms:.2f})", lp.key))
        stand.log_event("fallback", loop=lp.key, from_rule=res.chosen.rule,
                        to_rule=fallback.rule, why=res.first_try["problems"])
        res.chosen = fallback
        try:
            res.applied_gains = apply_gains(stand, gains_of(fallback, lp, res.operating_point,
                                                            stand), progress, lp.key)
        except SessionError as exc:
            res.verification = {"passed": False, "problems": [f"fallback not applied: {exc}"]}
            rollback(stand, res, progress)
            return res
        verify_applied(stand, lp, plan, res, progress, stop,
                       exp_id=f"{lp.axis}-{lp.loop}-verify-fallback")
    if res.status != LoopStatus.VERIFIED:
        rollback(stand, res, progress)
    if stand.log_error is not None and res.status == LoopStatus.VERIFIED:
        # the step's record was lost: gains nobody can audit do not stay on the board
        rollback(stand, res, progress, why=f"the session log refused a write "
                 f"({stand.log_error})")
    stand.check_log()
    return res


def fallback_candidate(res: LoopResult, analysis_input: AnalysisInput):
    """The most robust alternative to the chosen gains: among the other rules' candidates
    and the constrained design redone for Ms = FALLBACK_MS (rule name ``fallback_ms1.2``), the
    one with the lowest Ms below the chosen one's and a finite predicted step; None when there
    is none."""
    pool = [c for c in res.tuning.candidates if c is not res.chosen]
    try:
        strict = analysis.tune(res.identification,
                               **{**tune_kwargs(analysis_input), "ms_target": FALLBACK_MS})
        pool += [replace(c, rule=f"fallback_ms{FALLBACK_MS:g}") for c in strict.candidates
                 if c.rule == "ms_constrained"]
    except ValueError:
        pass
    pool = [c for c in pool if math.isfinite(c.ms) and c.ms < res.chosen.ms - 0.02
            and math.isfinite(c.predicted.rise_s)]
    return min(pool, key=lambda c: c.ms) if pool else None


def verify_applied(stand: Stand, lp: LoopPlan, plan: Plan, res: LoopResult,
                   progress: ProgressFn = quiet, stop: threading.Event | None = None,
                   exp_id: str | None = None) -> None:
    """Step-test the gains applied for ``res.chosen`` with the arguments autotune uses (step
    1.5 times the relay's oscillation, the hold's noise, the relay's period, the operating
    point). Sets ``res.verification`` and, on a pass, the status VERIFIED. A kill during the
    step rolls back, then re-raises."""
    try:
        res.verification = verify_step(stand, lp, plan, res.chosen, setpoint=res.operating_point,
                                       step=1.5 * res.relay.get("amplitude_seen", 0.0) or None,
                                       noise_std=res.noise_std,
                                       cand_period_s=res.relay.get("period_s"),
                                       progress=progress, stop=stop, exp_id=exp_id)
        if res.verification.get("experiment"):
            res.experiments.append(res.verification["experiment"])
    except KillTripped as exc:
        res.verification = {"passed": False, "problems": [f"kill during the step: {exc}"]}
        try:
            rollback(stand, res, progress)
        except LinkError:
            pass
        raise
    if res.verification["passed"]:
        res.status = LoopStatus.VERIFIED
        progress(Progress(Stage.VERIFY, f"{lp.key}: verification passed ({res.chosen.rule})",
                          lp.key, data=res.verification))
