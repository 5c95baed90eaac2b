"""The stand: one connected board with its link, session, safety monitor, recorder and log.

``Stand`` is what every workflow, the CLI and the TUI hold. It wires the data flow once:
telemetry -> (safety monitor, live buffer, experiment log, UI listeners) and events -> (session
state, log, kill bookkeeping). Opening a stand identifies the board and discovers its settings;
it never arms anything.
"""

from __future__ import annotations

import enum
import threading
import time
from collections import deque
from dataclasses import dataclass, field
from typing import Any, Callable

import numpy as np

from protocol import messages as m
from protocol.messages import DeviceState, EventKind, KillReason

from . import __version__
from .errors import LogbookError, WorkflowError
from .link import Link, LinkError
from .safety import Limits, SafetyMonitor, Trip
from .session import Session, SessionError


class Notice(enum.StrEnum):
    """What a stand listener is told: ``listener(kind: Notice, payload)``.

    TELEMETRY  payload: the Telemetry message (reader thread, every sample)
    EVENT      payload: the board's Event message
    KILL       payload: the kill's description dict (origin, reason, axis, value, threshold,
               text, host_time_s); see agent.operations.describe_kill
    STATE      payload: "armed" | "disarmed"
    LOOP       payload: {"key": "roll.rate", "status": LoopStatus value}
    WARNING    payload: a line for people (a log write failed, ...)
    """

    TELEMETRY = "telemetry"
    EVENT = "event"
    KILL = "kill"
    STATE = "state"
    LOOP = "loop"
    WARNING = "warning"


class KillTripped(WorkflowError):
    """A kill happened (device or host); the workflow stopped. ``info`` says why."""

    def __init__(self, info: dict):
        self.info = info
        super().__init__(f"KILL: {info.get('reason', 'unknown')}"
                         + (f" — {info['axis_name']} value {info['value']:.4g} beyond "
                            f"{info['threshold']:.4g}" if info.get("threshold") else "")
                         + (f" ({info['text']})" if info.get("text") else ""))


class Buffer:
    """Samples of the running experiment (and a short live history for the UI). Appends come
    from the reader thread; ``axis``/``columns`` convert only the rows added since the last call
    into a growing numpy array, so polling a long experiment stays cheap."""

    COLUMNS = ("host_time_s", "time_us", "state", "tag", "axis", "loop", "setpoint",
               "measurement", "output", "relay")

    def __init__(self, live_len: int = 4000):
        self._lock = threading.Lock()
        self._pending: list[tuple] = []
        self._arr = np.empty((0, len(self.COLUMNS)))
        self._n = 0
        self.recording = False
        self.started_s = 0.0
        self.live: deque = deque(maxlen=live_len)  # (host_t, Telemetry) for plots

    def start(self) -> None:
        self.started_s = time.monotonic()
        with self._lock:
            self._pending = []
            self._arr = np.empty((4096, len(self.COLUMNS)))
            self._n = 0
            self.recording = True

    def stop(self) -> None:
        with self._lock:
            self.recording = False

    def add(self, host_t: float, tel: m.Telemetry) -> None:
        self.live.append((host_t, tel))
        if not self.recording:
            return
        rows = [(host_t, tel.time_us, tel.state, tel.tag, s.axis, s.loop, s.setpoint,
                 s.measurement, s.output, s.relay) for s in tel.axes]
        with self._lock:
            self._pending.extend(rows)

    def _snapshot(self) -> np.ndarray:
        with self._lock:
            new, self._pending = self._pending, []
            if new:
                block = np.array(new, dtype=float)
                need = self._n + len(block)
                if need > len(self._arr):
                    grown = np.empty((max(need, 2 * len(self._arr)), len(self.COLUMNS)))
                    grown[:self._n] = self._arr[:self._n]
                    self._arr = grown
                self._arr[self._n:need] = block
                self._n = need
            return self._arr[:self._n].copy()

    def axis(self, axis: int) -> dict[str, np.ndarray]:
        arr = self._snapshot()
        arr = arr[arr[:, 4] == axis]
        return {c: arr[:, i] for i, c in enumerate(self.COLUMNS)}

    def columns(self) -> dict[str, np.ndarray]:
        arr = self._snapshot()
        return {c: arr[:, i] for i, c in enumerate(self.COLUMNS)}


