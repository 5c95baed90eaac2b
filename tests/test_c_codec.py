"""The C board side's framing and codec (protocol/c/), driven from Python through ctypes.

The library is built from source with the system C compiler (protocol/c/build.py; every build
uses -std=c99 -Wall -Wextra -Werror -pedantic and more). It is checked against the shared vectors
of protocol/vectors/, against the Python codec on messages generated from the message table, and
by a fuzz of its receive path built with AddressSanitizer and UndefinedBehaviorSanitizer.
"""

from __future__ import annotations

import json
import re
import shutil
import subprocess
import zlib
from pathlib import Path

import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from protocol import cobs, codec, emit_c, messages
from protocol.c import binding, build
from protocol.codec import MAX_ENCODED, MAX_PAYLOAD, EncodeError, StreamDecoder, encode
from protocol.messages import MESSAGES, UnknownMessage, by_name, field_specs
from test_protocol_properties import payload_size, record_strategy

VECTOR_DIR = Path(messages.__file__).resolve().parent / "vectors"
VECTORS = [(p.name, v) for p in sorted(VECTOR_DIR.glob("*.json"))
           for v in json.loads(p.read_text(encoding="utf-8"))]
GOOD = [(f, v) for f, v in VECTORS if v["message"] is not None]
REJECTS = [(f, v) for f, v in VECTORS if v["message"] is None]
MESSAGE_CLASSES = [MESSAGES[t].cls for t in sorted(MESSAGES)]
SETTINGS = settings(max_examples=40, deadline=None,
                    suppress_health_check=[HealthCheck.too_slow, HealthCheck.data_too_large])


@pytest.fixture(scope="module")
def clib() -> binding.CLib:
    return binding.load()


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


# ---------------------------------------------------------------------------- generated files


def test_checked_in_generated_files_are_current():
    fresh = emit_c.emit()
    for name, text in fresh.items():
        path = build.GENERATED_DIR / name
        assert path.read_text(encoding="ascii") == text, (
            f"{path} is stale: the message table changed; run `python -m protocol.emit_c "
            "protocol/c/generated` and commit the result")
    assert sorted(p.name for p in build.GENERATED_DIR.iterdir() if p.suffix in (".c", ".h")) == \
        sorted(fresh)


def test_emit_c_command_writes_the_same_files(tmp_path, capsys):
    from agent.cli import main
    assert main(["protocol", "--emit-c", str(tmp_path / "out")]) == 0
    for name, text in emit_c.emit().items():
        assert (tmp_path / "out" / name).read_text(encoding="ascii") == text
    assert "tl_messages.h" in capsys.readouterr().out
    assert emit_c.main([str(tmp_path / "again")]) == 0


def test_emit_c_command_into_an_unwritable_place_is_a_user_error(tmp_path):
    from agent.cli import main
    blocker = tmp_path / "file"
    blocker.write_text("not a folder")
    assert main(["protocol", "--emit-c", str(blocker / "sub")]) == 2


def test_generated_header_follows_the_table():
    header = emit_c.emit()["tl_messages.h"]
    for tid, spec in MESSAGES.items():
        assert f"TL_MSG_{spec.name.upper()} = 0x{tid:02X}" in header
        assert f"}} tl_{spec.name};" in header
    for en in emit_c.table_enums():
        for name, value in en.__members__.items():
            assert f"TL_{emit_c.snake(en.__name__).upper()}_{name} = {int(value)}" in header
    assert "float default_;" in header  # SettingInfo.default: a C keyword
    assert f"#define TL_MAX_STR_BYTES {messages.MAX_STR_BYTES}u" in header
    assert f"#define TL_MAX_PAYLOAD {MAX_PAYLOAD}u" in header


def test_emitter_refuses_a_wire_type_it_cannot_express():
    bad = messages.FieldSpec("x", "f64", "a double", "", None, None)
    with pytest.raises(emit_c.EmitError, match="f64"):
        emit_c._check_field(bad, "Probe")


