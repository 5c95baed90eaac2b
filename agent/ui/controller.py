"""The stand console's controller: what the console knows, and every operator action.

The app (:mod:`agent.ui.app`) lays out the tabs and hands the panes' requests to the controller;
the controller holds the console's state (the stand, the plan, the last result, the kill record,
the cautions record) and does every action through :mod:`agent.operations`, the calls the CLI
makes too, so the console neither sequences nor computes anything of its own. What there is to
show goes back to the app through :class:`agent.ui.state.ConsoleView`.

Threads. The controller's methods run on the UI thread. Work that talks to the board runs in a
textual thread worker of the group ``stand``, exclusive; the running worker is the lock: while
one runs (``busy`` is its description) a second action is refused with a message. A worker
reports back with ``call_from_thread``; the stand's listeners, called on the link's reader thread,
only post messages. The kill key never waits for a worker: ``operations.kill`` writes the kill
frame from the UI thread.

Stopping. Every worker gets a :class:`StopSignal`, the workflow's gentle stop: set by the
operator (``s``), or because textual cancelled the worker (the console is closing).
"""

from __future__ import annotations

import asyncio
import time
from dataclasses import replace
from functools import partial
from typing import TYPE_CHECKING, Callable

from textual.worker import Worker, WorkerState

from agent import operations
from agent.errors import LinkError, TetherloopError
from agent.safety import Limits
from agent.stand import Notice
from protocol.messages import Axis, DeviceState, KillReason, Loop

from .actions import BoardActions
from .state import (GROUP, KILL_KEY_LABEL, MOCK_ID, ConsoleView, KillRecord, LinkHealth,
                    ProgressNotice, StandNotice, StopSignal, event_text)

if TYPE_CHECKING:
    from agent.plan import Plan
    from agent.stand import Stand
    from agent.workflows import Progress, StandResult

LIVE_RATE_HZ = 100  # idle telemetry for the live scope (device time)
SCOPE_LEVELS = ("rate", "angle", "heave")
RATE_WINDOW_S = 1.0  # the link's telemetry rate is counted over this long


