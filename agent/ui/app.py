"""The stand console application: tabs over one connected stand, a permanent state strip and a
kill key that works on every tab, in every state, also on top of the safety confirmation.

Threads: the link's reader thread calls the stand's listeners; they only ``post_message`` (which is
thread-safe and never blocks the reader). Everything that talks to the board — connecting,
running a plan, applying, verifying, clearing a kill — runs in a textual thread worker and posts
its results back with ``call_from_thread``. The UI thread never waits on the board; the kill key
writes the kill frame directly (``Stand.kill`` does not wait for an answer).
"""

from __future__ import annotations

import threading
import time
from dataclasses import dataclass

from textual import work
from textual.app import App, ComposeResult
from textual.binding import Binding
from textual.message import Message
from textual.widgets import Footer, TabbedContent, TabPane

from protocol.messages import Axis, KillReason, Loop

from .caution import CautionScreen
from .panes.link import MOCK_ID, LinkPane
from .panes.logbook import LogbookPane
from .panes.plan import PlanPane
from .panes.results import ResultsPane
from .panes.run import RunPane
from .panes.scope import ScopePane
from .widgets import StateStrip, fmt

KILL_KEY = "ctrl+k"
KILL_KEY_LABEL = "Ctrl+K"
SCOPE_RATE_HZ = 100  # idle telemetry for the live scope (device time)
SCOPE_LEVELS = ("rate", "angle", "heave")
TABS = (("tab-link", "F2 Link", "f2"), ("tab-scope", "F3 Scope", "f3"),
        ("tab-plan", "F4 Plan", "f4"), ("tab-run", "F5 Run", "f5"),
        ("tab-results", "F6 Results", "f6"), ("tab-logbook", "F7 Logbook", "f7"))


@dataclass
class ConsoleOptions:
    port: str | None = None
    demo: bool = False
    log_dir: str | None = None
    scenario: str = "gimbal-quad"
    speed: str = "5"
    seed: int = 1
    baud: int = 921600


class StandNotice(Message):
    """Something the stand reported on another thread (kill, state, loop, event, warning)."""

    def __init__(self, kind: str, payload) -> None:
        super().__init__()
        self.kind = kind
        self.payload = payload


class ProgressNotice(Message):
    """A workflows.Progress event from the worker thread."""

    def __init__(self, progress) -> None:
        super().__init__()
        self.progress = progress