# ---------------------------------------------------------------------------- build rules


def test_library_uses_only_the_c_standard_library_and_no_allocation(tmp_path):
    """Each library file compiles alone under the strict flags and includes only freestanding
    standard headers and string.h; together the objects need nothing from outside but memcpy and
    memset (no allocation, no stdio, no OS)."""
    cc = build.find_compiler()
    allowed_headers = {"stddef.h", "stdint.h", "string.h"}
    objs = []
    for src in build.library_sources():
        text = src.read_text()
        system = set(re.findall(r"#include <([^>]+)>", text))
        assert system <= allowed_headers, (src.name, system)
        obj = tmp_path / f"{src.stem}.o"
        res = subprocess.run([*cc, *build.STRICT_FLAGS, "-O2", f"-I{build.C_DIR}",
                              f"-I{build.GENERATED_DIR}", "-c", str(src), "-o", str(obj)],
                             capture_output=True, text=True)
        assert res.returncode == 0, res.stderr
        objs.append(str(obj))
    assert {"-std=c99", "-Wall", "-Wextra", "-Werror", "-pedantic"} <= set(build.STRICT_FLAGS)
    nm = shutil.which("nm")
    if nm is None:
        pytest.skip("no nm (binutils) to list the objects' symbols")

    def symbols(*opts):
        out = subprocess.run([nm, *opts, *objs], capture_output=True, text=True, check=True)
        return {ln.split()[-1] for ln in out.stdout.splitlines() if ln.strip() and ":" not in ln}

    outside = symbols("-u") - symbols("--defined-only")
    outside = {s for s in outside if not s.startswith("_GLOBAL_OFFSET_TABLE_")}
    assert outside <= {"memcpy", "memset"}, outside


def test_missing_compiler_is_named_in_the_error(monkeypatch):
    monkeypatch.setenv("CC", "no-such-compiler-xyz")
    with pytest.raises(build.CBuildError, match="no-such-compiler-xyz.*not found"):
        build.find_compiler()
    monkeypatch.delenv("CC")
    monkeypatch.setenv("PATH", "/nonexistent")
    with pytest.raises(build.CBuildError, match="no C compiler found.*cc, gcc, clang.*apt-get"):
        build.find_compiler()


# ---------------------------------------------------------------------------- CRC, COBS, UTF-8


def test_crc_check_value(clib):
    # CRC catalogue, CRC-32/ISO-HDLC: check = 0xCBF43926 over "123456789" (Williams 1993 model)
    assert clib.crc32(b"123456789") == 0xCBF43926
    assert clib.crc32(b"") == 0
    # residue property (same catalogue entry): data + its CRC (LE) -> 0xDEBB20E3 ^ xorout
    data = b"123456789"
    assert clib.crc32(data + (0xCBF43926).to_bytes(4, "little")) == 0xDEBB20E3 ^ 0xFFFFFFFF


@SETTINGS
@given(data=st.binary(max_size=600))
def test_crc_agrees_with_zlib(clib, data):
    assert clib.crc32(data) == zlib.crc32(data)


@SETTINGS
@given(data=st.one_of(st.binary(max_size=700),
                      st.lists(st.sampled_from([0, 1, 0xFF, 7]), max_size=600).map(bytes)))
def test_cobs_agrees_with_python(clib, data):
    enc = clib.cobs_encode(data)
    assert enc == cobs.encode(data)
    assert clib.cobs_decode(enc) == data


@SETTINGS
@given(data=st.binary(max_size=300))
def test_cobs_decode_rejects_exactly_what_python_rejects(clib, data):
    try:
        want = cobs.decode(data)
    except cobs.CobsError:
        want = None
    assert clib.cobs_decode(data) == want


