"""SPEC.md stays in step with the message table; the CLI describes every message."""

from __future__ import annotations

import json
import re
from pathlib import Path

import pytest

from protocol import describe, messages
from protocol.codec import MAX_ENCODED, MAX_PAYLOAD, MAX_RAW, StreamDecoder, encode
from protocol.messages import MESSAGES, AxisSample, RefuseCode, Telemetry

PROTO = Path(messages.__file__).resolve().parent
SPEC = (PROTO / "SPEC.md").read_text(encoding="utf-8")


def test_generated_section_is_current():
    assert describe.generated_section(SPEC) == describe.spec_markdown(), (
        "protocol/SPEC.md's generated tables differ from protocol/messages.py: run "
        "`python -m protocol.describe --write-spec` and review the diff")


def test_spec_has_a_byte_table_for_every_message_and_every_enum_value():
    for tid, spec in MESSAGES.items():
        name = describe._class_name(spec.name)
        assert f"#### 0x{tid:02X} {name} (" in SPEC
        for f in spec.fields:
            assert f"`{f.name}`" in SPEC or f"`{f.name}.n`" in SPEC or f"`{f.name}.k`" in SPEC
    for code in RefuseCode:
        assert f"| {code.value} | {code.name} |" in SPEC


def test_size_limits_stated_in_spec_match_codec():
    assert (MAX_PAYLOAD, MAX_RAW, MAX_ENCODED) == (240, 249, 250)
    assert "5 + 240 + 4 = **249**" in SPEC and "249 + 1 = **250**" in SPEC
    assert "**251**" in SPEC


def test_legality_rule_matches_the_state_machine_text():
    """The refusal rule used for table 17.3 (messages.py docstring, restated)."""
    S = messages.DeviceState
    sw, es, arm = (messages.by_name(n) for n in ("setting_write", "experiment_start",
                                                 "arm_request"))
    assert describe.refusal_in(sw, S.RUNNING) == RefuseCode.BUSY
    assert describe.refusal_in(es, S.RUNNING) == RefuseCode.BUSY
    assert describe.refusal_in(es, S.KILLED) == RefuseCode.KILL_LATCHED
    assert describe.refusal_in(arm, S.ARMED) == RefuseCode.WRONG_STATE
    assert describe.refusal_in(sw, S.KILLED) is None
    kill = messages.by_name("kill")
    assert all(describe.refusal_in(kill, s) is None for s in S)  # kill works in every state


@pytest.mark.parametrize("n_axes,wire", [(1, 42), (4, 87)])
def test_telemetry_size_in_spec_is_what_the_codec_sends(n_axes, wire):
    msg = Telemetry(time_us=1, counter=1, state=1, tag=1,
                    axes=tuple(AxisSample(axis=a) for a in range(n_axes)))
    # COBS adds one byte to a raw frame under 254 bytes whatever its content
    assert len(encode(msg, 1)) == wire == describe.telemetry_frame_bytes(n_axes)["wire"]


def test_telemetry_rates_arithmetic():
    # 8N1: 10 bit times per byte (common practice, no source). 2,000,000 baud -> 200000 B/s;
    # 87-byte 4-axis frames -> 2298 whole samples per second.
    assert "200000 / 87 = 2298.9 → **2298**" in SPEC
    assert "11520 / 42 = 274.3 → **274**" in SPEC
    assert "92160 / 87 = 1059.3 → **1059**" in SPEC


def test_worked_examples_come_from_the_vectors():
    vectors = [v for p in (PROTO / "vectors").glob("*.json")
               for v in json.loads(p.read_text(encoding="utf-8"))]
    frames = {v["frame_hex"] for v in vectors}
    section = SPEC[SPEC.index("## 15. Worked examples"):SPEC.index("## 16.")]
    blocks = re.findall(r"wire\s+((?:[0-9A-F]{2}[ \n]+)+00)", section)
    assert len(blocks) >= 7
    for b in blocks:
        hexs = "".join(b.split()).lower()
        assert hexs in frames, f"worked example not in the vectors: {b}"
        assert len(StreamDecoder().feed(bytes.fromhex(hexs))) == 1


def test_spec_names_the_standard_settings():
    for p in ("kp", "ki", "kd", "tf", "b", "out_limit", "i_limit", "aw_mode", "aw_tt", "ff"):
        assert f"| {p} |" in SPEC
    for g in ("watchdog_s", "kill.angle_rad", "kill.rate_rad_s", "kill.heave_m",
              "kill.saturation_s"):
        assert f"| {g} |" in SPEC
    assert "{axis}.{loop}.{param}" in SPEC


def test_cli_describe_prints_every_message(capsys):
    from agent.cli import main
    assert main(["protocol", "--describe"]) == 0
    out = capsys.readouterr().out
    for tid, spec in MESSAGES.items():
        assert f"0x{tid:02X} {spec.name}" in out
        for f in spec.fields:
            assert f.name in out


def test_describe_module_cli(capsys):
    assert describe.main(["--markdown"]) == 0
    assert capsys.readouterr().out == describe.spec_markdown()


def test_the_spec_stands_alone_and_is_complete():
    # the spec is what a board conforms to; the message table only generates its byte tables
    assert "single source of truth" not in SPEC
    heads = re.findall(r"^## (\d+)\. ", SPEC, flags=re.M)
    assert [int(h) for h in heads] == list(range(1, 19))
    assert "## 18. Conformance" in SPEC
    ids = re.findall(r"^\| ([A-Z]+-\d+) \|", SPEC[SPEC.index("## 18."):], flags=re.M)
    assert len(ids) == len(set(ids)) >= 60


def test_every_refuse_code_states_its_detail():
    for code in RefuseCode:
        assert "detail" in describe._NOTES[("RefuseCode", code.name)], code


def test_reject_vectors_state_what_a_receiver_does():
    # SPEC.md 6 and 14: a malformed payload is handed up (the device refuses it); the rest drop
    rejects = json.loads((PROTO / "vectors" / "rejects.json").read_text(encoding="utf-8"))
    for v in rejects:
        assert v["outcome"] == ("refuse_malformed" if v["reject"] == "malformed" else "drop")
    assert {v["reject"] for v in rejects} == {"bad_crc", "bad_cobs", "short", "oversize",
                                               "malformed"}
