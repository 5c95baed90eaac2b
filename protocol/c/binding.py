"""ctypes binding of the C board side, for tests, benchmarks and the host's own tools.

The ctypes structures are built from the message table by the same naming rules as the C emitter
(protocol/emit_c.py), so they follow the generated structs; ``load()`` compares the sizes and
offsets it relies on with the compiled library (``tl_host_layout``) and refuses a library that
disagrees. Messages cross the boundary as the Python codec's own objects: ``CLib.encode`` takes a
message dataclass, ``CDecoder.feed`` returns ``protocol.codec.Frame`` tuples and its ``stats`` is
a ``protocol.codec.DecoderStats``, so the C and the Python implementations can be compared value
for value.
"""

from __future__ import annotations

import ctypes as C
from dataclasses import dataclass
from functools import lru_cache
from pathlib import Path

from protocol.codec import MAX_ENCODED, DecoderStats, Frame
from protocol.emit_c import member
from protocol.messages import (MAX_LIST_ITEMS, MAX_STR_BYTES, MESSAGES, UnknownMessage,
                               field_specs)

from . import build as _build

_SCALAR = {"u8": C.c_uint8, "i8": C.c_int8, "u16": C.c_uint16, "u32": C.c_uint32,
           "u64": C.c_uint64, "f32": C.c_float}

TL_OK, TL_ERR_MALFORMED, TL_ERR_UNKNOWN_TYPE = 0, -1, -2
STATUS_NAMES = {0: "ok", -1: "malformed", -2: "unknown type", -3: "no room", -4: "text",
                -5: "list", -6: "too long"}
FRAME_GOOD, FRAME_UNKNOWN_TYPE, FRAME_OTHER_MAJOR, FRAME_MALFORMED = 0, 1, 2, 3


class CStr(C.Structure):
    """ctypes mirror of tl_str: a length and the UTF-8 bytes."""
    _fields_ = [("len", C.c_uint8), ("data", C.c_uint8 * (MAX_STR_BYTES + 1))]


@lru_cache(maxsize=None)
def _list_type(item: type) -> type:
    rec = type(f"C{item.__name__}", (C.Structure,),
               {"_fields_": [(member(g.name), _SCALAR[g.wire]) for g in field_specs(item)]})
    return type(f"C{item.__name__}List", (C.Structure,),
                {"_fields_": [("count", C.c_uint8), ("items", rec * MAX_LIST_ITEMS)]})


def _ctype(f):
    if f.wire == "str":
        return CStr
    if f.wire == "list":
        return _list_type(f.item)
    return _SCALAR[f.wire]


def _struct_for(spec) -> type:
    fields = [(member(f.name), _ctype(f)) for f in spec.fields] or [("no_fields_", C.c_uint8)]
    return type(f"C{spec.cls.__name__}", (C.Structure,), {"_fields_": fields})


STRUCTS = {tid: _struct_for(spec) for tid, spec in sorted(MESSAGES.items())}


class CBody(C.Union):
    """ctypes mirror of the union of every message struct."""
    _fields_ = [(MESSAGES[tid].name, st) for tid, st in STRUCTS.items()]


class CMessage(C.Structure):
    """ctypes mirror of tl_message: a type id and the body union."""
    _fields_ = [("type_id", C.c_uint8), ("body", CBody)]


class CStats(C.Structure):
    """ctypes mirror of the C decoder's counters."""
    _fields_ = [(n, C.c_uint32) for n in ("good", "bad_crc", "bad_cobs", "too_short", "oversize",
                                          "malformed", "unknown_type", "bytes_in")]


class CFrame(C.Structure):
    """ctypes mirror of tl_frame, the frame the C decoder hands up."""
    _fields_ = [("kind", C.c_uint8), ("version", C.c_uint8), ("type_id", C.c_uint8),
                ("flags", C.c_uint8), ("seq", C.c_uint16), ("payload_len", C.c_uint8),
                ("payload", C.POINTER(C.c_uint8)), ("msg", CMessage)]


class CDecoderState(C.Structure):
    """ctypes mirror of tl_decoder: buffer, length, discarding flag, counters."""
    _fields_ = [("buf", C.c_uint8 * MAX_ENCODED), ("len", C.c_uint16),
                ("discarding", C.c_uint8), ("stats", CStats)]


