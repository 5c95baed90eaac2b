"""A session with one board: identify, version check, settings discovery, arming, experiments.

Settings are discovered, never assumed: the host asks the device to describe every entry of its
settings table (``SettingDescribe``) and finds gains by their documented dotted names
("roll.rate.kp"). Values are checked against the device's own bounds before anything is sent.

Settings the host records are the board's: ``values`` holds only what the board returned — a
read, or the value a write's reply echoes (SettingValue: the value stored) — and a setting whose
value could not be confirmed (a write whose reply and read-back were both lost) is taken out of
``values`` and put in ``unknown`` until a read succeeds. A write whose reply was lost is read
back before anything is recorded (the board may have executed it); ``write_many`` is
all-or-nothing: on a failure part-way it restores the values written so far, reads every one
back and raises an error that says what the board now holds.

Threads: the commands run on the caller's thread and block until the board answers (each is one
``Link.request``, with the link's retries and back-off; a resend is never executed twice by the
board). Connecting turns the board's telemetry off first, so that the many small requests of
settings discovery do not share a lossy link with a stream they do not need. The session also listens to the link: ``state`` follows every Ack, Telemetry and Event,
so it is written from the reader thread too; it is a hint for displays and guards, the board's
own state machine is what decides. Errors: ``SessionError`` for what the host refuses or cannot
understand, ``DeviceRefused`` (a SessionError) for a refusal by the board, ``LinkError`` /
``LinkTimeout`` from the link underneath (see agent.errors).
"""

from __future__ import annotations

import math
import struct
import threading
from dataclasses import dataclass
from typing import Any

from protocol import messages as m
from protocol.messages import (Axis, DeviceState, Loop, PROTOCOL_MAJOR, PROTOCOL_MINOR,
                               RefuseCode)

from . import __version__
from .errors import DeviceError
from .link import ForeignVersion, Link, LinkError
from .replies import describe_kill_event

HELLO_TIMEOUT_S = 0.3  # a board may still be booting: Hello has patience of its own ...
HELLO_RETRIES = 14
HELLO_SILENT_S = 2.0  # ... but a port where not one byte arrives for this long is given up
DISCOVERY_RETRIES = 14  # settings-table entries are the largest replies: more tries


class SessionError(DeviceError):
    """A problem with the board or the request; the text says what and what to do."""


class DeviceRefused(SessionError):
    """The board refused a request (nothing was changed). ``code`` is the RefuseCode number
    (kept as an int: a newer board may send a code this host does not know), ``refuse`` the
    whole Refuse message; the text names the request, the code and the board's reason, and
    ``context`` when given (why a kill is latched, what a set of writes left on the board).
    ``board`` is set on the error of a failed ``write_many`` (see :class:`BoardValues`)."""

    def __init__(self, request: str, refuse: m.Refuse, context: str = ""):
        try:
            code = RefuseCode(refuse.code).name
        except ValueError:
            code = f"code {refuse.code}"
        super().__init__(f"the board refused {request}: {code}"
                         + (f" — {refuse.text}" if refuse.text else "")
                         + (f" ({context})" if context else ""))
        self.refuse = refuse
        self.code = refuse.code
        self.board: BoardValues | None = None


@dataclass(frozen=True)
class BoardValues:
    """What the board holds after a failed set of writes, as read back: ``held`` by name,
    ``unknown`` the names that could not be read, ``restored`` True when every value is back
    to what it was before the set."""

    held: dict[str, float]
    unknown: tuple[str, ...]
    restored: bool

    def describe(self) -> str:
        """"roll.rate.kp=0.3, ...; unknown (could not be read back): roll.rate.ki"."""
        text = ", ".join(f"{k}={v:.6g}" for k, v in self.held.items()) or "nothing readable"
        if self.unknown:
            text += "; unknown (could not be read back): " + ", ".join(self.unknown)
        return text


def f32(value: float) -> float:
    """``value`` as the board stores it (IEEE binary32)."""
    return struct.unpack("<f", struct.pack("<f", float(value)))[0]


@dataclass(frozen=True)
class Setting:
    """One entry of the board's settings table, as the board described it (SI units)."""

    index: int
    setting_id: int
    name: str
    type: int
    unit: str
    minimum: float
    maximum: float
    default: float
    flags: int

    def check(self, value: float) -> None:
        """Raise SessionError if ``value`` is NaN or outside [minimum, maximum]."""
        if not (self.minimum <= value <= self.maximum) or value != value:
            raise SessionError(
                f"{self.name} = {value:g} is outside the board's bounds "
                f"[{self.minimum:g}, {self.maximum:g}]{(' ' + self.unit) if self.unit else ''}; "
                "nothing was written.")


