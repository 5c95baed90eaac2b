"""The message table of tetherloop protocol v1.

protocol/SPEC.md is normative: a board conforms to it. This table is where the program keeps the
layouts: every message is a frozen dataclass whose fields carry their wire type in metadata. The
codec, the description printed by ``tetherloop protocol --describe``, SPEC.md's byte tables and
the mock device's server all read this module, so that none of them defines a layout of its own.

Wire types (all little-endian):

=======  =====  ==============================================================
type     bytes  meaning
=======  =====  ==============================================================
u8       1      unsigned integer
i8       1      signed integer (two's complement)
u16      2      unsigned integer
u32      4      unsigned integer
u64      8      unsigned integer
f32      4      IEEE-754 binary32
str      1+n    u8 byte count n (0..64) then n bytes of UTF-8, no terminator
list     1+k*m  u8 item count k (0..16) then k items of a fixed item layout (m bytes)
=======  =====  ==============================================================

Device state machine (a summary; SPEC.md sections 9-13 are the rule):

- States: DISARMED (outputs zero), ARMED (loops closed, outputs live), RUNNING (armed and running
  one experiment), KILLED (outputs zero, latched). Boot state: DISARMED.
- Each host message lists the states it is legal in (``legal_in``). Outside them the device sends
  Refuse: WRONG_STATE in general; KILL_LATCHED when the state is KILLED; BUSY when an experiment
  runs (SettingWrite, ExperimentStart while RUNNING). Device-to-host types received by a device:
  Refuse NOT_A_REQUEST. Unknown type ids: Refuse UNKNOWN_TYPE. A payload that does not decode:
  Refuse MALFORMED. A frame whose protocol major differs: Refuse VERSION (sent in the device's own
  version), except a Kill, which is executed in every major. The device never crashes or changes
  state on a refused message.
- Arming interlock: ArmRequest (DISARMED) -> ArmChallenge(token, valid_ms). ArmConfirm with
  response == token ^ 0xFFFFFFFF, operator_confirmed == 1, within valid_ms, with a host frame
  (any type) within watchdog_s before it -> Ack, state ARMED. Otherwise Refuse INTERLOCK (token wrong/expired/absent or operator flag 0) or
  NO_KEEPALIVE. A token is good for one ArmConfirm only.
- Watchdog: any valid frame from the host refreshes it. While ARMED or RUNNING, if no host frame
  arrives for ``watchdog_s`` (a setting), the device kills with reason WATCHDOG (events
  WATCHDOG_EXPIRED then KILL_TRIPPED). In DISARMED and KILLED the watchdog does nothing.
- Kill: Kill is accepted in every state (Ack). Device-side trips (thresholds, saturation time,
  watchdog, kill button, sensor fault) do the same. On a kill the outputs go to zero in the same
  tick, any experiment ends (EXPERIMENT_FINISHED reason KILLED), the state becomes KILLED and a
  KILL_TRIPPED event carries reason, axis, offending value and threshold. Only KillClear leaves
  KILLED (to DISARMED, event KILL_CLEARED); KillClear in another state is acknowledged and changes
  nothing. A second kill while KILLED is acknowledged and logged as another event.
- Experiments: ExperimentStart (ARMED) -> RUNNING; it ends by ExperimentStop, by its duration limit,
  by Disarm or by a kill, each with EXPERIMENT_FINISHED(reason) and the device back in ARMED (or
  DISARMED/KILLED). Every state change also sends STATE_CHANGED.
- Replies: a reply frame carries the request's seq and FLAG_REPLY. The device keeps the last 16
  (seq, type, reply) entries of requests it executed (never a refusal, never a Kill's Ack); a
  request that arrives with FLAG_RETRY and a seq and type in that cache is answered with the
  cached reply and NOT executed again. Telemetry and Event frames use the device's own
  sequence counter (incremented per frame) without FLAG_REPLY.
- Versioning: the header's version byte is major << 4 | minor. Same major, different minor: both
  sides work; a newer minor may append fields at the end of a payload, and a decoder ignores
  trailing bytes it does not know. Different major: refused with VERSION.
"""

from __future__ import annotations

