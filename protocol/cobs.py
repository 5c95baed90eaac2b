"""Consistent Overhead Byte Stuffing (Cheshire & Baker 1999), zero byte as delimiter. Pure."""

from __future__ import annotations


class CobsError(ValueError):
    """The bytes are not a valid COBS encoding."""


def encode(data: bytes) -> bytes:
    """COBS-encode ``data``; the result holds no zero byte (the delimiter is not appended)."""
    out = bytearray()
    parts = bytes(data).split(b"\x00")
    last = len(parts) - 1
    for i, part in enumerate(parts):
        while len(part) >= 254:
            out.append(0xFF)
            out += part[:254]
            part = part[254:]
            if not part and i == last:
                return bytes(out)
        out.append(len(part) + 1)
        out += part
    return bytes(out)


def decode(data: bytes) -> bytes:
    """Decode one COBS block sequence (without its delimiter). Raises CobsError if malformed.

    Fast path: with no 0xFF code the decoded bytes are the encoded ones with every code byte after
    the first turned into a zero, so only the chain of code bytes is walked.
    """
    n = len(data)
    if 0 in data:
        raise CobsError("zero byte inside a COBS frame")
    out = bytearray(data)
    i = 0
    while i < n:
        code = data[i]
        if code == 0xFF:
            return _decode_general(data)
        j = i + code
        if j > n:
            raise CobsError("COBS block runs past the end of the frame")
        if j < n:
            out[j] = 0
        i = j
    del out[:1]
    return bytes(out)


def _decode_general(data: bytes) -> bytes:
    out = bytearray()
    i = 0
    n = len(data)
    while i < n:
        code = data[i]
        if code == 0:
            raise CobsError("zero byte inside a COBS frame")
        end = i + code
        if end > n:
            raise CobsError("COBS block runs past the end of the frame")
        block = data[i + 1:end]
        if 0 in block:
            raise CobsError("zero byte inside a COBS frame")
        out += block
        i = end
        if code != 0xFF and i < n:
            out.append(0)
    return bytes(out)
