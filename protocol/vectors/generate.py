"""Generate the protocol v1 test vectors (protocol/vectors/*.json) from the message table.

Run once by hand after a change to the table: ``python -m protocol.vectors.generate``. Tests never
regenerate the files; they check the codec against them. To be a real cross-check this script does
NOT use protocol.codec: it lays fields out from ``protocol.messages.field_specs`` with its own
struct calls, computes the CRC bit by bit (``crc32_reference``) and COBS-encodes with its own
textbook loop (Cheshire & Baker 1999). Every float below is exactly representable in binary32.

Vector file format: a JSON list of objects, each with

- ``name``: unique id of the vector; ``note``: what it shows;
- ``frame_hex``: the complete on-wire bytes, COBS-encoded, including the trailing 0x00 delimiter;
- ``message``: what a decoder must produce, ``{"type": <message name or null>, "type_id": int,
  "version": int, "seq": int, "flags": int, "fields": {...}}``. ``fields`` holds wire values
  (enums as integers, lists as lists of objects). For a type id the table does not know, or a
  frame of another major version, ``type`` is null and ``payload_hex`` holds the raw payload;
- ``type`` is the message's vector name: its name with an underscore before every capital
  letter but the first, all lower case (ArmConfirm -> arm_confirm; SPEC.md 17.2 lists them);
- optional ``trailing_hex``: bytes a newer minor version appended to the payload. ``frame_hex``
  carries them after the fields; a decoder ignores them; encoding ``message`` gives another frame,
  without them (its own CRC and COBS), that decodes to the same message;
- rejects.json only: ``message`` is null, ``reject`` names the decoder counter that counts the
  frame (``bad_crc``, ``bad_cobs``, ``short``, ``oversize``, ``malformed``) and ``outcome`` says
  what the receiver does with it: ``drop`` (no reply: nothing in it can be trusted) or
  ``refuse_malformed`` (the header is intact: a device answers Refuse MALFORMED to its seq).
"""

from __future__ import annotations

import json
import struct
import sys
from pathlib import Path

from protocol.crc import crc32_reference
from protocol.messages import (FLAG_REPLY, FLAG_RETRY, MESSAGES, PROTOCOL_MAJOR, PROTOCOL_MINOR,
                               Axis, DeviceState, EventKind, ExperimentKind, FinishReason,
                               KillReason, Loop, RefuseCode, SettingType, by_name, field_specs)

HERE = Path(__file__).resolve().parent
VERSION = PROTOCOL_MAJOR << 4 | PROTOCOL_MINOR
_FMT = {"u8": "<B", "i8": "<b", "u16": "<H", "u32": "<I", "u64": "<Q", "f32": "<f"}


# ---------------------------------------------------------------- independent frame builder

def cobs_encode(data: bytes) -> bytes:
    """Textbook COBS (Cheshire & Baker 1999): each block is a code byte (1 + number of non-zero
    bytes that follow, up to 0xFF) and those bytes; every block but a 0xFF one stands for its bytes
    plus one zero, and the zero implied after the last block is dropped. Frames here are at most
    249 bytes, so a 0xFF block (254 non-zero bytes in a row) never occurs and this form and the
    codec's (which omits an empty block after a final 0xFF block) give identical bytes."""
    assert len(data) < 254, "vectors never need a 0xFF block"
    out = bytearray([0])
    code_at, code = 0, 1
    for b in data:
        if b == 0:
            out[code_at] = code
            code_at, code = len(out), 1
            out.append(0)
        else:
            out.append(b)
            code += 1
    out[code_at] = code
    return bytes(out)


def pack_fields(cls, values: dict) -> bytes:
    out = b""
    for f in field_specs(cls):
        v = values[f.name]
        if f.wire == "str":
            raw = v.encode("utf-8")
            out += bytes([len(raw)]) + raw
        elif f.wire == "list":
            out += bytes([len(v)])
            for item in v:
                out += pack_fields(f.item, item)
        else:
            out += struct.pack(_FMT[f.wire], v)
    return out


def frame(type_id: int, payload: bytes, seq: int, flags: int, version: int = VERSION) -> bytes:
    body = bytes([version, type_id]) + struct.pack("<H", seq) + bytes([flags]) + payload
    return cobs_encode(body + struct.pack("<I", crc32_reference(body))) + b"\x00"


