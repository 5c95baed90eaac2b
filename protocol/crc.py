"""CRC-32/ISO-HDLC, as named in the CRC catalogue (parameter model of Williams 1993).

width=32 poly=0x04C11DB7 init=0xFFFFFFFF refin=true refout=true xorout=0xFFFFFFFF
check=0xCBF43926 residue=0xDEBB20E3. ``zlib.crc32`` computes exactly this CRC; ``crc32_reference``
is a bit-by-bit implementation of the parameter model, kept as a readable reference for porting.
"""

from __future__ import annotations

import zlib

WIDTH = 32
POLY = 0x04C11DB7
INIT = 0xFFFFFFFF
REFIN = True
REFOUT = True
XOROUT = 0xFFFFFFFF
CHECK = 0xCBF43926
NAME = "CRC-32/ISO-HDLC"


def crc32(data: bytes) -> int:
    """CRC-32/ISO-HDLC of ``data`` (fast, via zlib)."""
    return zlib.crc32(data) & 0xFFFFFFFF


def crc32_reference(data: bytes) -> int:
    """Bit-by-bit CRC-32/ISO-HDLC (reflected form of POLY), for porting and cross-checks."""
    reflected_poly = 0xEDB88320
    crc = INIT
    for byte in data:
        crc ^= byte
        for _ in range(8):
            crc = (crc >> 1) ^ reflected_poly if crc & 1 else crc >> 1
    return crc ^ XOROUT
