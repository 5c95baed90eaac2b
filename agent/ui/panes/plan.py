"""Plan tab: the loops to tune and every [stand] and [limits] key of a plan file, one input per
row of the plan schema (``agent.plan.SCHEMA``: its label, unit, help, range and default); the
board's own kill settings fill in the defaults where it has them. Every change is checked at once
by ``agent.plan.plan_from_dict`` (the check the CLI applies to a plan file) and against the
connected board's loops; the message says what is wrong before anything can be armed."""

from __future__ import annotations

from textual.app import ComposeResult
from textual.containers import Horizontal, VerticalScroll
from textual.message import Message
from textual.widgets import Checkbox, Input, Label, Select, SelectionList, Static

from agent.plan import (Field, LoopPlan, Plan, PlanError, check_against_device, default_plan,
                        fields, in_cascade_order, plan_from_dict)

SECTIONS = ("stand", "limits")  # the [[loop]] entries are the loop list


def form_fields() -> tuple[Field, ...]:
    """The schema rows the tab shows, in schema order."""
    return tuple(f for sec in SECTIONS for f in fields(sec))


def label_of(f: Field) -> str:
    return f.label + (f" [{f.unit}]" if f.unit else "")


def tooltip_of(f: Field) -> str:
    return f"{f.name}: {f.help}. Expected: {f.expected()}."


def _value(text: str):
    """Numbers as numbers; anything else is handed on as text so the plan check names it."""
    s = text.strip()
    try:
        return float(s)
    except ValueError:
        return s


class PlanPane(VerticalScroll):
    """Is given the board's loops and settings (``set_board``); posts Changed(plan, error)
    whenever the fields change."""

    class Changed(Message):
        """The plan the fields describe now: ``plan`` when valid, else None and ``error``."""

        def __init__(self, plan: Plan | None, error: str) -> None:
            super().__init__()
            self.plan = plan
            self.error = error

    def compose(self) -> ComposeResult:
        yield Static("Connect a board first (F2): the plan is checked against it.",
                     id="plan-status", classes="message")
        yield Label("Loops to tune (Space toggles; run in cascade order):", classes="section")
        yield SelectionList[str](id="plan-loops", compact=True)
        for f in form_fields():
            if f.type is bool:
                continue  # the switches share one row below
            with Horizontal(classes="plan-row"):
                yield Label(label_of(f), classes="plan-label", markup=False)
                if f.type is str:
                    widget = Select([(c.upper() if f.name == "controller" else c, c)
                                     for c in f.allowed()], value=f.default, allow_blank=False,
                                    id=f"plan-{f.name}", compact=True, classes="plan-select")
                else:
                    widget = Input(f"{f.default:g}", id=f"plan-{f.name}", compact=True,
                                   classes="plan-input")
                widget.tooltip = tooltip_of(f)
                yield widget
        with Horizontal(classes="plan-row"):
            for f in form_fields():
                if f.type is bool:
                    box = Checkbox(f.label, f.default, id=f"plan-{f.name}", compact=True)
                    box.tooltip = tooltip_of(f)
                    yield box

    def on_mount(self) -> None:
        self.plan: Plan | None = None
        self.error: str = "no board connected"
        self.axes: dict | None = None  # the board's loops: {axis: (levels)}; None: no board

    # ------------------------------------------------------------------ board
    def set_board(self, axes: dict | None, values: dict) -> None:
        """The connected board's loops and settings values (None: no board)."""
        self.axes = axes
        sl = self.query_one("#plan-loops", SelectionList)
        sl.clear_options()
        if axes is not None:
            loops = in_cascade_order(LoopPlan(a, lv) for a, levels in axes.items()
                                     for lv in levels)
            for lp in loops:
                sl.add_option((lp.key, lp.key, True))  # every loop, as the CLI's default plan
            sl.highlighted = 0
            self._defaults_from(axes, values)
        self.validate_plan()

    def _defaults_from(self, axes: dict, values: dict) -> None:
        """The same defaults the CLI uses without a plan file: the board's own kill settings
        where it has them (shown in operator units)."""
        dp = default_plan(axes, values)
        for f in form_fields():
            if f.type is not float or f.per_loop:
                continue
            owner = dp.limits if f.owner == "limits" else dp
            shown = getattr(owner, f.key_attr) / f.si_scale
            self.query_one(f"#plan-{f.name}", Input).value = f"{shown:.6g}"

    def select_loops(self, keys) -> None:
        sl = self.query_one("#plan-loops", SelectionList)
        sl.deselect_all()
        for k in keys:
            sl.select(k)
        self.validate_plan()

    def set_field(self, key: str, text: str) -> None:
        self.query_one(f"#plan-{key}", Input).value = text
        self.validate_plan()

    # ------------------------------------------------------------------ checking
    def plan_dict(self) -> dict:
        """The fields as a plan file's table (numbers as numbers, other text as typed)."""
        data: dict = {sec: {} for sec in SECTIONS}
        for f in form_fields():
            widget = self.query_one(f"#plan-{f.name}")
            value = widget.value
            data[f.section][f.name] = _value(value) if f.type is float else value
        data["loop"] = [dict(zip(("axis", "loop"), key.split(".")))
                        for key in self.query_one("#plan-loops", SelectionList).selected]
        return data

    def validate_plan(self) -> Plan | None:
        status = self.query_one("#plan-status", Static)
        self.plan = None
        if self.axes is None:
            self.error = "no board connected: connect on the Link tab (F2) first"
            status.update(self.error)
            status.set_class(True, "error")
            self.post_message(self.Changed(None, self.error))
            return None
        try:
            plan = plan_from_dict(self.plan_dict(), source="plan")
            check_against_device(plan, self.axes)
        except PlanError as exc:
            self.error = str(exc)
        else:
            self.plan, self.error = plan, ""
            status.update("Plan OK - cascade order: " + " > ".join(lp.key for lp in plan.loops)
                          + f"  ({'apply' if plan.apply else 'no apply'}, "
                          f"{'verify' if plan.verify and plan.apply else 'no verify'}). "
                          "Start it on the Run tab (F5, then g).")
            status.set_class(False, "error")
            self.post_message(self.Changed(plan, ""))
            return plan
        status.update("Plan NOT valid: " + self.error)
        status.set_class(True, "error")
        self.post_message(self.Changed(None, self.error))
        return None

    def on_input_changed(self, event: Input.Changed) -> None:
        self.validate_plan()

    def on_select_changed(self, event: Select.Changed) -> None:
        self.validate_plan()

    def on_checkbox_changed(self, event: Checkbox.Changed) -> None:
        self.validate_plan()

    def on_selection_list_selected_changed(self, event) -> None:
        self.validate_plan()