def vec(name: str, note: str, type_name: str, fields: dict, seq: int, flags: int = 0,
        version: int = VERSION, trailing: bytes = b"") -> dict:
    spec = by_name(type_name)
    full = {}
    for f in field_specs(spec.cls):  # every field present, in table order
        if f.name not in fields:
            raise KeyError(f"{name}: field {f.name} missing")
        full[f.name] = fields[f.name]
    extra = set(fields) - set(full)
    if extra:
        raise KeyError(f"{name}: unknown fields {sorted(extra)}")
    payload = pack_fields(spec.cls, full) + trailing
    assert len(payload) <= 240, (name, len(payload))
    v = {"name": name, "note": note,
         "frame_hex": frame(spec.type_id, payload, seq, flags, version).hex(),
         "message": {"type": type_name, "type_id": spec.type_id, "version": version, "seq": seq,
                     "flags": flags, "fields": full}}
    if trailing:
        v["trailing_hex"] = trailing.hex()
    return v


def raw_vec(name: str, note: str, type_id: int, payload: bytes, seq: int, flags: int = 0,
            version: int = VERSION) -> dict:
    return {"name": name, "note": note,
            "frame_hex": frame(type_id, payload, seq, flags, version).hex(),
            "message": {"type": None, "type_id": type_id, "version": version, "seq": seq,
                        "flags": flags, "payload_hex": payload.hex()}}


# ---------------------------------------------------------------- the vectors

def sample(axis, loop, sp, meas, out, relay):
    return {"axis": int(axis), "loop": int(loop), "setpoint": sp, "measurement": meas,
            "output": out, "relay": relay}


START = dict(tag=7, kind=int(ExperimentKind.RELAY), axis=int(Axis.ROLL), loop=int(Loop.RATE),
             amplitude=0.125, hysteresis=0.03125, bias=0.0, setpoint=0.0, step_at_s=0.0,
             duration_s=20.0, kill_angle_rad=0.5, kill_rate_rad_s=6.0, kill_heave_m=0.0,
             kill_saturation_s=1.5)


