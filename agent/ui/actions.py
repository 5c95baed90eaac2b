"""The stand console's work on the board: run a plan, stop it, clear a kill, and the Results
tab's apply, roll back and verify, each through agent.operations (the path `tune --apply` and
autotune take). A part of :class:`agent.ui.controller.Controller`, which provides the state
(``stand``, ``plan``, ``run_plan``, ``result``, ``confirmation``, ``gain_history``, ``options``),
the display (``view``) and the worker helpers (``_start``, ``_report``, ``_progress``,
``_failed``, ``_restore_live``); see that module for the threads.
"""

from __future__ import annotations

from functools import partial
from typing import TYPE_CHECKING, Callable

from agent import operations
from agent.errors import DeviceError, LinkError, LogbookError, PlanError, TetherloopError
from agent.stand import KillTripped

from .state import StopSignal

if TYPE_CHECKING:
    from agent.plan import Plan
    from agent.stand import Stand
    from agent.workflows import LoopResult, Progress, StandResult


class BoardActions:
    """Run, stop, clear a kill; apply, roll back, verify (UI thread; the work in the stand
    worker)."""

    # ------------------------------------------------------------------ plan and run
    def plan_changed(self, plan: "Plan | None", error: str) -> None:
        self.plan, self.plan_error = plan, error
        if plan is not None and self.busy is None:  # a running plan keeps its checklist
            self.view.plan_shown(plan)

    def _need_stand(self) -> bool:
        if self.stand is None:
            self.view.notify("No board connected: connect on the Link tab (F2) first.",
                             severity="warning")
            return False
        if self.stand.killed:
            self.view.notify("The board is KILLED: find out why, then clear the kill (x on the "
                             "Run tab) before anything else.", severity="error")
            return False
        return True

    def _confirm_then(self, what: str, then: Callable[[], None]) -> None:
        """Show the cautions once per connection; ``then()`` after the operator typed yes."""
        if self.stand.confirmed and self.confirmation is not None:
            then()
            return

        def done(ok: bool | None) -> None:
            if ok:
                self.confirmation = operations.Confirmation(operations.ConfirmedBy.CONSOLE,
                                                            what=what)
                then()
            else:
                self.view.notify("Not confirmed: nothing was armed.", severity="warning")
                self.view.note("safety check not confirmed: nothing was armed")

        self.view.ask_cautions(what, done)

    def start_run(self) -> None:
        if not self._need_stand() or self._refused():
            return
        plan = self.plan
        if plan is not None:
            try:
                operations.check_plan(self.stand, plan)  # what depends on the board
            except PlanError as exc:
                plan, self.plan_error = None, str(exc)
        if plan is None:
            self.view.notify("The plan is not valid: " + self.plan_error, severity="error",
                             timeout=8)
            self.view.show_tab("tab-plan")
            return
        self._confirm_then(f"run the plan ({', '.join(lp.key for lp in plan.loops)})",
                           partial(self._begin_run, plan))

    def _begin_run(self, plan: "Plan") -> None:
        if self.stand is None or self._refused():
            return
        self.run_plan = plan
        self.view.show_tab("tab-run")
        self.view.run_began(plan)
        self._start("running the plan", self._run_job, self.stand, plan, self.confirmation,
                    self._outcome("closed"))

    def _run_job(self, stop: StopSignal, stand: "Stand", plan: "Plan",
                 confirmation: operations.Confirmation, previous: str) -> None:
        result, error = None, None
        try:
            operations.open_session(stand, plan, confirmation, self.options.log_dir,
                                    previous_outcome=previous)
        except (LogbookError, OSError) as exc:
            error = f"{exc} (nothing was armed)"
        else:
            try:
                result = operations.autotune(stand, plan, self._progress, stop)
            except TetherloopError as exc:  # refused before the first loop (autotune is safe)
                error = str(exc)
            finally:
                self._restore_live(stand)
        self._report(stop, self._run_done, result, error)

    def _run_done(self, result: "StandResult | None", error: str | None) -> None:
        if error:
            self.view.note(f"run failed: {error}")
            self.view.notify(f"run failed: {error}", severity="error", timeout=10)
            return
        for lr in result.loops:
            self.view.loop_status(lr.key, lr.status)
            if lr.message:
                self.view.note(f"{lr.key}: {lr.status} - {lr.message}")
        for c in result.cascade:
            self.view.note(c.get("message", ""))
        self.view.note(f"-- outcome: {result.outcome} {result.message}".rstrip())
        self.view.note(f"log: {result.session_path}")
        self.set_result(result)
        self.view.notify(f"run {result.outcome}. Results on F6.",
                         severity="information" if result.outcome == "ok" else "warning")

    def set_result(self, result: "StandResult") -> None:
        """The result the Results tab shows and acts on."""
        self.result = result
        self.view.results_changed(result.loops)

    def stop_run(self) -> None:
        if self.busy is None or self._stop is None:
            self.view.notify("nothing is running", severity="information")
            return
        self._stop.set()
        self.view.note("stop requested: the workflow ends gently and disarms")

    def clear_kill(self) -> None:
        if self.stand is None:
            self.view.notify("not connected", severity="warning")
        elif not self.stand.killed:
            self.view.notify("the board is not killed", severity="information")
        else:
            self._start("clearing the kill", self._clear_job, self.stand)

    def _clear_job(self, stop: StopSignal, stand: "Stand") -> None:
        try:
            operations.clear_kill(stand)
        except (TetherloopError, OSError) as exc:
            self._report(stop, self._failed, f"the kill was not cleared: {exc}")
            return
        self._restore_live(stand)
        self._report(stop, self._cleared)

    def _cleared(self) -> None:
        self.kill = None
        self.view.kill_changed(None)
        self.view.note("kill cleared by the operator; the board is disarmed")

    # ------------------------------------------------------------------ results: the gains
    def _gains_done(self, text: str | None, error: str | None) -> None:
        self.view.note(text or error)
        self.view.notify(text or error, severity="error" if error else "information",
                         timeout=8 if error else 4)
        self.view.results_changed(None)

    def apply(self, lr: "LoopResult | None", cand) -> None:
        if lr is None or cand is None:
            self.view.notify("choose a loop and a candidate first", severity="warning")
            return
        if self._need_stand():
            self._start(f"applying {cand.rule} to {lr.key}", self._apply_job, self.stand, lr,
                        cand, self.run_plan)

    def _apply_job(self, stop: StopSignal, stand: "Stand", lr: "LoopResult", cand,
                   plan: "Plan | None") -> None:
        try:
            before = operations.apply_candidate(stand, lr, cand, self._progress, plan=plan)
        except (DeviceError, LinkError) as exc:
            self._report(stop, self._gains_done, None, f"not applied: {exc}")
            return
        self._report(stop, self._applied, lr.key, before, f"{lr.key}: {cand.rule} gains written")

    def _applied(self, key: str, before: dict, text: str) -> None:
        self.gain_history.setdefault(key, []).append(before)
        self._gains_done(text, None)

    def roll_back(self, lr: "LoopResult | None") -> None:
        if lr is None:
            self.view.notify("choose a loop first", severity="warning")
            return
        history = self.gain_history.get(lr.key) or ([lr.previous_gains] if lr.previous_gains
                                                    else [])
        if not history:
            self.view.notify(f"{lr.key}: no earlier gains to go back to", severity="warning")
            return
        if self._need_stand():
            self._start(f"rolling back {lr.key}", self._rollback_job, self.stand, lr,
                        dict(history[-1]))

    def _rollback_job(self, stop: StopSignal, stand: "Stand", lr: "LoopResult",
                      gains: dict) -> None:
        said: list[str] = []

        def progress(p: "Progress") -> None:
            said.append(p.message)
            self._progress(p)

        if operations.roll_back(stand, lr, gains, progress, why="rolled back by the operator"):
            self._report(stop, self._rolled_back, lr.key)
        else:  # the reason is in what roll_back reported
            self._report(stop, self._gains_done, None,
                         said[-1] if said else f"{lr.key}: ROLLBACK FAILED")

    def _rolled_back(self, key: str) -> None:
        history = self.gain_history.get(key)
        if history:
            history.pop()  # one step back per press
        self._gains_done(f"{key}: rolled back to the earlier gains", None)

    def verify(self, lr: "LoopResult | None") -> None:
        if lr is None or lr.chosen is None or not lr.applied_gains:
            self.view.notify("apply a candidate first (a), then verify it", severity="warning")
            return
        if not self._need_stand():
            return
        plan = self.run_plan or self.plan
        if plan is None:
            self.view.notify("no plan: the step size and limits come from the plan (F4)",
                             severity="warning")
            return
        self._confirm_then(f"step-test {lr.key} with the applied gains",
                           partial(self._begin_verify, lr, plan))

    def _begin_verify(self, lr: "LoopResult", plan: "Plan") -> None:
        if self.stand is None:
            return
        self._verify_count += 1  # experiment ids are unique within a session log
        self._start(f"verifying {lr.key}", self._verify_job, self.stand, lr, plan,
                    f"{lr.axis}-{lr.loop}-verify-{self._verify_count}", self.confirmation)

    def _verify_job(self, stop: StopSignal, stand: "Stand", lr: "LoopResult", plan: "Plan",
                    exp_id: str, confirmation: operations.Confirmation) -> None:
        error = None
        try:
            if stand.log is None:
                operations.open_session(stand, plan, confirmation, self.options.log_dir)
            ver = operations.reverify(stand, lr, plan, self._progress, stop, exp_id=exp_id)
        except KillTripped as exc:
            error = f"killed during the step: {exc}"
        except (TetherloopError, OSError) as exc:
            error = str(exc) or type(exc).__name__
        finally:
            self._restore_live(stand)
        if error is not None:
            self._report(stop, self._verify_failed, lr, error)
        elif ver.get("passed"):
            self._report(stop, self._gains_done, f"{lr.key}: verification passed", None)
        else:
            self._report(stop, self._gains_done, f"{lr.key}: verification FAILED: "
                         + "; ".join(ver.get("problems", [])) + " (b rolls back)", None)

    def _verify_failed(self, lr: "LoopResult", error: str) -> None:
        if lr.verification is None:  # a kill's record is kept; otherwise say why it did not run
            lr.verification = {"passed": False, "problems": [error]}
        self._gains_done(None, f"{lr.key}: {error}")