@pytest.mark.parametrize("raw,ok", [
    (b"", True), (b"roll.rate.kp", True), ("µs ±0.5 °".encode(), True), (b"\x00", True),
    ("\U0010FFFF".encode(), True), (b"\xc0\x80", False), (b"\xe0\x80\x80", False),
    (b"\xed\xa0\x80", False), (b"\xf4\x90\x80\x80", False), (b"\xf5\x80\x80\x80", False),
    (b"\x80", False), (b"\xe2\x82", False), (b"\xff", False),
])
def test_utf8_edge_cases(clib, raw, ok):
    """Unicode's well-formed UTF-8 table (value from memory), checked against Python's codec."""
    try:
        raw.decode("utf-8")
        python_ok = True
    except UnicodeDecodeError:
        python_ok = False
    assert python_ok == ok
    assert clib.utf8_valid(raw) == ok


@SETTINGS
@given(raw=st.one_of(st.binary(max_size=40),
                     st.text(max_size=20).map(lambda s: s.encode("utf-8", "surrogatepass"))))
def test_utf8_agrees_with_python(clib, raw):
    try:
        raw.decode("utf-8")
        ok = True
    except UnicodeDecodeError:
        ok = False
    assert clib.utf8_valid(raw) == ok


# ---------------------------------------------------------------------------- shared vectors


@pytest.mark.parametrize("fname,v", GOOD, ids=_ids(GOOD))
def test_vector_through_the_c_codec_both_ways(clib, fname, v):
    m = v["message"]
    frame = bytes.fromhex(v["frame_hex"])
    dec = clib.decoder()
    got = dec.feed(frame)
    assert len(got) == 1
    fr = got[0]
    assert fr.error is None
    assert (fr.seq, fr.flags, fr.version, fr.type_id) == (m["seq"], m["flags"], m["version"],
                                                          m["type_id"])
    want = build_message(m)
    assert fr.msg == want
    stats = dec.stats
    assert (stats.unknown_type, stats.good) == ((1, 0) if m["type"] is None else (0, 1))
    # re-encoded by the C encoder
    if m["type"] is None:
        again = clib.frame_encode(m["version"], m["type_id"], m["seq"], m["flags"], want.payload)
    elif m["version"] == codec.VERSION_BYTE:
        again = clib.encode(want, m["seq"], m["flags"])
    else:
        again = clib.frame_encode(m["version"], m["type_id"], m["seq"], m["flags"],
                                  clib.encode_payload(want))
    if "trailing_hex" in v:
        # the decoder ignored the appended bytes: the frame without them decodes the same
        assert again != frame
        assert clib.decoder().feed(again)[0].msg == want
    else:
        assert again == frame


@pytest.mark.parametrize("fname,v", REJECTS, ids=_ids(REJECTS))
def test_reject_vector_counted_by_the_right_c_counter(clib, fname, v):
    dec = clib.decoder()
    frames = dec.feed(bytes.fromhex(v["frame_hex"]))
    counter = v["reject"]
    stats = dec.stats
    assert getattr(stats, counter) == 1
    others = {n: getattr(stats, n) for n in ("good", "bad_crc", "bad_cobs", "short", "oversize",
                                             "malformed", "unknown_type") if n != counter}
    assert set(others.values()) == {0}, others
    if counter == "malformed":
        assert len(frames) == 1 and frames[0].msg is None and frames[0].error
    else:
        assert frames == []
    ok = encode(messages.Keepalive(host_time_ms=1), seq=9)
    assert [f.msg for f in dec.feed(ok)] == [messages.Keepalive(host_time_ms=1)]


# ---------------------------------------------------------------------------- C vs Python