def messages_vectors() -> list[dict]:
    R = FLAG_REPLY
    token = 0x5A17C3E9
    v = [
        vec("hello", "session start", "hello", {"host_name": "tetherloop 0.1.0"}, 1),
        vec("hello_reply", "answer to seq 1: four axes; heave has RATE and HEAVE loops (mask 5)",
            "hello_reply", {"device_id": "demo-board-01", "firmware_version": "sim 1.0",
                            "protocol_major": 1, "protocol_minor": 0, "loop_rate_hz": 400,
                            "capabilities": 0x7F, "setting_count": 52,
                            "axes": [{"axis": 0, "loops": 3}, {"axis": 1, "loops": 3},
                                     {"axis": 2, "loops": 3}, {"axis": 3, "loops": 5}]},
            1, R),
        vec("keepalive", "host keepalive", "keepalive", {"host_time_ms": 123456}, 2),
        vec("ack", "ArmConfirm (0x22) accepted, now ARMED", "ack",
            {"acked_type": 0x22, "state": int(DeviceState.ARMED)}, 10, R),
        vec("refuse", "SettingWrite refused: value above its maximum", "refuse",
            {"refused_type": 0x14, "code": int(RefuseCode.OUT_OF_BOUNDS), "detail": 0x0101,
             "text": "value 50 above maximum 10"}, 6, R),
        vec("setting_describe", "ask for entry 0", "setting_describe", {"index": 0}, 3),
        vec("setting_info", "entry 0 of an invented settings table", "setting_info",
            {"index": 0, "setting_id": 0x0101, "name": "roll.rate.kp",
             "type": int(SettingType.FLOAT), "unit": "", "minimum": 0.0, "maximum": 10.0,
             "default": 0.5, "flags": 0}, 3, R),
        vec("setting_read", "read setting 0x0101", "setting_read", {"setting_id": 0x0101}, 4),
        vec("setting_value", "its value", "setting_value",
            {"setting_id": 0x0101, "value": 0.5}, 4, R),
        vec("setting_write", "write 0.75", "setting_write",
            {"setting_id": 0x0101, "value": 0.75}, 5),
        vec("settings_persist", "store settings (empty payload)", "settings_persist", {}, 7),
        vec("arm_request", "arming, first half (empty payload)", "arm_request", {}, 8),
        vec("arm_challenge", "token valid 2 s", "arm_challenge",
            {"token": token, "valid_ms": 2000}, 8, R),
        vec("arm_confirm", "response = token XOR 0xFFFFFFFF, operator confirmed",
            "arm_confirm", {"response": token ^ 0xFFFFFFFF, "operator_confirmed": 1}, 10),
        vec("disarm", "disarm (empty payload)", "disarm", {}, 20),
        vec("experiment_start", "relay on the roll rate loop", "experiment_start", START, 11),
        vec("experiment_stop", "stop experiment 7", "experiment_stop", {"tag": 7}, 12),
        vec("experiment_adjust", "ramp the relay amplitude", "experiment_adjust",
            {"tag": 7, "amplitude": 0.25, "hysteresis": 0.03125, "bias": -0.0625}, 13),
        vec("kill", "operator kill", "kill",
            {"reason": int(KillReason.HOST_OPERATOR), "value": 0.0}, 14),
        vec("kill_clear", "clear the latch (empty payload)", "kill_clear", {}, 15),
        vec("telemetry_config", "200 Hz, roll+pitch, rate loops", "telemetry_config",
            {"rate_hz": 200, "axis_mask": 0b0011, "loop": int(Loop.RATE)}, 16),
        vec("telemetry", "device frame (own counter, no FLAG_REPLY), two axes", "telemetry",
            {"time_us": 12_345_678, "counter": 1000, "state": int(DeviceState.RUNNING), "tag": 7,
             "axes": [sample(Axis.ROLL, Loop.RATE, 0.0, 0.25, 0.125, 1),
                      sample(Axis.PITCH, Loop.RATE, 0.0, -0.015625, -0.0078125, 0)]}, 500),
        vec("event", "experiment 7 started", "event",
            {"time_us": 12_000_000, "kind": int(EventKind.EXPERIMENT_STARTED),
             "state": int(DeviceState.RUNNING), "reason": 0, "axis": int(Axis.ROLL),
             "value": 0.0, "threshold": 0.0, "tag": 7, "text": "relay roll.rate"}, 499),
    ]
    return v


REFUSE_CASES = {
    RefuseCode.UNKNOWN_TYPE: (0x7E, 0x7E, "unknown message type 0x7E"),
    RefuseCode.MALFORMED: (0x14, 0, "payload too short for setting_write"),
    RefuseCode.WRONG_STATE: (0x32, int(DeviceState.ARMED), "no experiment running"),
    RefuseCode.UNKNOWN_SETTING: (0x12, 0x0999, "no setting with id 0x0999"),
    RefuseCode.OUT_OF_BOUNDS: (0x14, 0x0101, "value 50 above maximum 10"),
    RefuseCode.INTERLOCK: (0x22, 2, "arming token expired"),
    RefuseCode.KILL_LATCHED: (0x20, int(DeviceState.KILLED), "kill latched: send kill_clear"),
    RefuseCode.BUSY: (0x30, int(DeviceState.RUNNING), "experiment 7 running"),
    RefuseCode.BAD_PARAMETER: (0x30, 4, "amplitude must be positive"),  # field 4: amplitude
    RefuseCode.UNSUPPORTED: (0x30, 3, "axis heave has no angle loop"),  # field 3: loop
    RefuseCode.VERSION: (0x01, 2, "protocol major 2 not supported, device speaks 1.0"),
    RefuseCode.NO_KEEPALIVE: (0x22, 1250, "no host frame for 1250 ms before arming"),
    RefuseCode.READ_ONLY: (0x14, 0x0001, "setting is read-only"),
    RefuseCode.NOT_A_REQUEST: (0x51, 0x51, "telemetry is sent by devices"),
    RefuseCode.STORAGE: (0x15, 0, "persist failed: no space left on device"),
}