import enum
import struct
from dataclasses import dataclass, field, fields
from typing import Any, NamedTuple

PROTOCOL_MAJOR = 1
PROTOCOL_MINOR = 0

# ---------------------------------------------------------------------------- enums


class Axis(enum.IntEnum):
    """The stand's axes: three rotations and the vertical (heave)."""
    ROLL = 0
    PITCH = 1
    YAW = 2
    HEAVE = 3


class Loop(enum.IntEnum):
    """Loop level. RATE is the inner loop of every axis (angular rate; climb rate on heave)."""

    RATE = 0
    ANGLE = 1  # outer attitude loop of roll, pitch, yaw
    HEAVE = 2  # outer height loop of the heave axis


class DeviceState(enum.IntEnum):
    """State of the device; the transitions are in the module docstring and SPEC.md."""
    DISARMED = 0
    ARMED = 1
    RUNNING = 2  # armed and running an experiment
    KILLED = 3  # outputs forced to zero; latched until KillClear


class ExperimentKind(enum.IntEnum):
    """Experiment a device runs on one loop."""
    RELAY = 1
    STEP = 2
    HOLD = 3


class RefuseCode(enum.IntEnum):
    """Why a device refused a request (Refuse.code)."""
    UNKNOWN_TYPE = 1  # message type id not known to this device
    MALFORMED = 2  # payload too short or a field out of its wire range
    WRONG_STATE = 3  # not legal in the device's current state
    UNKNOWN_SETTING = 4  # no setting with this id or index
    OUT_OF_BOUNDS = 5  # setting value outside [min, max]
    INTERLOCK = 6  # arming interlock not satisfied (no challenge, wrong or expired response)
    KILL_LATCHED = 7  # a kill is latched; clear it first
    BUSY = 8  # an experiment is running
    BAD_PARAMETER = 9  # experiment parameter invalid (negative amplitude, NaN, ...)
    UNSUPPORTED = 10  # axis, loop level or experiment kind not supported by this device
    VERSION = 11  # frame's protocol major version differs from the device's
    NO_KEEPALIVE = 12  # arming refused: no fresh keepalive from the host
    READ_ONLY = 13  # setting cannot be written
    NOT_A_REQUEST = 14  # the message is one a device sends, not one it accepts
    STORAGE = 15  # the device could not write its non-volatile settings store


class KillReason(enum.IntEnum):
    """Who or what killed the outputs: the host (HOST_*) or the device."""
    HOST_OPERATOR = 1  # the operator asked (key, Ctrl-C, button in the UI)
    HOST_MONITOR = 2  # host safety monitor saw a limit crossed in telemetry
    HOST_LINK = 3  # host saw reply time-outs or a link problem
    HOST_ERROR = 4  # unexpected error in the host program
    ANGLE_LIMIT = 5  # device: angle beyond the experiment's kill threshold
    RATE_LIMIT = 6  # device: rate beyond the experiment's kill threshold
    HEAVE_LIMIT = 7  # device: height excursion beyond the kill threshold
    SATURATION_TIME = 8  # device: actuator saturated longer than allowed
    WATCHDOG = 9  # device: no frame from the host within watchdog_s
    KILL_BUTTON = 10  # device: the board's own kill input
    SENSOR_FAULT = 11  # device: a sensor stuck or out of range


class EventKind(enum.IntEnum):
    """What an Event reports."""
    STATE_CHANGED = 1
    EXPERIMENT_STARTED = 2
    EXPERIMENT_FINISHED = 3  # reason: FinishReason
    KILL_TRIPPED = 4  # reason: KillReason, value/threshold: the offending value and the limit
    KILL_CLEARED = 5
    WATCHDOG_EXPIRED = 6
    FAULT = 7  # text says what


class FinishReason(enum.IntEnum):
    """Why an experiment ended."""
    STOPPED = 1  # host sent ExperimentStop
    DURATION_LIMIT = 2  # the experiment's duration limit was reached
    KILLED = 3
    DISARMED = 4


class SettingType(enum.IntEnum):
    """How a setting's f32 value is to be read."""
    FLOAT = 0
    INT = 1  # integral value carried as f32
    BOOL = 2  # 0.0 or 1.0
    CHOICE = 3  # small non-negative integer naming an option, carried as f32


