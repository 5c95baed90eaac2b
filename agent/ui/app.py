"""The stand console application: tabs over one connected stand, a permanent state strip and a
kill key that works on every tab, in every state, also on top of the safety confirmation.

This module is the layout: the tabs, the key bindings, the screens, and the routing of the panes'
requests (textual Messages they post) to the :class:`~agent.ui.controller.Controller`, which
holds the console's state and acts through agent.operations. What the controller has to show
comes back through the display methods below (``ConsoleView``), which pass it down to the panes.

Drawing. The state strip, the kill box, the checklist and the run log are drawn when their event
arrives (a stand notice, a progress event, a worker starting or ending). Two timers remain, for
what is periodic by nature: the live plots (samples stream in continuously; they are drawn a few
times a second) and the link's figures (a telemetry rate is a count per second).
"""

from __future__ import annotations

from dataclasses import dataclass

from textual import on
from textual.app import App, ComposeResult
from textual.binding import Binding
from textual.css.query import NoMatches
from textual.widgets import Footer, TabbedContent, TabPane
from textual.worker import Worker

from .caution import CautionScreen
from .controller import Controller
from .panes.link import LinkPane
from .panes.logbook import LogbookPane
from .panes.plan import PlanPane
from .panes.results import ResultsPane
from .panes.run import RunPane
from .panes.scope import ScopePane
from .state import KILL_KEY_LABEL, MOCK_ID, KillRecord, LinkHealth, ProgressNotice, StandNotice
from .widgets import StateStrip, fmt

KILL_KEY = "ctrl+k"
PLOT_PERIOD_S = 0.25  # live plots
LINK_PERIOD_S = 0.5  # link figures (the rate itself is counted over a second)
TABS = (("tab-link", "F2 Link", "f2"), ("tab-scope", "F3 Scope", "f3"),
        ("tab-plan", "F4 Plan", "f4"), ("tab-run", "F5 Run", "f5"),
        ("tab-results", "F6 Results", "f6"), ("tab-logbook", "F7 Logbook", "f7"))
FOCUS = {"tab-link": "#port-list", "tab-plan": "#plan-loops", "tab-run": "#run",
         "tab-results": "#candidates", "tab-logbook": "#sessions", "tab-scope": "#scope"}

__all__ = ["ConsoleOptions", "StandConsole", "MOCK_ID", "KILL_KEY", "KILL_KEY_LABEL"]


@dataclass
class ConsoleOptions:
    port: str | None = None
    demo: bool = False
    log_dir: str | None = None
    scenario: str = "gimbal-quad"
    speed: str = "5"
    seed: int = 1
    baud: int = 921600


