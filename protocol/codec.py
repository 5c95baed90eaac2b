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
MAX_ENCODED = MAX_RAW + 1 + MAX_RAW // 254  # 250, COBS worst case, without the delimiter
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
        """Protocol major version of the frame (high nibble of its version byte)."""
        return self.version >> 4

    @property
    def minor(self) -> int:
        """Protocol minor version of the frame (low nibble of its version byte)."""
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
        self.unpack = self._compile_unpack()
        self.pack = self._compile_pack()

    def _flush(self, run):
        st = struct.Struct("<" + "".join(_STRUCT[s.wire] for s in run))
        self.steps.append(("fixed", st, tuple(s.name for s in run)))

    def _compile_pack(self):
        """Build ``pack(msg)`` as straight-line code for this layout; same results and the same
        EncodeError messages as ``pack_reference``."""
        name = self.cls.__name__
        env: dict[str, Any] = {"EncodeError": EncodeError, "struct_error": struct.error,
                               "_byte": tuple(bytes([i]) for i in range(256))}
        lines = ["def pack(msg):", "    out = b''"]
        for k, step in enumerate(self.steps):
            kind = step[0]
            if kind == "fixed":
                env[f"S{k}"] = step[1]
                args = ", ".join(f"msg.{n}" for n in step[2])
                lines += ["    try:",
                          f"        out += S{k}.pack({args})",
                          "    except struct_error as exc:",
                          f"        raise EncodeError(f'{name}: {{exc}}') from None"]
            elif kind == "str":
                n = step[1]
                lines += [f"    raw = msg.{n}.encode('utf-8')",
                          f"    if len(raw) > {MAX_STR_BYTES}:",
                          f"        raise EncodeError('{name}.{n}: text longer than "
                          f"{MAX_STR_BYTES} bytes')",
                          "    out += _byte[len(raw)] + raw"]
            else:
                n, st, item = step[1], step[2], step[3]
                env[f"S{k}"], env[f"I{k}"] = st, item
                env[f"N{k}"] = tuple(s.name for s in field_specs(item))
                lines += [f"    items = msg.{n}",
                          f"    if len(items) > {MAX_LIST_ITEMS}:",
                          f"        raise EncodeError('{name}.{n}: more than "
                          f"{MAX_LIST_ITEMS} items')",
                          "    parts = [_byte[len(items)]]",
                          "    try:",
                          "        for it in items:",
                          f"            if type(it) is I{k}:",
                          f"                parts.append(S{k}.pack(*it))",
                          "            else:",
                          f"                parts.append(S{k}.pack(*[getattr(it, a) for a in N{k}]))",
                          "    except struct_error as exc:",
                          f"        raise EncodeError(f'{name}.{n}: {{exc}}') from None",
                          "    out += b''.join(parts)"]
        lines.append("    return out")
        exec(compile("\n".join(lines), f"<pack {name}>", "exec"), env)
        return env["pack"]

    def pack_reference(self, msg) -> bytes:
        """Encode a payload by interpreting the layout step by step (``pack`` is compiled)."""
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

    def _compile_unpack(self):
        """Build ``unpack(payload)`` as straight-line code for this layout (no per-step dispatch).

        Same behaviour as ``unpack_reference``; generated once per message class at import.
        """
        env: dict[str, Any] = {"_new": object.__new__, "_cls": self.cls,
                               "_tuple_new": tuple.__new__}
        lines = ["def unpack(payload):", "    pos = 0"]
        names: list[str] = []
        for k, step in enumerate(self.steps):
            kind = step[0]
            if kind == "fixed":
                env[f"S{k}"] = step[1]
                targets = "".join(f"v_{n}, " for n in step[2])
                lines.append(f"    {targets}= S{k}.unpack_from(payload, pos)")
                lines.append(f"    pos += {step[1].size}")
                names.extend(step[2])
            elif kind == "str":
                n = step[1]
                lines += [
                    "    count = payload[pos]",
                    "    raw = payload[pos + 1:pos + 1 + count]",
                    f"    if len(raw) != count or count > {MAX_STR_BYTES}:",
                    "        raise ValueError('text field runs past the end of the payload')",
                    f"    v_{n} = raw.decode('utf-8')",
                    "    pos += 1 + count",
                ]
                names.append(n)
            else:
                n, st, item = step[1], step[2], step[3]
                env[f"S{k}"] = st
                env[f"I{k}"] = item
                lines += [
                    "    count = payload[pos]",
                    "    pos += 1",
                    f"    end = pos + count * {st.size}",
                    f"    if count > {MAX_LIST_ITEMS} or end > len(payload):",
                    "        raise ValueError('list field runs past the end of the payload')",
                    f"    v_{n} = tuple([_tuple_new(I{k}, t) "
                    f"for t in S{k}.iter_unpack(payload[pos:end])])",
                    "    pos = end",
                ]
                names.append(n)
        lines.append("    obj = _new(_cls)  # frozen dataclass: fill __dict__ in one call")
        lines.append("    obj.__dict__.update({" + ", ".join(f"'{n}': v_{n}" for n in names) + "})")
        lines.append("    return obj")
        exec(compile("\n".join(lines), f"<unpack {self.cls.__name__}>", "exec"), env)
        return env["unpack"]

    def unpack_reference(self, payload: bytes):
        """Decode a payload; trailing bytes are ignored (a newer minor version may append fields).
        Raises ValueError/struct.error if the payload is short or malformed. Step-by-step
        interpreter of the layout; ``unpack`` (compiled) must behave exactly like it."""
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
    """Encode a message's fields in wire order.

    Parameters
    ----------
    msg
        A message dataclass instance.

    Returns
    -------
    bytes
        Its payload (no header, CRC or framing).
    """
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
    try:
        body = HEADER.pack(version, type_id, seq, flags) + payload
    except struct.error:
        raise EncodeError(f"header out of range: version {version!r}, type {type_id!r}, "
                          f"flags {flags!r} must each be 0..255") from None
    return cobs.encode(body + CRC.pack(crc32(body))) + b"\x00"


