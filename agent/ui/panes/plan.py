"""Plan tab: which loops, which controller and rule, the robustness target, the relay target and
the kill limits. Every change is checked at once by ``agent.plan.plan_from_dict`` (the same check
the CLI applies to a plan file) and against the connected board; the message says what is wrong
before anything can be armed."""

from __future__ import annotations

import math

from textual.app import ComposeResult
from textual.containers import Horizontal, VerticalScroll
from textual.message import Message
from textual.widgets import Checkbox, Input, Label, Select, SelectionList, Static

from agent.plan import (CONTROLLERS, LoopPlan, Plan, PlanError, check_against_device,
                        default_plan, in_cascade_order, known_rules, plan_from_dict)

# (key, label, default text) — operator units, the same keys as a plan file
STAND_FIELDS = (("ms_target", "Ms target (robustness, 1.1-2.5)", "1.4"),
                ("relay_target", "relay target (fraction of kill limit)", "0.3"))
LIMIT_FIELDS = (("angle_deg", "kill: angle [deg]", "30"),
                ("rate_deg_s", "kill: rate [deg/s]", "400"),
                ("heave_m", "kill: heave excursion [m]", "0.25"),
                ("climb_rate_m_s", "kill: climb rate [m/s]", "1.0"),
                ("saturation_s", "kill: output saturated [s]", "1.5"),
                ("max_experiment_s", "longest experiment [s]", "120"))


def _rules() -> list[str]:
    return ["recommended", *known_rules()]


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
        with Horizontal(classes="plan-row"):
            yield Label("controller", classes="plan-label")
            yield Select([(c.upper(), c) for c in CONTROLLERS], value="pid", allow_blank=False,
                         id="plan-controller", compact=True)
        with Horizontal(classes="plan-row"):
            yield Label("rule / design", classes="plan-label")
            yield Select([(r, r) for r in _rules()], value="recommended", allow_blank=False,
                         id="plan-rule", compact=True)
        for key, label, default in STAND_FIELDS + LIMIT_FIELDS:
            with Horizontal(classes="plan-row"):
                yield Label(label, classes="plan-label", markup=False)
                yield Input(default, id=f"plan-{key}", compact=True, classes="plan-input")
        with Horizontal(classes="plan-row"):
            yield Checkbox("write the gains", True, id="plan-apply", compact=True)
            yield Checkbox("verify with a step", True, id="plan-verify", compact=True)

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
        lim = dp.limits
        shown = {"angle_deg": math.degrees(lim.angle_rad),
                 "rate_deg_s": math.degrees(lim.rate_rad_s), "heave_m": lim.heave_m,
                 "climb_rate_m_s": lim.climb_rate_m_s, "saturation_s": lim.saturation_s,
                 "max_experiment_s": dp.max_experiment_s, "relay_target": dp.relay_target}
        for key, value in shown.items():
            self.query_one(f"#plan-{key}", Input).value = f"{value:.6g}"

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
        stand = {"controller": self.query_one("#plan-controller", Select).value,
                 "rule": self.query_one("#plan-rule", Select).value,
                 "apply": self.query_one("#plan-apply", Checkbox).value,
                 "verify": self.query_one("#plan-verify", Checkbox).value}
        for key, _, _ in STAND_FIELDS:
            stand[key] = _value(self.query_one(f"#plan-{key}", Input).value)
        limits = {key: _value(self.query_one(f"#plan-{key}", Input).value)
                  for key, _, _ in LIMIT_FIELDS}
        loops = []
        for key in self.query_one("#plan-loops", SelectionList).selected:
            axis, loop = key.split(".")
            loops.append({"axis": axis, "loop": loop})
        return {"stand": stand, "limits": limits, "loop": loops}

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
