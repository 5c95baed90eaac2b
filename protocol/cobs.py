"""Consistent Overhead Byte Stuffing (Cheshire & Baker 1999), zero byte as delimiter. Pure."""

from __future__ import annotations


class CobsError(ValueError):
    """The bytes are not a valid COBS encoding."""


_CODE = tuple(bytes([n + 1]) for n in range(254))  # code byte of a run of n non-zero bytes


def encode(data: bytes) -> bytes:
    """COBS-encode ``data``; the result holds no zero byte (the delimiter is not appended)."""
    parts = bytes(data).split(b"\x00")
    if len(data) < 254:  # no run can reach 254 bytes: every block is code + run (fast path)
        return b"".join([_CODE[len(part)] + part for part in parts])
    out = bytearray()
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
    the first turned into a zero, so only the chain of code bytes is walked. Data shorter than 254
    bytes (every protocol frame) never has a 0xFF code; anything else takes the general path.
    """
    n = len(data)
    if 0 in data:
        raise CobsError("zero byte inside a COBS frame")
    out = bytearray(data)
    out.append(0)  # slot n: where a well-formed chain of code bytes ends exactly
    i = 0
    try:
        while i < n:
            code = data[i]
            if code == 0xFF:
                return _decode_general(data)
            i += code
            out[i] = 0  # IndexError when the chain runs past slot n
    except IndexError:
        raise CobsError("COBS block runs past the end of the frame") from None
    return bytes(out[1:n])


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
