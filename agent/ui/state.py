"""What the stand console's controller and its app pass between them: the messages carried
from other threads to the UI thread, the records shown (kill, link health), the worker's stop
signal, and the display interface the app implements (:class:`ConsoleView`)."""

from __future__ import annotations

import threading
from dataclasses import dataclass
from typing import TYPE_CHECKING, Any, Callable, Protocol

from textual.message import Message
from textual.worker import Worker

from agent import operations
from agent.stand import Notice
from protocol.messages import EventKind

if TYPE_CHECKING:
    from agent.plan import Plan
    from agent.stand import Stand
    from agent.workflows import LoopResult, Progress

MOCK_ID = "__mock__"  # the port list's entry for the built-in simulated board
GROUP = "stand"  # the worker group of everything that talks to the board
KILL_KEY_LABEL = "Ctrl+K"


class StandNotice(Message):
    """A stand notice (kill, state, event, loop, warning), carried from the thread it happened on
    to the UI thread."""

    def __init__(self, kind: Notice, payload: Any) -> None:
        super().__init__()
        self.kind = kind
        self.payload = payload


class ProgressNotice(Message):
    """A workflow's Progress event, carried from the worker thread to the UI thread."""

    def __init__(self, progress: "Progress") -> None:
        super().__init__()
        self.progress = progress


@dataclass(frozen=True)
class KillRecord:
    """The first kill since the last clear (the cause; later ones follow from it) and how many
    came after it."""

    info: dict
    later: int = 0

    @property
    def text(self) -> str:
        """Who, why, where: ``operations.describe_kill``."""
        return operations.describe_kill(self.info)

    @property
    def short(self) -> str:
        """Origin and reason, for the one-line state strip."""
        return f"{self.info.get('origin')}: {self.info.get('reason')}"


@dataclass(frozen=True)
class LinkHealth:
    """The link's figures (rates in frames/s, latency in ms; ``lost`` says why it ended)."""

    rate_hz: float
    latency_ms: float
    frames_in: int
    frames_out: int
    bad_frames: int
    retries: int
    timeouts: int
    lost: str | None


class StopSignal(threading.Event):
    """The gentle stop a workflow polls with ``is_set()``: set by the operator, or the worker it
    belongs to was cancelled. (Workflows only poll ``is_set``; ``wait`` sees ``set`` alone.)"""

    def __init__(self) -> None:
        super().__init__()
        self.worker: Worker | None = None

    @property
    def cancelled(self) -> bool:
        return self.worker is not None and self.worker.is_cancelled

    def is_set(self) -> bool:
        return super().is_set() or self.cancelled


class ConsoleView(Protocol):
    """What the controller asks of the app: textual's own (notify, post_message, run_worker,
    workers, call_from_thread) and the console's displays below (UI thread only)."""

    workers: Any

    def notify(self, message: str, *, severity: str = ..., timeout: float | None = ...) -> None: ...
    def post_message(self, message: Message) -> bool: ...
    def call_from_thread(self, callback: Callable, *args: Any) -> Any: ...
    def run_worker(self, work: Callable, **kwargs: Any) -> Worker: ...
    def note(self, text: str) -> None: ...
    def link_said(self, text: str, error: bool = False) -> None: ...
    def board_changed(self, stand: "Stand | None") -> None: ...
    def kill_changed(self, record: KillRecord | None) -> None: ...
    def results_changed(self, loops: "list[LoopResult] | None") -> None: ...
    def run_began(self, plan: "Plan") -> None: ...
    def plan_shown(self, plan: "Plan") -> None: ...
    def loop_status(self, key: str, status: str) -> None: ...
    def ask_cautions(self, what: str, done: Callable[[bool | None], None]) -> None: ...
    def show_tab(self, tab_id: str) -> None: ...
    def state_changed(self) -> None: ...
    def scope_level_changed(self, level: str) -> None: ...


def event_text(ev) -> str:
    """A board event (protocol Event) as a line of the run log."""
    name = (EventKind(ev.kind).name.lower() if ev.kind in EventKind._value2member_map_
            else f"event {ev.kind}")
    return f"board: {name}" + (f" ({ev.text})" if ev.text else "")
