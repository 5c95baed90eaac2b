"""Frame codec for protocol v1: message objects <-> on-wire bytes. Pure and sans-I/O.

On-wire frame::

    COBS( header(5) | payload(0..MAX_PAYLOAD) | crc32_le(4) ) | 0x00

header = version u8 (major << 4 | minor), type u8, seq u16 LE, flags u8. The CRC
(CRC-32/ISO-HDLC) covers header and payload. ``StreamDecoder`` is fed arbitrary chunks and returns
complete frames; it never raises on bad input and never buffers more than MAX_ENCODED bytes.
"""

from __future__ import annotations

import struct
from dataclasses import dataclass, field
from typing import Any, NamedTuple

from . import cobs
from .crc import crc32
from .messages import (BY_CLASS, MAX_LIST_ITEMS, MAX_STR_BYTES, MESSAGES, PROTOCOL_MAJOR,
                       PROTOCOL_MINOR, _STRUCT, UnknownMessage, field_specs, item_struct)

HEADER = struct.Struct("<BBHB")
CRC = struct.Struct("<I")
MAX_PAYLOAD = 240
MAX_RAW = HEADER.size + MAX_PAYLOAD + CRC.size  # 249
MAX_ENCODED = MAX_RAW + 1 + MAX_RAW // 254  # 251, COBS worst case, without the delimiter
VERSION_BYTE = (PROTOCOL_MAJOR << 4) | PROTOCOL_MINOR


class EncodeError(ValueError):
    """A message cannot be encoded (value out of its wire range, payload too long)."""


class Frame(NamedTuple):
    """One decoded frame. ``msg`` is None when ``error`` says why the payload was not understood
    (the header was intact, so a device can still refuse it by ``seq``)."""

    seq: int
    flags: int
    version: int
    type_id: int
    msg: Any
    error: str | None = None

    @property
    def major(self) -> int:
        return self.version >> 4

    @property
    def minor(self) -> int:
        return self.version & 0x0F


# ------------------------------------------------------------------ compiled layouts

class _Layout:
    """Encode/decode plan for one message class: runs of fixed fields become one struct."""

    def __init__(self, cls: type):
        self.cls = cls
        self.steps: list[tuple] = []  # ("fixed", Struct, names) | ("str", name) | ("list", name, Struct, item)
        run: list = []
        for spec in field_specs(cls):
            if spec.wire in _STRUCT:
                run.append(spec)
                continue
            if run:
                self._flush(run)
                run = []
            if spec.wire == "str":
                self.steps.append(("str", spec.name))
            elif spec.wire == "list":
                self.steps.append(("list", spec.name, item_struct(spec.item), spec.item))
            else:  # pragma: no cover - table error
                raise TypeError(f"unknown wire type {spec.wire}")
        if run:
            self._flush(run)

    def _flush(self, run):
        st = struct.Struct("<" + "".join(_STRUCT[s.wire] for s in run))
        self.steps.append(("fixed", st, tuple(s.name for s in run)))

    def pack(self, msg) -> bytes:
        out = bytearray()
        for step in self.steps:
            kind = step[0]
            if kind == "fixed":
                try:
                    out += step[1].pack(*[getattr(msg, n) for n in step[2]])
                except struct.error as exc:
                    raise EncodeError(f"{type(msg).__name__}: {exc}") from None
            elif kind == "str":
                raw = getattr(msg, step[1]).encode("utf-8")
                if len(raw) > MAX_STR_BYTES:
                    raise EncodeError(f"{type(msg).__name__}.{step[1]}: text longer than "
                                      f"{MAX_STR_BYTES} bytes")
                out.append(len(raw))
                out += raw
            else:
                items = getattr(msg, step[1])
                if len(items) > MAX_LIST_ITEMS:
                    raise EncodeError(f"{type(msg).__name__}.{step[1]}: more than "
                                      f"{MAX_LIST_ITEMS} items")
                out.append(len(items))
                names = [s.name for s in field_specs(step[3])]
                for it in items:
                    try:
                        out += step[2].pack(*[getattr(it, n) for n in names])
                    except struct.error as exc:
                        raise EncodeError(f"{type(msg).__name__}.{step[1]}: {exc}") from None
        return bytes(out)

    def unpack(self, payload: bytes):
        """Decode a payload; trailing bytes are ignored (a newer minor version may append fields).
        Raises ValueError/struct.error if the payload is short or malformed."""
        values: dict[str, Any] = {}
        pos = 0
        for step in self.steps:
            kind = step[0]
            if kind == "fixed":
                vals = step[1].unpack_from(payload, pos)
                pos += step[1].size
                for n, v in zip(step[2], vals):
                    values[n] = v
            elif kind == "str":
                n = payload[pos]
                raw = payload[pos + 1:pos + 1 + n]
                if len(raw) != n or n > MAX_STR_BYTES:
                    raise ValueError("text field runs past the end of the payload")
                values[step[1]] = raw.decode("utf-8")
                pos += 1 + n
            else:
                count = payload[pos]
                pos += 1
                st, item = step[2], step[3]
                end = pos + count * st.size
                if count > MAX_LIST_ITEMS or end > len(payload):
                    raise ValueError("list field runs past the end of the payload")
                values[step[1]] = tuple(map(item._make, st.iter_unpack(payload[pos:end])))
                pos = end
        obj = object.__new__(self.cls)  # frozen dataclass: fill __dict__ in one call (fast path)
        obj.__dict__.update(values)
        return obj