@dataclass(frozen=True)
class DeviceInfo:
    """Who the board is, from its HelloReply; ``protocol`` is "major.minor"."""

    device_id: str
    firmware_version: str
    protocol: str
    loop_rate_hz: int
    capabilities: int
    axes: dict[str, tuple[str, ...]]  # axis name -> loop level names

    def as_dict(self) -> dict:
        """Plain values for the session log's manifest."""
        return {"device_id": self.device_id, "firmware_version": self.firmware_version,
                "protocol": self.protocol, "loop_rate_hz": self.loop_rate_hz,
                "capabilities": self.capabilities,
                "axes": {k: list(v) for k, v in self.axes.items()}}


def axis_name(axis: int) -> str:
    """"roll" for Axis.ROLL; raises ValueError for a number that is no Axis."""
    return Axis(axis).name.lower()


def loop_name(loop: int) -> str:
    """"rate" for Loop.RATE; raises ValueError for a number that is no Loop."""
    return Loop(loop).name.lower()


class Session:
    """High-level commands to one board over a Link (see the module docstring for threads and
    errors). ``info``, ``settings`` and ``values`` are filled by ``connect``; ``values`` holds
    the last value the board returned for each setting (read back or echoed by a write),
    ``unknown`` the settings whose value on the board could not be confirmed."""

    def __init__(self, link: Link):
        self.link = link
        self.info: DeviceInfo | None = None
        self.settings: dict[str, Setting] = {}
        self.values: dict[str, float] = {}
        self.unknown: set[str] = set()
        self.state: DeviceState = DeviceState.DISARMED
        self._tag = 0
        self._lock = threading.Lock()
        link.on_telemetry(self._on_telemetry)
        link.on_event(self._on_event)

    # ------------------------------------------------------------------ state tracking
    # link subscribers, on the reader thread: an unknown state number is ignored
    def _on_telemetry(self, t: float, tel: m.Telemetry) -> None:
        self.state = DeviceState(tel.state) if tel.state in DeviceState._value2member_map_ else self.state

    def _on_event(self, t: float, ev: m.Event) -> None:
        if ev.state in DeviceState._value2member_map_:
            self.state = DeviceState(ev.state)

    def _ask(self, msg, what: str, **kw):
        """One request (``kw`` go to ``Link.request``); a Refuse becomes DeviceRefused
        (``what`` names the request in its text; a latched kill also says which kill, when
        the board reported it), an Ack updates ``state``; any other reply is returned."""
        reply = self.link.request(msg, **kw)
        if isinstance(reply, m.Refuse):
            context = ""
            if reply.code == RefuseCode.KILL_LATCHED:
                self.state = DeviceState.KILLED
                if self.link.last_kill is not None:
                    context = "the board killed: " + describe_kill_event(self.link.last_kill)
            raise DeviceRefused(what, reply, context)
        if isinstance(reply, m.Ack) and reply.state in DeviceState._value2member_map_:
            self.state = DeviceState(reply.state)
        return reply

    # ------------------------------------------------------------------ identify and discover
    def connect(self) -> DeviceInfo:
        """Identify the board, check the protocol version and discover its settings table.

        Hello is asked with its own patience (a board may still be booting; a port where
        nothing at all arrives is given up after ``HELLO_SILENT_S``); then the board's telemetry
        is turned off (it would share a lossy link with the discovery's requests; every
        experiment sets the rate it needs) and every setting is described and read (see
        ``discover_settings``).

        Returns
        -------
        DeviceInfo
            Also kept in ``info``.

        Raises
        ------
        SessionError
            Nothing answered; the board speaks another protocol major (in its HelloReply, in the
            frame's version byte, or by refusing with VERSION); the answer was not a HelloReply.
        DeviceRefused
            The board refused Hello, or a SettingDescribe/SettingRead, for another reason.
        LinkError
            The link was lost during discovery.
        """
        try:
            reply = self.link.request(m.Hello(host_name=f"tetherloop {__version__}"),
                                      timeout_s=HELLO_TIMEOUT_S, retries=HELLO_RETRIES,
                                      silent_s=HELLO_SILENT_S)
        except LinkError as exc:
            raise SessionError(str(exc)) from None
        if isinstance(reply, ForeignVersion):
            raise SessionError(
                f"the board answers in protocol {reply.major}.{reply.minor}; this tetherloop "
                f"speaks {PROTOCOL_MAJOR}.{PROTOCOL_MINOR}. Major versions must match: update "
                "the tool or the firmware.")
        if isinstance(reply, m.Refuse):
            if reply.code == RefuseCode.VERSION:
                raise SessionError(
                    f"the board speaks another major version of the protocol ({reply.text}); this "
                    f"tetherloop speaks {PROTOCOL_MAJOR}.{PROTOCOL_MINOR}. Update the tool or the "
                    "firmware so the major versions match.")
            raise DeviceRefused("identify", reply)
        if not isinstance(reply, m.HelloReply):
            raise SessionError(f"unexpected answer to identify: {type(reply).__name__}")
        if reply.protocol_major != PROTOCOL_MAJOR:
            raise SessionError(
                f"the board speaks protocol {reply.protocol_major}.{reply.protocol_minor}; this "
                f"tetherloop speaks {PROTOCOL_MAJOR}.{PROTOCOL_MINOR}. Major versions must match: "
                "update the tool or the firmware.")
        axes: dict[str, tuple[str, ...]] = {}
        for item in reply.axes:
            if item.axis not in Axis._value2member_map_:
                continue  # an axis of a newer protocol minor: not ours to drive
            axes[axis_name(item.axis)] = tuple(loop_name(lv) for lv in Loop
                                                if item.loops & (1 << int(lv)))
        self.info = DeviceInfo(reply.device_id, reply.firmware_version,
                               f"{reply.protocol_major}.{reply.protocol_minor}",
                               reply.loop_rate_hz, reply.capabilities, axes)
        self._ask(m.TelemetryConfig(rate_hz=0, axis_mask=0, loop=0), "telemetry off",
                  retries=DISCOVERY_RETRIES)
        self.discover_settings(reply.setting_count)
        return self.info

    def discover_settings(self, count: int) -> None:
        """Describe the entries 0 .. count-1 of the board's table, then read each value into
        ``values``. ``settings`` is replaced only when every description arrived. Each request
        has ``DISCOVERY_RETRIES`` resends. Raises DeviceRefused or LinkError."""
        settings: dict[str, Setting] = {}
        for index in range(count):
            info = self._ask(m.SettingDescribe(index=index), f"describe setting #{index}",
                             retries=DISCOVERY_RETRIES)
            s = Setting(info.index, info.setting_id, info.name, info.type, info.unit,
                        info.minimum, info.maximum, info.default, info.flags)
            settings[s.name] = s
        self.settings = settings
        self.values, self.unknown = {}, set()
        for name in settings:
            self.read(name, retries=DISCOVERY_RETRIES)

    # ------------------------------------------------------------------ settings
    def setting(self, name: str) -> Setting:
        """The description of ``name``; SessionError if the board has no such setting."""
        try:
            return self.settings[name]
        except KeyError:
            raise SessionError(f"the board has no setting named {name!r}") from None

    def read(self, name: str, retries: int | None = None) -> float:
        """Read one setting from the board into ``values`` (it leaves ``unknown``).

        Raises
        ------
        SessionError
            No such setting.
        DeviceRefused, LinkError
            The board refused, or the link failed (the record is left as it was).
        """
        s = self.setting(name)
        reply = self._ask(m.SettingRead(setting_id=s.setting_id), f"read {name}",
                          retries=retries)
        self.values[name] = reply.value
        self.unknown.discard(name)
        return reply.value

    def _read_back(self, name: str) -> float | None:
        """Read ``name`` with discovery's patience; None (and the name moved from ``values``
        to ``unknown``) when it cannot be read."""
        try:
            return self.read(name, retries=DISCOVERY_RETRIES)
        except (SessionError, LinkError):
            self.values.pop(name, None)
            self.unknown.add(name)
            return None

    def reread_unknown(self) -> None:
        """Read again every setting whose value is unknown (those that still fail stay so)."""
        for name in sorted(self.unknown):
            self._read_back(name)

    @staticmethod
    def _holds(s: Setting, held: float, value: float) -> bool:
        """Whether the value read back is the one written (as binary32; an integral, boolean
        or choice setting may have been rounded by the board)."""
        if math.isclose(held, f32(value), rel_tol=1e-6, abs_tol=1e-12):
            return True
        return s.type != m.SettingType.FLOAT and held == f32(round(value))

    def write(self, name: str, value: float) -> float:
        """Write one setting after checking it against the board's bounds, and record what the
        board holds afterwards.

        The reply (SettingValue) echoes the value stored, which is recorded. When the reply is
        lost after every retry the board may or may not have executed the write, so the
        setting is read back first: the new value there means it was done; the old value
        means it was not, and the write is sent once more; no answer to the read either
        leaves the setting ``unknown``.

        Returns
        -------
        float
            The value the board stored (float32, perhaps rounded), also kept in ``values``.

        Raises
        ------
        SessionError
            No such setting, or the value is NaN or out of bounds: nothing was sent.
        DeviceRefused
            The board refused (read-only, busy, wrong state, ...): nothing was changed.
        LinkError, LinkTimeout
            The link failed; the text says what the board holds (read back) or that its value
            is unknown.
        """
        s = self.setting(name)
        s.check(value)
        what = f"write {name} = {value:g}"
        for attempt in range(2):
            try:
                reply = self._ask(m.SettingWrite(setting_id=s.setting_id, value=float(value)),
                                  what)
            except LinkError as exc:
                held = self._read_back(name)
                if held is None:
                    raise LinkError(
                        f"{what}: {exc}. Its value could not be read back either, so what the "
                        "board holds is unknown (left out of the host's record until it is "
                        "read again)") from exc
                if self._holds(s, held, value):
                    return held  # done on the board; only its reply was lost
                if attempt:
                    raise LinkError(f"{what}: {exc}. Read back: the board still holds "
                                    f"{name} = {held:.6g}, unchanged") from exc
                continue  # the read-back proved it was not done: sending it again is safe
            self.values[name] = reply.value
            self.unknown.discard(name)
            return reply.value
        raise AssertionError("unreachable")  # pragma: no cover

    def write_many(self, values: dict[str, float]) -> dict[str, float]:
        """Write a set of settings, all or nothing.

        Every name and value is checked first and nothing is sent unless all are good; a
        setting whose value is not known is read first (so it can be restored). On a failure
        part-way (a refusal or a link error) the settings written so far, and the one that
        failed, are written back to their previous values, every setting of the set is read
        back, and the error says what the board now holds.

        Returns
        -------
        dict
            The stored values by name (as the board returned them).

        Raises
        ------
        SessionError
            A name or value refused by the host: nothing was sent.
        DeviceRefused, LinkError
            A write failed; the text says what the board holds now and ``board`` (a
            :class:`BoardValues`) gives the values read back and the names still unknown.
        """
        for name, value in values.items():
            self.setting(name).check(value)
        before = {}
        for name in values:
            if name not in self.values:
                self.read(name)  # raises before anything was written
            before[name] = self.values[name]
        written: dict[str, float] = {}
        current = ""
        try:
            for name, value in values.items():
                current = name
                written[name] = self.write(name, value)
        except (SessionError, LinkError) as exc:
            board = self._undo([*written, current], before)
            raise self._set_failed(exc, current, list(written), board) from exc
        return written

    def _undo(self, touched: list[str], before: dict[str, float]) -> BoardValues:
        """Write the previous values of ``touched`` back (latest first), then read every
        setting of the set again."""
        for name in reversed(touched):
            if name in self.unknown or self.values.get(name) != before[name]:
                try:
                    self.write(name, before[name])
                except (SessionError, LinkError):
                    pass  # the read-back below says what the board holds
        for name in before:
            self._read_back(name)
        held = {n: self.values[n] for n in before if n in self.values}
        unknown = tuple(n for n in before if n in self.unknown)
        restored = not unknown and all(held[n] == before[n] for n in before)
        return BoardValues(held, unknown, restored)

    @staticmethod
    def _set_failed(exc: Exception, name: str, earlier: list[str], board: BoardValues):
        """The error of a failed set of writes: the cause and what the board holds now."""
        if board.restored:
            tail = ("the settings written before it were restored and read back; the board "
                    if earlier else "read back, the board ")
            tail += f"holds its previous values: {board.describe()}"
        else:
            tail = (f"the set could not be restored: the board now holds {board.describe()}. "
                    "Read the settings again (`tetherloop settings`) and set them before "
                    "arming")
        if isinstance(exc, DeviceRefused):
            err = DeviceRefused(f"write {name}", exc.refuse, tail)
        elif isinstance(exc, LinkError):
            err = LinkError(f"writing {name} failed: {exc}. Then {tail}")
        else:
            err = SessionError(f"writing {name} failed: {exc}. Then {tail}")
        err.board = board
        return err

    def persist(self) -> None:
        """Ask the board to store its settings table in non-volatile memory (DISARMED only).
        Raises DeviceRefused (e.g. STORAGE, WRONG_STATE) or LinkError."""
        self._ask(m.SettingsPersist(), "persist settings")

    def gains(self, axis: str, loop: str) -> dict[str, float]:
        """The known ``values`` of one loop, by short name ("kp", "ki", ...); no I/O."""
        prefix = f"{axis}.{loop}."
        return {k[len(prefix):]: v for k, v in self.values.items() if k.startswith(prefix)}

    # ------------------------------------------------------------------ arming and kill
    def arm(self, operator_confirmed: bool) -> None:
        """Arm through the two-step interlock: ArmRequest, then ArmConfirm with the complement
        of the board's token and the operator flag set.

        Parameters
        ----------
        operator_confirmed : bool
            Must be True: the operator has accepted the safety cautions (agent.safety). False
            raises SessionError before anything is sent.

        Raises
        ------
        SessionError
            Not confirmed.
        DeviceRefused
            The board refused either step (WRONG_STATE, KILL_LATCHED, INTERLOCK, NO_KEEPALIVE).
        LinkError, LinkTimeout
            The link failed; the board may then be armed, and disarms by its watchdog if the
            host stays silent.
        """
        if not operator_confirmed:
            raise SessionError("arming needs the operator's confirmation of the safety cautions")
        challenge = self._ask(m.ArmRequest(), "arm request")
        self._ask(m.ArmConfirm(response=challenge.token ^ 0xFFFFFFFF, operator_confirmed=1),
                  "arm")

    def disarm(self) -> None:
        """Stop any experiment and disarm (legal in every state; a latched kill stays).
        Raises LinkError, LinkTimeout."""
        self._ask(m.Disarm(), "disarm")

    def kill(self, reason: int, value: float = 0.0) -> float:
        """Send Kill at once, without waiting: safe from any thread, the reader's too (see
        ``Link.send_kill``, which makes sure of it in the background). Returns the host time
        it was written; raises LinkError if it could not be written."""
        return self.link.send_kill(reason, value)

    def clear_kill(self) -> None:
        """Clear a latched kill (KILLED -> DISARMED; acknowledged in any state). Raises
        LinkError, LinkTimeout."""
        self._ask(m.KillClear(), "clear kill")

    # ------------------------------------------------------------------ telemetry and experiments
    def telemetry(self, rate_hz: int, axes: list[int] | tuple[int, ...], loop: int) -> None:
        """Choose the telemetry stream: ``rate_hz`` (0 = off), the axes by number, and the loop
        level reported for idle axes. Raises DeviceRefused (rate above the loop rate, an axis
        the board lacks) or LinkError."""
        mask = 0
        for a in axes:
            mask |= 1 << int(a)
        self._ask(m.TelemetryConfig(rate_hz=int(rate_hz), axis_mask=mask, loop=int(loop)),
                  "telemetry configuration")

    def next_tag(self) -> int:
        """A fresh experiment tag, 1 .. 65535 then 1 again (0 means "none" on the wire)."""
        with self._lock:
            self._tag = self._tag % 65535 + 1
            return self._tag

    def start_experiment(self, **params: Any) -> int:
        """Start an on-board experiment; ``params`` are ExperimentStart's fields, ``tag`` may be
        left out (a fresh one is used). Returns the tag. Raises DeviceRefused (WRONG_STATE,
        BUSY, BAD_PARAMETER, UNSUPPORTED, ...) or LinkError."""
        tag = params.pop("tag", None) or self.next_tag()
        self._ask(m.ExperimentStart(tag=tag, **params), "experiment start")
        return tag

    def adjust(self, tag: int, amplitude: float, hysteresis: float, bias: float) -> None:
        """Change the running relay ``tag``. Raises DeviceRefused (not that experiment, not a
        relay, bad values) or LinkError."""
        self._ask(m.ExperimentAdjust(tag=tag, amplitude=float(amplitude),
                                     hysteresis=float(hysteresis), bias=float(bias)),
                  "relay adjustment")

    def stop_experiment(self, tag: int) -> None:
        """End the running experiment (acknowledged in any state). Raises LinkError."""
        self._ask(m.ExperimentStop(tag=tag), "experiment stop")

    def close(self) -> None:
        """Close the link (see ``Link.close``); the board disarms by its watchdog if armed."""
        self.link.close()