# CRC-32/ISO-HDLC run over data followed by its own CRC (little-endian) always gives this
# constant: the catalogue's residue 0xDEBB20E3 (Williams 1993 parameter model) XOR xorout
# 0xFFFFFFFF. For fixed data the CRC is a bijection of the four appended bytes, so
# "crc32(body) == _GOOD_RESIDUE" holds exactly when the appended CRC equals crc32(header +
# payload); checking it this way saves a slice and an unpack.
_GOOD_RESIDUE = 0x2144DF1C
_MIN_RAW = HEADER.size + CRC.size
_UNPACK_BY_TYPE = {tid: _LAYOUTS[spec.cls].unpack for tid, spec in MESSAGES.items()}
_NAME_BY_TYPE = {tid: spec.name for tid, spec in MESSAGES.items()}
_DECODE_ERRORS = (ValueError, IndexError, struct.error, UnicodeDecodeError)
_new_frame = tuple.__new__


def decode_frame(raw_encoded: bytes) -> Frame:
    """Decode one frame given without its delimiter. Raises ValueError with the reason on a bad
    frame (COBS, length, CRC); returns a Frame with ``error`` set for a bad payload."""
    if len(raw_encoded) > MAX_ENCODED:
        raise ValueError("oversize")
    body = cobs.decode(raw_encoded)
    if len(body) < _MIN_RAW:
        raise ValueError("short")
    if crc32(body) != _GOOD_RESIDUE:
        raise ValueError("crc")
    version, type_id, seq, flags = HEADER.unpack_from(body, 0)
    payload = body[5:-4]
    unpack = _UNPACK_BY_TYPE.get(type_id)
    if unpack is None or (version >> 4) != PROTOCOL_MAJOR:
        return _new_frame(Frame, (seq, flags, version, type_id, UnknownMessage(type_id, payload),
                                  None))
    try:
        msg = unpack(payload)
    except _DECODE_ERRORS as exc:
        return _new_frame(Frame, (seq, flags, version, type_id, None,
                                  f"malformed {_NAME_BY_TYPE[type_id]}: {exc}"))
    return _new_frame(Frame, (seq, flags, version, type_id, msg, None))


# ------------------------------------------------------------------ streaming decoder


@dataclass
class DecoderStats:
    """Counts of what a StreamDecoder met: good frames, each kind of bad one, bytes fed."""
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
        """Frames dropped as damaged (CRC, COBS, short, oversize, malformed)."""
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

    @property
    def buffered(self) -> int:
        """Bytes held back waiting for a delimiter (never more than MAX_ENCODED)."""
        return len(self._buf)

    def feed(self, chunk: bytes) -> list[Frame]:
        """Feed received bytes and return the frames they complete.

        Parameters
        ----------
        chunk : bytes
            Bytes as they arrived; frames may span chunks.

        Returns
        -------
        list of Frame
            The frames completed by this chunk, damaged ones dropped and counted in ``stats``.
        """
        frames: list[Frame] = []
        if not chunk:
            return frames
        stats = self.stats
        stats.bytes_in += len(chunk)
        start = 0
        n = len(chunk)
        buf = self._buf
        while start < n:
            z = chunk.find(b"\x00", start)
            if z < 0:
                if not self._discarding:
                    buf += chunk[start:]
                    if len(buf) > MAX_ENCODED:
                        buf.clear()
                        self._discarding = True
                        stats.oversize += 1
                break
            if self._discarding:
                self._discarding = False
                start = z + 1
                continue
            if buf:
                buf += chunk[start:z]
                piece = bytes(buf)
                buf.clear()
            else:
                piece = chunk[start:z]
            start = z + 1
            if not piece:
                continue  # empty piece between two delimiters: ignored
            try:
                frame = decode_frame(piece)
            except cobs.CobsError:
                stats.bad_cobs += 1
                continue
            except ValueError as exc:
                self._count_bad(str(exc))
                continue
            if frame[5] is not None:  # error: payload did not decode
                stats.malformed += 1
            elif type(frame[4]) is UnknownMessage:
                stats.unknown_type += 1
            else:
                stats.good += 1
            frames.append(frame)
        return frames

    def _count_bad(self, reason: str) -> None:
        if reason == "crc":
            self.stats.bad_crc += 1
        elif reason == "oversize":
            self.stats.oversize += 1
        else:
            self.stats.short += 1
