"""Every operator action, once. The CLI (agent/cli) and the console (agent/ui) call these and
only render what comes back; neither sequences nor computes anything itself.

Actions: start the built-in simulated board, connect, check a plan against the board, open a
session (the log, with the cautions record), run work armed (arm, work, disarm), tune one loop,
autotune, apply a candidate, roll back, re-verify with exactly the arguments autotune uses, kill,
clear a kill, describe a kill, close. Long work runs in a :class:`Job` so that a shell stays
free to kill at any moment.

Safety: nothing arms without an open session whose cautions record says how they were accepted
(:class:`Confirmation`); the record is the truth — a scripted ``--confirm-safe``, a typed "yes",
or, for the built-in simulated board only, "not asked: simulated board".
"""

from __future__ import annotations

import contextlib
import enum
import threading
import time
from dataclasses import dataclass, field
from typing import Any, Callable, Iterator

from protocol.messages import KillReason

from . import workflows
from .errors import DeviceError, LinkError, LogbookError, UserError
from .plan import LoopPlan, Plan, PlanError, check_against_device
from .stand import Notice, Stand
from .workflows import LoopResult, LoopStatus, ProgressFn, StandResult, quiet


# ---------------------------------------------------------------------------- the cautions record


class ConfirmedBy(enum.StrEnum):
    """How the safety cautions were accepted before arming."""

    TYPED = "typed yes at the prompt"
    FLAG = "--confirm-safe (scripted run)"
    CONSOLE = "typed yes in the stand console"
    SIMULATED = "not asked: the board is the built-in simulation, no hardware is driven"


@dataclass(frozen=True)
class Confirmation:
    """The cautions record: how they were accepted, when (Unix time), and for what."""

    by: ConfirmedBy
    time_s: float = field(default_factory=time.time)
    what: str = ""

    def as_record(self) -> dict:
        """The session log's ``confirmations`` object."""
        return {"cautions": str(self.by), "by": self.by.name.lower(),
                "time": self.time_s, "what": self.what}


# ---------------------------------------------------------------------------- board and link


def start_builtin_board(scenario: str, speed: float | str = 5.0, seed: int = 1,
                        transport: str = "pty", **kwargs):
    """Start the built-in simulated board (an invented stand) and return its handle.

    Raises
    ------
    UserError
        The scenario is unknown or invalid (``tetherloop mock --list`` shows them).
    """
    from mock_device.runner import start_mock
    from mock_device.scenarios import load_scenario
    try:
        sc = load_scenario(scenario)
    except (FileNotFoundError, KeyError, ValueError) as exc:
        raise UserError(f"scenario {scenario!r}: {exc} (`tetherloop mock --list` shows the "
                        "bundled stands)") from None
    sp = "max" if str(speed) == "max" else float(speed)
    return start_mock(sc, transport=transport, speed=sp, seed=seed, **kwargs)


def connect(port, baud: int = 921600, mock=None) -> Stand:
    """Open the link and the session (handshake, settings discovery).

    On failure the built-in board ``mock`` (if any) is stopped too.

    Raises
    ------
    LinkError, DeviceError
        The port could not be opened or the board did not answer as a board should.
    """
    try:
        return Stand.connect(port, baudrate=baud, mock=mock)
    except BaseException:
        if mock is not None:
            mock.stop()
        raise


def check_plan(stand: Stand, plan: Plan) -> None:
    """Check a plan against the connected board before anything is armed: its loops exist, and
    what depends on the board (relay ceilings against output limits, limits against the board's
    kill bounds) fits.

    Raises
    ------
    PlanError
    """
    check_against_device(plan, stand.info.axes)
    from . import plan as plan_mod
    board_check = getattr(plan_mod, "check_against_board", None)
    if board_check is not None:
        board_check(plan, stand.info.axes, stand.session.settings, stand.session.values)


# ---------------------------------------------------------------------------- sessions


