"""CRC-32/ISO-HDLC and COBS against published values and independent implementations."""

from __future__ import annotations

import zlib

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from protocol import cobs
from protocol.crc import CHECK, crc32, crc32_reference


def test_crc_check_value():
    # CRC catalogue, CRC-32/ISO-HDLC: check = 0xCBF43926 over ASCII "123456789"
    # (parameter model: Williams, R. (1993). A painless guide to CRC error detection algorithms).
    assert crc32(b"123456789") == 0xCBF43926
    assert crc32_reference(b"123456789") == 0xCBF43926
    assert CHECK == 0xCBF43926


def test_crc_residue():
    # CRC catalogue, CRC-32/ISO-HDLC: residue = 0xDEBB20E3 (before xorout). A message followed by
    # its CRC (little-endian) therefore gives 0xDEBB20E3 ^ 0xFFFFFFFF = 0x2144DF1C.
    data = b"123456789"
    framed = data + crc32(data).to_bytes(4, "little")
    assert crc32(framed) ^ 0xFFFFFFFF == 0xDEBB20E3


def test_crc_empty():
    # CRC of no bytes is init ^ xorout = 0 (follows from the catalogue parameters).
    assert crc32(b"") == crc32_reference(b"") == 0


@settings(max_examples=150, deadline=None)
@given(st.binary(max_size=300))
def test_crc_reference_matches_zlib(data):
    # zlib.crc32 implements the same CRC (common practice, no source beyond the zlib manual).
    assert crc32_reference(data) == zlib.crc32(data) == crc32(data)


# Cheshire, S., Baker, M. (1999). Consistent Overhead Byte Stuffing. IEEE/ACM Trans. Networking
# 7(2), defines the algorithm. The example pairs below are the widely reproduced COBS example
# table (value from memory), each also checked by hand against the algorithm's definition.
COBS_EXAMPLES = [
    (b"\x00", b"\x01\x01"),
    (b"\x00\x00", b"\x01\x01\x01"),
    (b"\x00\x11\x00", b"\x01\x02\x11\x01"),
    (b"\x11\x22\x00\x33", b"\x03\x11\x22\x02\x33"),
    (b"\x11\x22\x33\x44", b"\x05\x11\x22\x33\x44"),
    (b"\x11\x00\x00\x00", b"\x02\x11\x01\x01\x01"),
    (bytes(range(1, 255)), b"\xff" + bytes(range(1, 255))),  # 254 non-zero bytes
    (bytes(range(0, 255)), b"\x01\xff" + bytes(range(1, 255))),
    (bytes(range(1, 256)), b"\xff" + bytes(range(1, 255)) + b"\x02\xff"),
    (bytes(range(2, 256)) + b"\x00", b"\xff" + bytes(range(2, 256)) + b"\x01\x01"),
    (bytes(range(3, 256)) + b"\x00\x01", b"\xfe" + bytes(range(3, 256)) + b"\x02\x01"),
]


@pytest.mark.parametrize("raw,encoded", COBS_EXAMPLES)
def test_cobs_examples(raw, encoded):
    assert cobs.encode(raw) == encoded
    assert cobs.decode(encoded) == raw


def test_cobs_empty():
    # Empty input: one code byte 0x01 (one empty block; the implied trailing zero is dropped).
    assert cobs.encode(b"") == b"\x01"
    assert cobs.decode(b"\x01") == b""


@settings(max_examples=120, deadline=None)
@given(st.binary(max_size=700))
def test_cobs_round_trip_and_no_zero(data):
    enc = cobs.encode(data)
    assert 0 not in enc
    # Cheshire & Baker 1999: overhead at most 1 byte per started 254 bytes (and at least 1).
    assert len(data) + 1 <= len(enc) <= len(data) + 1 + len(data) // 254
    assert cobs.decode(enc) == data


@pytest.mark.parametrize("bad", [
    b"\x05\x11\x22",  # block runs past the end
    b"\x02\x11\x00\x01",  # zero inside
    b"\x00",
    b"\x03\x11",
    b"\xff\x01",  # 0xFF block shorter than 254 bytes (general path)
])
def test_cobs_rejects_malformed(bad):
    with pytest.raises(cobs.CobsError):
        cobs.decode(bad)


@settings(max_examples=150, deadline=None)
@given(st.one_of(st.binary(max_size=300),
                 st.lists(st.integers(1, 12), max_size=40).map(bytes)))  # small codes: chains
def test_cobs_fast_path_equals_general_decoder(data):
    """The fast decoder must accept and reject exactly what the block-by-block one does."""
    try:
        expected = cobs._decode_general(data) if 0 not in data else None
    except cobs.CobsError:
        expected = None
    if expected is None:
        with pytest.raises(cobs.CobsError):
            cobs.decode(data)
    else:
        assert cobs.decode(data) == expected