def link_text(h: LinkHealth | None) -> str:
    """The state strip's link figures."""
    if h is None:
        return ""
    if h.lost:
        return "LINK LOST"
    return f"{fmt(h.rate_hz, 3)} tel/s {fmt(h.latency_ms, 2)} ms bad {h.bad_frames}"


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
        self.controller = Controller(self, self.options)

    # ------------------------------------------------------------------ layout
    def compose(self) -> ComposeResult:
        o = self.options
        yield StateStrip(id="strip")
        with TabbedContent(id="tabs", initial="tab-link"):
            with TabPane("F2 Link", id="tab-link"):
                yield LinkPane(f"Simulated stand (built-in, invented '{o.scenario}', clock "
                               f"x{o.speed})", id="link")
            with TabPane("F3 Scope", id="tab-scope"):
                yield ScopePane(id="scope")
            with TabPane("F4 Plan", id="tab-plan"):
                yield PlanPane(id="plan")
            with TabPane("F5 Run", id="tab-run"):
                yield RunPane(id="run")
            with TabPane("F6 Results", id="tab-results"):
                yield ResultsPane(id="results")
            with TabPane("F7 Logbook", id="tab-logbook"):
                yield LogbookPane(o.log_dir, id="logbook")
        yield Footer()

    @property
    def main(self):
        """The console's own screen (queries must not land on a modal on top of it)."""
        return self.screen_stack[0] if self.screen_stack else self.screen

    def on_mount(self) -> None:
        self.set_interval(PLOT_PERIOD_S, self._plot_tick)
        self.set_interval(LINK_PERIOD_S, self._link_tick)
        self.state_changed()
        self.main.query_one(LogbookPane).action_refresh()
        if self.options.demo:
            self.controller.connect(MOCK_ID)
        elif self.options.port:
            self.controller.connect(self.options.port)

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
        try:
            w = self.main.query_one(FOCUS[tab_id])
        except (KeyError, NoMatches):
            return
        if tab_id in ("tab-run", "tab-scope"):
            w.can_focus = True
        w.focus()

    def on_tabbed_content_tab_activated(self, event: TabbedContent.TabActivated) -> None:
        self._focus_tab(event.pane.id)
        if event.pane.id == "tab-link":
            self.main.query_one(LinkPane).show_health(self.controller.link_health())

    # ------------------------------------------------------------------ the kill key
    def action_kill(self) -> None:
        """Kill now. Works without a plan, without a run, in any state, on any screen."""
        self.controller.kill_now()

    # ------------------------------------------------------------------ messages up
    def on_stand_notice(self, msg: StandNotice) -> None:
        try:
            self.controller.on_notice(msg.kind, msg.payload)
        except Exception as exc:  # noqa: BLE001 — a drawing problem must never take the
            # console (and its kill key) down at the moment a kill is being reported
            self.log.error(f"notice not shown: {exc!r}")

    def on_progress_notice(self, msg: ProgressNotice) -> None:
        self.main.query_one(RunPane).progress(msg.progress)

    def on_worker_state_changed(self, event: Worker.StateChanged) -> None:
        self.controller.worker_changed(event.worker)

    @on(LinkPane.ConnectRequested)
    def _connect(self, msg: LinkPane.ConnectRequested) -> None:
        self.controller.connect(msg.port)

    @on(LinkPane.DisconnectRequested)
    def _disconnect(self) -> None:
        self.controller.disconnect()

    @on(ScopePane.LevelRequested)
    def _next_level(self) -> None:
        self.controller.next_scope_level()

    @on(PlanPane.Changed)
    def _plan_changed(self, msg: PlanPane.Changed) -> None:
        self.controller.plan_changed(msg.plan, msg.error)

    @on(RunPane.RunRequested)
    def _run(self) -> None:
        self.controller.start_run()

    @on(RunPane.StopRequested)
    def _stop(self) -> None:
        self.controller.stop_run()

    @on(RunPane.ClearKillRequested)
    def _clear_kill(self) -> None:
        self.controller.clear_kill()

    @on(ResultsPane.ApplyRequested)
    def _apply(self, msg: ResultsPane.ApplyRequested) -> None:
        self.controller.apply(msg.loop, msg.candidate)

    @on(ResultsPane.VerifyRequested)
    def _verify(self, msg: ResultsPane.VerifyRequested) -> None:
        self.controller.verify(msg.loop)

    @on(ResultsPane.RollbackRequested)
    def _rollback(self, msg: ResultsPane.RollbackRequested) -> None:
        self.controller.roll_back(msg.loop)

    # ------------------------------------------------------------------ state down (ConsoleView)
    def note(self, text: str) -> None:
        self.main.query_one(RunPane).note(text)

    def link_said(self, text: str, error: bool = False) -> None:
        self.main.query_one(LinkPane).say(text, error=error)

    def board_changed(self, stand) -> None:
        main = self.main
        link = main.query_one(LinkPane)
        link.show_identity(stand)
        link.show_health(self.controller.link_health())
        main.query_one(ScopePane).build(stand.info.axes if stand else {},
                                        stand.buffer.live if stand else ())
        main.query_one(PlanPane).set_board(stand.info.axes if stand else None,
                                           dict(stand.session.values) if stand else {})
        main.query_one(RunPane).show_kill(None)
        if stand is None:
            main.query_one(ResultsPane).set_results([])
            main.query_one(LogbookPane).action_refresh()
        self.state_changed()

    def kill_changed(self, record: KillRecord | None) -> None:
        run = self.main.query_one(RunPane)
        run.show_kill(record)
        if record is not None:
            run.mark_killed()
        self.state_changed()

    def results_changed(self, loops) -> None:
        results = self.main.query_one(ResultsPane)
        if loops is None:
            results.refresh_current()
        else:
            results.set_results(loops)

    def run_began(self, plan) -> None:
        self.main.query_one(RunPane).begin(plan)

    def plan_shown(self, plan) -> None:
        self.main.query_one(RunPane).show_plan(plan)

    def loop_status(self, key: str, status: str) -> None:
        self.main.query_one(RunPane).loop_status(key, status)

    def ask_cautions(self, what: str, done) -> None:
        self.push_screen(CautionScreen(what), done)

    def show_tab(self, tab_id: str) -> None:
        self.action_tab(tab_id)

    def scope_level_changed(self, level: str) -> None:
        self.main.query_one(ScopePane).level = level

    def state_changed(self) -> None:
        """Redraw the state strip (on the events that change it, and with the link figures)."""
        state, board, alert = self.controller.strip()
        self.main.query_one(StateStrip).show(state, board, link_text(
            self.controller.link_health()), KILL_KEY_LABEL, alert)

    # ------------------------------------------------------------------ the two timers
    def _plot_tick(self) -> None:
        stand = self.controller.stand
        try:
            active = self.main.query_one("#tabs", TabbedContent).active
            if active == "tab-scope":
                self.main.query_one(ScopePane).draw(self.controller.limits)
            elif active == "tab-run" and stand is not None:
                self.main.query_one(RunPane).draw(stand.buffer)
        except Exception as exc:  # noqa: BLE001 — a drawing problem (or shutdown) must never
            # stop the timer nor take the console and its kill key down
            self.log.error(f"plot not drawn: {exc!r}")

    def _link_tick(self) -> None:
        try:
            health = self.controller.link_health()
            self.state_changed()
            if self.main.query_one("#tabs", TabbedContent).active == "tab-link":
                self.main.query_one(LinkPane).show_health(health)
        except Exception as exc:  # noqa: BLE001 — as above: drawing must never stop the kill key
            self.log.error(f"link figures not drawn: {exc!r}")

    # ------------------------------------------------------------------ leaving
    async def action_quit(self) -> None:
        await self.controller.close()
        self.exit()