def open_session(stand: Stand, plan: Plan, confirmation: Confirmation,
                 log_dir: str | None = None, previous_outcome: str = "closed"):
    """Open a fresh session log for a run and record how the cautions were accepted.

    A log already open on the stand (the console runs several plans per connection) is closed
    first with ``previous_outcome`` and the settings read back. After this the stand may arm.

    Raises
    ------
    LogbookError
        The log folder is not usable: nothing was armed.
    """
    from .logbook import Logbook
    if stand.log is not None:
        old, stand.log = stand.log, None
        try:
            old.update_manifest(settings_after=dict(stand.session.values),
                                link_stats=stand.link.stats.as_dict())
            old.close(previous_outcome)
        except (OSError, LogbookError) as exc:
            stand.emit(Notice.WARNING, f"previous session log not closed cleanly: {exc}")
    record = confirmation.as_record()
    stand.open_log(Logbook(log_dir), plan.as_dict(), record)
    stand.confirmed = True
    stand.log_event("cautions_confirmed", **record)
    return stand.log


@contextlib.contextmanager
def armed(stand: Stand, plan: Plan) -> Iterator[Stand]:
    """Arm for a piece of work and disarm after it (unless a kill ended it: a killed board
    stays killed until the operator clears it). The host monitor uses the plan's limits."""
    if stand.monitor is not None:
        stand.monitor.limits = plan.limits
    stand.arm()
    try:
        yield stand
    finally:
        if not stand.killed:
            workflows.safe_disarm(stand)


def tune_one(stand: Stand, lp: LoopPlan, plan: Plan, progress: ProgressFn = quiet,
             stop: threading.Event | None = None) -> LoopResult:
    """Arm, tune one loop (as the plan says: apply, verify), disarm."""
    workflows.worker.analysis_pool()  # started before arming: a Ctrl-C meets a ready worker
    with armed(stand, plan):
        return workflows.tune_loop(stand, lp, plan, progress, stop)


def autotune(stand: Stand, plan: Plan, progress: ProgressFn = quiet,
             stop: threading.Event | None = None) -> StandResult:
    """Every loop of the plan in cascade order (the workflow arms and disarms)."""
    workflows.worker.analysis_pool()  # started before arming: a Ctrl-C meets a ready worker
    return workflows.autotune(stand, plan, progress, stop)


# ---------------------------------------------------------------------------- gains


def loop_plan_of(lr: LoopResult, plan: Plan | None = None) -> LoopPlan:
    """The plan's entry for a result's loop, or a default entry for it."""
    if plan is not None:
        for lp in plan.loops:
            if lp.key == lr.key:
                return lp
    return LoopPlan(lr.axis, lr.loop, lr.controller)


def apply_candidate(stand: Stand, lr: LoopResult, cand, progress: ProgressFn = quiet,
                    plan: Plan | None = None) -> dict[str, float]:
    """Write a candidate's gains for a tuned loop, exactly as ``tune --apply`` does (with the
    loop's operating point). Updates ``lr`` (applied gains as read back, chosen, status APPLIED,
    verification cleared) and returns the gains that were on the board before.

    Raises
    ------
    DeviceError, LinkError
        A value out of the board's bounds (nothing written) or a failed write.
    """
    lp = loop_plan_of(lr, plan)
    before = workflows.current_gains(stand, lp)
    written = workflows.apply_gains(stand, workflows.gains_of(cand, lp, lr.operating_point,
                                                              stand), progress, lr.key)
    if not lr.previous_gains:
        lr.previous_gains = before
    lr.applied_gains, lr.chosen, lr.status = written, cand, LoopStatus.APPLIED
    lr.verification = None
    return before


def roll_back(stand: Stand, lr: LoopResult, gains: dict[str, float] | None = None,
              progress: ProgressFn = quiet, why: str = "operator") -> bool:
    """Restore earlier gains (default: the loop's previous gains) through the same bounds-
    checked path autotune uses. Returns True when restored; ``lr.status`` says ROLLED_BACK or
    ROLLBACK_FAILED."""
    return workflows.rollback(stand, lr, progress, why=why, gains=gains)


