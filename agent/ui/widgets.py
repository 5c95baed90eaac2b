"""Small widgets of the stand console: state strip, checklist, plots, key/value panels.

They render what the workflows and the stand report; nothing here computes a result. Plots thin
long series down to about one point per terminal column before handing them to plotext (a
display step, not an analysis).
"""

from __future__ import annotations

import math
from typing import Iterable, Sequence

import numpy as np
from rich.text import Text
from textual.containers import Horizontal
from textual.widgets import Static
from textual_plotext import PlotextPlot


def fmt(x, digits: int = 4, unit: str = "") -> str:
    """A number for people: ``digits`` significant figures, '-' when missing or not finite."""
    if x is None:
        return "-"
    try:
        v = float(x)
    except (TypeError, ValueError):
        return str(x)
    if not math.isfinite(v):
        return "-"
    # whole numbers up to a million read better in full (1734 tel/s, not 1.73e+03)
    text = f"{v:.0f}" if 10 ** digits <= abs(v) < 1e6 else f"{v:.{digits}g}"
    return text + (f" {unit}" if unit else "")


def thin(x: np.ndarray, *ys: np.ndarray, points: int = 300):
    """Every n-th sample so that at most ``points`` remain (display only)."""
    n = len(x)
    if n <= points:
        return (x,) + ys
    step = int(math.ceil(n / points))
    return (x[::step],) + tuple(y[::step] for y in ys)


STATE_STYLE = {
    "disarmed": "state-disarmed",
    "armed": "state-armed",
    "running": "state-running",
    "killed": "state-killed",
    "offline": "state-offline",
}


class StateStrip(Horizontal):
    """The top line on every tab: device state, board, link health; the kill key on the right,
    always visible whatever the width."""

    def compose(self):
        yield Static("", id="strip-info")
        yield Static("", id="strip-kill")

    def show(self, state: str, board: str, link: str, kill_key: str, alert: str = "") -> None:
        for cls in STATE_STYLE.values():
            self.remove_class(cls)
        self.add_class(STATE_STYLE.get(state, "state-offline"))
        t = Text(no_wrap=True, overflow="ellipsis")
        t.append(f" {state.upper():<8} ", style="bold reverse")
        if alert:
            t.append(f" {alert} |", style="bold")
        t.append(f" {board}")
        if link:
            t.append(f" | {link}")
        self.query_one("#strip-info", Static).update(t)
        self.query_one("#strip-kill", Static).update(Text(f" {kill_key}: KILL ", style="bold"))


class Checklist(Static):
    """The cascade order as a checklist: one line per loop with its status mark."""

    MARKS = {"pending": "[ ]", "running": "[>]", "tuned": "[~]", "applied": "[+]",
             "verified": "[v]", "rolled_back": "[<]", "failed": "[x]", "killed": "[!]",
             "skipped": "[-]"}

    EMPTY = "(no plan yet: make one on the Plan tab, F4)"

    def __init__(self, **kw):
        super().__init__(self.EMPTY, **kw)
        self.items: list[tuple[str, str]] = []

    def set_loops(self, keys: Iterable[str]) -> None:
        self.items = [(k, "pending") for k in keys]
        self._draw()

    def set_status(self, key: str, status: str) -> None:
        self.items = [(k, status if k == key else s) for k, s in self.items]
        self._draw()

    def status_of(self, key: str) -> str | None:
        return dict(self.items).get(key)

    def _draw(self) -> None:
        t = Text()
        for i, (k, s) in enumerate(self.items, 1):
            style = {"running": "bold", "verified": "green", "failed": "red", "killed": "bold red",
                     "rolled_back": "yellow"}.get(s, "")
            t.append(f"{self.MARKS.get(s, '[?]')} {i}. {k:<11} {s}\n", style=style)
        self.update(t if self.items else self.EMPTY)


class KeyValues(Static):
    """Aligned 'label: value' lines."""

    def show(self, rows: Sequence[tuple[str, str]], title: str = "") -> None:
        t = Text()
        if title:
            t.append(title + "\n", style="bold")
        width = max((len(k) for k, _ in rows), default=0)
        for k, v in rows:
            t.append(f"{k:<{width}}  ", style="dim")
            t.append(f"{v}\n")
        self.update(t)


class TracePlot(PlotextPlot):
    """A plotext plot redrawn from arrays; keeps its title and axis labels. A series is
    ``(x, y, label)``, or ``(x, y, label, "right")`` for the right-hand y axis."""

    def __init__(self, title: str = "", xlabel: str = "", **kw):
        super().__init__(**kw)
        self._title = title
        self._xlabel = xlabel

    def draw(self, series: Sequence[tuple], *,
             title: str | None = None, hlines: Sequence[float] = (),
             vlines: Sequence[float] = (), marks: tuple[np.ndarray, np.ndarray] | None = None,
             mark_label: str = "") -> None:
        plt = self.plt
        plt.clear_data()
        plt.clear_figure()
        plt.title(title if title is not None else self._title)
        if self._xlabel:
            plt.xlabel(self._xlabel)
        any_data = False
        for x, y, label, *side in series:
            if len(x) == 0:
                continue
            x, y = thin(np.asarray(x, float), np.asarray(y, float),
                        points=max(60, 2 * self.size.width))
            plt.plot(x.tolist(), y.tolist(), label=label, marker="braille",
                     yside=side[0] if side else "left")
            any_data = True
        if marks is not None and len(marks[0]):
            plt.scatter(np.asarray(marks[0], float).tolist(), np.asarray(marks[1], float).tolist(),
                        label=mark_label, marker="x")
        for h in hlines:
            if math.isfinite(h):
                plt.hline(h, "gray")
        for v in vlines:
            if math.isfinite(v):
                plt.vline(v, "gray")
        if not any_data:
            plt.title((title if title is not None else self._title) + " (no data yet)")
        self.refresh()