def refuse_vectors() -> list[dict]:
    out = []
    for k, code in enumerate(RefuseCode):
        rtype, detail, text = REFUSE_CASES[code]
        out.append(vec(f"refuse_{code.name.lower()}", f"Refuse code {code.value} {code.name}",
                       "refuse", {"refused_type": rtype, "code": int(code), "detail": detail,
                                  "text": text}, 100 + k, FLAG_REPLY))
    return out


KILL_VALUES = {  # (axis, value, threshold) in SI units, invented
    KillReason.ANGLE_LIMIT: (Axis.ROLL, 0.5625, 0.5),
    KillReason.RATE_LIMIT: (Axis.PITCH, -6.5, 6.0),
    KillReason.HEAVE_LIMIT: (Axis.HEAVE, 0.3125, 0.25),
    KillReason.SATURATION_TIME: (Axis.YAW, 1.5, 1.5),
    KillReason.WATCHDOG: (255, 0.75, 0.5),
    KillReason.SENSOR_FAULT: (Axis.ROLL, 0.0, 0.0),
}


def kill_vectors() -> list[dict]:
    out = []
    for k, reason in enumerate(KillReason):
        axis, value, threshold = KILL_VALUES.get(reason, (255, 0.0, 0.0))
        if reason.name.startswith("HOST"):
            out.append(vec(f"kill_{reason.name.lower()}", f"host Kill, reason {reason.name}",
                           "kill", {"reason": int(reason), "value": value}, 200 + k))
        out.append(vec(f"event_kill_tripped_{reason.name.lower()}",
                       f"device event KILL_TRIPPED, reason {reason.name}", "event",
                       {"time_us": 30_000_000 + k, "kind": int(EventKind.KILL_TRIPPED),
                        "state": int(DeviceState.KILLED), "reason": int(reason),
                        "axis": int(axis), "value": value, "threshold": threshold, "tag": 7,
                        "text": f"kill: {reason.name.lower()}"}, 900 + k))
    out.append(vec("event_watchdog_expired", "precedes KILL_TRIPPED(WATCHDOG)", "event",
                   {"time_us": 29_999_999, "kind": int(EventKind.WATCHDOG_EXPIRED),
                    "state": int(DeviceState.RUNNING), "reason": 0, "axis": 255, "value": 0.75,
                    "threshold": 0.5, "tag": 7, "text": ""}, 899))
    out.append(vec("event_kill_cleared", "KillClear accepted in KILLED", "event",
                   {"time_us": 40_000_000, "kind": int(EventKind.KILL_CLEARED),
                    "state": int(DeviceState.DISARMED), "reason": 0, "axis": 255, "value": 0.0,
                    "threshold": 0.0, "tag": 0, "text": ""}, 950))
    for k, fin in enumerate(FinishReason):
        out.append(vec(f"event_experiment_finished_{fin.name.lower()}",
                       f"EXPERIMENT_FINISHED, reason {fin.name}", "event",
                       {"time_us": 35_000_000 + k, "kind": int(EventKind.EXPERIMENT_FINISHED),
                        "state": int(DeviceState.KILLED if fin == FinishReason.KILLED else
                                     DeviceState.DISARMED if fin == FinishReason.DISARMED else
                                     DeviceState.ARMED),
                        "reason": int(fin), "axis": 0, "value": 0.0, "threshold": 0.0, "tag": 7,
                        "text": ""}, 960 + k))
    return out


