"""A session with one board: identify, version check, settings discovery, arming, experiments.

Settings are discovered, never assumed: the host asks the device to describe every entry of its
settings table (``SettingDescribe``) and finds gains by their documented dotted names
("roll.rate.kp"). Values are checked against the device's own bounds before anything is sent.
"""

from __future__ import annotations

import threading
from dataclasses import dataclass, field
from typing import Any, Callable

from protocol import messages as m
from protocol.messages import (Axis, DeviceState, Loop, PROTOCOL_MAJOR, PROTOCOL_MINOR,
                               RefuseCode)

from . import __version__
from .errors import DeviceError
from .link import ForeignVersion, Link, LinkError


class SessionError(DeviceError):
    """A problem with the board or the request; the text says what and what to do."""


class DeviceRefused(SessionError):
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
        if not (self.minimum <= value <= self.maximum) or value != value:
            raise SessionError(
                f"{self.name} = {value:g} is outside the board's bounds "
                f"[{self.minimum:g}, {self.maximum:g}]{(' ' + self.unit) if self.unit else ''}; "
                "nothing was written.")


@dataclass(frozen=True)
class DeviceInfo:
    device_id: str
    firmware_version: str
    protocol: str
    loop_rate_hz: int
    capabilities: int
    axes: dict[str, tuple[str, ...]]  # axis name -> loop level names

    def as_dict(self) -> dict:
        return {"device_id": self.device_id, "firmware_version": self.firmware_version,
                "protocol": self.protocol, "loop_rate_hz": self.loop_rate_hz,
                "capabilities": self.capabilities,
                "axes": {k: list(v) for k, v in self.axes.items()}}


def axis_name(axis: int) -> str:
    return Axis(axis).name.lower()


def loop_name(loop: int) -> str:
    return Loop(loop).name.lower()


class Session:
    """High-level commands to one board over a Link."""

    def __init__(self, link: Link):
        self.link = link
        self.info: DeviceInfo | None = None
        self.settings: dict[str, Setting] = {}
        self.values: dict[str, float] = {}
        self.state: DeviceState = DeviceState.DISARMED
        self.last_event: m.Event | None = None
        self.kill_info: m.Event | None = None
        self._tag = 0
        self._lock = threading.Lock()
        link.on_telemetry(self._on_telemetry)
        link.on_event(self._on_event)

    # ------------------------------------------------------------------ state tracking
    def _on_telemetry(self, t: float, tel: m.Telemetry) -> None:
        self.state = DeviceState(tel.state) if tel.state in DeviceState._value2member_map_ else self.state

    def _on_event(self, t: float, ev: m.Event) -> None:
        self.last_event = ev
        if ev.state in DeviceState._value2member_map_:
            self.state = DeviceState(ev.state)
        if ev.kind == m.EventKind.KILL_TRIPPED:
            self.kill_info = ev

    def _ask(self, msg, what: str):
        reply = self.link.request(msg)
        if isinstance(reply, m.Refuse):
            raise DeviceRefused(what, reply)
        if isinstance(reply, m.Ack):
            self.state = DeviceState(reply.state)
        return reply

    # ------------------------------------------------------------------ identify and discover
    def connect(self) -> DeviceInfo:
        """Identify the board, check the protocol version and discover its settings table."""
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
                continue
            axes[axis_name(item.axis)] = tuple(loop_name(lv) for lv in Loop
                                                if item.loops & (1 << int(lv)))
        self.info = DeviceInfo(reply.device_id, reply.firmware_version,
                               f"{reply.protocol_major}.{reply.protocol_minor}",
                               reply.loop_rate_hz, reply.capabilities, axes)
        self.discover_settings(reply.setting_count)
        return self.info

    def discover_settings(self, count: int) -> None:
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
        try:
            return self.settings[name]
        except KeyError:
            raise SessionError(f"the board has no setting named {name!r}") from None

    def read(self, name: str) -> float:
        s = self.setting(name)
        reply = self._ask(m.SettingRead(setting_id=s.setting_id), f"read {name}")
        self.values[name] = reply.value
        return reply.value

    def write(self, name: str, value: float) -> float:
        s = self.setting(name)
        s.check(value)
        reply = self._ask(m.SettingWrite(setting_id=s.setting_id, value=float(value)),
                          f"write {name} = {value:g}")
        self.values[name] = reply.value
        return reply.value

    def write_many(self, values: dict[str, float]) -> dict[str, float]:
        """Check every value against the bounds first; write only if all are good."""
        for name, value in values.items():
            self.setting(name).check(value)
        return {name: self.write(name, value) for name, value in values.items()}

    def persist(self) -> None:
        self._ask(m.SettingsPersist(), "persist settings")

    def gains(self, axis: str, loop: str) -> dict[str, float]:
        prefix = f"{axis}.{loop}."
        return {k[len(prefix):]: v for k, v in self.values.items() if k.startswith(prefix)}

    # ------------------------------------------------------------------ arming and kill
    def arm(self, operator_confirmed: bool) -> None:
        """Arm through the interlock. ``operator_confirmed`` must be True: the operator has
        accepted the safety cautions (see agent.safety)."""
        if not operator_confirmed:
            raise SessionError("arming needs the operator's confirmation of the safety cautions")
        challenge = self._ask(m.ArmRequest(), "arm request")
        self._ask(m.ArmConfirm(response=challenge.token ^ 0xFFFFFFFF, operator_confirmed=1),
                  "arm")

    def disarm(self) -> None:
        self._ask(m.Disarm(), "disarm")

    def kill(self, reason: int, value: float = 0.0) -> float:
        """Send Kill at once (does not wait). Returns the host time it was written."""
        return self.link.send_kill(reason, value)

    def clear_kill(self) -> None:
        self._ask(m.KillClear(), "clear kill")
        self.kill_info = None

    # ------------------------------------------------------------------ telemetry and experiments
    def telemetry(self, rate_hz: int, axes: list[int] | tuple[int, ...], loop: int) -> None:
        mask = 0
        for a in axes:
            mask |= 1 << int(a)
        self._ask(m.TelemetryConfig(rate_hz=int(rate_hz), axis_mask=mask, loop=int(loop)),
                  "telemetry configuration")

    def next_tag(self) -> int:
        with self._lock:
            self._tag = self._tag % 65535 + 1
            return self._tag

    def start_experiment(self, **params: Any) -> int:
        tag = params.pop("tag", None) or self.next_tag()
        self._ask(m.ExperimentStart(tag=tag, **params), "experiment start")
        return tag

    def adjust(self, tag: int, amplitude: float, hysteresis: float, bias: float) -> None:
        self._ask(m.ExperimentAdjust(tag=tag, amplitude=float(amplitude),
                                     hysteresis=float(hysteresis), bias=float(bias)),
                  "relay adjustment")

    def stop_experiment(self, tag: int) -> None:
        self._ask(m.ExperimentStop(tag=tag), "experiment stop")

    def close(self) -> None:
        self.link.close()
