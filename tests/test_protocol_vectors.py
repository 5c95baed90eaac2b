"""The codec against the frozen on-wire vectors in protocol/vectors/*.json.

The vectors were generated once by protocol/vectors/generate.py, which builds frames without the
codec (own field layout, bit-by-bit CRC, textbook COBS); these tests only read them.
"""

from __future__ import annotations

import json
from pathlib import Path

import pytest

from protocol import codec, messages
from protocol.codec import StreamDecoder, encode
from protocol.messages import (MESSAGES, EventKind, KillReason, RefuseCode, UnknownMessage,
                               by_name, field_specs)

VECTOR_DIR = Path(messages.__file__).resolve().parent / "vectors"
FILES = sorted(VECTOR_DIR.glob("*.json"))
VECTORS = [(p.name, v) for p in FILES for v in json.loads(p.read_text(encoding="utf-8"))]
GOOD = [(f, v) for f, v in VECTORS if v["message"] is not None]
REJECTS = [(f, v) for f, v in VECTORS if v["message"] is None]


def _ids(pairs):
    return [f"{f}:{v['name']}" for f, v in pairs]


def build_message(m: dict):
    """Message object from a vector's ``message`` (the decoded view)."""
    if m["type"] is None:
        return UnknownMessage(m["type_id"], bytes.fromhex(m["payload_hex"]))
    spec = by_name(m["type"])
    kwargs = {}
    for f in field_specs(spec.cls):
        value = m["fields"][f.name]
        if f.wire == "list":
            value = tuple(f.item(**item) for item in value)
        kwargs[f.name] = value
    return spec.cls(**kwargs)


def test_vector_files_present_and_well_formed():
    assert {p.name for p in FILES} >= {"messages.json", "refuse.json", "kill.json", "edge.json",
                                       "rejects.json"}
    names = [v["name"] for _, v in VECTORS]
    assert len(names) == len(set(names)), "vector names must be unique"
    for _, v in VECTORS:
        assert {"name", "frame_hex", "message"} <= set(v)
        frame = bytes.fromhex(v["frame_hex"])
        assert frame.endswith(b"\x00") and 0 not in frame[:-1]
        assert len(frame) <= codec.MAX_ENCODED + 1 or v.get("reject") == "oversize"


@pytest.mark.parametrize("fname,v", GOOD, ids=_ids(GOOD))
def test_vector_decodes_to_its_message(fname, v):
    m = v["message"]
    dec = StreamDecoder()
    frames = dec.feed(bytes.fromhex(v["frame_hex"]))
    assert len(frames) == 1
    fr = frames[0]
    assert fr.error is None
    assert (fr.seq, fr.flags, fr.version, fr.type_id) == (m["seq"], m["flags"], m["version"],
                                                          m["type_id"])
    assert fr.msg == build_message(m)
    if m["type"] is None:
        assert dec.stats.unknown_type == 1
    else:
        assert dec.stats.good == 1


@pytest.mark.parametrize("fname,v", GOOD, ids=_ids(GOOD))
def test_message_encodes_to_its_frame(fname, v):
    m = v["message"]
    frame = encode(build_message(m), m["seq"], m["flags"], version=m["version"])
    if "trailing_hex" in v:
        # the decoder ignored the appended bytes; re-encoding gives the frame without them, which
        # must decode to the same message
        assert frame != bytes.fromhex(v["frame_hex"])
        assert StreamDecoder().feed(frame)[0].msg == build_message(m)
    else:
        assert frame.hex() == v["frame_hex"]


@pytest.mark.parametrize("fname,v", REJECTS, ids=_ids(REJECTS))
def test_reject_vectors_are_counted_and_dropped(fname, v):
    dec = StreamDecoder()
    frames = dec.feed(bytes.fromhex(v["frame_hex"]))
    counter = v["reject"]
    assert getattr(dec.stats, counter) == 1
    assert dec.stats.good == 0
    if counter == "malformed":
        assert len(frames) == 1 and frames[0].msg is None and frames[0].error
    else:
        assert frames == []
    # the decoder is intact afterwards: a good frame right after is received
    ok = encode(messages.Keepalive(host_time_ms=1), seq=9)
    assert [f.msg for f in dec.feed(ok)] == [messages.Keepalive(host_time_ms=1)]


def test_coverage_of_the_vectors():
    types = {v["message"]["type"] for _, v in GOOD}
    assert {s.name for s in MESSAGES.values()} <= types, "every message type has a vector"
    refuse_codes = {v["message"]["fields"]["code"] for _, v in GOOD
                    if v["message"]["type"] == "refuse"}
    assert {int(c) for c in RefuseCode} <= refuse_codes
    kill_reasons = {v["message"]["fields"]["reason"] for _, v in GOOD
                    if v["message"]["type"] == "event"
                    and v["message"]["fields"]["kind"] == EventKind.KILL_TRIPPED}
    assert {int(r) for r in KillReason} <= kill_reasons
    flags = {v["message"]["flags"] for _, v in GOOD}
    assert messages.FLAG_RETRY in flags and messages.FLAG_REPLY in flags
    assert any(v["message"]["type"] is None and v["message"]["version"] >> 4 == 1
               for _, v in GOOD), "an unknown type id"
    assert any("trailing_hex" in v and v["message"]["version"] & 0x0F != 0 for _, v in GOOD)
    assert any(v["message"]["version"] >> 4 != messages.PROTOCOL_MAJOR for _, v in GOOD)
    raws = [codec.cobs.decode(bytes.fromhex(v["frame_hex"])[:-1]) for _, v in GOOD]
    assert any(len(r) == codec.MAX_RAW for r in raws), "a maximum-size frame"
    assert max(len(r) - 9 for _, v in GOOD for r in [codec.cobs.decode(
        bytes.fromhex(v["frame_hex"])[:-1])] if v["message"]["type"]) >= 220
    assert sum(r[5:-4].count(0) for r in raws) > 100, "payloads with zero bytes"


def test_vectors_match_the_table():
    """The frozen vectors still describe the table as it is now (no file is written here)."""
    from protocol.vectors.generate import build
    fresh = build()
    for fname, vectors in fresh.items():
        on_disk = json.loads((VECTOR_DIR / fname).read_text(encoding="utf-8"))
        assert on_disk == json.loads(json.dumps(vectors)), (
            f"{fname} differs from the message table: if the table changed on purpose, run "
            "`python -m protocol.vectors.generate` and review the diff")


def test_generator_is_independent_of_the_codec():
    """The vectors are a cross-check only if their generator builds frames by other means."""
    import ast
    tree = ast.parse((VECTOR_DIR / "generate.py").read_text(encoding="utf-8"))
    imported = set()
    for node in ast.walk(tree):
        if isinstance(node, ast.Import):
            imported |= {a.name for a in node.names}
        elif isinstance(node, ast.ImportFrom):
            imported.add(node.module or "")
            imported |= {f"{node.module}.{a.name}" for a in node.names}
    assert not any("codec" in name or name.endswith(".cobs") for name in imported), imported
    assert "protocol.crc.crc32_reference" in imported