@pytest.mark.parametrize("cls", MESSAGE_CLASSES, ids=lambda c: c.__name__)
@SETTINGS
@given(data=st.data())
def test_c_and_python_agree_on_every_message_type(clib, cls, data):
    msg = data.draw(record_strategy(cls))
    seq = data.draw(st.integers(0, 0xFFFF))
    flags = data.draw(st.integers(0, 0xFF))
    if payload_size(cls, msg) > MAX_PAYLOAD:
        with pytest.raises(EncodeError):
            encode(msg, seq, flags)
        with pytest.raises(binding.CError, match="too long"):
            clib.encode(msg, seq, flags)
        return
    frame = encode(msg, seq, flags)
    assert clib.encode(msg, seq, flags) == frame
    got = clib.decoder().feed(frame)
    assert [f.msg for f in got] == [msg]
    assert (got[0].seq, got[0].flags, got[0].version) == (seq, flags, codec.VERSION_BYTE)


@SETTINGS
@given(msg=st.one_of([record_strategy(c) for c in MESSAGE_CLASSES]), data=st.data())
def test_c_payload_decoder_accepts_exactly_what_python_accepts(clib, msg, data):
    """Cut, extended or damaged payloads: the C decoder is malformed exactly where Python is."""
    spec = messages.spec_of(msg)
    payload = codec.encode_payload(msg)
    cut = data.draw(st.integers(0, len(payload)))
    extra = data.draw(st.binary(max_size=8))
    variant = bytearray(payload[:cut] + extra)
    if variant and data.draw(st.booleans()):
        variant[data.draw(st.integers(0, len(variant) - 1))] = data.draw(st.integers(0, 255))
    variant = bytes(variant)
    try:
        want = codec._LAYOUTS[spec.cls].unpack(variant)
    except (ValueError, IndexError, codec.struct.error, UnicodeDecodeError):
        want = None
    try:
        got = clib.decode_payload(spec.type_id, variant)
    except binding.CError as exc:
        assert exc.status == binding.TL_ERR_MALFORMED
        got = None
    if want is not None and got is not None and want != got:
        # NaN is the one value that differs from itself: compare the re-encoded bytes
        assert codec.encode_payload(want) == clib.encode_payload(got)
    else:
        assert got == want


def _piece(frames):
    return st.one_of(
        st.binary(max_size=300),
        st.sampled_from([bytes.fromhex(v["frame_hex"]) for _, v in VECTORS]),
        st.binary(min_size=1, max_size=60).map(lambda b: b + b"\x00"),
        st.integers(240, 600).map(lambda n: b"\x55" * n),
        frames,
    )


_frames = st.one_of([record_strategy(c) for c in MESSAGE_CLASSES]).filter(
    lambda m: payload_size(type(m), m) <= MAX_PAYLOAD).map(lambda m: encode(m, 7))


@settings(max_examples=150, deadline=None,
          suppress_health_check=[HealthCheck.too_slow, HealthCheck.data_too_large])
@given(pieces=st.lists(_piece(_frames), max_size=8), data=st.data())
def test_c_stream_decoder_matches_python_on_any_stream(clib, pieces, data):
    """Garbage, vectors, oversize runs and frames in any chunking: the same frames and the same
    counters from both decoders, and the C buffer never above its size."""
    stream = b"".join(pieces)
    mutate = data.draw(st.lists(st.tuples(st.integers(0, max(0, len(stream) - 1)),
                                          st.integers(0, 255)), max_size=4))
    damaged = bytearray(stream)
    for pos, val in mutate:
        if damaged:
            damaged[pos] = val
    damaged = bytes(damaged)
    cuts = sorted(data.draw(st.lists(st.integers(0, len(damaged)), max_size=10)))
    py, c = StreamDecoder(), clib.decoder()
    got_py, got_c, prev = [], [], 0
    for cut in cuts + [len(damaged)]:
        got_py += py.feed(damaged[prev:cut])
        got_c += c.feed(damaged[prev:cut])
        prev = cut
        assert c.buffered <= MAX_ENCODED
        assert c.buffered == py.buffered
    assert [(f.seq, f.flags, f.version, f.type_id, f.msg, f.error is None) for f in got_c] == \
        [(f.seq, f.flags, f.version, f.type_id, f.msg, f.error is None) for f in got_py]
    assert c.stats == py.stats