class SettingFlags(enum.IntFlag):
    """Restrictions on writing a setting (bit flags)."""
    NONE = 0
    READ_ONLY = 1
    DISARMED_ONLY = 2  # may only be written while disarmed


class Capability(enum.IntFlag):
    """What a device can do, announced in HelloReply (bit flags)."""
    RELAY = 0x01
    STEP = 0x02
    HOLD = 0x04
    PERSIST = 0x08  # settings can be saved on the device
    KILL_BUTTON = 0x10  # the board has its own kill input
    BACK_CALCULATION = 0x20  # back-calculation anti-windup available
    RELAY_ADJUST = 0x40  # amplitude/bias/hysteresis of a running relay can be changed


# Frame header flags
FLAG_REPLY = 0x01  # this frame answers the request whose sequence number it carries
FLAG_RETRY = 0x02  # host resends an earlier request unchanged (same seq): never execute twice

ANY_STATE = frozenset(DeviceState)

# ---------------------------------------------------------------------------- field helpers

_SIZES = {"u8": 1, "i8": 1, "u16": 2, "u32": 4, "u64": 8, "f32": 4}
_STRUCT = {"u8": "B", "i8": "b", "u16": "H", "u32": "I", "u64": "Q", "f32": "f"}
MAX_STR_BYTES = 64
MAX_LIST_ITEMS = 16


def wire(kind: str, doc: str, unit: str = "", enum_: type | None = None, item: type | None = None,
         default: Any = None) -> Any:
    """A dataclass field with its wire type in metadata."""
    md = {"wire": kind, "doc": doc, "unit": unit, "enum": enum_, "item": item}
    if kind == "list":
        return field(default_factory=tuple, metadata=md)
    if default is None:
        default = "" if kind == "str" else 0
    return field(default=default, metadata=md)


@dataclass(frozen=True)
class FieldSpec:
    """One wire field of a message or list item: name, wire type, meaning, unit, and the enum or item class it carries."""
    name: str
    wire: str
    doc: str
    unit: str
    enum: type | None
    item: type | None

    @property
    def size(self) -> int | None:
        """Bytes on the wire, or None for the variable-length types (text, lists)."""
        return _SIZES.get(self.wire)


def field_specs(cls: type) -> tuple[FieldSpec, ...]:
    """Wire fields of a message class or of a list-item class (items are NamedTuples with a WIRE
    attribute, so that decoding a list is one tuple construction per item)."""
    if hasattr(cls, "WIRE"):
        return cls.WIRE
    return tuple(
        FieldSpec(f.name, f.metadata["wire"], f.metadata["doc"], f.metadata["unit"],
                  f.metadata["enum"], f.metadata["item"])
        for f in fields(cls)
    )


def item_struct(item: type) -> struct.Struct:
    """Fixed layout of a list item (items hold only fixed-size fields)."""
    return struct.Struct("<" + "".join(_STRUCT[s.wire] for s in field_specs(item)))


# ---------------------------------------------------------------------------- list items


class AxisInfo(NamedTuple):
    axis: int = 0
    loops: int = 0


AxisInfo.WIRE = (
    FieldSpec("axis", "u8", "Axis", "", Axis, None),
    FieldSpec("loops", "u8", "bit mask of supported Loop levels: bit n set = Loop n supported", "",
              None, None),
)


class AxisSample(NamedTuple):
    axis: int = 0
    loop: int = 0
    setpoint: float = 0.0
    measurement: float = 0.0
    output: float = 0.0
    relay: int = 0


AxisSample.WIRE = (
    FieldSpec("axis", "u8", "Axis", "", Axis, None),
    FieldSpec("loop", "u8", "Loop level whose signals follow", "", Loop, None),
    FieldSpec("setpoint", "f32", "setpoint of that loop", "rad, rad/s, m or m/s", None, None),
    FieldSpec("measurement", "f32", "measurement of that loop", "rad, rad/s, m or m/s", None, None),
    FieldSpec("output", "f32", "that loop's controller (or relay) output", "", None, None),
    FieldSpec("relay", "i8", "relay state: +1 high, -1 low, 0 no relay on this axis", "", None,
              None),
)