class CRing(C.Structure):
    """Layout of tl_ring for the library's TL_RING_SIZE (checked at load)."""

    _fields_ = [("head", C.c_uint16), ("tail", C.c_uint16), ("dropped", C.c_uint32),
                ("data", C.c_uint8 * 256)]


# ---------------------------------------------------------------------------- conversions


def _put_str(dst: CStr, text: str) -> None:
    raw = text.encode("utf-8")
    if len(raw) > MAX_STR_BYTES:
        raise ValueError(f"text of {len(raw)} bytes: at most {MAX_STR_BYTES} fit a C tl_str")
    dst.len = len(raw)
    C.memmove(dst.data, raw, len(raw))


def to_c(msg) -> CMessage:
    """A ``CMessage`` holding the message dataclass ``msg``."""
    spec = type(msg)
    tid = next(t for t, s in MESSAGES.items() if s.cls is spec)
    out = CMessage(type_id=tid)
    body = getattr(out.body, MESSAGES[tid].name)
    for f in field_specs(spec):
        value = getattr(msg, f.name)
        if f.wire == "str":
            _put_str(getattr(body, member(f.name)), value)
        elif f.wire == "list":
            lst = getattr(body, member(f.name))
            if len(value) > MAX_LIST_ITEMS:
                raise ValueError(f"{len(value)} items: at most {MAX_LIST_ITEMS} fit a C list")
            lst.count = len(value)
            for k, item in enumerate(value):
                for g in field_specs(f.item):
                    setattr(lst.items[k], member(g.name), getattr(item, g.name))
        else:
            setattr(body, member(f.name), value)
    return out


def from_c(cmsg: CMessage):
    """The message dataclass a ``CMessage`` holds."""
    spec = MESSAGES[cmsg.type_id]
    body = getattr(cmsg.body, spec.name)
    kwargs = {}
    for f in spec.fields:
        value = getattr(body, member(f.name))
        if f.wire == "str":
            value = bytes(value.data[:value.len]).decode("utf-8")
        elif f.wire == "list":
            names = [member(g.name) for g in field_specs(f.item)]
            value = tuple(f.item._make([getattr(value.items[k], n) for n in names])
                          for k in range(value.count))
        kwargs[f.name] = value
    return spec.cls(**kwargs)


# ---------------------------------------------------------------------------- library


class CError(ValueError):
    """A C function returned a negative tl_status."""

    def __init__(self, what: str, status: int):
        super().__init__(f"{what}: {STATUS_NAMES.get(status, status)} ({status})")
        self.status = status


