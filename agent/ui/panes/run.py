"""Run tab: the cascade as a checklist, the relay oscillation of the loop being identified (with
its ramp, switching points and target band), convergence figures, progress, stop and kill."""

from __future__ import annotations

import numpy as np
from rich.text import Text
from textual.app import ComposeResult
from textual.binding import Binding
from textual.containers import Horizontal, Vertical
from textual.message import Message
from textual.widgets import ProgressBar, RichLog, Static

from protocol.messages import Axis, Loop

from ..widgets import Checklist, TracePlot, fmt


class RunPane(Vertical):
    """Posts RunRequested (g), StopRequested (s) and ClearKillRequested (x); is given the plan,
    progress events, loop statuses, notes, the kill record and the recording to draw."""

    BINDINGS = [
        Binding("g", "start", "Go (run plan)"),
        Binding("s", "stop", "Stop gently"),
        Binding("x", "clear_kill", "Clear kill"),
    ]

    class RunRequested(Message):
        """Run the Plan tab's plan (after the safety check)."""

    class StopRequested(Message):
        """End the running work gently (it disarms)."""

    class ClearKillRequested(Message):
        """Clear the board's latched kill."""

    def compose(self) -> ComposeResult:
        yield Static("", id="kill-box")
        with Horizontal(id="run-top"):
            with Vertical(id="run-left"):
                yield Checklist(id="checklist")
                yield Static("", id="relay-figures")
            yield TracePlot("relay", "device time [s]", id="relay-plot")
        with Horizontal(id="run-bottom"):
            yield ProgressBar(total=1.0, show_eta=False, id="run-progress")
            yield Static("idle", id="run-stage")
        yield RichLog(id="run-log", wrap=True, markup=False, max_lines=500, min_width=20)

    def on_mount(self) -> None:
        self.current: str | None = None  # loop key of the running experiment
        self.stage = ""
        self.relay: dict = {}
        self.query_one("#kill-box", Static).display = False

    # ------------------------------------------------------------------ actions
    def action_start(self) -> None:
        self.post_message(self.RunRequested())

    def action_stop(self) -> None:
        self.post_message(self.StopRequested())

    def action_clear_kill(self) -> None:
        self.post_message(self.ClearKillRequested())

    # ------------------------------------------------------------------ updates from the app
    def show_plan(self, plan) -> None:
        """The loops of a newly validated plan, all pending, before it is started."""
        self.query_one("#checklist", Checklist).set_loops(lp.key for lp in plan.loops)

    def begin(self, plan) -> None:
        self.show_plan(plan)
        self.query_one("#run-progress", ProgressBar).update(progress=0.0)
        self.current, self.relay = None, {}
        self.query_one("#run-log", RichLog).write("-- run started: "
                                                  + ", ".join(lp.key for lp in plan.loops))

    def progress(self, p) -> None:
        """A workflows.Progress event (on the UI thread)."""
        if p.fraction is not None:
            self.query_one("#run-progress", ProgressBar).update(progress=p.fraction)
        self.query_one("#run-stage", Static).update(f"{p.stage}: {p.message}"[:200])
        if p.loop and p.stage in ("noise", "ramp", "relay", "analysis", "verify", "apply"):
            self.current = p.loop
            cl = self.query_one("#checklist", Checklist)
            if cl.status_of(p.loop) == "pending":
                cl.set_status(p.loop, "running")
        if p.stage in ("noise", "ramp") and "target" in p.data:
            self.relay = {"target": p.data["target"], "amplitude": p.data.get("amplitude"),
                          "adjustments": 0}
        if p.stage == "ramp" and "seen" in p.data:
            self.relay.update(amplitude=p.data.get("amplitude"), bias=p.data.get("bias"),
                              seen=p.data.get("seen"),
                              adjustments=self.relay.get("adjustments", 0) + 1)
        if p.stage == "relay":
            self.relay.update(period_s=p.data.get("period_s"), seen=p.data.get("seen"))
        self.stage = p.stage
        if p.stage != "relay":  # relay ticks arrive ~30 times a second: figures only
            self.query_one("#run-log", RichLog).write(f"{p.stage:>8}  {p.message}")
        self._figures()

    def loop_status(self, key: str, status: str) -> None:
        self.query_one("#checklist", Checklist).set_status(key, status)

    def note(self, text: str) -> None:
        self.query_one("#run-log", RichLog).write(text)

    def mark_killed(self) -> None:
        """A kill arrived: the loop being worked on (if any) did not finish."""
        cl = self.query_one("#checklist", Checklist)
        if self.current and cl.status_of(self.current) in ("running", "tuned", "applied"):
            cl.set_status(self.current, "killed")

    def show_kill(self, record) -> None:
        """The kill record (controller.KillRecord) in the red box; None hides it."""
        box = self.query_one("#kill-box", Static)
        if record is None:
            box.display = False
            return
        t = Text()
        t.append(" KILLED ", style="bold reverse")
        t.append(" " + record.text.removeprefix("KILL "))  # the badge already says KILLED
        if record.later:
            t.append(f"  (+{record.later} later)")
        t.append("   x: clear the kill when it is safe")
        box.update(t)
        box.display = True

    def _figures(self) -> None:
        r = self.relay
        t = Text()
        if self.current:
            t.append(f"{self.current}  {self.stage}\n", style="bold")
        if r:
            t.append(f"target amp  {fmt(r.get('target'), 3)}\n")
            t.append(f"seen amp    {fmt(r.get('seen'), 3)}\n")
            t.append(f"relay amp   {fmt(r.get('amplitude'), 3)}\n")
            t.append(f"bias        {fmt(r.get('bias'), 3)}\n")
            t.append(f"period      {fmt(r.get('period_s'), 4)} s\n")
            t.append(f"ramp steps  {r.get('adjustments', 0)}")
        self.query_one("#relay-figures", Static).update(t)

    def draw(self, buffer) -> None:
        """Redraw the running experiment from the stand's recording buffer (the app's plot
        timer)."""
        if not self.current or self.stage not in ("noise", "ramp", "relay",
                                                                   "verify"):
            return
        axis_name, loop_name = self.current.split(".")
        axis_i, loop_i = int(Axis[axis_name.upper()]), int(Loop[loop_name.upper()])
        cols = buffer.axis(axis_i)
        sel = cols["loop"] == loop_i
        if not sel.any():
            return
        t = (cols["time_us"][sel] - cols["time_us"][sel][0]) * 1e-6
        y, u, relay = cols["measurement"][sel], cols["output"][sel], cols["relay"][sel]
        sw = np.flatnonzero(np.diff(np.sign(relay)) != 0) + 1  # where the relay switched
        sw = sw[-16:]  # the latest switching points only: older ones would cover the trace
        centre = float(cols["setpoint"][sel][-1])
        target = self.relay.get("target")
        seen = self.relay.get("seen")
        band = []
        if target and self.stage != "verify" and seen and seen >= 0.3 * target:
            band = [centre + target, centre - target]  # the target band, once it is in reach
        self.query_one("#relay-plot", TracePlot).draw(
            [(t, y, "measured"), (t, u, "relay output", "right")],
            title=f"{self.current} {self.stage}: measured (left), relay output (right)",
            hlines=band, marks=(t[sw], y[sw]) if len(sw) else None, mark_label="switch")
