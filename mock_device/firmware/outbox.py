"""The board's output to the host: encoded frames in a bounded buffer the runner drains.

Nothing here waits for the link: :meth:`Outbox.take` hands the bytes produced since the last call
to the runner, which writes what the link takes without blocking. A host that does not read
cannot stall the tick; past ``OUTPUT_BUFFER_LIMIT`` the oldest bytes are dropped and counted.

Frames that are not replies (Telemetry, Event) carry the device's own sequence counter. While a
request is handled (:meth:`begin_request` ... :meth:`end_request`), the frames it causes wait so
that its reply goes first (protocol/SPEC.md 11.2: the reply precedes its events).
"""

from __future__ import annotations

from protocol import codec
from protocol import messages as M

OUTPUT_BUFFER_LIMIT = 1 << 20  # bytes kept for a host that does not read (older bytes dropped)
_F32_MAX = 3.4028234663852886e38


def f32(v: float) -> float:
    """Clamp to the f32 range (NaN passes) so encoding never fails on a wild value."""
    if v > _F32_MAX:
        return _F32_MAX
    if v < -_F32_MAX:
        return -_F32_MAX
    return v


class Outbox:
    """Encodes and buffers the board's frames; ``stats`` is the board's counter dict."""

    def __init__(self, stats: dict[str, int]):
        self._out = bytearray()
        self._seq = 0
        self._deferred: list[bytes] | None = None
        self._stats = stats
        self.last_reply = b""  # the reply sent to the request being handled
        self.last_reply_refused = False  # ... and whether it was a Refuse (never cached)
        self.ack_trailing_byte = False  # test-only quirk "ack-trailing-byte"

    def send(self, msg, seq: int | None = None, reply: bool = False) -> None:
        """Encode and queue ``msg``: a reply with the request's ``seq``, or a device frame with
        the next device seq (held back while a request is handled)."""
        if seq is None:
            seq = self._seq
            self._seq = (self._seq + 1) & 0xFFFF
        if self.ack_trailing_byte and type(msg) is M.Ack:
            msg = M.UnknownMessage(M.BY_CLASS[M.Ack].type_id, codec.encode_payload(msg) + b"\x00")
        data = codec.encode(msg, seq, M.FLAG_REPLY if reply else 0)
        if reply:
            self.last_reply = data
            self.last_reply_refused = isinstance(msg, M.Refuse)
            self.queue(data)
        elif self._deferred is not None:
            self._deferred.append(data)  # events a request causes follow its reply
        else:
            self.queue(data)

    def queue(self, data: bytes) -> None:
        """Queue encoded bytes as they are (a cached reply sent again)."""
        self._out += data
        over = len(self._out) - OUTPUT_BUFFER_LIMIT
        if over > 0:
            del self._out[:over]
            self._stats["output_dropped"] += over

    def begin_request(self) -> None:
        self.last_reply = b""
        self.last_reply_refused = False
        self._deferred = []

    def end_request(self) -> list[bytes]:
        """Stop holding device frames back; returns those held (queue them after the reply
        has been cached)."""
        deferred, self._deferred = self._deferred, None
        return deferred or []

    def take(self) -> bytes:
        """Bytes for the host produced since the last call."""
        if not self._out:
            return b""
        out = bytes(self._out)
        self._out.clear()
        return out