def reverify(stand: Stand, lr: LoopResult, plan: Plan, progress: ProgressFn = quiet,
             stop: threading.Event | None = None, exp_id: str | None = None) -> dict:
    """Arm, step-test the applied gains with exactly the arguments autotune uses, disarm.
    Returns the verification record (also in ``lr.verification``); the status becomes VERIFIED
    on a pass, APPLIED on a miss (the operator decides whether to roll back)."""
    if lr.chosen is None or not lr.applied_gains:
        raise UserError(f"{lr.key}: apply a candidate first, then verify it")
    lp = loop_plan_of(lr, plan)
    with armed(stand, plan):
        lr.status = LoopStatus.APPLIED
        workflows.verify_applied(stand, lp, plan, lr, progress, stop, exp_id=exp_id)
    return lr.verification


# ---------------------------------------------------------------------------- kill


def kill(stand: Stand, reason: int = KillReason.HOST_OPERATOR) -> None:
    """Kill now, from any thread, in any state (it does not wait for the board's answer).

    Raises
    ------
    LinkError
        The kill frame could not be written: the board's watchdog will kill; use the hardware
        kill.
    """
    stand.kill(reason)


def clear_kill(stand: Stand) -> None:
    """Clear a latched kill on the board (it comes back DISARMED)."""
    stand.clear_kill()


def describe_kill(info: dict) -> str:
    """One line for a kill: who, why, and — for a threshold trip — the axis, value and limit.

    >>> describe_kill({"origin": "host", "reason": "host_operator"})
    'KILL by the host: host_operator'
    """
    origin = {"device": "the board", "host": "the host"}.get(info.get("origin"),
                                                            str(info.get("origin", "?")))
    text = f"KILL by {origin}: {info.get('reason', 'unknown')}"
    threshold = info.get("threshold") or 0.0
    if threshold:
        text += (f" on {info.get('axis_name', '-')} (value {info.get('value', 0.0):.4g} beyond "
                 f"{threshold:.4g})")
    if info.get("text"):
        text += f" — {info['text']}"
    return text


def close(stand: Stand, outcome: str = "closed") -> None:
    """Disarm if armed, close the session log (settings read back) and the link."""
    stand.close(outcome)


# ---------------------------------------------------------------------------- board commands


@dataclass(frozen=True)
class BoardStatus:
    """What the board says of itself now: identity, state (from its own Ack), axes and the
    gains it holds (read back)."""

    device_id: str
    firmware_version: str
    protocol: str
    loop_rate_hz: int
    state: str
    axes: dict
    gains: dict  # {"roll.rate": {"kp": ..., ...}}
    link: dict


def board_status(stand: Stand) -> BoardStatus:
    """Ask the board for its state (a telemetry configuration's Ack carries it) and read the
    gains of every loop back."""
    from protocol.messages import Axis, Loop
    axes = [int(Axis[a.upper()]) for a in stand.info.axes]
    stand.session.telemetry(10, axes, int(Loop.RATE))  # a harmless request: its Ack says state
    gains = {}
    for axis, levels in stand.info.axes.items():
        for level in levels:
            gains[f"{axis}.{level}"] = {k.split(".")[-1]: v for k, v in
                                        workflows.current_gains(stand, LoopPlan(axis, level)).items()}
    info = stand.info
    return BoardStatus(info.device_id, info.firmware_version, info.protocol, info.loop_rate_hz,
                       stand.state.name.lower(), {a: list(l) for a, l in info.axes.items()},
                       gains, stand.link.stats.as_dict())


def disarm(stand: Stand) -> None:
    """Stop any experiment and disarm (legal in every state; a latched kill stays latched)."""
    stand.disarm()


def gain_settings(stand: Stand) -> dict[str, float]:
    """Every loop's gains as read back from the board (``{axis}.{loop}.{gain}`` names)."""
    out: dict[str, float] = {}
    for axis, levels in stand.info.axes.items():
        for level in levels:
            out.update(workflows.current_gains(stand, LoopPlan(axis, level)))
    return out