@dataclass
class Stand:
    session: Session
    log: Any = None  # agent.logbook.SessionLog or None
    monitor: SafetyMonitor | None = None
    buffer: Buffer = field(default_factory=Buffer)
    experiment_log: Any = None
    listeners: list = field(default_factory=list)  # UI: fn(kind, payload)
    kills: list = field(default_factory=list)
    mock: Any = None  # MockHandle when the stand is the built-in simulation
    confirmed: bool = False
    _kill_event: threading.Event = field(default_factory=threading.Event)
    _wall_offset: float = field(default_factory=lambda: time.time() - time.monotonic())
    last_telemetry_s: float = field(default_factory=time.monotonic)
    telemetry_timeout_s: float = 1.0  # silence during an experiment = a dead link: kill
    _closed: bool = False
    log_error: str | None = None  # the first log write the disk refused (None: all written)

    # ------------------------------------------------------------------ construction
    @classmethod
    def connect(cls, port: str | Any, *, baudrate: int = 921600, limits: Limits | None = None,
                mock: Any = None) -> "Stand":
        link = Link(port, baudrate=baudrate)
        session = Session(link)
        try:
            session.connect()
        except Exception:
            link.close()
            raise
        stand = cls(session=session, mock=mock)
        stand.monitor = SafetyMonitor(kill=session.kill, limits=limits or Limits())
        stand.monitor.on_trip.append(stand._on_host_trip)
        link.on_telemetry(stand._on_telemetry)
        link.on_event(stand._on_event)
        link.on_lost(stand._on_lost)
        return stand

    @property
    def link(self) -> Link:
        return self.session.link

    @property
    def info(self):
        return self.session.info

    @property
    def state(self) -> DeviceState:
        return self.session.state

    def emit(self, kind: Notice | str, payload: Any) -> None:
        """Tell every listener (on the calling thread; a failing listener is ignored)."""
        kind = Notice(kind)
        for fn in tuple(self.listeners):
            try:
                fn(kind, payload)
            except Exception:
                pass

    def open_log(self, logbook, plan_dict: dict, confirmations: dict | None = None,
                 name: str | None = None):
        """Open the session log (before anything is armed: disk problems stop us here)."""
        self.log_error = None
        self.log = logbook.open_session(
            device=self.info.as_dict(), settings_before=dict(self.session.values),
            plan=plan_dict, tool_version=__version__, protocol_version=self.info.protocol,
            name=name, confirmations=confirmations or {})
        return self.log

    def log_event(self, kind: str, **fields) -> None:
        if self.log is not None:
            try:
                fields.setdefault("host_time_s", time.time())
                self.log.event(kind, **fields)
            except Exception as exc:  # a full disk must not stop a kill; say it once
                self.note_log_error(exc)

    def note_log_error(self, exc: BaseException) -> None:
        """A log write failed (full disk, removed folder): warn once and remember it, so the
        workflow stops before it writes gains it could not record (see check_log)."""
        if self.log_error is None:
            self.log_error = str(exc) or type(exc).__name__
            self.emit(Notice.WARNING, f"log write failed: {self.log_error}")

    def check_log(self) -> None:
        """Raise LogbookError when a log write has failed since the session log was opened."""
        if self.log_error is not None:
            raise LogbookError(f"the session log refused a write ({self.log_error}); the run "
                               "stops here so that nothing happens on the board that the log "
                               "cannot record. Free disk space or choose --log-dir, then run "
                               "again")

    # ------------------------------------------------------------------ data flow
    def _on_telemetry(self, host_t: float, tel: m.Telemetry) -> None:
        self.last_telemetry_s = host_t
        if self.monitor is not None:
            self.monitor.check(host_t, tel)
        self.buffer.add(host_t, tel)
        exp = self.experiment_log
        if exp is not None:
            try:
                exp.append(host_t + self._wall_offset, tel)  # the log keeps Unix time
            except Exception as exc:
                self.experiment_log = None
                self.note_log_error(exc)
        self.emit(Notice.TELEMETRY, tel)

    def _on_event(self, host_t: float, ev: m.Event) -> None:
        fields = {"device_time_us": ev.time_us, "event": EventKind(ev.kind).name.lower()
                  if ev.kind in EventKind._value2member_map_ else ev.kind,
                  "state": ev.state, "reason": ev.reason, "axis": ev.axis, "value": ev.value,
                  "threshold": ev.threshold, "tag": ev.tag, "text": ev.text}
        if ev.kind == EventKind.KILL_TRIPPED:
            info = self._kill_info(ev.reason, ev.axis, ev.value, ev.threshold, ev.text, "device")
            self.kills.append(info)
            self._kill_event.set()
            if self.monitor is not None:
                self.monitor.active = False
            self.log_event("kill", **info, device_time_us=ev.time_us)
            self.emit(Notice.KILL, info)
        else:
            self.log_event("device_event", **fields)
        self.emit(Notice.EVENT, ev)

    def _on_host_trip(self, trip: Trip) -> None:
        info = self._kill_info(trip.reason, trip.axis, trip.value, trip.threshold, "", "host")
        info["latency_ms"] = trip.latency_ms
        self.kills.append(info)
        self._kill_event.set()
        self.log_event("kill", **info)
        self.emit(Notice.KILL, info)

    def _on_lost(self, reason: str) -> None:
        info = self._kill_info(KillReason.HOST_LINK, 255, 0.0, 0.0, reason, "host")
        self.kills.append(info)
        self._kill_event.set()
        self.log_event("kill", **info)
        self.emit(Notice.KILL, info)

    @staticmethod
    def _kill_info(reason, axis, value, threshold, text, origin) -> dict:
        try:
            rname = KillReason(reason).name.lower()
        except ValueError:
            rname = f"reason {reason}"
        try:
            aname = m.Axis(axis).name.lower()
        except ValueError:
            aname = "-"
        return {"origin": origin, "reason": rname, "axis": int(axis), "axis_name": aname,
                "value": float(value), "threshold": float(threshold), "text": text,
                "host_time_s": time.time()}

    def stop_recording(self) -> None:
        """The experiment is over: stop buffering and stop writing its telemetry file (its
        results are written later, after the analysis)."""
        self.buffer.stop()
        self.experiment_log = None

    # ------------------------------------------------------------------ kill and arm
    def kill(self, reason: int = KillReason.HOST_OPERATOR, value: float = 0.0) -> None:
        """Kill now, from any thread, in any state (operator key, Ctrl-C, errors)."""
        if self.monitor is not None:
            self.monitor.trip(reason, time.monotonic(), value=value)
        else:
            try:
                self.session.kill(reason, value)
            finally:
                self._kill_event.set()

    @property
    def killed(self) -> bool:
        return self._kill_event.is_set() or self.session.state == DeviceState.KILLED

    def check_kill(self) -> None:
        """Raise KillTripped if anything killed; also kill if the board went silent while an
        experiment records (a cable pulled out of a pty or USB adapter gives no error)."""
        if not self.killed and self.buffer.recording:
            gap = time.monotonic() - max(self.last_telemetry_s, self.buffer.started_s)
            if gap > self.telemetry_timeout_s:
                self.kill(KillReason.HOST_LINK, gap)
        if self.killed:
            info = self.kills[-1] if self.kills else {"reason": "device reports KILLED"}
            raise KillTripped(info)

    def clear_kill(self) -> None:
        self.session.clear_kill()
        self._kill_event.clear()
        self.log_event("kill_cleared")

    def arm(self) -> None:
        if not self.confirmed:
            raise SessionError("the safety cautions have not been confirmed for this session")
        self.check_kill()
        self.session.arm(operator_confirmed=True)
        if self.monitor is not None:
            self.monitor.active = False
        self.log_event("armed")
        self.emit(Notice.STATE, "armed")

    def disarm(self) -> None:
        if self.monitor is not None:
            self.monitor.active = False
        try:
            self.session.disarm()
        finally:
            self.log_event("disarmed")
            self.emit(Notice.STATE, "disarmed")

    def close(self, outcome: str = "closed") -> None:
        if self._closed:
            return
        self._closed = True
        try:
            if self.state in (DeviceState.ARMED, DeviceState.RUNNING) and self.link.lost_reason is None:
                self.session.disarm()
        except Exception:
            pass
        if self.log is not None:
            try:
                if self.link.lost_reason is None:
                    self.session.reread_unknown()  # settings_after: read-back values only
                self.log.update_manifest(settings_after=dict(self.session.values),
                                         link_stats=self.link.stats.as_dict())
                self.log.close(outcome)
            except Exception:
                pass
        self.session.close()
        if self.mock is not None:
            self.mock.stop()