# ---------------------------------------------------------------------------- messages


@dataclass(frozen=True)
class MessageSpec:
    """One row of the message table: type id, name, class, sender, meaning, the device states it is legal in and its replies."""
    type_id: int
    name: str
    cls: type
    sender: str  # "host" or "device"
    doc: str
    legal_in: frozenset  # device states in which the device accepts it (host messages)
    replies: tuple[str, ...]  # what the device answers with (host messages)

    @property
    def fields(self) -> tuple[FieldSpec, ...]:
        """The message's wire fields in order."""
        return field_specs(self.cls)


MESSAGES: dict[int, MessageSpec] = {}
BY_CLASS: dict[type, MessageSpec] = {}


def message(type_id: int, sender: str, legal_in=ANY_STATE, replies: tuple[str, ...] = ()):
    """Class decorator that enters a message class in the table.

    Parameters
    ----------
    type_id : int
        The message's type id (unique in the table).
    sender : {"host", "device"}
        Who sends it.
    legal_in : iterable of DeviceState
        States in which the device accepts it (host messages).
    replies : tuple of str
        Names of the messages the device answers with.

    Returns
    -------
    callable
        The decorator: makes the class a frozen dataclass and enters it in ``MESSAGES``.
    """
    def deco(cls):
        cls = dataclass(frozen=True)(cls)
        doc = " ".join((cls.__doc__ or "").split())
        spec = MessageSpec(type_id, _snake(cls.__name__), cls, sender, doc, frozenset(legal_in),
                           replies)
        assert type_id not in MESSAGES, f"duplicate type id 0x{type_id:02x}"
        MESSAGES[type_id] = spec
        BY_CLASS[cls] = spec
        return cls
    return deco


def _snake(name: str) -> str:
    return "".join("_" + c.lower() if c.isupper() else c for c in name).lstrip("_")


_D, _A, _R, _K = (DeviceState.DISARMED, DeviceState.ARMED, DeviceState.RUNNING,
                  DeviceState.KILLED)


@message(0x01, "host", replies=("hello_reply",))
class Hello:
    """Host asks the device who it is. First message of every session."""

    host_name: str = wire("str", "free text naming the host program and its version")


@message(0x02, "device")
class HelloReply:
    """Device identity and what it supports."""

    device_id: str = wire("str", "unique id of this board")
    firmware_version: str = wire("str", "firmware version text")
    protocol_major: int = wire("u8", "protocol major version the device speaks")
    protocol_minor: int = wire("u8", "protocol minor version the device speaks")
    loop_rate_hz: int = wire("u16", "control loop tick rate", "Hz")
    capabilities: int = wire("u32", "Capability bit mask", enum_=Capability)
    setting_count: int = wire("u16", "number of entries in the settings table")
    axes: tuple = wire("list", "axes present and their loop levels", item=AxisInfo)


@message(0x03, "host")
class Keepalive:
    """Host is alive. Any valid frame from the host refreshes the device watchdog; the host sends
    this one when it has nothing else to say. No reply."""

    host_time_ms: int = wire("u32", "host monotonic time, wraps", "ms")


@message(0x04, "device")
class Ack:
    """Request accepted and done. Carries the request's seq in the header with FLAG_REPLY."""

    acked_type: int = wire("u8", "type id of the request")
    state: int = wire("u8", "device state after the request", enum_=DeviceState)


@message(0x05, "device")
class Refuse:
    """Request refused; nothing was changed. Carries the request's seq with FLAG_REPLY."""

    refused_type: int = wire("u8", "type id of the refused request")
    code: int = wire("u8", "RefuseCode", enum_=RefuseCode)
    detail: int = wire("u32", "code-specific detail (setting id, state, ...) or 0")
    text: str = wire("str", "human-readable reason")


@message(0x10, "host", replies=("setting_info", "refuse"))
class SettingDescribe:
    """Ask for the description of the settings-table entry at position ``index``
    (0 .. setting_count-1)."""

    index: int = wire("u16", "position in the settings table")


