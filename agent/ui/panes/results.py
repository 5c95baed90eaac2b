"""Results tab: per loop the ultimate point, the model, the candidates with their margins and Ms,
and the predicted step response; choose a candidate, apply it, verify it with a step, roll back."""

from __future__ import annotations

import math

from rich.text import Text
from textual.app import ComposeResult
from textual.binding import Binding
from textual.containers import Horizontal, Vertical
from textual.message import Message
from textual.widgets import DataTable, Select, Static

from ..widgets import KeyValues, TracePlot, fmt


class ResultsPane(Vertical):
    """Is given the run's loop results (``set_results``, ``refresh_current``); posts
    ApplyRequested(loop, candidate), VerifyRequested(loop) and RollbackRequested(loop)."""

    BINDINGS = [
        Binding("a", "apply", "Apply candidate"),
        Binding("v", "verify", "Verify (step)"),
        Binding("b", "rollback", "Roll back"),
    ]

    class ApplyRequested(Message):
        """Write ``candidate``'s gains for ``loop`` (a LoopResult; either may be None)."""

        def __init__(self, loop, candidate) -> None:
            super().__init__()
            self.loop = loop
            self.candidate = candidate

    class VerifyRequested(Message):
        """Step-test the gains applied for ``loop``."""

        def __init__(self, loop) -> None:
            super().__init__()
            self.loop = loop

    class RollbackRequested(Message):
        """Go back to ``loop``'s gains before the last apply."""

        def __init__(self, loop) -> None:
            super().__init__()
            self.loop = loop

    def compose(self) -> ComposeResult:
        with Horizontal(id="results-head"):
            yield Select([], prompt="no results yet", id="results-loop", compact=True)
            yield Static("", id="results-status")
        with Horizontal(id="results-body"):
            yield KeyValues(id="results-ident")
            with Vertical(id="results-right"):
                yield DataTable(id="candidates", cursor_type="row", zebra_stripes=True)
                yield TracePlot("predicted step", "time [s]", id="step-plot")

    def on_mount(self) -> None:
        self.loops: dict = {}  # key -> LoopResult
        table = self.query_one("#candidates", DataTable)
        table.add_columns("rule", "kp", "ki", "kd", "Ms", "GM", "PM deg", "os %", "rise s")
        self.show(None)

    # ------------------------------------------------------------------ data
    def set_results(self, loops) -> None:
        self.loops = {lr.key: lr for lr in loops}
        sel = self.query_one("#results-loop", Select)
        sel.set_options([(f"{lr.key} [{lr.status}]", lr.key) for lr in loops])
        if loops:
            sel.value = loops[0].key
        self.show(loops[0].key if loops else None)

    def current(self):
        sel = self.query_one("#results-loop", Select)
        key = sel.value if isinstance(sel.value, str) else None
        return self.loops.get(key) if key else None

    def selected_candidate(self):
        lr = self.current()
        if lr is None or lr.tuning is None:
            return None
        table = self.query_one("#candidates", DataTable)
        row = table.cursor_row
        cands = lr.all_candidates()
        return cands[row] if 0 <= row < len(cands) else None

    def on_select_changed(self, event: Select.Changed) -> None:
        if event.select.id == "results-loop":
            self.show(event.value if isinstance(event.value, str) else None)

    def on_data_table_row_highlighted(self, event: DataTable.RowHighlighted) -> None:
        self._plot_candidate()

    # ------------------------------------------------------------------ drawing
    def refresh_current(self) -> None:
        lr = self.current()
        row = self.query_one("#candidates", DataTable).cursor_row
        self.show(lr.key if lr else None, keep_row=row)

    def show(self, key: str | None, keep_row: int | None = None) -> None:
        lr = self.loops.get(key) if key else None
        ident_w = self.query_one("#results-ident", KeyValues)
        table = self.query_one("#candidates", DataTable)
        table.clear()
        status = self.query_one("#results-status", Static)
        if lr is None:
            ident_w.show([("", "Run a plan (F5) to see results here.")])
            status.update("")
            self.query_one("#step-plot", TracePlot).draw([])
            return
        s = Text()
        s.append(f" {lr.status} ", style="bold reverse")
        if lr.message:
            s.append(f" {lr.message}")
        status.update(s)
        rows = [("loop", f"{lr.key} ({lr.controller.upper()})"), ("status", lr.status)]
        if lr.message:
            rows.append(("why", lr.message))
        rows += [
                ("noise std", fmt(lr.noise_std, 3)), ("trim", fmt(lr.trim, 3))]
        ident = lr.identification
        if ident is not None:
            rows += [("Ku", fmt(ident.best.ku)), ("Tu", fmt(ident.best.tu_s, 4, "s")),
                     ("method", f"{ident.best.method}"), ("basis", ident.best.basis)]
            if ident.best_plant is not None:
                rows += [("plant Ku", fmt(ident.best_plant.ku)),
                         ("plant Tu", fmt(ident.best_plant.tu_s, 4, "s"))]
            m = ident.model
            rows += [("model", m.kind)]
            rows += [(f"  {k}", fmt(v)) for k, v in m.params.items()]
            # the normalised dead time is L/(L+T) for a lag; an integrating loop has none
            rows += [("  tau", "- (integrating)" if m.integrating else
                      fmt(m.normalized_delay, 3)), ("  rmse", fmt(m.rmse, 3))]
            for w in ident.warnings:
                rows.append(("warning", w))
        relay = lr.relay or {}
        if relay:
            rows += [("relay amp", fmt(relay.get("final_amplitude"), 3)),
                     ("periods", f"{relay.get('periods_after_ramp', '-')} to converge, "
                                 f"{relay.get('periods_recorded', '-')} analysed")]
        if lr.chosen is not None:
            rows.append(("chosen", lr.chosen.rule))
            # what the chosen gains make of the measurement noise at the loop's output
            rows.append(("noise in u", fmt(lr.chosen.output_noise, 3)))
        if lr.first_try:
            rows.append(("first try", f"{lr.first_try['rule']} missed its step: "
                                      + "; ".join(lr.first_try.get("problems") or [])))
        ver = lr.verification
        if ver:
            meas = ver.get("measured") or {}
            rows.append(("verify", ("PASS" if ver.get("passed") else "FAIL")
                         + f" os {fmt((meas.get('overshoot') or math.nan) * 100, 3)}% rise "
                         f"{fmt(meas.get('rise_s'), 3)} s"))
            for p in ver.get("problems") or []:
                rows.append(("", p))
        if lr.applied_gains:
            rows.append(("on board", ", ".join(f"{k.split('.')[-1]} {fmt(v, 3)}"
                                               for k, v in lr.applied_gains.items())))
        ident_w.show(rows, title="Identification")
        if lr.tuning is not None:
            rec = lr.tuning.recommended
            chosen = lr.chosen.rule if lr.chosen is not None else None
            for c in lr.all_candidates():
                tag = ("*" if c.rule == chosen else " ") + ("R" if c.rule == rec else " ")
                p = c.predicted
                table.add_row(f"{tag}{c.rule}", fmt(c.kp, 3), fmt(c.ki, 3), fmt(c.kd, 3),
                              fmt(c.ms, 3), fmt(c.gm, 3), fmt(c.pm_deg, 3),
                              fmt(p.overshoot * 100, 3), fmt(p.rise_s, 3))
            if keep_row is not None and 0 <= keep_row < table.row_count:
                table.move_cursor(row=keep_row)
            elif chosen is not None:
                names = [c.rule for c in lr.all_candidates()]
                if chosen in names:
                    table.move_cursor(row=names.index(chosen))
        self._plot_candidate()

    def _plot_candidate(self) -> None:
        plot = self.query_one("#step-plot", TracePlot)
        c = self.selected_candidate()
        if c is None:
            plot.draw([])
            return
        p = c.predicted
        plot.draw([(p.t_s, p.y_setpoint, "set-point step"), (p.t_s, p.y_load, "load step")],
                  title=f"predicted unit steps, {c.rule}: Ms {fmt(c.ms, 3)}")

    # ------------------------------------------------------------------ actions
    def action_apply(self) -> None:
        self.post_message(self.ApplyRequested(self.current(), self.selected_candidate()))

    def action_verify(self) -> None:
        self.post_message(self.VerifyRequested(self.current()))

    def action_rollback(self) -> None:
        self.post_message(self.RollbackRequested(self.current()))