class StandConsole(App):
    CSS_PATH = "console.tcss"
    ENABLE_COMMAND_PALETTE = False
    TITLE = "tetherloop stand console"

    BINDINGS = [
        Binding(KILL_KEY, "kill", "KILL", priority=True),
        Binding("f12", "kill", "KILL", priority=True, show=False),
        *[Binding(key, f"tab('{tid}')", title, show=False, priority=True)
          for tid, title, key in TABS],
        Binding("ctrl+q", "quit", "Quit", priority=True),
    ]

    def __init__(self, options: ConsoleOptions | None = None):
        super().__init__()
        self.options = options or ConsoleOptions()
        self.stand = None
        self.plan = None  # the last valid plan from the Plan tab
        self.run_plan = None  # the plan of the last run (limits used by verify)
        self.result = None  # workflows.StandResult of the last run
        self.busy: str | None = None  # what the worker is doing
        self.stop_event: threading.Event | None = None
        self.confirmations: dict | None = None
        self.last_kill: dict | None = None  # the first kill since the last clear
        self.kill_count = 0
        self.scope_level = "rate"
        self.gain_history: dict[str, list[dict]] = {}
        self._verify_count = 0
        self._rate = (time.monotonic(), 0, float("nan"))

    # ------------------------------------------------------------------ layout
    def compose(self) -> ComposeResult:
        yield StateStrip(id="strip")
        with TabbedContent(id="tabs", initial="tab-link"):
            with TabPane("F2 Link", id="tab-link"):
                yield LinkPane(id="link")
            with TabPane("F3 Scope", id="tab-scope"):
                yield ScopePane(id="scope")
            with TabPane("F4 Plan", id="tab-plan"):
                yield PlanPane(id="plan")
            with TabPane("F5 Run", id="tab-run"):
                yield RunPane(id="run")
            with TabPane("F6 Results", id="tab-results"):
                yield ResultsPane(id="results")
            with TabPane("F7 Logbook", id="tab-logbook"):
                yield LogbookPane(id="logbook")
        yield Footer()

    @property
    def main(self):
        """The console's own screen (queries must not land on a modal on top of it)."""
        return self.screen_stack[0] if self.screen_stack else self.screen

    def on_mount(self) -> None:
        self.set_interval(0.25, self._tick)
        self._tick()
        self.main.query_one(LogbookPane).action_refresh()
        if self.options.demo:
            self.connect(MOCK_ID)
        elif self.options.port:
            self.connect(self.options.port)

    def on_resize(self, event) -> None:
        self.set_class(self.size.width >= 120, "-wide")

    def action_tab(self, tab_id: str) -> None:
        if isinstance(self.screen, CautionScreen):
            return
        self.main.query_one("#tabs", TabbedContent).active = tab_id
        if tab_id == "tab-logbook":
            self.main.query_one(LogbookPane).action_refresh()
        self._focus_tab(tab_id)

    def _focus_tab(self, tab_id: str) -> None:
        targets = {"tab-link": "#port-list", "tab-plan": "#plan-loops", "tab-run": "#run",
                   "tab-results": "#candidates", "tab-logbook": "#sessions", "tab-scope": "#scope"}
        try:
            w = self.main.query_one(targets[tab_id])
            w.can_focus = True if tab_id in ("tab-run", "tab-scope") else w.can_focus
            w.focus()
        except Exception:
            pass

    def on_tabbed_content_tab_activated(self, event: TabbedContent.TabActivated) -> None:
        self._focus_tab(event.pane.id)

    # ------------------------------------------------------------------ the kill key
    def action_kill(self) -> None:
        """Kill now. Works without a plan, without a run, in any state, on any screen."""
        stand = self.stand
        if stand is None:
            if self.stop_event is not None:
                self.stop_event.set()
            self.notify("No board connected: there is nothing to kill from here. Use the "
                        "hardware kill if something is moving.", severity="warning")
            return
        try:
            stand.kill(KillReason.HOST_OPERATOR)  # first: a running workflow ends as killed
        except Exception as exc:  # link gone: the device watchdog kills; say what to do
            if self.stop_event is not None:
                self.stop_event.set()
            self.notify(f"KILL could not be sent ({exc}). Use the hardware kill now!",
                        severity="error", timeout=30)
            return
        self.main.query_one(RunPane).note(f"KILL sent by the operator ({KILL_KEY_LABEL})")

    # ------------------------------------------------------------------ stand events
    def _listener(self, kind: str, payload) -> None:
        # reader / worker threads: never block, never touch widgets
        if kind != "telemetry":
            self.post_message(StandNotice(kind, payload))

    def on_stand_notice(self, msg: StandNotice) -> None:
        run = self.main.query_one(RunPane)
        if msg.kind == "kill":
            info = dict(msg.payload)
            if self.last_kill is None:  # the first kill is the cause; later ones follow from it
                self.last_kill = info
                self.kill_count = 1
            else:
                self.kill_count += 1
            run.show_kill(self.last_kill, self.kill_count - 1)
            run.note(f"KILL by {info.get('origin')}: {info.get('reason')} axis "
                     f"{info.get('axis_name', '-')} value {fmt(info.get('value'))} threshold "
                     f"{fmt(info.get('threshold'))} {info.get('text', '')}".rstrip())
            if self.kill_count == 1:
                self.notify(f"KILLED by {info.get('origin')}: {info.get('reason')}",
                            severity="error", timeout=4)
                # the strip may already say KILLED (the board's status can arrive before its
                # kill event): redraw it now so the reason shows without waiting for the timer
                self._tick()
            if run.current and run.query_one("#checklist").status_of(run.current) in (
                    "running", "tuned", "applied"):
                run.loop_status(run.current, "killed")
        elif msg.kind == "loop":
            run.loop_status(msg.payload.get("key"), msg.payload.get("status"))
        elif msg.kind == "warning":
            run.note(f"warning: {msg.payload}")
        elif msg.kind == "event":
            ev = msg.payload
            try:
                from protocol.messages import EventKind
                name = EventKind(ev.kind).name.lower()
            except Exception:
                name = f"event {getattr(ev, 'kind', '?')}"
            run.note(f"board: {name}" + (f" ({ev.text})" if getattr(ev, "text", "") else ""))

    # ------------------------------------------------------------------ periodic refresh
    def _link_rate(self) -> float:
        t0, n0, rate = self._rate
        now = time.monotonic()
        n = self.stand.link.stats.telemetry if self.stand is not None else 0
        if now - t0 >= 1.0:
            rate = (n - n0) / (now - t0)
            self._rate = (now, n, rate)
        return rate

    def _tick(self) -> None:
        try:
            self._refresh_all()
        except Exception as exc:  # a drawing problem (or shutdown) must never stop the timer
            self.log.error(f"refresh failed: {exc!r}")

    def _refresh_all(self) -> None:
        stand = self.stand
        strip = self.main.query_one(StateStrip)
        if stand is None:
            strip.show("offline", "no board" + (f" ({self.busy})" if self.busy else ""), "",
                       KILL_KEY_LABEL)
        else:
            state = stand.state.name.lower()
            if stand.killed:
                state = "killed"
            info = stand.info
            board = info.device_id + (" (SIM)" if stand.mock is not None else "")
            lost = stand.link.lost_reason
            link = ("LINK LOST" if lost else
                    f"{fmt(self._link_rate(), 3)} tel/s {fmt(stand.link.latency_ms_median(), 2)}"
                    f" ms bad {stand.link.stats.bad_frames}")
            alert = ""
            if self.last_kill and stand.killed:
                k = self.last_kill
                alert = f"{k.get('origin')}: {k.get('reason')}"
            elif self.busy:
                alert = self.busy
            strip.show(state, board, link, KILL_KEY_LABEL, alert)
        active = self.main.query_one("#tabs", TabbedContent).active
        try:
            if active == "tab-link":
                self.main.query_one(LinkPane).tick(stand)
            elif active == "tab-scope":
                self.main.query_one(ScopePane).tick(stand)
            elif active == "tab-run":
                self.main.query_one(RunPane).tick(stand)
        except Exception as exc:  # a drawing problem must never stop the timer (or the kill)
            self.log.error(f"refresh failed: {exc!r}")

    def active_limits(self):
        if self.stand is not None and self.stand.monitor is not None and self.busy:
            return self.stand.monitor.limits
        if self.plan is not None:
            return self.plan.limits
        from agent.safety import Limits
        return Limits()

    def plan_changed(self, plan) -> None:
        self.plan = plan
        if not self.busy:  # a running plan keeps its checklist
            self.main.query_one(RunPane).show_plan(plan)

    # ------------------------------------------------------------------ connect / disconnect
    def _claim(self, what: str) -> bool:
        if self.busy:
            self.notify(f"busy: {self.busy}. Wait for it, stop it (s on the Run tab) or kill "
                        f"({KILL_KEY_LABEL}).", severity="warning")
            return False
        self.busy = what
        return True

    def _release(self) -> None:
        self.busy = None
        self.stop_event = None

    def connect(self, port: str) -> None:
        if self.stand is not None:
            self.notify("Already connected: disconnect first (d on the Link tab).",
                        severity="warning")
            return
        if not self._claim("connecting"):
            return
        label = "the simulated stand" if port == MOCK_ID else port
        self.main.query_one(LinkPane).say(f"connecting to {label} ...")
        self._connect_worker(port)

    @work(thread=True, exclusive=False, group="stand")
    def _connect_worker(self, port: str) -> None:
        from agent.link import LinkError
        from agent.session import SessionError
        from agent.stand import Stand
        mock = None
        try:
            if port == MOCK_ID:
                from mock_device.runner import start_mock
                from mock_device.scenarios import load_scenario
                o = self.options
                try:
                    scenario = load_scenario(o.scenario)
                except (FileNotFoundError, KeyError, ValueError) as exc:
                    raise SessionError(f"scenario {o.scenario!r}: {exc}") from None
                speed = o.speed if str(o.speed) == "max" else float(o.speed)
                mock = start_mock(scenario, transport="pty", speed=speed, seed=o.seed)
                port = mock.port
            stand = Stand.connect(port, baudrate=self.options.baud, mock=mock)
        except (LinkError, SessionError, OSError, ValueError) as exc:
            if mock is not None:
                mock.stop()
            self.call_from_thread(self._connect_failed, str(exc))
            return
        except Exception as exc:
            if mock is not None:
                mock.stop()
            self.call_from_thread(self._connect_failed, f"{type(exc).__name__}: {exc}")
            return
        try:
            self._scope_telemetry(stand)
        except Exception as exc:
            stand.emit("warning", f"live telemetry not started: {exc}")
        self.call_from_thread(self._connected, stand)

    def _scope_telemetry(self, stand) -> None:
        levels = set(lv for ls in stand.info.axes.values() for lv in ls)
        level = self.scope_level if self.scope_level in levels else "rate"
        axes = [int(Axis[a.upper()]) for a in stand.info.axes]
        stand.session.telemetry(min(SCOPE_RATE_HZ, stand.info.loop_rate_hz), axes,
                                int(Loop[level.upper()]))

    def _connect_failed(self, text: str) -> None:
        self._release()
        self.main.query_one(LinkPane).say(f"Not connected: {text}", error=True)
        self.notify(f"not connected: {text}", severity="error", timeout=8)

    def _connected(self, stand) -> None:
        self._release()
        self.stand = stand
        self.last_kill, self.kill_count = None, 0
        self.confirmations = None
        stand.listeners.append(self._listener)
        link = self.main.query_one(LinkPane)
        link.show_identity(stand)
        link.say(f"connected to {stand.info.device_id} on {stand.link.port_name}. Next: plan "
                 "(F4), then run (F5).")
        self.main.query_one(ScopePane).build(stand)
        self.main.query_one(PlanPane).set_board(stand)
        self.main.query_one(RunPane).show_kill(None)

    def disconnect(self) -> None:
        if self.stand is None:
            self.notify("not connected", severity="information")
            return
        if not self._claim("disconnecting"):
            return
        self._disconnect_worker(self.stand)

    @work(thread=True, exclusive=False, group="stand")
    def _disconnect_worker(self, stand) -> None:
        outcome = self.result.outcome if self.result is not None else "closed by the operator"
        try:
            stand.close(outcome)
        finally:
            self.call_from_thread(self._disconnected)

    def _disconnected(self) -> None:
        self._release()
        self.stand = None
        self.result = None
        link = self.main.query_one(LinkPane)
        link.show_identity(None)
        link.say("disconnected")
        self.main.query_one(ScopePane).build(None)
        self.main.query_one(PlanPane).set_board(None)
        self.main.query_one(ResultsPane).set_results([])
        self.main.query_one(LogbookPane).action_refresh()

    def cycle_scope_level(self) -> None:
        if self.stand is None or not self._claim("switching the scope level"):
            return
        offered = [lv for lv in SCOPE_LEVELS
                   if any(lv in levels for levels in self.stand.info.axes.values())]
        i = offered.index(self.scope_level) if self.scope_level in offered else -1
        self.scope_level = offered[(i + 1) % len(offered)]
        self._simple_worker(self._scope_telemetry, "scope level", self.stand)

    @work(thread=True, exclusive=False, group="stand")
    def _simple_worker(self, fn, what: str, *args) -> None:
        try:
            fn(*args)
            text = None
        except Exception as exc:
            text = f"{what} failed: {exc}"
        self.call_from_thread(self._simple_done, text)

    def _simple_done(self, error: str | None) -> None:
        self._release()
        if error:
            self.notify(error, severity="error", timeout=8)
            self.main.query_one(RunPane).note(error)

    # ------------------------------------------------------------------ run a plan
    def _need_stand(self) -> bool:
        if self.stand is None:
            self.notify("No board connected: connect on the Link tab (F2) first.",
                        severity="warning")
            return False
        if self.stand.killed:
            self.notify("The board is KILLED: find out why, then clear the kill (x on the Run "
                        "tab) before anything else.", severity="error")
            return False
        return True

    def _confirm_then(self, what: str, then) -> None:
        """Show the cautions once per connection; call ``then()`` after the operator typed yes."""
        if self.stand.confirmed and self.confirmations:
            then()
            return

        def done(ok: bool | None) -> None:
            if ok:
                self.confirmations = {"cautions": "confirmed in the stand console (typed yes)",
                                      "time": time.time(), "what": what}
                then()
            else:
                self.notify("Not confirmed: nothing was armed.", severity="warning")
                self.main.query_one(RunPane).note("safety check not confirmed: nothing was armed")

        self.push_screen(CautionScreen(what), done)

    def start_run(self) -> None:
        if not self._need_stand():
            return
        if self.busy:
            self._claim("")  # says why not
            return
        plan = self.main.query_one(PlanPane).validate_plan()
        if plan is None:
            self.notify("The plan is not valid: " + self.main.query_one(PlanPane).error,
                        severity="error", timeout=8)
            self.action_tab("tab-plan")
            return
        self._confirm_then(f"run the plan ({', '.join(lp.key for lp in plan.loops)})",
                           lambda: self._begin_run(plan))

    def _begin_run(self, plan) -> None:
        if not self._claim("running the plan"):
            return
        self.stop_event = threading.Event()
        self.run_plan = plan
        self.action_tab("tab-run")
        self.main.query_one(RunPane).begin(plan)
        self._run_worker(self.stand, plan, self.stop_event, dict(self.confirmations))

    def _open_log(self, stand, plan, confirmations: dict) -> None:
        """A fresh session log for every run (experiment ids are unique within a log)."""
        from agent.logbook import Logbook
        if stand.log is not None:
            old = stand.log
            stand.log = None
            try:
                old.update_manifest(settings_after=dict(stand.session.values),
                                    link_stats=stand.link.stats.as_dict())
                old.close(self.result.outcome if self.result is not None else "closed")
            except Exception as exc:
                stand.emit("warning", f"previous session log not closed cleanly: {exc}")
        stand.open_log(Logbook(self.options.log_dir), plan.as_dict(), confirmations)
        stand.confirmed = True
        stand.log_event("cautions_confirmed", **confirmations)

    @work(thread=True, exclusive=False, group="stand")
    def _run_worker(self, stand, plan, stop: threading.Event, confirmations: dict) -> None:
        from agent.logbook import LogbookError
        from agent.workflows import autotune
        result, error = None, None
        try:
            try:
                self._open_log(stand, plan, confirmations)
            except (LogbookError, OSError) as exc:
                error = f"{exc} (nothing was armed)"
            else:
                result = autotune(stand, plan, self._progress_from_worker, stop)
        except Exception as exc:  # autotune already killed on unexpected errors
            error = f"{type(exc).__name__}: {exc}"
        finally:
            self._restore_scope(stand)
        self.call_from_thread(self._run_done, result, error)

    def _progress_from_worker(self, p) -> None:
        # never block the workflow on the screen: post (thread-safe) and carry on
        self.post_message(ProgressNotice(p))

    def on_progress_notice(self, msg: "ProgressNotice") -> None:
        self.main.query_one(RunPane).progress(msg.progress)

    def _restore_scope(self, stand) -> None:
        try:
            if not stand.killed and stand.link.lost_reason is None:
                self._scope_telemetry(stand)
        except Exception:
            pass

    def _run_done(self, result, error: str | None) -> None:
        self._release()
        run = self.main.query_one(RunPane)
        if error:
            run.note(f"run failed: {error}")
            self.notify(f"run failed: {error}", severity="error", timeout=10)
            return
        self.result = result
        for lr in result.loops:
            run.loop_status(lr.key, lr.status)
            if lr.message:
                run.note(f"{lr.key}: {lr.status} - {lr.message}")
        for c in result.cascade:
            run.note(c.get("message", ""))
        run.note(f"-- outcome: {result.outcome} {result.message}".rstrip())
        run.note(f"log: {result.session_path}")
        self.main.query_one(ResultsPane).set_results(result.loops)
        sev = "information" if result.outcome == "ok" else "warning"
        self.notify(f"run {result.outcome}. Results on F6.", severity=sev)

    def stop_run(self) -> None:
        if self.stop_event is None:
            self.notify("nothing is running", severity="information")
            return
        self.stop_event.set()
        self.main.query_one(RunPane).note("stop requested: the workflow ends gently and disarms")

    def clear_kill(self) -> None:
        if self.stand is None:
            self.notify("not connected", severity="warning")
            return
        if not self.stand.killed:
            self.notify("the board is not killed", severity="information")
            return
        if not self._claim("clearing the kill"):
            return

        self._clear_worker(self.stand)

    @work(thread=True, exclusive=False, group="stand")
    def _clear_worker(self, stand) -> None:
        try:
            stand.clear_kill()
        except Exception as exc:
            self.call_from_thread(self._simple_done, f"the kill was not cleared: {exc}")
            return
        self._restore_scope(stand)
        self.call_from_thread(self._cleared)

    def _cleared(self) -> None:
        self._release()
        self.last_kill, self.kill_count = None, 0
        self.main.query_one(RunPane).show_kill(None)
        self.main.query_one(RunPane).note("kill cleared by the operator; the board is disarmed")

    # ------------------------------------------------------------------ results: apply / verify
    def _loop_plan(self, lr):
        from agent.plan import LoopPlan
        return LoopPlan(lr.axis, lr.loop, lr.controller)

    def apply_candidate(self, lr, cand) -> None:
        if lr is None or cand is None:
            self.notify("choose a loop and a candidate first", severity="warning")
            return
        if not self._need_stand() or not self._claim(f"applying {cand.rule} to {lr.key}"):
            return
        self._apply_worker(self.stand, lr, cand)

    @work(thread=True, exclusive=False, group="stand")
    def _apply_worker(self, stand, lr, cand) -> None:
        from agent.workflows import apply_gains, current_gains, gains_of
        lp = self._loop_plan(lr)
        try:
            before = current_gains(stand, lp)
            written = apply_gains(stand, gains_of(cand, lp), self._progress_from_worker, lr.key)
        except Exception as exc:
            self.call_from_thread(self._gains_done, lr, None, f"not applied: {exc}")
            return
        self.gain_history.setdefault(lr.key, []).append(before)
        if not lr.previous_gains:
            lr.previous_gains = before
        lr.applied_gains, lr.chosen, lr.status = written, cand, "applied"
        lr.verification = None
        self.call_from_thread(self._gains_done, lr, f"{lr.key}: {cand.rule} gains written", None)

    def _gains_done(self, lr, text: str | None, error: str | None) -> None:
        self._release()
        self.main.query_one(RunPane).note(text or error)
        self.notify(text or error, severity="error" if error else "information",
                    timeout=8 if error else 4)
        self.main.query_one(ResultsPane).refresh_current()

    def rollback(self, lr) -> None:
        if lr is None:
            self.notify("choose a loop first", severity="warning")
            return
        history = self.gain_history.get(lr.key) or ([lr.previous_gains] if lr.previous_gains
                                                    else [])
        if not history:
            self.notify(f"{lr.key}: no earlier gains to go back to", severity="warning")
            return
        if not self._need_stand() or not self._claim(f"rolling back {lr.key}"):
            return
        self._rollback_worker(self.stand, lr, history)

    @work(thread=True, exclusive=False, group="stand")
    def _rollback_worker(self, stand, lr, history) -> None:
        from agent.workflows import apply_gains
        prev = history[-1]
        try:
            written = apply_gains(stand, prev, self._progress_from_worker, lr.key)
            stand.log_event("rollback", loop=lr.key, gains=written, why="operator")
        except Exception as exc:
            self.call_from_thread(self._gains_done, lr, None, f"ROLLBACK FAILED: {exc}")
            return
        if self.gain_history.get(lr.key) is history:
            history.pop()  # one step back per press
        lr.applied_gains, lr.status = written, "rolled_back"
        self.call_from_thread(self._gains_done, lr, f"{lr.key}: rolled back to the earlier "
                              "gains", None)

    def verify_candidate(self, lr) -> None:
        if lr is None or lr.chosen is None or not lr.applied_gains:
            self.notify("apply a candidate first (a), then verify it", severity="warning")
            return
        if not self._need_stand():
            return
        plan = self.run_plan or self.plan
        if plan is None:
            self.notify("no plan: the step size and limits come from the plan (F4)",
                        severity="warning")
            return
        self._confirm_then(f"step-test {lr.key} with the applied gains",
                           lambda: self._begin_verify(lr, plan))

    def _begin_verify(self, lr, plan) -> None:
        if not self._claim(f"verifying {lr.key}"):
            return
        self.stop_event = threading.Event()
        self._verify_count += 1
        exp_id = f"{lr.axis}-{lr.loop}-verify-{self._verify_count}"
        self._verify_worker(self.stand, lr, plan, self.stop_event, exp_id,
                            dict(self.confirmations))

    @work(thread=True, exclusive=False, group="stand")
    def _verify_worker(self, stand, lr, plan, stop, exp_id: str, confirmations: dict) -> None:
        from agent import workflows
        from agent.stand import KillTripped
        lp = self._loop_plan(lr)
        error, ver = None, None
        try:
            if stand.log is None:
                self._open_log(stand, plan, confirmations)
            setpoint = (lr.verification or {}).get("setpoint")
            if setpoint is None:
                setpoint = 0.0
                if lp.loop == "heave":  # hold the height the frame is at
                    setpoint = workflows.current_measurement(stand, int(Axis.HEAVE), int(Loop.HEAVE)) or 0.0
            stand.confirmed = True
            if stand.monitor is not None:
                stand.monitor.limits = plan.limits
            stand.arm()
            try:
                ver = workflows.verify_step(stand, lp, plan, lr.chosen, setpoint=setpoint,
                                            progress=self._progress_from_worker, stop=stop,
                                            exp_id=exp_id)
            finally:
                if not stand.killed:
                    stand.disarm()
        except KillTripped as exc:
            error = f"killed during the step: {exc}"
        except Exception as exc:
            error = f"{type(exc).__name__}: {exc}" if not str(exc) else str(exc)
        finally:
            self._restore_scope(stand)
        if ver is not None:
            lr.verification = ver
            lr.status = "verified" if ver.get("passed") else "applied"
            text = (f"{lr.key}: verification " + ("passed" if ver.get("passed") else
                    "FAILED: " + "; ".join(ver.get("problems", [])) + " (b rolls back)"))
            self.call_from_thread(self._gains_done, lr, text, None)
        else:
            lr.verification = {"passed": False, "problems": [error or "not run"]}
            self.call_from_thread(self._gains_done, lr, None, f"{lr.key}: {error}")

    # ------------------------------------------------------------------ leaving
    async def action_quit(self) -> None:
        stand = self.stand
        if stand is not None:
            if self.stop_event is not None:
                self.stop_event.set()
            try:
                from protocol.messages import DeviceState
                if stand.state in (DeviceState.ARMED, DeviceState.RUNNING):
                    stand.kill(KillReason.HOST_OPERATOR)  # leaving mid-run stops everything
            except Exception:
                pass
            outcome = self.result.outcome if self.result is not None else "console closed"
            await self.run_in_thread_quietly(stand, outcome)
            self.stand = None
        self.exit()

    async def run_in_thread_quietly(self, stand, outcome: str) -> None:
        import asyncio
        try:
            await asyncio.get_running_loop().run_in_executor(None, stand.close, outcome)
        except Exception:
            pass