@message(0x11, "device")
class SettingInfo:
    """One settings-table entry as the device describes it."""

    index: int = wire("u16", "position in the settings table")
    setting_id: int = wire("u16", "id used by read and write")
    name: str = wire("str", "dotted name, e.g. roll.rate.kp")
    type: int = wire("u8", "SettingType", enum_=SettingType)
    unit: str = wire("str", "SI unit text, may be empty")
    minimum: float = wire("f32", "lowest accepted value")
    maximum: float = wire("f32", "highest accepted value")
    default: float = wire("f32", "factory value")
    flags: int = wire("u8", "SettingFlags", enum_=SettingFlags)


@message(0x12, "host", replies=("setting_value", "refuse"))
class SettingRead:
    """Read one setting's current value."""

    setting_id: int = wire("u16", "setting id")


@message(0x13, "device")
class SettingValue:
    """A setting's current (after a write: stored) value."""

    setting_id: int = wire("u16", "setting id")
    value: float = wire("f32", "value")


@message(0x14, "host", legal_in=(_D, _A, _K), replies=("setting_value", "refuse"))
class SettingWrite:
    """Write one setting. Refused outside [minimum, maximum] (OUT_OF_BOUNDS), while an experiment
    runs (BUSY), or for read-only entries."""

    setting_id: int = wire("u16", "setting id")
    value: float = wire("f32", "new value")


@message(0x15, "host", legal_in=(_D,), replies=("ack", "refuse"))
class SettingsPersist:
    """Store the current settings table in the device's non-volatile memory."""


@message(0x20, "host", legal_in=(_D,), replies=("arm_challenge", "refuse"))
class ArmRequest:
    """First half of the arming interlock: the device answers with a fresh random token."""


@message(0x21, "device")
class ArmChallenge:
    """Arming token; valid for ``valid_ms`` and for one ArmConfirm only."""

    token: int = wire("u32", "random token")
    valid_ms: int = wire("u16", "how long the token stays valid", "ms")


@message(0x22, "host", legal_in=(_D,), replies=("ack", "refuse"))
class ArmConfirm:
    """Second half of the interlock: ``response`` must equal the bitwise complement of the token
    (token XOR 0xFFFFFFFF) and ``operator_confirmed`` must be 1 (the operator accepted the safety
    cautions). The device also requires a host frame within watchdog_s before it and no latched
    kill."""

    response: int = wire("u32", "token XOR 0xFFFFFFFF")
    operator_confirmed: int = wire("u8", "1 = operator confirmed the safety cautions")


@message(0x23, "host", replies=("ack",))
class Disarm:
    """Stop any experiment and disarm. Legal in every state; in KILLED the kill stays latched."""


@message(0x30, "host", legal_in=(_A,), replies=("ack", "refuse"))
class ExperimentStart:
    """Start an on-board experiment on one axis and loop level. Inner loops stay closed on their
    current gains. RELAY: the loop's output becomes bias +/- amplitude, switching when the error
    (setpoint - measurement) leaves the band +/- hysteresis. STEP: the loop holds ``setpoint`` until
    ``step_at_s``, then ``setpoint + amplitude``. HOLD: the loop holds ``setpoint``. A threshold of
    0 means "use the device's kill.* setting"; one above that setting is capped at it."""

    tag: int = wire("u16", "host-chosen experiment id, echoed in events")
    kind: int = wire("u8", "ExperimentKind", enum_=ExperimentKind)
    axis: int = wire("u8", "Axis", enum_=Axis)
    loop: int = wire("u8", "Loop level", enum_=Loop)
    amplitude: float = wire("f32", "relay amplitude d (loop output units) or step size")
    hysteresis: float = wire("f32", "relay hysteresis band (measurement units)")
    bias: float = wire("f32", "relay centre (loop output units)")
    setpoint: float = wire("f32", "loop setpoint (measurement units)")
    step_at_s: float = wire("f32", "STEP: time of the step after start", "s")
    duration_s: float = wire("f32", "experiment ends by itself after this", "s")
    kill_angle_rad: float = wire("f32", "kill if |angle| exceeds", "rad")
    kill_rate_rad_s: float = wire("f32", "kill if |rate| exceeds", "rad/s")
    kill_heave_m: float = wire("f32", "kill if |height - start height| exceeds", "m")
    kill_saturation_s: float = wire("f32", "kill if the actuator stays saturated longer", "s")