class Controller(BoardActions):
    """The console's state and actions; see the module docstring (the work on the board is in
    :class:`agent.ui.actions.BoardActions`)."""

    def __init__(self, view: ConsoleView, options) -> None:
        self.view = view
        self.options = options
        self.stand: Stand | None = None
        self.plan: Plan | None = None  # the last valid plan of the Plan tab
        self.plan_error = "no board connected: connect on the Link tab (F2) first"
        self.run_plan: Plan | None = None  # the plan of the last run (what verify re-uses)
        self.result: StandResult | None = None
        self.kill: KillRecord | None = None
        self.confirmation: operations.Confirmation | None = None
        self.scope_level = "rate"
        self.gain_history: dict[str, list[dict]] = {}  # per loop: gains before each apply
        self._stop: StopSignal | None = None
        self._verify_count = 0
        self._seen_state: int | None = None
        self._rate = (time.monotonic(), 0, float("nan"))

    # ------------------------------------------------------------------ what is shown
    @property
    def last_kill(self) -> dict | None:
        return self.kill.info if self.kill is not None else None

    @property
    def busy(self) -> str | None:
        """What the running stand worker does, or None. (A worker textual cancelled counts as
        finished: that happens only when the console closes.)"""
        for w in self.view.workers:
            if w.group == GROUP and not w.is_finished:
                return w.description
        return None

    @property
    def limits(self) -> Limits:
        """The kill limits in force: the running work's, else the plan's, else the defaults."""
        stand = self.stand
        if stand is not None and stand.monitor is not None and self.busy:
            return stand.monitor.limits
        return self.plan.limits if self.plan is not None else Limits()

    def strip(self) -> tuple[str, str, str]:
        """(state, board, alert) for the state strip."""
        stand, busy = self.stand, self.busy
        if stand is None:
            return "offline", "no board" + (f" ({busy})" if busy else ""), ""
        state = "killed" if stand.killed else stand.state.name.lower()
        board = stand.info.device_id + (" (SIM)" if stand.mock is not None else "")
        alert = self.kill.short if self.kill is not None and stand.killed else (busy or "")
        return state, board, alert

    def link_health(self) -> LinkHealth | None:
        """The link's figures now; the telemetry rate is counted over RATE_WINDOW_S."""
        stand = self.stand
        if stand is None:
            return None
        link, st = stand.link, stand.link.stats
        t0, n0, rate = self._rate
        now = time.monotonic()
        if now - t0 >= RATE_WINDOW_S:
            rate = (st.telemetry - n0) / (now - t0)
            self._rate = (now, st.telemetry, rate)
        return LinkHealth(rate, link.latency_ms_median(), st.frames_in, st.frames_out,
                          st.bad_frames, st.retries, st.timeouts, link.lost_reason)

    # ------------------------------------------------------------------ workers
    def _refused(self) -> bool:
        busy = self.busy
        if busy is None:
            return False
        self.view.notify(f"busy: {busy}. Wait for it, stop it (s on the Run tab) or kill "
                         f"({KILL_KEY_LABEL}).", severity="warning")
        return True

    def _start(self, what: str, job: Callable[..., None], *args) -> bool:
        """Run ``job(stop, *args)`` in the stand worker, unless one runs (then say so)."""
        if self._refused():
            return False
        stop = StopSignal()
        stop.worker = self.view.run_worker(partial(job, stop, *args), name=job.__name__,
                                           group=GROUP, description=what, exclusive=True,
                                           thread=True, exit_on_error=False)
        self._stop = stop
        self.view.state_changed()
        return True

    def _report(self, stop: StopSignal, fn: Callable, *args) -> bool:
        """From a worker: run ``fn(*args)`` on the UI thread. False when the console is closing
        (the worker was cancelled, or the app has stopped)."""
        if stop.cancelled:
            return False
        try:
            self.view.call_from_thread(fn, *args)
        except RuntimeError:  # textual: the app is no longer running
            return False
        return True

    def worker_changed(self, worker: Worker) -> None:
        """A stand worker started or ended (UI thread): redraw the strip; show an error nobody
        expected (the operations left the board safe: armed work disarms, autotune kills)."""
        if worker.group != GROUP:
            return
        if worker.state == WorkerState.ERROR:
            self._failed(f"{worker.description} failed: {type(worker.error).__name__}: "
                         f"{worker.error}")
        self.view.state_changed()

    def _progress(self, p: "Progress") -> None:
        # worker thread: never block the workflow on the screen; post (thread-safe), carry on
        self.view.post_message(ProgressNotice(p))

    def _failed(self, text: str) -> None:
        self.view.notify(text, severity="error", timeout=8)
        self.view.note(text)

    # ------------------------------------------------------------------ stand notices
    def _listener(self, kind: Notice, payload) -> None:
        # reader and worker threads: never block, never touch widgets; post and return
        if kind is Notice.TELEMETRY:
            # a state change seen in telemetry: its board event may be lost on the wire
            if payload.state != self._seen_state:
                self._seen_state = payload.state
                self.view.post_message(StandNotice(Notice.STATE, payload.state))
            return
        self.view.post_message(StandNotice(kind, payload))

    def on_notice(self, kind: Notice, payload) -> None:
        """A stand notice on the UI thread."""
        if kind is Notice.KILL:
            info = dict(payload)
            first = self.kill is None
            self.kill = (KillRecord(info) if first
                         else replace(self.kill, later=self.kill.later + 1))
            self.view.note(operations.describe_kill(info))
            self.view.kill_changed(self.kill)
            if first:
                self.view.notify(operations.describe_kill(info), severity="error", timeout=4)
        elif kind is Notice.LOOP:
            self.view.loop_status(payload.get("key"), payload.get("status"))
        elif kind is Notice.WARNING:
            self.view.note(f"warning: {payload}")
        elif kind is Notice.EVENT:
            self.view.note(event_text(payload))
        self.view.state_changed()

    # ------------------------------------------------------------------ the kill key
    def kill_now(self) -> None:
        """Kill now: without a plan, without a run, in any state, on any screen."""
        stand = self.stand
        if stand is None:
            if self._stop is not None:
                self._stop.set()
            self.view.notify("No board connected: there is nothing to kill from here. Use the "
                             "hardware kill if something is moving.", severity="warning")
            return
        try:
            operations.kill(stand, KillReason.HOST_OPERATOR)  # a running workflow ends killed
        except (LinkError, OSError) as exc:  # link gone: the board's watchdog kills; say what to do
            if self._stop is not None:
                self._stop.set()
            self.view.notify(f"KILL could not be sent ({exc}). Use the hardware kill now!",
                             severity="error", timeout=30)
            return
        self.view.note(f"KILL sent by the operator ({KILL_KEY_LABEL})")

    # ------------------------------------------------------------------ connect / disconnect
    def connect(self, port: str) -> None:
        if self.stand is not None:
            self.view.notify("Already connected: disconnect first (d on the Link tab).",
                             severity="warning")
            return
        if self._start("connecting", self._connect_job, port):
            label = "the simulated stand" if port == MOCK_ID else port
            self.view.link_said(f"connecting to {label} ...")

    def _connect_job(self, stop: StopSignal, port: str) -> None:
        o = self.options
        try:
            mock = None
            if port == MOCK_ID:
                mock = operations.start_builtin_board(o.scenario, o.speed, o.seed)
                port = mock.port
            stand = operations.connect(port, o.baud, mock=mock)  # stops the mock on failure
        except (TetherloopError, OSError) as exc:
            self._report(stop, self._connect_failed, str(exc))
            return
        self._restore_live(stand)
        if not self._report(stop, self._connected, stand):
            operations.close(stand, "console closed while connecting")

    def _connect_failed(self, text: str) -> None:
        self.view.link_said(f"Not connected: {text}", error=True)
        self.view.notify(f"not connected: {text}", severity="error", timeout=8)

    def _connected(self, stand: "Stand") -> None:
        self.stand, self.kill, self.confirmation = stand, None, None
        self._seen_state = None
        self._rate = (time.monotonic(), stand.link.stats.telemetry, float("nan"))
        stand.listeners.append(self._listener)
        self.view.board_changed(stand)
        self.view.link_said(f"connected to {stand.info.device_id} on {stand.link.port_name}. "
                            "Next: plan (F4), then run (F5).")

    def _outcome(self, default: str) -> str:
        return str(self.result.outcome) if self.result is not None else default

    def disconnect(self) -> None:
        if self.stand is None:
            self.view.notify("not connected", severity="information")
            return
        self._start("disconnecting", self._disconnect_job, self.stand,
                    self._outcome("closed by the operator"))

    def _disconnect_job(self, stop: StopSignal, stand: "Stand", outcome: str) -> None:
        error = None
        try:
            operations.close(stand, outcome)
        except (TetherloopError, OSError) as exc:
            error = f"the link did not close cleanly: {exc}"
        self._report(stop, self._disconnected, error)

    def _disconnected(self, error: str | None) -> None:
        self.stand, self.result, self.kill = None, None, None
        self.gain_history.clear()
        self.view.board_changed(None)
        self.view.link_said("disconnected" + (f" ({error})" if error else ""), error=bool(error))

    async def close(self) -> None:
        """The console is closing: stop the work, kill if armed, close the stand (off the UI
        thread: closing reads the settings back)."""
        stand, self.stand = self.stand, None
        if stand is None:
            return
        if self._stop is not None:
            self._stop.set()
        if stand.state in (DeviceState.ARMED, DeviceState.RUNNING):
            try:
                operations.kill(stand, KillReason.HOST_OPERATOR)  # leaving mid-run stops all
            except (LinkError, OSError):
                pass  # the link is gone: the board's watchdog kills
        try:
            await asyncio.get_running_loop().run_in_executor(
                None, operations.close, stand, self._outcome("console closed"))
        except (TetherloopError, OSError):
            pass  # leaving anyway; the log keeps what was written

    # ------------------------------------------------------------------ live telemetry
    def _live_telemetry(self, stand: "Stand") -> None:
        """Idle telemetry for the live scope at the chosen level. agent.operations has no
        action for this display setting (it arms and writes nothing), so it is the console's
        one direct session request."""
        levels = {lv for ls in stand.info.axes.values() for lv in ls}
        level = self.scope_level if self.scope_level in levels else "rate"
        stand.session.telemetry(min(LIVE_RATE_HZ, stand.info.loop_rate_hz),
                                [int(Axis[a.upper()]) for a in stand.info.axes],
                                int(Loop[level.upper()]))

    def _restore_live(self, stand: "Stand") -> None:
        """Worker thread: the live telemetry back after a workflow changed it."""
        if stand.killed or stand.link.lost_reason is not None:
            return
        try:
            self._live_telemetry(stand)
        except (TetherloopError, OSError) as exc:
            stand.emit(Notice.WARNING, f"live telemetry not started: {exc}")

    def next_scope_level(self) -> None:
        if self.stand is None or self._refused():
            return
        offered = [lv for lv in SCOPE_LEVELS
                   if any(lv in levels for levels in self.stand.info.axes.values())]
        i = offered.index(self.scope_level) if self.scope_level in offered else -1
        self.scope_level = offered[(i + 1) % len(offered)]
        self.view.scope_level_changed(self.scope_level)
        self._start("switching the scope level", self._level_job, self.stand)

    def _level_job(self, stop: StopSignal, stand: "Stand") -> None:
        try:
            self._live_telemetry(stand)
        except (TetherloopError, OSError) as exc:
            self._report(stop, self._failed, f"scope level failed: {exc}")