def edge_vectors() -> list[dict]:
    R = FLAG_REPLY
    zeros_axes = [sample(a, 0, 0.0, 0.0, 0.0, 0) for a in range(4)]
    big_axes = [sample(k % 4, (k // 4) % 2, -1.5 - k, 2.0 ** -k, 0.5 * k, (-1, 1)[k % 2])
                for k in range(14)]
    ff_payload = bytes(range(1, 241))  # no zero byte: one long COBS block
    max_mixed = bytes((k * 37) % 256 for k in range(240))  # zeros every so often
    v = [
        vec("zeros_keepalive", "payload all zero bytes", "keepalive", {"host_time_ms": 0}, 0),
        vec("zeros_telemetry", "mostly zero bytes: many one-byte COBS blocks", "telemetry",
            {"time_us": 0, "counter": 0, "state": 0, "tag": 0, "axes": zeros_axes}, 0),
        vec("ff_bytes", "0xFF everywhere a field allows it", "setting_value",
            {"setting_id": 0xFFFF, "value": -3.4028234663852886e38}, 0xFFFF, R),
        vec("seq_max_both_flags", "seq 65535 with FLAG_REPLY|FLAG_RETRY (0x03)", "ack",
            {"acked_type": 0x40, "state": int(DeviceState.KILLED)}, 0xFFFF, R | FLAG_RETRY),
        vec("retry_setting_write", "host resends seq 5 unchanged with FLAG_RETRY; the device "
            "answers from its reply cache and does not write again", "setting_write",
            {"setting_id": 0x0101, "value": 0.75}, 5, FLAG_RETRY),
        vec("retry_kill", "retried Kill", "kill",
            {"reason": int(KillReason.HOST_LINK), "value": 0.0}, 77, FLAG_RETRY),
        vec("nul_in_text", "U+0000 is an ordinary character of a text (counted, not a "
            "terminator)", "hello", {"host_name": "host\u0000one"}, 2),
        vec("utf8_text", "multi-byte UTF-8 in a text field", "event",
            {"time_us": 1, "kind": int(EventKind.FAULT), "state": 0, "reason": 0, "axis": 255,
             "value": 0.0, "threshold": 0.0, "tag": 0, "text": "gyro Δ > 2000 °/s"}, 3),
        vec("empty_text_and_list", "zero-length text and list", "hello_reply",
            {"device_id": "", "firmware_version": "", "protocol_major": 1, "protocol_minor": 0,
             "loop_rate_hz": 0, "capabilities": 0, "setting_count": 0, "axes": []}, 1, R),
        vec("max_hello_reply", "both texts at 64 bytes and 16 list items (173-byte payload)",
            "hello_reply", {"device_id": "d" * 64, "firmware_version": "f" * 64,
                            "protocol_major": 1, "protocol_minor": 0, "loop_rate_hz": 1000,
                            "capabilities": 0xFFFFFFFF, "setting_count": 65535,
                            "axes": [{"axis": k, "loops": 7} for k in range(16)]}, 1, R),
        vec("max_telemetry", "14 axis entries: 226-byte payload, the largest Telemetry that "
            "fits in 240 bytes", "telemetry",
            {"time_us": 2 ** 64 - 1, "counter": 2 ** 32 - 1, "state": 2, "tag": 65535,
             "axes": big_axes}, 4242),
        vec("max_setting_info", "both texts at 64 bytes (148-byte payload)", "setting_info",
            {"index": 65535, "setting_id": 65535, "name": "n" * 64, "type": 3, "unit": "u" * 64,
             "minimum": -1.0, "maximum": 1.0, "default": 0.0, "flags": 3}, 9, R),
        raw_vec("unknown_type_0x7e", "type id not in the table: decoder returns an unknown "
                "message; a device answers Refuse UNKNOWN_TYPE", 0x7E, b"\x01\x02\x00\x03", 30),
        raw_vec("max_payload_no_zero", "240-byte payload without zeros: raw 249 bytes, COBS "
                "250 bytes, 251 on the wire", 0x7F, ff_payload, 31),
        raw_vec("max_payload_with_zeros", "240-byte payload with zero bytes", 0x7D, max_mixed, 32),
        vec("minor_newer_trailing", "version 1.3 (0x13) keepalive with 6 appended bytes the "
            "decoder ignores", "keepalive", {"host_time_ms": 65536}, 40, 0,
            version=(PROTOCOL_MAJOR << 4) | 3, trailing=b"\x01\x00\x02\x00\x03\x00"),
        vec("minor_newer_event_trailing", "version 1.15 event with trailing bytes", "event",
            {"time_us": 5, "kind": 1, "state": 1, "reason": 0, "axis": 255, "value": 0.0,
             "threshold": 0.0, "tag": 0, "text": "armed"}, 41, 0,
            version=(PROTOCOL_MAJOR << 4) | 15, trailing=b"\x00\xAA"),
        raw_vec("other_major_hello", "version 2.0 (0x20) frame: decoded only as far as the "
                "header; a device answers Refuse VERSION", 0x01, b"\x03abc", 42,
                version=((PROTOCOL_MAJOR + 1) << 4)),
    ]
    return v


def reject_vectors() -> list[dict]:
    good = bytes.fromhex(vec("x", "", "setting_write", {"setting_id": 0x0101, "value": 0.75},
                             5)["frame_hex"])
    flipped = bytearray(good)
    flipped[6] ^= 0x10  # a payload bit (byte 6 is not a COBS code byte here)
    body = bytes([VERSION, 0x14]) + struct.pack("<H", 6) + b"\x00" + b"\x01\x01\x00"
    malformed = cobs_encode(body + struct.pack("<I", crc32_reference(body))) + b"\x00"
    short_body = bytes([VERSION, 0x03, 0, 0])  # 4 bytes: no room for header and CRC
    short = cobs_encode(short_body) + b"\x00"
    bad_cobs = b"\x05\x11\x22\x00"  # first block claims 4 data bytes, 2 present
    oversize = bytes([0x01]) + b"\x7f" * 250 + b"\x00"  # 251 bytes before the delimiter
    code_ff = bytes([0xFF]) + b"\x11" * 20 + b"\x00"  # a 0xFF block in a piece of 21 bytes

    def hello(text: bytes, seq: int) -> bytes:  # a Hello whose text bytes are given raw
        return frame(0x01, bytes([len(text)]) + text, seq, 0)

    rej = [
        ("bad_crc", "one bit of a valid SettingWrite frame flipped", bytes(flipped), "bad_crc"),
        ("bad_cobs", "COBS block runs past the delimiter", bad_cobs, "bad_cobs"),
        ("cobs_code_ff", "a 0xFF code byte claims 254 bytes; a piece of at most 250 never holds "
         "them", code_ff, "bad_cobs"),
        ("short", "fewer than 9 decoded bytes (header + CRC)", short, "short"),
        ("oversize", "251 bytes before the delimiter (maximum is 250)", oversize, "oversize"),
        ("malformed_setting_write", "CRC good, payload 3 bytes where SettingWrite needs 6",
         malformed, "malformed"),
        ("utf8_overlong", "Hello text with the overlong form C0 AF of '/'",
         hello(b"a\xc0\xaf", 50), "malformed"),
        ("utf8_surrogate", "Hello text with ED A0 80, the surrogate U+D800",
         hello(b"\xed\xa0\x80", 51), "malformed"),
        ("utf8_above_max", "Hello text with F4 90 80 80, above U+10FFFF",
         hello(b"\xf4\x90\x80\x80", 52), "malformed"),
        ("utf8_truncated", "Hello text ending inside a sequence (E2 82)",
         hello(b"x\xe2\x82", 53), "malformed"),
        ("text_too_long", "Hello text count 65 (maximum 64)", hello(b"h" * 65, 54),
         "malformed"),
    ]
    return [{"name": n, "note": note, "frame_hex": b.hex(), "message": None, "reject": r,
             "outcome": "refuse_malformed" if r == "malformed" else "drop"}
            for n, note, b, r in rej]


FILES = {
    "messages.json": messages_vectors,
    "refuse.json": refuse_vectors,
    "kill.json": kill_vectors,
    "edge.json": edge_vectors,
    "rejects.json": reject_vectors,
}


def build() -> dict[str, list[dict]]:
    out = {name: fn() for name, fn in FILES.items()}
    names = [v["name"] for vs in out.values() for v in vs]
    dup = {n for n in names if names.count(n) > 1}
    if dup:
        raise SystemExit(f"duplicate vector names: {sorted(dup)}")
    covered = {v["message"]["type"] for vs in out.values() for v in vs if v["message"]}
    missing = {s.name for s in MESSAGES.values()} - covered
    if missing:
        raise SystemExit(f"no vector for message types {sorted(missing)}: add one")
    return out


def main() -> int:
    for name, vectors in build().items():
        (HERE / name).write_text(json.dumps(vectors, indent=1, ensure_ascii=False) + "\n",
                                 encoding="utf-8")
        print(f"wrote {name}: {len(vectors)} vectors")
    return 0


if __name__ == "__main__":
    sys.exit(main())