_LAYOUTS: dict[type, _Layout] = {spec.cls: _Layout(spec.cls) for spec in MESSAGES.values()}


# ------------------------------------------------------------------ encode


def encode_payload(msg) -> bytes:
    return _LAYOUTS[type(msg)].pack(msg)


def encode(msg, seq: int, flags: int = 0, version: int = VERSION_BYTE) -> bytes:
    """Complete on-wire frame for ``msg``: COBS-encoded header+payload+CRC, then the 0x00
    delimiter. ``UnknownMessage`` objects are encoded with their raw payload (for tests)."""
    if isinstance(msg, UnknownMessage):
        type_id, payload = msg.type_id, bytes(msg.payload)
    else:
        spec = BY_CLASS.get(type(msg))
        if spec is None:
            raise EncodeError(f"{type(msg).__name__} is not a protocol message")
        type_id, payload = spec.type_id, encode_payload(msg)
    if len(payload) > MAX_PAYLOAD:
        raise EncodeError(f"payload of {len(payload)} bytes exceeds the maximum {MAX_PAYLOAD}")
    if not 0 <= seq <= 0xFFFF:
        raise EncodeError(f"sequence number {seq} outside 0..65535")
    body = HEADER.pack(version, type_id, seq, flags) + payload
    return cobs.encode(body + CRC.pack(crc32(body))) + b"\x00"


def decode_frame(raw_encoded: bytes) -> Frame:
    """Decode one frame given without its delimiter. Raises ValueError with the reason on a bad
    frame (COBS, length, CRC); returns a Frame with ``error`` set for a bad payload."""
    if len(raw_encoded) > MAX_ENCODED:
        raise ValueError("oversize")
    body = cobs.decode(raw_encoded)
    if len(body) < HEADER.size + CRC.size:
        raise ValueError("short")
    (crc,) = CRC.unpack_from(body, len(body) - 4)
    if crc32(body[:-4]) != crc:
        raise ValueError("crc")
    version, type_id, seq, flags = HEADER.unpack_from(body, 0)
    payload = body[HEADER.size:-4]
    spec = MESSAGES.get(type_id)
    if spec is None or (version >> 4) != PROTOCOL_MAJOR:
        return Frame(seq, flags, version, type_id, UnknownMessage(type_id, payload))
    try:
        msg = _LAYOUTS[spec.cls].unpack(payload)
    except (ValueError, IndexError, struct.error, UnicodeDecodeError) as exc:
        return Frame(seq, flags, version, type_id, None, f"malformed {spec.name}: {exc}")
    return Frame(seq, flags, version, type_id, msg)


# ------------------------------------------------------------------ streaming decoder


@dataclass
class DecoderStats:
    good: int = 0
    bad_crc: int = 0
    bad_cobs: int = 0
    short: int = 0
    oversize: int = 0
    malformed: int = 0
    unknown_type: int = 0
    bytes_in: int = 0

    @property
    def bad(self) -> int:
        return self.bad_crc + self.bad_cobs + self.short + self.oversize + self.malformed


@dataclass
class StreamDecoder:
    """Feed bytes in any chunking; get complete frames. Never raises on input bytes.

    Garbage is dropped up to the next zero byte (resynchronisation); a run of more than
    MAX_ENCODED bytes without a zero is discarded as it arrives, so memory stays bounded.
    """

    stats: DecoderStats = field(default_factory=DecoderStats)
    _buf: bytearray = field(default_factory=bytearray)
    _discarding: bool = False

    def feed(self, chunk: bytes) -> list[Frame]:
        frames: list[Frame] = []
        if not chunk:
            return frames
        self.stats.bytes_in += len(chunk)
        start = 0
        n = len(chunk)
        while start < n:
            z = chunk.find(b"\x00", start)
            if z < 0:
                if not self._discarding:
                    self._buf += chunk[start:]
                    if len(self._buf) > MAX_ENCODED:
                        self._buf.clear()
                        self._discarding = True
                        self.stats.oversize += 1
                break
            if self._discarding:
                self._discarding = False
                start = z + 1
                continue
            if self._buf:
                self._buf += chunk[start:z]
                piece = bytes(self._buf)
                self._buf.clear()
            else:
                piece = chunk[start:z]
            start = z + 1
            if piece:
                frame = self._one(piece)
                if frame is not None:
                    frames.append(frame)
        return frames

    def _one(self, piece: bytes) -> Frame | None:
        try:
            frame = decode_frame(piece)
        except cobs.CobsError:
            self.stats.bad_cobs += 1
            return None
        except ValueError as exc:
            reason = str(exc)
            if reason == "crc":
                self.stats.bad_crc += 1
            elif reason == "oversize":
                self.stats.oversize += 1
            else:
                self.stats.short += 1
            return None
        if frame.error is not None:
            self.stats.malformed += 1
        elif isinstance(frame.msg, UnknownMessage):
            self.stats.unknown_type += 1
        else:
            self.stats.good += 1
        return frame
