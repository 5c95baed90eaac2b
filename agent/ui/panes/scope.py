"""Scope tab: every axis live — setpoint, measurement and controller output — with the device
state and the kill limits in force."""

from __future__ import annotations

import math

import numpy as np
from rich.text import Text
from textual.app import ComposeResult
from textual.binding import Binding
from textual.containers import Grid, Vertical
from textual.message import Message
from textual.reactive import reactive
from textual.widgets import Static

from protocol.messages import Axis, Loop

from ..widgets import TracePlot, fmt

WINDOW = 1500  # live samples per axis on screen

# display units for people: radians shown in degrees, metres as metres
_DEG = 180.0 / math.pi


def display_scale(axis: int, loop: int) -> tuple[float, str]:
    if axis == Axis.HEAVE:
        return 1.0, ("m" if loop == Loop.HEAVE else "m/s")
    return _DEG, ("deg" if loop == Loop.ANGLE else "deg/s")


def live_columns(live, axis: int) -> dict[str, np.ndarray]:
    """The live history of one axis as arrays (time in device seconds)."""
    rows = []
    for _, tel in live:
        for s in tel.axes:
            if s.axis == axis:
                rows.append((tel.time_us, s.loop, s.setpoint, s.measurement, s.output, s.relay))
    if not rows:
        return {k: np.empty(0) for k in ("t_s", "loop", "setpoint", "measurement", "output",
                                          "relay")}
    a = np.array(rows[-WINDOW:], dtype=float)
    return {"t_s": a[:, 0] * 1e-6, "loop": a[:, 1], "setpoint": a[:, 2], "measurement": a[:, 3],
            "output": a[:, 4], "relay": a[:, 5]}


def snapshot(buffer_live) -> list:
    for _ in range(5):
        try:
            return list(buffer_live)
        except RuntimeError:  # appended during the copy: try again
            continue
    return []


class ScopePane(Vertical):
    """Posts LevelRequested (l: the next loop level); is given the board's axes and live
    history (``build``), the level shown (``level``) and the kill limits (``draw``)."""

    BINDINGS = [
        Binding("n", "next_axis", "Next axis"),
        Binding("l", "next_level", "Loop level"),
    ]

    level = reactive("rate", init=False)

    class LevelRequested(Message):
        """Show the next loop level (the board's telemetry is switched to it)."""

    def compose(self) -> ComposeResult:
        yield Static("", id="scope-summary")
        yield Grid(id="scope-grid")

    def on_mount(self) -> None:
        self.axes: list[int] = []
        self.selected = 0
        self.live = None  # the stand's live history (a deque the reader thread appends to)
        self.limits = None

    def build(self, axes, live) -> None:
        """The board's axes (names) and its live history; no axes: no board."""
        grid = self.query_one("#scope-grid", Grid)
        grid.remove_children()
        self.axes = [int(Axis[a.upper()]) for a in axes]
        self.live = live if self.axes else None
        self.selected = 0
        for ax in self.axes:
            grid.mount(TracePlot(Axis(ax).name.lower(), "device time [s]", id=f"scope-{ax}",
                                 classes="scope-plot"))
        self._mark_selected()

    def _mark_selected(self) -> None:
        for i, ax in enumerate(self.axes):
            for w in self.query(f"#scope-{ax}"):
                w.set_class(i == self.selected, "selected")

    def action_next_axis(self) -> None:
        if self.axes:
            self.selected = (self.selected + 1) % len(self.axes)
            self._mark_selected()
            if self.limits is not None:
                self.draw(self.limits)

    def action_next_level(self) -> None:
        self.post_message(self.LevelRequested())

    def watch_level(self) -> None:
        if self.limits is not None:
            self.draw(self.limits)

    def draw(self, limits) -> None:
        """Redraw from the live history (the app's plot timer) with the kill limits in force."""
        self.limits = limits
        summary = self.query_one("#scope-summary", Static)
        if self.live is None:
            summary.update("No board connected: connect on the Link tab (F2).")
            return
        live = snapshot(self.live)
        wide = self.screen.size.width >= 120
        t = Text()
        t.append(f"level shown: {self.level}   ", style="bold")
        lim = limits
        t.append(f"kill limits: angle {fmt(lim.angle_rad * _DEG, 3)} deg, rate "
                 f"{fmt(lim.rate_rad_s * _DEG, 3)} deg/s, heave {fmt(lim.heave_m, 3)} m, climb "
                 f"{fmt(lim.climb_rate_m_s, 3)} m/s, saturation {fmt(lim.saturation_s, 3)} s")
        for i, ax in enumerate(self.axes):
            cols = live_columns(live, ax)
            plot = self.query_one(f"#scope-{ax}", TracePlot)
            visible = wide or i == self.selected
            plot.display = visible
            if not len(cols["t_s"]):
                if visible:
                    plot.draw([], title=f"{Axis(ax).name.lower()}")
                continue
            loop = int(cols["loop"][-1])
            k, unit = display_scale(ax, loop)
            if visible:
                tt = cols["t_s"] - cols["t_s"][-1]
                plot.draw([(tt, cols["setpoint"] * k, "setpoint"),
                           (tt, cols["measurement"] * k, "measured"),
                           (tt, cols["output"], "output", "right")],
                          title=f"{Axis(ax).name.lower()} {Loop(loop).name.lower()} [{unit}]; "
                                "output right axis")
        summary.update(t)
