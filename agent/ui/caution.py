"""The safety confirmation shown before the first arm of a connection.

The operator must type the word ``yes`` and press Enter; Escape (or anything else) cancels and
nothing is armed. The kill key stays live on this screen as everywhere.
"""

from __future__ import annotations

from rich.text import Text
from textual.app import ComposeResult
from textual.binding import Binding
from textual.containers import Vertical, VerticalScroll
from textual.screen import ModalScreen
from textual.widgets import Input, Static

from agent.safety import CAUTIONS

CONFIRM_WORD = "yes"


class CautionScreen(ModalScreen[bool]):
    """Dismisses with True only after the operator typed the confirmation word."""

    BINDINGS = [Binding("escape", "cancel", "Cancel (nothing is armed)")]
    AUTO_FOCUS = "#caution-input"

    def __init__(self, what: str):
        super().__init__()
        self.what = what

    def compose(self) -> ComposeResult:
        t = Text()
        t.append("SAFETY CHECK before the motors are armed\n", style="bold")
        t.append(f"About to: {self.what}\n\n")
        for i, c in enumerate(CAUTIONS, 1):
            t.append(f" {i}. ", style="bold")
            t.append(c + "\n")
        with Vertical(id="caution-box"):
            with VerticalScroll(id="caution-scroll"):
                yield Static(t, id="caution-text")
            yield Static(f"Type '{CONFIRM_WORD}' and press Enter to confirm all of the above; "
                         "Esc cancels.", id="caution-hint")
            yield Input(placeholder=f"type {CONFIRM_WORD}", id="caution-input", compact=True)

    def on_mount(self) -> None:
        self.query_one("#caution-input", Input).focus()

    def on_input_submitted(self, event: Input.Submitted) -> None:
        event.stop()
        if event.value.strip().lower() == CONFIRM_WORD:
            self.dismiss(True)
        else:
            hint = self.query_one("#caution-hint", Static)
            hint.update(f"'{event.value.strip()}' is not '{CONFIRM_WORD}'. Type {CONFIRM_WORD} "
                        "to confirm, or press Esc to cancel.")
            hint.add_class("caution-wrong")
            event.input.value = ""

    def action_cancel(self) -> None:
        self.dismiss(False)