def test_long_run_without_zero_is_bounded_and_counted_once(clib):
    dec = clib.decoder()
    for _ in range(100):
        dec.feed(b"\x55" * 1000)
        assert dec.buffered <= MAX_ENCODED
    assert dec.stats.oversize == 1 and dec.stats.bytes_in == 100_000
    good = encode(messages.Keepalive(host_time_ms=5), 1)
    assert [f.msg for f in dec.feed(b"\x00" + good)] == [messages.Keepalive(host_time_ms=5)]


def test_every_single_bit_flip_of_a_frame_is_dropped(clib):
    frame = next(bytes.fromhex(v["frame_hex"]) for _, v in GOOD if v["name"] == "telemetry")
    after = encode(messages.Keepalive(host_time_ms=0xABCDEF), seq=0x1234)
    for i in range(len(frame) - 1):  # the delimiter's flips merge two frames: not this check
        for bit in range(8):
            bad = bytearray(frame)
            bad[i] ^= 1 << bit
            got = clib.decoder().feed(bytes(bad) + after)
            assert [f.msg for f in got] == [messages.Keepalive(host_time_ms=0xABCDEF)], (i, bit)


# ---------------------------------------------------------------------------- ring


def test_ring_is_fifo_bounded_and_counts_drops(clib):
    ring = clib.ring()
    size = clib.dll.tl_host_layout(8)
    data = bytes(range(256)) * 2
    assert ring.push(data[:size + 10]) == size
    assert ring.count == size and ring.dropped == 10
    assert ring.pop_all() == data[:size]
    assert ring.count == 0
    # run the free-running 16-bit indices through their wrap-around
    sent = bytearray()
    for k in range(70_000 // 200):
        chunk = bytes((k + j) & 0xFF for j in range(200))
        assert ring.push(chunk) == 200
        sent += chunk
        assert ring.pop_all() == chunk
    assert ring.state.head == ring.state.tail == (size + 70_000 // 200 * 200) & 0xFFFF


def test_frames_through_the_ring_and_tick_poll(clib):
    ring, dec = clib.ring(), clib.decoder()
    msgs = [messages.Keepalive(host_time_ms=k) for k in range(20)]
    stream = b"".join(encode(m, k) for k, m in enumerate(msgs))
    got = []
    for i in range(0, len(stream), 37):  # the interrupt pushes, the tick polls
        assert ring.push(stream[i:i + 37]) == len(stream[i:i + 37])
        got += ring.poll(dec)
    assert [f.msg for f in got] == msgs
    assert dec.stats.good == 20 and ring.count == 0


# ---------------------------------------------------------------------------- fuzz


FUZZ_INPUTS = 20_000


def test_receive_path_fuzz_under_sanitizers():
    ok, why = build.sanitizers_available()
    if not ok:
        pytest.skip(f"the C compiler lacks sanitizer support here: {why}")
    exe = build.build("program", [build.HARNESS_DIR / "fuzz.c"], sanitize=True, optimize="-O1")
    res = subprocess.run([str(exe), str(FUZZ_INPUTS), "7"], capture_output=True, text=True,
                         timeout=300)
    assert res.returncode == 0, res.stdout + res.stderr[-4000:]
    m = re.search(r"fuzz inputs=(\d+) failures=(\d+)", res.stdout)
    assert m and int(m.group(1)) == FUZZ_INPUTS and int(m.group(2)) == 0, res.stdout
    counts = dict(re.findall(r"(\w+)=(\d+)", res.stdout))
    # the inputs reached every outcome of the decoder, not just one
    for key in ("good", "bad_crc", "bad_cobs", "short", "oversize", "malformed",
                "unknown_type", "dropped"):
        assert int(counts[key]) > 0, (key, res.stdout)