@dataclass
class CLib:
    """The loaded shared library and typed wrappers of its functions."""

    dll: C.CDLL
    path: Path

    def crc32(self, data: bytes) -> int:
        """tl_crc32 of the bytes."""
        return self.dll.tl_crc32(data, len(data))

    def cobs_encode(self, data: bytes) -> bytes:
        """tl_cobs_encode: the COBS encoding of the bytes (no delimiter)."""
        out = (C.c_uint8 * (len(data) + 2 + len(data) // 254))()
        n = self.dll.tl_cobs_encode(data, len(data), out, len(out))
        if n == 0:
            raise CError("tl_cobs_encode", -3)
        return bytes(out[:n])

    def cobs_decode(self, data: bytes) -> bytes | None:
        """Decoded bytes, or None when tl_cobs_decode rejects the input."""
        out = (C.c_uint8 * max(1, len(data)))()
        n = self.dll.tl_cobs_decode(data, len(data), out)
        return None if n < 0 else bytes(out[:n])

    def utf8_valid(self, data: bytes) -> bool:
        """tl_utf8_valid: whether the bytes are valid UTF-8."""
        return bool(self.dll.tl_utf8_valid(data, len(data)))

    def encode(self, msg, seq: int, flags: int = 0) -> bytes:
        """tl_encode_message: the whole on-wire frame of a message dataclass."""
        out = (C.c_uint8 * (MAX_ENCODED + 1))()
        n = self.dll.tl_encode_message(C.byref(to_c(msg)), seq, flags, out, len(out))
        if n < 0:
            raise CError("tl_encode_message", n)
        return bytes(out[:n])

    def encode_payload(self, msg) -> bytes:
        """The payload bytes of a message dataclass as the C encoder writes them."""
        out = (C.c_uint8 * 256)()
        n = self.dll.tl_encode_payload(C.byref(to_c(msg)), out, len(out))
        if n < 0:
            raise CError("tl_encode_payload", n)
        return bytes(out[:n])

    def frame_encode(self, version: int, type_id: int, seq: int, flags: int,
                     payload: bytes) -> bytes:
        """tl_frame_encode: a whole frame around a given payload."""
        out = (C.c_uint8 * (MAX_ENCODED + 1))()
        n = self.dll.tl_frame_encode(version, type_id, seq, flags, payload, len(payload), out,
                                     len(out))
        if n < 0:
            raise CError("tl_frame_encode", n)
        return bytes(out[:n])

    def decode_payload(self, type_id: int, payload: bytes):
        """The message, or raises CError (malformed, unknown type)."""
        cmsg = CMessage()
        rc = self.dll.tl_decode_payload(type_id, payload, len(payload), C.byref(cmsg))
        if rc != TL_OK:
            raise CError("tl_decode_payload", rc)
        return from_c(cmsg)

    def decoder(self) -> CDecoder:
        """A new C stream decoder."""
        return CDecoder(self)

    def ring(self) -> CRingHandle:
        """A new C receive ring."""
        return CRingHandle(self)


class CDecoder:
    """A tl_decoder driven through ``tl_decoder_feed``; frames come back as codec.Frame."""

    def __init__(self, lib: CLib):
        self.lib = lib
        self.state = CDecoderState()
        self._frame = CFrame()
        lib.dll.tl_decoder_init(C.byref(self.state))

    @property
    def buffered(self) -> int:
        """Bytes the C decoder holds waiting for a delimiter."""
        return self.state.len

    @property
    def stats(self) -> DecoderStats:
        """The C decoder's counters as the Python codec's DecoderStats."""
        s = self.state.stats
        return DecoderStats(good=s.good, bad_crc=s.bad_crc, bad_cobs=s.bad_cobs, short=s.too_short,
                            oversize=s.oversize, malformed=s.malformed,
                            unknown_type=s.unknown_type, bytes_in=s.bytes_in)

    def feed(self, chunk: bytes) -> list[Frame]:
        """Feed bytes to tl_decoder_feed; the frames completed, as codec.Frame."""
        frames = []
        buf = (C.c_uint8 * len(chunk)).from_buffer_copy(chunk) if chunk else None
        pos, used = 0, C.c_size_t()
        while pos < len(chunk):
            ptr = C.cast(C.byref(buf, pos), C.POINTER(C.c_uint8))
            got = self.lib.dll.tl_decoder_feed(C.byref(self.state), ptr, len(chunk) - pos,
                                               C.byref(used), C.byref(self._frame))
            pos += used.value
            if got:
                frames.append(self.frame(self._frame))
        return frames

    @staticmethod
    def frame(f: CFrame) -> Frame:
        """The handed-up tl_frame as the Python codec's Frame (same msg/error conventions)."""
        payload = bytes(f.payload[:f.payload_len])
        if f.kind in (FRAME_UNKNOWN_TYPE, FRAME_OTHER_MAJOR):
            return Frame(f.seq, f.flags, f.version, f.type_id,
                         UnknownMessage(f.type_id, payload), None)
        if f.kind == FRAME_MALFORMED:
            return Frame(f.seq, f.flags, f.version, f.type_id, None,
                         f"malformed {MESSAGES[f.type_id].name}")
        return Frame(f.seq, f.flags, f.version, f.type_id, from_c(f.msg), None)


class CRingHandle:
    """A tl_ring with both of its sides driven from Python (one thread)."""

    def __init__(self, lib: CLib):
        self.lib = lib
        self.state = CRing()
        lib.dll.tl_ring_init(C.byref(self.state))

    def push(self, data: bytes) -> int:
        """Push bytes as the interrupt would; returns how many were stored."""
        return sum(self.lib.dll.tl_ring_push(C.byref(self.state), b) for b in data)

    def pop_all(self) -> bytes:
        """Pop every byte the ring holds, as the tick would."""
        out, b = bytearray(), C.c_uint8()
        while self.lib.dll.tl_ring_pop(C.byref(self.state), C.byref(b)):
            out.append(b.value)
        return bytes(out)

    @property
    def count(self) -> int:
        """Bytes waiting in the ring."""
        return self.lib.dll.tl_ring_count(C.byref(self.state))

    @property
    def dropped(self) -> int:
        """Bytes dropped because the ring was full."""
        return self.state.dropped

    def poll(self, decoder: CDecoder) -> list[Frame]:
        """tl_rx_poll until the ring is empty."""
        frames, f = [], CFrame()
        while self.lib.dll.tl_rx_poll(C.byref(self.state), C.byref(decoder.state), C.byref(f)):
            frames.append(CDecoder.frame(f))
        return frames


_SIGNATURES = {
    "tl_crc32": (C.c_uint32, [C.c_char_p, C.c_size_t]),
    "tl_cobs_encode": (C.c_size_t, [C.c_char_p, C.c_size_t, C.c_void_p, C.c_size_t]),
    "tl_cobs_decode": (C.c_long, [C.c_char_p, C.c_size_t, C.c_void_p]),
    "tl_utf8_valid": (C.c_int, [C.c_char_p, C.c_size_t]),
    "tl_encode_message": (C.c_int, [C.c_void_p, C.c_uint16, C.c_uint8, C.c_void_p, C.c_size_t]),
    "tl_encode_payload": (C.c_int, [C.c_void_p, C.c_void_p, C.c_size_t]),
    "tl_decode_payload": (C.c_int, [C.c_uint8, C.c_char_p, C.c_size_t, C.c_void_p]),
    "tl_frame_encode": (C.c_int, [C.c_uint8, C.c_uint8, C.c_uint16, C.c_uint8, C.c_char_p,
                                  C.c_size_t, C.c_void_p, C.c_size_t]),
    "tl_decoder_init": (None, [C.c_void_p]),
    "tl_decoder_feed": (C.c_int, [C.c_void_p, C.POINTER(C.c_uint8), C.c_size_t, C.c_void_p,
                                  C.c_void_p]),
    "tl_ring_init": (None, [C.c_void_p]),
    "tl_ring_push": (C.c_int, [C.c_void_p, C.c_uint8]),
    "tl_ring_pop": (C.c_int, [C.c_void_p, C.c_void_p]),
    "tl_ring_count": (C.c_size_t, [C.c_void_p]),
    "tl_rx_poll": (C.c_int, [C.c_void_p, C.c_void_p, C.c_void_p]),
    "tl_host_layout": (C.c_size_t, [C.c_int]),
}

_LAYOUT = {0: C.sizeof(CMessage), 1: CMessage.body.offset, 2: C.sizeof(CFrame),
           3: CFrame.msg.offset, 4: C.sizeof(CDecoderState), 5: CDecoderState.stats.offset,
           6: C.sizeof(CRing), 7: CRing.data.offset, 8: 256}


def load(path: str | Path | None = None) -> CLib:
    """Load the shared library (building it first when ``path`` is None).

    Parameters
    ----------
    path : path, optional
        A library built by ``protocol.c.build.build("shared", [harness/host_shim.c])``.

    Returns
    -------
    CLib

    Raises
    ------
    CBuildError
        No compiler, or the build failed.
    ImportError
        The library's struct layouts differ from this binding's (a stale or foreign build).
    """
    if path is None:
        path = _build.build("shared", [_build.HARNESS_DIR / "host_shim.c"])
    dll = C.CDLL(str(path))
    for name, (res, args) in _SIGNATURES.items():
        fn = getattr(dll, name)
        fn.restype, fn.argtypes = res, args
    for what, expected in _LAYOUT.items():
        got = dll.tl_host_layout(what)
        if got != expected:
            raise ImportError(f"{path}: C layout item {what} is {got} bytes, the ctypes binding "
                              f"expects {expected}; rebuild protocol/c (its generated files may "
                              "be stale: python -m protocol.emit_c protocol/c/generated)")
    return CLib(dll, Path(path))
