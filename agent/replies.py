"""Which reply answers which request, and what to tell people when none did.

The link (agent/link.py) asks these pure functions; they read the message table
(protocol/messages.py) and do no I/O. A reply answers a request only if its type is one the
table lists for it (``@message(..., replies=...)``), an Ack or Refuse names the request's type
id and the ids a reply echoes (setting id, table index) agree (protocol/SPEC.md 8). When a
request gives up, :class:`RequestReport` says what arrived meanwhile and what that means.
"""

from __future__ import annotations

import errno
from dataclasses import dataclass
from typing import Any

from protocol import messages as m
from protocol.messages import Event, Kill, KillReason


@dataclass(frozen=True)
class ForeignVersion:
    """A reply in a protocol major version this host does not speak."""

    major: int
    minor: int


# fields a reply echoes from its request: they must agree for the reply to answer it
_ECHOED = ("setting_id", "index")
DAMAGE_KINDS = (("bad_crc", "CRC errors"), ("bad_cobs", "broken framing (COBS)"),
                ("short", "too short"), ("oversize", "oversize"),
                ("malformed", "payloads that do not decode"))


def answers(request: Any, reply: Any) -> bool:
    """Whether a reply answers a request, by the message table.

    Parameters
    ----------
    request : a host message of protocol.messages
        The request waiting with the reply's seq.
    reply : a decoded message, ForeignVersion or UnknownMessage
        A frame that carried the request's seq and FLAG_REPLY.

    Returns
    -------
    bool
        True when the reply's type is among the request's ``replies`` and the ids it echoes
        (setting id, table index) agree; for an Ack, when it names the request's type id and
        the request is answered with Ack; for a Refuse, when it names the request's type id
        and the request is not a Kill (never refused, SPEC 11.1). A reply in another protocol
        major cannot be read further and is True (the session refuses that board).
    """
    if isinstance(reply, ForeignVersion):
        return True
    spec = m.spec_of(request)
    if isinstance(reply, m.Refuse):
        return reply.refused_type == spec.type_id and not isinstance(request, Kill)
    if isinstance(reply, m.Ack):
        return reply.acked_type == spec.type_id and "ack" in spec.replies
    if type(reply) not in m.BY_CLASS or m.spec_of(reply).name not in spec.replies:
        return False
    return all(getattr(reply, f) == getattr(request, f) for f in _ECHOED
               if hasattr(reply, f) and hasattr(request, f))


def kind_of(msg: Any) -> str:
    """A reply's kind for people.

    Parameters
    ----------
    msg : a decoded message or UnknownMessage

    Returns
    -------
    str
        "Ack of 0x12", "Refuse of 0x14", "SettingValue", "type 0x7f", ...
    """
    if isinstance(msg, m.Ack):
        return f"Ack of 0x{msg.acked_type:02x}"
    if isinstance(msg, m.Refuse):
        return f"Refuse of 0x{msg.refused_type:02x}"
    if isinstance(msg, m.UnknownMessage):
        return f"type 0x{msg.type_id:02x}"
    return type(msg).__name__


def describe_kill_event(ev: Event) -> str:
    """A board's KILL_TRIPPED event in words.

    Parameters
    ----------
    ev : Event
        The board's KILL_TRIPPED event.

    Returns
    -------
    str
        For the watchdog, what it means for the link; else the reason's name and the board's
        text ("angle_limit (angle beyond ...)").
    """
    if ev.reason == KillReason.WATCHDOG:
        return ("its watchdog: no frame from the host reached it within its watchdog_s, so the "
                "link stalled or lost everything for that long")
    try:
        name = KillReason(ev.reason).name.lower()
    except ValueError:
        name = f"reason {ev.reason}"
    return name + (f" ({ev.text})" if ev.text else "")


@dataclass(frozen=True)
class RequestReport:
    """What arrived while one request waited, up to the moment it gave up.

    ``damaged`` counts frames the decoder dropped by kind (("CRC errors", 14), ...);
    ``other_replies`` the kinds of the replies with its seq that did not answer it; ``frames``
    the intact frames of any kind; ``kill`` the board's KILL_TRIPPED event when one arrived
    meanwhile; ``board_killed`` whether the board's telemetry or events said KILLED meanwhile.
    """

    request: str
    tries: int
    elapsed_s: float
    bytes_in: int
    frames: int
    damaged: tuple[tuple[str, int], ...]
    other_replies: tuple[str, ...]
    kill: Event | None
    board_killed: bool

    @property
    def damaged_total(self) -> int:
        return sum(n for _, n in self.damaged)

    def describe(self, port: str) -> str:
        """One message for people: what went wrong, what was seen, what to do."""
        waited = (f"after {self.tries} {'try' if self.tries == 1 else 'tries'} over "
                  f"{self.elapsed_s:.1f} s")
        if self.kill is not None or self.board_killed:
            why = (describe_kill_event(self.kill) if self.kill is not None
                   else "the kill event itself was lost; its telemetry reports KILLED")
            return (f"the board on {port} killed while {self.request} waited for its answer "
                    f"({why}); the request got no answer {waited}. Check the cable and the "
                    "adapter, then clear the kill before going on")
        found = []
        if self.other_replies:
            kinds = ", ".join(sorted(set(self.other_replies)))
            found.append(f"{len(self.other_replies)} replies with its sequence number were of "
                         f"another kind ({kinds}) and were ignored: another program may share "
                         "the port, or the board does not follow protocol v1")
        if self.damaged_total:
            kinds = ", ".join(f"{n} {k}" for k, n in self.damaged if n)
            found.append(f"{self.damaged_total} damaged frames arrived meanwhile ({kinds}): "
                         "the link is corrupting data — check the cable, its screening and "
                         "the baud rate")
        if not found and self.frames:
            found.append(f"{self.frames} intact frames arrived meanwhile, none of them its "
                         "answer: the board runs, but its replies are lost or it ignores "
                         f"{self.request}")
        if not found and self.bytes_in:
            found.append(f"{self.bytes_in} bytes arrived but not one frame: check the baud "
                         "rate")
        if not found:
            found.append("nothing arrived at all: is the board powered, connected to this "
                         "port and running tetherloop protocol v1 at this baud rate?")
        return f"no reply to {self.request} from {port} {waited}: " + "; ".join(found)


def loss_reason(op: str, exc: BaseException) -> str:
    """One line for a failed read or write of the port.

    Parameters
    ----------
    op : str
        "read" or "write".
    exc : BaseException
        What the port raised (pyserial often prefixes its text with "read failed: " already).

    Returns
    -------
    str
        "<op> failed: <what it means> [<the system's words, once>]", or "<op> failed: <the
        system's words>" for a failure without a known meaning.
    """
    text = str(exc).strip()
    for prefix in ("read failed: ", "write failed: "):
        while text.startswith(prefix):
            text = text[len(prefix):]
    low = text.lower()
    code = getattr(exc, "errno", None)
    if "socket disconnected" in low or "connection reset" in low or "broken pipe" in low \
            or code in (errno.ECONNRESET, errno.EPIPE):
        why = "the other end closed the connection (the board, simulator or proxy stopped)"
    elif "readiness to read but returned no data" in low:
        why = ("the device is gone: the adapter was unplugged, the board reset its USB port, "
               "or the program serving this pseudo-terminal ended")
    elif "input/output error" in low or code == errno.EIO:
        why = "input/output error: the adapter was unplugged or lost power"
    else:
        return f"{op} failed: {text or type(exc).__name__}"
    return f"{op} failed: {why} [{text}]"