def export_gains(stand: Stand) -> str:
    """The board's gains (read back now) as a settings file's text."""
    from .settingsfile import format_settings
    return format_settings(stand.info.device_id, gain_settings(stand), "the board's gains")


def apply_settings(stand: Stand, values: dict[str, float], source: str,
                   device_id: str = "", force: bool = False,
                   progress: ProgressFn = quiet) -> dict[str, float]:
    """Write a set of settings (from a file or a session's start) all-or-nothing: every name,
    bound and read-only flag is checked against the board's table before the first write; the
    values are then read back. A file from another board is refused unless ``force``.

    Raises
    ------
    UserError
        A name, bound or board mismatch (nothing written).
    DeviceError, LinkError
        A write failed on the link or the board.
    """
    from .settingsfile import check_against_table
    if device_id and device_id != stand.info.device_id and not force:
        raise UserError(f"{source} was read from board {device_id!r}, this is "
                        f"{stand.info.device_id!r}: nothing was written (--force to apply it "
                        "anyway)")
    check_against_table(values, stand.session.settings, source)
    written = workflows.write_gains(stand, values, key=None, event="settings_applied",
                                    progress=progress, source=source)
    return {name: stand.session.read(name) for name in written}


def restore_session(stand: Stand, session_path, force: bool = False,
                    progress: ProgressFn = quiet) -> dict[str, float]:
    """Write back the gains a logged session started from (its manifest's settings_before),
    read back. Only writable gain settings that differ from the board's are written.

    Raises
    ------
    LogbookError
        The session cannot be read.
    UserError
        It was recorded on another board (unless ``force``), or holds no gains.
    """
    from .logbook import read_session
    sess = read_session(session_path)
    before = sess.manifest.get("settings_before") or {}
    device = (sess.manifest.get("device") or {}).get("device_id", "")
    gains = {k: float(v) for k, v in before.items()
             if k.rsplit(".", 1)[-1] in workflows.GAIN_KEYS and k in stand.session.settings}
    if not gains:
        raise UserError(f"session {sess.name} holds no gains of this board to restore")
    changed = {k: v for k, v in gains.items() if stand.session.values.get(k) != v}
    if not changed:
        return {}
    return apply_settings(stand, changed, f"session {sess.name}", device, force, progress)


# ---------------------------------------------------------------------------- background work


class Job:
    """Work on the stand in a thread of its own, so the caller's thread stays free to kill.

    ``Job(fn).start()``; ``wait(timeout)`` returns True when done; ``result`` or ``error``.
    An exception that is not an ``Exception`` (SystemExit, KeyboardInterrupt) is kept in
    ``error`` too; the caller decides to re-raise it.
    """

    def __init__(self, fn: Callable[[], Any], name: str = "tetherloop-workflow"):
        self._fn = fn
        self._done = threading.Event()
        self.result: Any = None
        self.error: BaseException | None = None
        self._thread = threading.Thread(target=self._run, name=name, daemon=True)

    def _run(self) -> None:
        try:
            self.result = self._fn()
        except BaseException as exc:  # reported by the caller
            self.error = exc
        finally:
            self._done.set()

    def start(self) -> "Job":
        self._thread.start()
        return self

    def wait(self, timeout: float | None = None) -> bool:
        """Wait up to ``timeout`` s; True when the work is done. An Event, not Thread.join: a
        Ctrl-C that interrupts join() can leave is_alive() False while the work still runs."""
        return self._done.wait(timeout)

    @property
    def done(self) -> bool:
        return self._done.is_set()


__all__ = ["BoardStatus", "board_status", "disarm", "gain_settings", "export_gains",
           "apply_settings", "restore_session", "ConfirmedBy", "Confirmation", "start_builtin_board", "connect", "check_plan",
           "open_session", "armed", "tune_one", "autotune", "loop_plan_of", "apply_candidate",
           "roll_back", "reverify", "kill", "clear_kill", "describe_kill", "close", "Job",
           "PlanError", "DeviceError", "LinkError"]