@message(0x31, "host", replies=("ack",))
class ExperimentStop:
    """End the running experiment if ``tag`` is its tag or 0 (the device returns to ARMED);
    another tag changes nothing. Acknowledged in any state."""

    tag: int = wire("u16", "experiment id")


@message(0x32, "host", legal_in=(_R,), replies=("ack", "refuse"))
class ExperimentAdjust:
    """Change a running relay's amplitude, hysteresis and bias (amplitude ramp, bias centring)."""

    tag: int = wire("u16", "experiment id")
    amplitude: float = wire("f32", "new relay amplitude")
    hysteresis: float = wire("f32", "new hysteresis band")
    bias: float = wire("f32", "new relay centre")


@message(0x40, "host", replies=("ack",))
class Kill:
    """Kill now: outputs to zero in the same tick, latched until KillClear. Accepted in every
    state and every major version, never refused."""

    reason: int = wire("u8", "KillReason", enum_=KillReason)
    value: float = wire("f32", "the offending value the host saw, or 0")


@message(0x41, "host", replies=("ack",))
class KillClear:
    """Clear a latched kill (KILLED -> DISARMED). Acknowledged in any state."""


@message(0x50, "host", replies=("ack", "refuse"))
class TelemetryConfig:
    """Choose telemetry: rate (0 = off, at most the board's telemetry limit), which axes, and
    which loop level's signals to report for axes that are not running an experiment (the
    experiment's axis reports the experiment's level)."""

    rate_hz: int = wire("u16", "samples per second of device time", "Hz")
    axis_mask: int = wire("u8", "bit n set = report Axis n")
    loop: int = wire("u8", "Loop level reported for idle axes", enum_=Loop)


@message(0x51, "device")
class Telemetry:
    """One telemetry sample."""

    time_us: int = wire("u64", "device time since boot", "us")
    counter: int = wire("u32", "sample counter, +1 per sample sent, wraps")
    state: int = wire("u8", "DeviceState", enum_=DeviceState)
    tag: int = wire("u16", "running experiment's tag, or 0")
    axes: tuple = wire("list", "one entry per reported axis", item=AxisSample)


@message(0x52, "device")
class Event:
    """Something happened on the device."""

    time_us: int = wire("u64", "device time", "us")
    kind: int = wire("u8", "EventKind", enum_=EventKind)
    state: int = wire("u8", "device state after the event", enum_=DeviceState)
    reason: int = wire("u8", "KillReason, FinishReason or ExperimentKind, per kind, else 0")
    axis: int = wire("u8", "Axis concerned, or 255")
    value: float = wire("f32", "offending value (kill), else 0")
    threshold: float = wire("f32", "limit crossed (kill), else 0")
    tag: int = wire("u16", "experiment tag concerned, or 0")
    text: str = wire("str", "human-readable detail")


@dataclass(frozen=True)
class UnknownMessage:
    """A frame of a type id this implementation does not know (not on the wire table)."""

    type_id: int
    payload: bytes


def spec_of(msg: Any) -> MessageSpec:
    """The table row of a message instance.

    Parameters
    ----------
    msg
        A message dataclass instance.

    Returns
    -------
    MessageSpec

    Raises
    ------
    KeyError
        When its class is not on the message table.
    """
    return BY_CLASS[type(msg)]


def by_name(name: str) -> MessageSpec:
    """The table row of a message name.

    Parameters
    ----------
    name : str
        Snake-case message name, e.g. ``"setting_write"``.

    Returns
    -------
    MessageSpec

    Raises
    ------
    KeyError
        When no message has that name.
    """
    for spec in MESSAGES.values():
        if spec.name == name:
            return spec
    raise KeyError(name)


def loop_names() -> dict[str, Loop]:
    """Loop levels by lower-case name (``{"rate": Loop.RATE, ...}``)."""
    return {lv.name.lower(): lv for lv in Loop}


def axis_names() -> dict[str, Axis]:
    """Axes by lower-case name (``{"roll": Axis.ROLL, ...}``)."""
    return {ax.name.lower(): ax for ax in Axis}
