"""A session with one board: identify, version check, settings discovery, arming, experiments.

Settings are discovered, never assumed: the host asks the device to describe every entry of its
settings table (``SettingDescribe``) and finds gains by their documented dotted names
("roll.rate.kp"). Values are checked against the device's own bounds before anything is sent.

Threads: the commands run on the caller's thread and block until the board answers (each is one
``Link.request``, with the link's time-out and retries; a resend is never executed twice by the
board). The session also listens to the link: ``state`` follows every Ack, Telemetry and Event,
so it is written from the reader thread too; it is a hint for displays and guards, the board's
own state machine is what decides. Errors: ``SessionError`` for what the host refuses or cannot
understand, ``DeviceRefused`` (a SessionError) for a refusal by the board, ``LinkError`` /
``LinkTimeout`` from the link underneath (see agent.errors).
"""

from __future__ import annotations

import threading
from dataclasses import dataclass
from typing import Any

from protocol import messages as m
from protocol.messages import (Axis, DeviceState, Loop, PROTOCOL_MAJOR, PROTOCOL_MINOR,
                               RefuseCode)

from . import __version__
from .errors import DeviceError
from .link import ForeignVersion, Link, LinkError


class SessionError(DeviceError):
    """A problem with the board or the request; the text says what and what to do."""


class DeviceRefused(SessionError):
    """The board refused a request (nothing was changed). ``code`` is the RefuseCode number
    (kept as an int: a newer board may send a code this host does not know), ``refuse`` the
    whole Refuse message; the text names the request, the code and the board's reason."""

    def __init__(self, request: str, refuse: m.Refuse):
        try:
            code = RefuseCode(refuse.code).name
        except ValueError:
            code = f"code {refuse.code}"
        super().__init__(f"the board refused {request}: {code}"
                         + (f" — {refuse.text}" if refuse.text else ""))
        self.refuse = refuse
        self.code = refuse.code


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
    the last value read from or written to the board, by setting name."""

    def __init__(self, link: Link):
        self.link = link
        self.info: DeviceInfo | None = None
        self.settings: dict[str, Setting] = {}
        self.values: dict[str, float] = {}
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

    def _ask(self, msg, what: str):
        """One request; a Refuse becomes DeviceRefused (``what`` names the request in its
        text), an Ack updates ``state``; any other reply is returned."""
        reply = self.link.request(msg)
        if isinstance(reply, m.Refuse):
            raise DeviceRefused(what, reply)
        if isinstance(reply, m.Ack):
            self.state = DeviceState(reply.state)
        return reply

    # ------------------------------------------------------------------ identify and discover
    def connect(self) -> DeviceInfo:
        """Identify the board, check the protocol version and discover its settings table.

        Hello is asked with its own patience (4 tries of 0.5 s: a board may still be booting);
        then every setting is described and read (see ``discover_settings``).

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
                                      timeout_s=0.5, retries=3)
        except LinkError as exc:
            raise SessionError(f"nothing answered on {self.link.port_name}: {exc}") from None
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
        self.discover_settings(reply.setting_count)
        return self.info

    def discover_settings(self, count: int) -> None:
        """Describe the entries 0 .. count-1 of the board's table, then read each value into
        ``values``. ``settings`` is replaced only when every description arrived. Raises
        DeviceRefused or LinkError (one request per entry, twice)."""
        settings: dict[str, Setting] = {}
        for index in range(count):
            info = self._ask(m.SettingDescribe(index=index), f"describe setting #{index}")
            s = Setting(info.index, info.setting_id, info.name, info.type, info.unit,
                        info.minimum, info.maximum, info.default, info.flags)
            settings[s.name] = s
        self.settings = settings
        self.values = {name: self.read(name) for name in settings}

    # ------------------------------------------------------------------ settings
    def setting(self, name: str) -> Setting:
        """The description of ``name``; SessionError if the board has no such setting."""
        try:
            return self.settings[name]
        except KeyError:
            raise SessionError(f"the board has no setting named {name!r}") from None

    def read(self, name: str) -> float:
        """Read one setting from the board (and into ``values``).

        Raises
        ------
        SessionError
            No such setting.
        DeviceRefused, LinkError
            The board refused, or the link failed.
        """
        s = self.setting(name)
        reply = self._ask(m.SettingRead(setting_id=s.setting_id), f"read {name}")
        self.values[name] = reply.value
        return reply.value

    def write(self, name: str, value: float) -> float:
        """Write one setting after checking it against the board's bounds.

        Returns
        -------
        float
            The value the board stored (its SettingValue reply: float32, perhaps rounded), also
            kept in ``values``.

        Raises
        ------
        SessionError
            No such setting, or the value is NaN or out of bounds: nothing was sent.
        DeviceRefused
            The board refused (read-only, busy, wrong state, ...): nothing was changed.
        LinkError, LinkTimeout
            The link failed; a write whose reply was lost may or may not have happened, so read
            it back before recording it.
        """
        s = self.setting(name)
        s.check(value)
        reply = self._ask(m.SettingWrite(setting_id=s.setting_id, value=float(value)),
                          f"write {name} = {value:g}")
        self.values[name] = reply.value
        return reply.value

    def write_many(self, values: dict[str, float]) -> dict[str, float]:
        """Check every name and value first and write only if all are good; then write them in
        order (see ``write``). A refusal or link error part-way raises with the earlier values
        written: ``values`` says which. Returns the stored values by name."""
        for name, value in values.items():
            self.setting(name).check(value)
        return {name: self.write(name, value) for name, value in values.items()}

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
