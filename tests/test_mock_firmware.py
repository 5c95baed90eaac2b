"""The mock board's firmware driven tick by tick over its byte interface: protocol server,
state machine, safety, experiments (checked against protocol/SPEC.md and textbook behaviour)."""

from __future__ import annotations

import dataclasses
import math

import numpy as np
import pytest

from mock_device.firmware import STUCK_TICKS, Firmware
from mock_device.scenarios import load_scenario
from protocol import codec
from protocol import messages as M
from protocol.messages import DeviceState as S
from protocol.messages import EventKind as EK
from protocol.messages import RefuseCode as RC


class Wire:
    """Host end for in-process tests: link time = device time, one request per tick."""

    def __init__(self, fw: Firmware):
        self.fw = fw
        self.dec = codec.StreamDecoder()
        self.seq = 100
        self.t = 0.0
        self.frames: list = []
        self.events: list = []
        self.telemetry: list = []
        self.raw = bytearray()

    def send(self, msg, flags=0, seq=None, version=codec.VERSION_BYTE) -> int:
        if seq is None:
            seq = self.seq
            self.seq += 1
        self.fw.receive(codec.encode(msg, seq, flags, version=version))
        return seq

    def send_raw(self, data: bytes) -> None:
        self.fw.receive(data)

    def tick(self, n=1) -> None:
        for _ in range(n):
            self.fw.tick(self.t)
            self.t += self.fw.ts
            out = self.fw.take_output()
            if out:
                self.raw += out
                for f in self.dec.feed(out):
                    self.frames.append(f)
                    if isinstance(f.msg, M.Event):
                        self.events.append(f.msg)
                    elif isinstance(f.msg, M.Telemetry):
                        self.telemetry.append(f.msg)

    def request(self, msg, flags=0, seq=None):
        seq = self.send(msg, flags, seq)
        start = len(self.frames)
        self.tick()
        replies = [f for f in self.frames[start:] if f.flags & M.FLAG_REPLY and f.seq == seq]
        assert len(replies) == 1, f"expected one reply to {msg}, got {replies}"
        return replies[0].msg

    def keepalive(self):
        self.send(M.Keepalive(host_time_ms=int(self.t * 1000)))

    def arm(self):
        self.keepalive()
        self.tick()
        ch = self.request(M.ArmRequest())
        assert isinstance(ch, M.ArmChallenge), ch
        return self.request(M.ArmConfirm(response=ch.token ^ 0xFFFFFFFF, operator_confirmed=1))

    def kinds(self):
        return [M.EventKind(e.kind) for e in self.events]


def relay(axis=M.Axis.ROLL, loop=M.Loop.RATE, amplitude=0.1, duration_s=5.0, **kw):
    return M.ExperimentStart(tag=kw.pop("tag", 7), kind=M.ExperimentKind.RELAY, axis=axis,
                             loop=loop, amplitude=amplitude, duration_s=duration_s, **kw)


def setting_id(fw, name):
    return fw.settings.by_name[name].setting_id


def in_state(state: S, scenario="single-axis") -> Wire:
    w = Wire(Firmware(scenario, seed=1))
    w.tick()
    if state in (S.ARMED, S.RUNNING):
        assert isinstance(w.arm(), M.Ack)
    if state == S.RUNNING:
        assert isinstance(w.request(relay(amplitude=0.05, duration_s=30)), M.Ack)
    if state == S.KILLED:
        w.request(M.Kill(reason=M.KillReason.HOST_OPERATOR, value=0))
    assert w.fw.state == state
    return w


# ------------------------------------------------------------------ discovery and settings


def test_hello_and_settings_discovery():
    w = in_state(S.DISARMED, "gimbal-quad")
    hello = w.request(M.Hello(host_name="test"))
    assert hello.protocol_major == 1 and hello.loop_rate_hz == 1000
    assert [(a.axis, a.loops) for a in hello.axes] == [(0, 3), (1, 3), (2, 3)]
    infos = [w.request(M.SettingDescribe(index=i)) for i in range(hello.setting_count)]
    names = {i.name: i for i in infos}
    for axis in ("roll", "pitch", "yaw"):
        for loop in ("rate", "angle"):
            for p in ("kp", "ki", "kd", "tf", "b", "out_limit", "i_limit", "aw_mode", "aw_tt",
                      "ff"):
                assert f"{axis}.{loop}.{p}" in names
    for g in ("watchdog_s", "kill.angle_rad", "kill.rate_rad_s", "kill.heave_m",
              "kill.saturation_s"):
        assert g in names
    assert len({i.setting_id for i in infos}) == len(infos)
    kp = names["roll.rate.kp"]
    assert kp.minimum <= kp.default <= kp.maximum
    assert w.request(M.SettingRead(setting_id=kp.setting_id)).value == pytest.approx(0.3)
    r = w.request(M.SettingDescribe(index=hello.setting_count))
    assert isinstance(r, M.Refuse) and r.code == RC.UNKNOWN_SETTING


def test_out_of_bounds_settings_are_refused_and_change_nothing():
    w = in_state(S.DISARMED)
    fw = w.fw
    kp = setting_id(fw, "roll.rate.kp")
    for bad in (-0.1, 1e6, float("nan"), float("inf")):
        r = w.request(M.SettingWrite(setting_id=kp, value=bad))
        assert isinstance(r, M.Refuse) and r.code == RC.OUT_OF_BOUNDS and r.detail == kp
    assert fw.settings.get("roll.rate.kp") == pytest.approx(0.3)
    r = w.request(M.SettingWrite(setting_id=setting_id(fw, "roll.rate.aw_mode"), value=0.5))
    assert r.code == RC.OUT_OF_BOUNDS  # a CHOICE must be whole
    r = w.request(M.SettingWrite(setting_id=setting_id(fw, "loop_rate_hz"), value=1000))
    assert r.code == RC.READ_ONLY
    r = w.request(M.SettingWrite(setting_id=999, value=1))
    assert r.code == RC.UNKNOWN_SETTING
    ok = w.request(M.SettingWrite(setting_id=kp, value=0.5))
    assert isinstance(ok, M.SettingValue) and ok.value == pytest.approx(0.5)
    assert fw.pid("roll", "rate").kp == pytest.approx(0.5)  # applied to the running PID


def test_a_setting_accepts_the_bounds_it_describes():
    # SettingInfo carries the bounds in binary32: 0.01 arrives as 0.0099999998, which the board
    # refused as below its minimum of 0.01 (protocol/SPEC.md 11.3: the bounds are accepted)
    w = in_state(S.DISARMED)
    sid = setting_id(w.fw, "kill.angle_rad")
    info = w.request(M.SettingDescribe(index=w.fw.settings.by_id[sid].index))
    for bound in (info.minimum, info.maximum):
        r = w.request(M.SettingWrite(setting_id=sid, value=bound))
        assert isinstance(r, M.SettingValue) and r.value == bound, r
        assert w.request(M.SettingRead(setting_id=sid)).value == bound


def test_disarmed_only_setting_is_refused_while_armed():
    w = in_state(S.ARMED)
    r = w.request(M.SettingWrite(setting_id=setting_id(w.fw, "watchdog_s"), value=1.0))
    # protocol/SPEC.md 11.3: WRONG_STATE's detail is the state (it was the setting id)
    assert isinstance(r, M.Refuse) and r.code == RC.WRONG_STATE and r.detail == S.ARMED


# ------------------------------------------------------------------ refusals per state

# protocol/SPEC.md 17.3: the state refusals (None = accepted as far as state goes)
LEGALITY = {
    "setting_write": {S.RUNNING: RC.BUSY},
    "settings_persist": {S.ARMED: RC.WRONG_STATE, S.RUNNING: RC.WRONG_STATE,
                         S.KILLED: RC.KILL_LATCHED},
    "arm_request": {S.ARMED: RC.WRONG_STATE, S.RUNNING: RC.WRONG_STATE,
                    S.KILLED: RC.KILL_LATCHED},
    "arm_confirm": {S.ARMED: RC.WRONG_STATE, S.RUNNING: RC.WRONG_STATE,
                    S.KILLED: RC.KILL_LATCHED},
    "experiment_start": {S.DISARMED: RC.WRONG_STATE, S.RUNNING: RC.BUSY,
                         S.KILLED: RC.KILL_LATCHED},
    "experiment_adjust": {S.DISARMED: RC.WRONG_STATE, S.ARMED: RC.WRONG_STATE,
                          S.KILLED: RC.KILL_LATCHED},
}


def _sample(name: str, fw: Firmware):
    return {
        "hello": M.Hello(host_name="t"),
        "setting_describe": M.SettingDescribe(index=0),
        "setting_read": M.SettingRead(setting_id=1),
        "setting_write": M.SettingWrite(setting_id=setting_id(fw, "roll.rate.kp"), value=0.4),
        "settings_persist": M.SettingsPersist(),
        "arm_request": M.ArmRequest(),
        "arm_confirm": M.ArmConfirm(response=0, operator_confirmed=1),
        "disarm": M.Disarm(),
        "experiment_start": relay(tag=9),
        "experiment_stop": M.ExperimentStop(tag=7),
        "experiment_adjust": M.ExperimentAdjust(tag=7, amplitude=0.06, hysteresis=0, bias=0),
        "kill": M.Kill(reason=1, value=0),
        "kill_clear": M.KillClear(),
        "telemetry_config": M.TelemetryConfig(rate_hz=10, axis_mask=1, loop=0),
    }[name]


@pytest.mark.parametrize("state", [S.DISARMED, S.ARMED, S.RUNNING, S.KILLED])
def test_every_request_in_every_state_is_answered_per_the_legality_table(state):
    for spec in M.MESSAGES.values():
        if spec.sender != "host" or spec.cls is M.Keepalive:
            continue
        w = in_state(state)
        reply = w.request(_sample(spec.name, w.fw))
        expected = LEGALITY.get(spec.name, {}).get(state)
        if expected is not None:
            assert isinstance(reply, M.Refuse), (spec.name, state, reply)
            assert reply.code == expected and reply.refused_type == spec.type_id
            assert reply.detail == int(state)
            assert w.fw.state == state  # a refused request changes nothing
        else:
            assert not (isinstance(reply, M.Refuse) and reply.code in
                        (RC.WRONG_STATE, RC.BUSY, RC.KILL_LATCHED)), (spec.name, state, reply)


def test_unknown_device_malformed_and_foreign_major_frames_are_refused():
    w = in_state(S.ARMED)
    r = w.request(M.UnknownMessage(0x7E, b"\x01\x02"))
    assert r.code == RC.UNKNOWN_TYPE and r.detail == 0x7E
    r = w.request(M.Ack(acked_type=1, state=0))
    assert r.code == RC.NOT_A_REQUEST
    # SettingWrite with a 3-byte payload (needs 6)
    r = w.request(M.UnknownMessage(0x14, b"\x01\x00\x00"))
    assert r.code == RC.MALFORMED
    seq = w.send(M.Hello(host_name="x"), version=0x20)
    w.tick()
    f = [f for f in w.frames if f.seq == seq and f.flags & M.FLAG_REPLY][-1]
    # protocol/SPEC.md 10: detail = the frame's major (it was the whole version byte, 0x20)
    assert f.msg.code == RC.VERSION and f.msg.detail == 2 and f.version == codec.VERSION_BYTE
    assert w.fw.state == S.ARMED
    # a Kill with a short payload is still a kill (never refused), by the operator
    r = w.request(M.UnknownMessage(0x40, b""))
    assert isinstance(r, M.Ack) and w.fw.state == S.KILLED
    trip = [e for e in w.events if e.kind == EK.KILL_TRIPPED][-1]
    assert trip.reason == M.KillReason.HOST_OPERATOR and trip.value == 0.0  # was reason 0


def test_a_kill_of_another_major_is_executed_and_other_frames_of_it_refused():
    # protocol/SPEC.md 11.1 step 2: type 0x40 is Kill in every major; it was refused VERSION
    w = in_state(S.RUNNING)
    seq = w.send(M.Kill(reason=M.KillReason.HOST_LINK, value=0.0), version=0x21)
    w.tick()
    f = [f for f in w.frames if f.seq == seq and f.flags & M.FLAG_REPLY][-1]
    assert isinstance(f.msg, M.Ack) and f.msg.state == S.KILLED
    assert f.version == codec.VERSION_BYTE and w.fw.state == S.KILLED
    trip = [e for e in w.events if e.kind == EK.KILL_TRIPPED][-1]
    assert trip.reason == M.KillReason.HOST_OPERATOR
    seq = w.send(M.KillClear(), version=0x00)
    w.tick()
    f = [f for f in w.frames if f.seq == seq and f.flags & M.FLAG_REPLY][-1]
    assert f.msg.code == RC.VERSION and f.msg.detail == 0 and w.fw.state == S.KILLED


def test_checks_run_in_the_order_of_the_spec():
    # protocol/SPEC.md 11.1: the type is checked before the payload (a device type with an
    # empty payload is NOT_A_REQUEST), and the payload before the reply cache (a malformed retry
    # whose seq and type are cached was answered from the cache)
    w = in_state(S.DISARMED)
    r = w.request(M.UnknownMessage(M.BY_CLASS[M.Telemetry].type_id, b""))
    assert r.code == RC.NOT_A_REQUEST and r.detail == M.BY_CLASS[M.Telemetry].type_id
    kp = setting_id(w.fw, "roll.rate.kp")
    seq = w.seq
    assert isinstance(w.request(M.SettingRead(setting_id=kp)), M.SettingValue)
    r = w.request(M.UnknownMessage(M.BY_CLASS[M.SettingRead].type_id, b"\x01"),
                  flags=M.FLAG_RETRY, seq=seq)
    assert isinstance(r, M.Refuse) and r.code == RC.MALFORMED and r.detail == 0
    assert w.fw.stats["replies_from_cache"] == 0
    # a request carrying FLAG_REPLY and reserved flag bits is served as any request
    r = w.request(M.SettingRead(setting_id=kp), flags=0xFD)
    assert isinstance(r, M.SettingValue)


def test_garbage_bytes_do_not_disturb_the_board():
    w = in_state(S.ARMED)
    rng = np.random.default_rng(5)
    w.send_raw(rng.integers(0, 256, 5000, dtype=np.uint8).tobytes())
    w.keepalive()
    w.tick(10)
    assert w.fw.state == S.ARMED
    assert isinstance(w.request(M.Hello(host_name="again")), M.HelloReply)


# ------------------------------------------------------------------ retries


def test_retry_is_answered_from_the_cache_and_never_executed_twice():
    w = in_state(S.ARMED)
    seq = w.seq
    first = w.request(relay(duration_s=10))
    assert isinstance(first, M.Ack)
    n_started = w.kinds().count(EK.EXPERIMENT_STARTED)
    again = w.request(relay(duration_s=10), flags=M.FLAG_RETRY, seq=seq)
    assert again == first
    assert w.kinds().count(EK.EXPERIMENT_STARTED) == n_started == 1
    assert w.fw.stats["replies_from_cache"] == 1
    # the same seq WITHOUT the retry flag is a new request: executed (and refused: BUSY)
    r = w.request(relay(duration_s=10), seq=seq)
    assert isinstance(r, M.Refuse) and r.code == RC.BUSY
    # a retry whose original never arrived is executed
    r = w.request(M.ExperimentStop(tag=7), flags=M.FLAG_RETRY, seq=5000)
    assert isinstance(r, M.Ack) and w.fw.state == S.ARMED


def test_refusals_are_never_cached():
    # protocol/SPEC.md 9: a refused request executed nothing, so its retry is executed again;
    # the cached refusal was sent back, and the board stayed unarmable for that seq
    w = in_state(S.KILLED)
    seq = w.seq
    assert w.request(M.ArmRequest()).code == RC.KILL_LATCHED
    w.request(M.KillClear())
    r = w.request(M.ArmRequest(), flags=M.FLAG_RETRY, seq=seq)
    assert isinstance(r, M.ArmChallenge)
    # a refused new request of a cached seq also drops the older reply of that seq
    w = in_state(S.DISARMED)
    seq = w.seq
    first = w.request(M.ArmRequest())
    w.request(M.KillClear())
    w.request(M.Kill(reason=1, value=0.0))
    assert w.request(M.ArmRequest(), seq=seq).code == RC.KILL_LATCHED
    w.request(M.KillClear())
    again = w.request(M.ArmRequest(), flags=M.FLAG_RETRY, seq=seq)
    assert isinstance(again, M.ArmChallenge) and again.token != first.token


def test_retried_setting_write_is_not_applied_twice_and_hello_clears_the_cache():
    w = in_state(S.DISARMED)
    kp = setting_id(w.fw, "roll.rate.kp")
    seq = w.send(M.SettingWrite(setting_id=kp, value=0.7))
    w.tick()
    w.fw.set_setting("roll.rate.kp", 0.2)  # changed meanwhile by someone else
    w.request(M.SettingWrite(setting_id=kp, value=0.7), flags=M.FLAG_RETRY, seq=seq)
    assert w.fw.settings.get("roll.rate.kp") == pytest.approx(0.2)
    w.request(M.Hello(host_name="new session"))
    w.request(M.SettingWrite(setting_id=kp, value=0.7), flags=M.FLAG_RETRY, seq=seq)
    assert w.fw.settings.get("roll.rate.kp") == pytest.approx(0.7)


def test_a_retry_of_another_type_is_executed_not_answered_from_the_cache():
    # protocol/SPEC.md 11.1 step 7: a cached reply answers only a retry of the same seq AND type
    w = in_state(S.DISARMED)
    w.keepalive()
    w.tick()
    ch = w.request(M.ArmRequest())
    seq = w.seq
    ack = w.request(M.ArmConfirm(response=ch.token ^ 0xFFFFFFFF, operator_confirmed=1))
    assert isinstance(ack, M.Ack) and w.fw.state == S.ARMED
    kp = setting_id(w.fw, "roll.rate.kp")
    r = w.request(M.SettingRead(setting_id=kp), flags=M.FLAG_RETRY, seq=seq)
    assert isinstance(r, M.SettingValue) and r.setting_id == kp
    assert r.value == pytest.approx(w.fw.settings.get("roll.rate.kp"))
    assert w.fw.stats["replies_from_cache"] == 0


def test_a_kill_is_never_answered_from_the_cache():
    # a Kill whose seq meets a cached reply of another request is executed; so is a retry of
    # a Kill already executed (every kill acts, protocol/SPEC.md 12.2)
    w = in_state(S.RUNNING)
    seq = w.seq
    ok = w.request(M.ExperimentAdjust(tag=7, amplitude=0.06, hysteresis=0, bias=0))
    assert isinstance(ok, M.Ack) and ok.state == S.RUNNING
    r = w.request(M.Kill(reason=M.KillReason.HOST_MONITOR, value=2.0), flags=M.FLAG_RETRY,
                  seq=seq)
    assert isinstance(r, M.Ack) and r.acked_type == M.BY_CLASS[M.Kill].type_id
    assert r.state == S.KILLED and w.fw.state == S.KILLED
    assert all(v == 0.0 for v in w.fw.outputs.values())
    assert w.kinds().count(EK.KILL_TRIPPED) == 1
    # the same Kill again (same seq, same type, retry flag): executed again, another trip
    r = w.request(M.Kill(reason=M.KillReason.HOST_MONITOR, value=2.0), flags=M.FLAG_RETRY,
                  seq=seq)
    assert isinstance(r, M.Ack) and r.state == S.KILLED
    assert w.kinds().count(EK.KILL_TRIPPED) == 2
    assert w.fw.stats["replies_from_cache"] == 0
    # after a clear and a new arming, a retried Kill of an old seq still kills
    w.request(M.KillClear())
    assert isinstance(w.arm(), M.Ack)
    w.request(M.Kill(reason=M.KillReason.HOST_OPERATOR, value=0.0), flags=M.FLAG_RETRY, seq=seq)
    assert w.fw.state == S.KILLED


# ------------------------------------------------------------------ arming interlock


def test_arming_interlock():
    # protocol/SPEC.md 12.3: INTERLOCK's detail says which condition failed (it was 0)
    w = in_state(S.DISARMED)
    w.keepalive()
    r = w.request(M.ArmConfirm(response=0, operator_confirmed=1))
    assert (r.code, r.detail) == (RC.INTERLOCK, 1)  # no challenge
    ch = w.request(M.ArmRequest())
    r = w.request(M.ArmConfirm(response=ch.token, operator_confirmed=1))
    assert (r.code, r.detail) == (RC.INTERLOCK, 3)  # wrong response
    r = w.request(M.ArmConfirm(response=ch.token ^ 0xFFFFFFFF, operator_confirmed=1))
    assert (r.code, r.detail) == (RC.INTERLOCK, 1)  # token used up by the refused confirm
    ch = w.request(M.ArmRequest())
    r = w.request(M.ArmConfirm(response=ch.token ^ 0xFFFFFFFF, operator_confirmed=0))
    assert (r.code, r.detail) == (RC.INTERLOCK, 4)  # operator did not confirm
    ch = w.request(M.ArmRequest())
    for _ in range(int(ch.valid_ms) + 5):  # expired (link time advances with the ticks)
        w.keepalive()
        w.tick()
    r = w.request(M.ArmConfirm(response=ch.token ^ 0xFFFFFFFF, operator_confirmed=1))
    assert (r.code, r.detail) == (RC.INTERLOCK, 2)
    ch = w.request(M.ArmRequest())
    silent = int(w.fw.settings.get("watchdog_s") * 1000) + 5
    w.tick(silent)  # host silent too long
    r = w.request(M.ArmConfirm(response=ch.token ^ 0xFFFFFFFF, operator_confirmed=1))
    assert r.code == RC.NO_KEEPALIVE and r.detail == pytest.approx(silent + 1, abs=2)  # ms
    assert w.fw.state == S.DISARMED
    assert isinstance(w.arm(), M.Ack) and w.fw.state == S.ARMED
    assert w.kinds()[-1] == EK.STATE_CHANGED


def test_any_host_frame_satisfies_the_arming_keepalive_condition():
    # protocol/SPEC.md 12.3: a busy host that sends requests and no Keepalive (SPEC 12.1) arms
    w = in_state(S.DISARMED)
    ch = w.request(M.ArmRequest())
    for _ in range(15):
        w.tick(99)
        w.request(M.SettingRead(setting_id=1))  # 1.5 s of requests, watchdog_s is 1 s
    r = w.request(M.ArmConfirm(response=ch.token ^ 0xFFFFFFFF, operator_confirmed=1))
    assert isinstance(r, M.Ack) and r.state == S.ARMED
# ------------------------------------------------------------------ kill


@pytest.mark.parametrize("state", [S.DISARMED, S.ARMED, S.RUNNING, S.KILLED])
def test_kill_request_works_in_every_state(state):
    w = in_state(state)
    n = len(w.events)
    r = w.request(M.Kill(reason=M.KillReason.HOST_MONITOR, value=1.25))
    assert isinstance(r, M.Ack) and r.state == S.KILLED
    assert w.fw.state == S.KILLED
    assert all(v == 0.0 for v in w.fw.outputs.values())
    assert w.fw.plant("roll").u_eff == 0.0  # the plant got zero in the same tick
    new = w.events[n:]
    tripped = [e for e in new if e.kind == EK.KILL_TRIPPED]
    assert len(tripped) == 1 and tripped[0].reason == M.KillReason.HOST_MONITOR
    assert tripped[0].value == pytest.approx(1.25)
    # the reply comes before the events it causes
    idx_reply = next(i for i, f in enumerate(w.frames) if f.msg is r)
    idx_event = next(i for i, f in enumerate(w.frames) if f.msg is tripped[0])
    assert idx_reply < idx_event


@pytest.mark.parametrize("state", [S.DISARMED, S.ARMED, S.RUNNING, S.KILLED])
def test_kill_button_works_in_every_state(state):
    w = in_state(state)
    w.fw.press_kill_button()
    w.tick()
    assert w.fw.state == S.KILLED
    assert all(v == 0.0 for v in w.fw.outputs.values())
    assert w.events[-1].kind in (EK.KILL_TRIPPED, EK.STATE_CHANGED)
    assert any(e.kind == EK.KILL_TRIPPED and e.reason == M.KillReason.KILL_BUTTON
               for e in w.events)


def test_kill_is_latched_until_cleared():
    w = in_state(S.KILLED)
    assert w.request(M.ArmRequest()).code == RC.KILL_LATCHED
    assert w.request(M.Disarm()).state == S.KILLED
    w.request(M.Hello(host_name="x"))
    assert w.fw.state == S.KILLED
    r = w.request(M.KillClear())
    assert r.state == S.DISARMED and w.fw.state == S.DISARMED
    assert w.kinds()[-2:] == [EK.KILL_CLEARED, EK.STATE_CHANGED]
    assert isinstance(w.arm(), M.Ack)


def test_threshold_crossing_zeroes_outputs_in_the_same_tick():
    w = in_state(S.ARMED)
    fw = w.fw
    w.request(relay(amplitude=0.4, duration_s=10, kill_rate_rad_s=0.1))
    last_y = None
    for _ in range(3000):
        w.keepalive()
        w.tick()
        if fw.state == S.KILLED:
            break
        last_y = fw.level_signals("roll", "rate")[1]
    assert fw.state == S.KILLED
    ev = [e for e in w.events if e.kind == EK.KILL_TRIPPED][-1]
    assert ev.reason == M.KillReason.RATE_LIMIT and ev.axis == M.Axis.ROLL
    assert abs(ev.value) > 0.1 and ev.threshold == pytest.approx(0.1)
    assert abs(last_y) <= 0.1  # the tick before was still inside: it tripped at first crossing
    assert fw.outputs["roll"] == 0.0
    assert fw.plant("roll").u_eff == 0.0  # zero applied to the plant in the tripping tick
    assert EK.EXPERIMENT_FINISHED in w.kinds()
    fin = [e for e in w.events if e.kind == EK.EXPERIMENT_FINISHED][-1]
    assert fin.reason == M.FinishReason.KILLED


def test_saturation_time_kill():
    w = in_state(S.ARMED)
    fw = w.fw
    _raise_kill_settings(fw)
    w.request(relay(amplitude=1.5, duration_s=10, kill_saturation_s=0.25, kill_rate_rad_s=50,
                    kill_angle_rad=3))
    start = w.t
    while fw.state == S.RUNNING and w.t - start < 2:
        w.keepalive()
        w.tick()
    ev = [e for e in w.events if e.kind == EK.KILL_TRIPPED][-1]
    assert ev.reason == M.KillReason.SATURATION_TIME
    assert ev.value == pytest.approx(0.25, abs=2 * fw.ts)


def test_keepalive_loss_trips_the_watchdog_within_timeout_plus_one_tick():
    w = in_state(S.ARMED)
    fw = w.fw
    wd = fw.settings.get("watchdog_s")
    for _ in range(2000):  # keepalives every 100 ms keep it alive for 2 s
        if int(round(w.t * 1000)) % 100 == 0:
            w.keepalive()
        w.tick()
    assert fw.state == S.ARMED
    w.keepalive()
    w.tick()
    last_rx = w.t - fw.ts  # link time of the tick that handled the keepalive
    while fw.state == S.ARMED:
        w.tick()
    killed_at = w.t - fw.ts
    assert wd < killed_at - last_rx <= wd + fw.ts + 1e-9
    assert w.kinds()[-3:] == [EK.WATCHDOG_EXPIRED, EK.KILL_TRIPPED, EK.STATE_CHANGED]
    assert all(v == 0.0 for v in fw.outputs.values())


def test_watchdog_does_nothing_while_disarmed():
    w = in_state(S.DISARMED)
    w.tick(3000)
    assert w.fw.state == S.DISARMED


LOOSE = {"kill_angle_rad": 3.0, "kill_rate_rad_s": 50.0, "kill_heave_m": 2.5,
         "kill_saturation_s": 20.0}


def _raise_kill_settings(fw: Firmware) -> None:
    """The owner's ceilings up to LOOSE: an experiment can only tighten a kill.* setting."""
    for field, value in LOOSE.items():
        fw.set_setting("kill." + field[len("kill_"):], value)


def _run_until_killed(fw: Firmware, ticks: int = 5000):
    for _ in range(ticks):
        fw.tick(0.0)
        if fw.state == S.KILLED:
            break
    assert fw.state == S.KILLED
    return [e for e in fw.events if e.kind == EK.KILL_TRIPPED][-1]


@pytest.mark.parametrize("scenario, axis, loop, field, reason", [
    ("single-axis", M.Axis.ROLL, M.Loop.RATE, "kill_rate_rad_s", M.KillReason.RATE_LIMIT),
    ("single-axis", M.Axis.ROLL, M.Loop.ANGLE, "kill_angle_rad", M.KillReason.ANGLE_LIMIT),
    ("heave-rail", M.Axis.HEAVE, M.Loop.HEAVE, "kill_heave_m", M.KillReason.HEAVE_LIMIT),
    ("tf-fopdt", M.Axis.ROLL, M.Loop.RATE, "kill_rate_rad_s", M.KillReason.RATE_LIMIT),
    ("tf-integrating", M.Axis.ROLL, M.Loop.ANGLE, "kill_angle_rad", M.KillReason.ANGLE_LIMIT),
])
def test_each_measured_kill_threshold_trips_on_its_own_axis(scenario, axis, loop, field, reason):
    # protocol/SPEC.md 12.2: with only one threshold tight, a relay on the level trips exactly
    # that one, on that axis, at the first sample beyond it (the relay's setpoint of 0.1 takes
    # the measurement past 0.02 on every level)
    fw = Firmware(scenario, seed=3)
    _raise_kill_settings(fw)
    fw.arm_now()
    limits = dict(LOOSE, **{field: 0.02})
    fw.start_experiment(relay(axis=axis, loop=loop, amplitude=0.3, setpoint=0.1, duration_s=5,
                              **limits))
    ev = _run_until_killed(fw)
    assert (ev.reason, ev.axis) == (reason, axis)
    assert abs(ev.value) > 0.02 and ev.threshold == pytest.approx(0.02)
    assert abs(ev.value) < 0.2  # the first crossing, not long after


def test_the_height_threshold_counts_from_the_height_at_the_experiment_start():
    # protocol/SPEC.md 12.2: |height - height at start| > kill heave threshold. Lift the frame
    # 0.5 m, hold it, then start a relay with a 5 cm threshold: an absolute check would trip at
    # once with 0.5 m
    fw = Firmware("heave-rail", seed=2)
    _raise_kill_settings(fw)
    fw.arm_now()
    fw.start_experiment(M.ExperimentStart(
        tag=3, kind=M.ExperimentKind.STEP, axis=M.Axis.HEAVE, loop=M.Loop.HEAVE,
        amplitude=0.5, step_at_s=0.1, duration_s=6.0, **LOOSE))
    for _ in range(8000):
        fw.tick(0.0)
    assert fw.state == S.ARMED and fw.level_signals("heave", "heave")[1] > 0.4
    fw.start_experiment(relay(axis=M.Axis.HEAVE, loop=M.Loop.HEAVE, amplitude=0.3,
                              duration_s=5, tag=4, **dict(LOOSE, kill_heave_m=0.05)))
    fw.tick(0.0)
    assert fw.state == S.RUNNING
    ev = _run_until_killed(fw)
    assert ev.reason == M.KillReason.HEAVE_LIMIT
    assert 0.05 < abs(ev.value) < 0.1


def test_the_kill_settings_apply_where_the_experiment_gives_zero():
    fw = Firmware("single-axis", seed=3)
    fw.set_setting("kill.rate_rad_s", 0.1)
    fw.arm_now()
    fw.start_experiment(relay(amplitude=0.3, duration_s=5))  # every threshold 0
    ev = _run_until_killed(fw)
    assert ev.reason == M.KillReason.RATE_LIMIT and ev.threshold == pytest.approx(0.1)


def test_an_experiment_cannot_loosen_the_kill_settings():
    # protocol/SPEC.md 12.2: a threshold above the kill.* setting is capped at it; 1e30 was
    # taken as asked and the body could leave the stand's range without a trip
    fw = Firmware("single-axis", seed=3)
    fw.set_setting("kill.rate_rad_s", 0.1)
    fw.arm_now()
    fw.start_experiment(relay(amplitude=0.3, duration_s=5, kill_rate_rad_s=1e30))
    ev = _run_until_killed(fw)
    assert ev.reason == M.KillReason.RATE_LIMIT and ev.threshold == pytest.approx(0.1)
    assert abs(ev.value) < 0.2  # at the first crossing of the setting


def test_a_host_message_without_a_handler_stops_the_import(monkeypatch):
    # the server's dispatch table is built from the message table (protocol/messages.py)
    from mock_device.firmware import server
    handlers = dict(server._handlers)
    del handlers[M.SettingRead]
    monkeypatch.setattr(server, "_handlers", handlers)
    with pytest.raises(ImportError, match="without a handler: \\['SettingRead'\\]"):
        server._dispatch_table()


def test_stuck_sensor_is_detected_in_every_state():
    fw = Firmware("single-axis", seed=2)
    fw.schedule_stuck_sensor("roll", 0.2)
    w = Wire(fw)
    w.tick(200 + STUCK_TICKS + 2)
    assert fw.state == S.KILLED
    ev = [e for e in w.events if e.kind == EK.KILL_TRIPPED][-1]
    assert ev.reason == M.KillReason.SENSOR_FAULT


# ------------------------------------------------------------------ experiments


def test_relay_duration_limit_and_event_order():
    w = in_state(S.ARMED)
    n = len(w.events)
    r = w.request(relay(amplitude=0.05, duration_s=0.5))
    assert r.state == S.RUNNING
    for _ in range(600):
        w.keepalive()
        w.tick()
    assert w.fw.state == S.ARMED
    assert w.kinds()[n:] == [EK.EXPERIMENT_STARTED, EK.STATE_CHANGED, EK.EXPERIMENT_FINISHED,
                             EK.STATE_CHANGED]
    fin = [e for e in w.events if e.kind == EK.EXPERIMENT_FINISHED][-1]
    assert fin.reason == M.FinishReason.DURATION_LIMIT and fin.tag == 7
    assert fin.time_us == pytest.approx(500_000 + w.events[n].time_us, abs=2000)


def test_experiment_parameters_are_checked():
    w = in_state(S.ARMED)
    for bad, code in [(relay(amplitude=0.0), RC.BAD_PARAMETER),
                      (relay(amplitude=float("nan")), RC.BAD_PARAMETER),
                      (relay(duration_s=0.0), RC.BAD_PARAMETER),
                      (relay(tag=0), RC.BAD_PARAMETER),
                      (relay(kill_rate_rad_s=-1.0), RC.BAD_PARAMETER),
                      (relay(axis=M.Axis.HEAVE), RC.UNSUPPORTED),
                      (relay(loop=M.Loop.HEAVE), RC.UNSUPPORTED),
                      (dataclasses.replace(relay(), kind=9), RC.UNSUPPORTED),
                      (dataclasses.replace(relay(), kind=M.ExperimentKind.STEP, step_at_s=6.0),
                       RC.BAD_PARAMETER)]:
        r = w.request(bad)
        assert isinstance(r, M.Refuse) and r.code == code, (bad, r)
    assert w.fw.state == S.ARMED


def test_experiment_refusals_name_the_offending_field():
    # protocol/SPEC.md 11.3: Refuse.detail = the field's position in the byte table (it was 0)
    w = in_state(S.ARMED)
    for bad, code, detail in [
            (relay(tag=0), RC.BAD_PARAMETER, 0),
            (dataclasses.replace(relay(), kind=9), RC.UNSUPPORTED, 1),
            (relay(axis=M.Axis.HEAVE, tag=0), RC.UNSUPPORTED, 2),  # UNSUPPORTED comes first
            (relay(loop=M.Loop.HEAVE), RC.UNSUPPORTED, 3),
            (relay(amplitude=-1.0), RC.BAD_PARAMETER, 4),
            (relay(bias=float("inf"), duration_s=-1.0), RC.BAD_PARAMETER, 6),
            (relay(duration_s=0.0), RC.BAD_PARAMETER, 9),
            (dataclasses.replace(relay(), kind=M.ExperimentKind.STEP, step_at_s=-0.1),
             RC.BAD_PARAMETER, 8),
            (relay(kill_heave_m=-0.1), RC.BAD_PARAMETER, 12),
            (relay(kill_saturation_s=float("nan")), RC.BAD_PARAMETER, 13)]:
        r = w.request(bad)
        assert isinstance(r, M.Refuse) and (r.code, r.detail) == (code, detail), (bad, r)
    assert w.fw.state == S.ARMED
    # ExperimentAdjust of an experiment that is not a relay: BAD_PARAMETER on the tag (it was
    # UNSUPPORTED); the spec names no relay running as a bad tag
    w.request(M.ExperimentStart(tag=5, kind=M.ExperimentKind.HOLD, axis=M.Axis.ROLL,
                                loop=M.Loop.RATE, duration_s=10))
    r = w.request(M.ExperimentAdjust(tag=5, amplitude=0.1, hysteresis=0.0, bias=0.0))
    assert (r.code, r.detail) == (RC.BAD_PARAMETER, 0)


def test_experiment_stop_with_another_tag_changes_nothing():
    # protocol/SPEC.md 11.2: acknowledged with the state unchanged (the board stopped it)
    w = in_state(S.RUNNING)
    n = len(w.events)
    r = w.request(M.ExperimentStop(tag=8))
    assert isinstance(r, M.Ack) and r.state == S.RUNNING and w.fw.state == S.RUNNING
    w.keepalive()
    w.tick(5)
    assert len(w.events) == n
    r = w.request(M.ExperimentStop(tag=0))  # 0 means "whatever runs"
    assert r.state == S.ARMED and w.fw.state == S.ARMED
    assert w.events[-2].kind == EK.EXPERIMENT_FINISHED


def test_state_changed_and_watchdog_events_carry_the_running_tag():
    # protocol/SPEC.md 13.5: STATE_CHANGED names the tag running after the change (it sent 0 on
    # entering RUNNING); WATCHDOG_EXPIRED names the tag running when it expired (it sent 0)
    w = in_state(S.RUNNING)
    started = [e for e in w.events if e.kind == EK.STATE_CHANGED][-1]
    assert started.state == S.RUNNING and started.tag == 7
    while w.fw.state == S.RUNNING:
        w.tick()
    expired = [e for e in w.events if e.kind == EK.WATCHDOG_EXPIRED][-1]
    assert expired.tag == 7
    killed = [e for e in w.events if e.kind == EK.STATE_CHANGED][-1]
    assert killed.state == S.KILLED and killed.tag == 0


def test_relay_adjust_changes_the_amplitude():
    w = in_state(S.RUNNING)
    r = w.request(M.ExperimentAdjust(tag=7, amplitude=0.2, hysteresis=0.01, bias=0.0))
    assert isinstance(r, M.Ack)
    w.keepalive()
    w.tick(3)
    assert abs(w.fw.level_signals("roll", "rate")[2]) == pytest.approx(0.2)
    assert w.request(M.ExperimentAdjust(tag=8, amplitude=0.2, hysteresis=0,
                                        bias=0)).code == RC.BAD_PARAMETER


def test_step_on_the_angle_loop_settles_at_the_new_setpoint():
    w = in_state(S.ARMED, "gimbal-quad")
    fw = w.fw
    w.request(M.ExperimentStart(tag=3, kind=M.ExperimentKind.STEP, axis=M.Axis.ROLL,
                                loop=M.Loop.ANGLE, amplitude=0.1, step_at_s=0.2, duration_s=4))
    ys = []
    for _ in range(3500):
        if len(ys) % 100 == 0:
            w.keepalive()
        w.tick()
        ys.append(fw.level_signals("roll", "angle"))
    r = np.array([s[0] for s in ys])
    y = np.array([s[1] for s in ys])
    assert r[100] == 0.0 and r[300] == pytest.approx(0.1)
    assert np.mean(y[-500:]) == pytest.approx(0.1, abs=0.01)
    assert fw.state == S.RUNNING


def test_heave_hold_finds_the_hover_trim():
    # a climb-rate PI under a height P loop holds the frame; in steady state the thrust command
    # equals the hover command (m*g - wind)/F (Newton's second law; common practice, no source)
    sc = load_scenario("heave-rail")
    sc = dataclasses.replace(sc, heave=dataclasses.replace(sc.heave, gust_std_n=0.0))
    w = Wire(Firmware(sc, seed=4))
    w.tick()
    w.arm()
    fw = w.fw
    r = w.request(M.ExperimentStart(tag=4, kind=M.ExperimentKind.HOLD, axis=M.Axis.HEAVE,
                                    loop=M.Loop.HEAVE, setpoint=0.5, duration_s=40))
    assert isinstance(r, M.Ack)
    cmds = []
    for k in range(30000):
        if k % 100 == 0:
            w.keepalive()
        w.tick()
        cmds.append(fw.outputs["heave"])
    assert fw.state == S.RUNNING
    assert fw.plant("heave").h == pytest.approx(0.5, abs=0.01)
    assert np.mean(cmds[-5000:]) == pytest.approx(sc.hover_command(), rel=0.01)


def test_blocked_axis_winds_up_without_anti_windup_and_the_board_kills():
    # integral windup on a locked stand (common practice, no source): with back-calculation and
    # a huge tracking time (about no anti-windup) and no integrator clamp the integrator grows
    # without bound; with clamping it stays near the output limit. The saturation kill trips.
    def run(aw_mode, aw_tt, i_limit):
        w = in_state(S.DISARMED, "single-axis-locked")
        fw = w.fw
        fw.set_setting("kill.saturation_s", 3.0)  # the experiment's 3 s is not capped
        fw.set_setting("roll.rate.aw_mode", aw_mode)
        fw.set_setting("roll.rate.aw_tt", aw_tt)
        fw.set_setting("roll.rate.i_limit", i_limit)
        w.arm()
        w.request(M.ExperimentStart(tag=5, kind=M.ExperimentKind.HOLD, axis=M.Axis.ROLL,
                                    loop=M.Loop.RATE, setpoint=1.0, duration_s=10,
                                    kill_saturation_s=3.0))
        imax = 0.0
        for k in range(4000):
            if k % 100 == 0:
                w.keepalive()
            w.tick()
            imax = max(imax, abs(fw.pid("roll", "rate").i))
        return fw, imax, w

    fw, wound, w = run(1, 100.0, 0.0)
    _, clamped, _ = run(0, 0.05, 0.0)
    assert fw.plant("roll").th == 0.0  # the lock held the body
    assert wound > 4.0 and clamped < 1.1  # out_limit is 1.0
    assert fw.state == S.KILLED
    ev = [e for e in w.events if e.kind == EK.KILL_TRIPPED][-1]
    assert ev.reason == M.KillReason.SATURATION_TIME


def test_armed_board_holds_level_against_its_bias_torque():
    w = in_state(S.ARMED, "single-axis")
    fw = w.fw
    for k in range(4000):
        if k % 100 == 0:
            w.keepalive()
        w.tick()
    assert fw.state == S.ARMED
    assert abs(fw.plant("roll").th) < 0.01


# ------------------------------------------------------------------ telemetry


def test_telemetry_at_the_requested_rate():
    w = in_state(S.ARMED, "gimbal-quad")
    assert isinstance(w.request(M.TelemetryConfig(rate_hz=250, axis_mask=0b101, loop=1)), M.Ack)
    n0 = len(w.telemetry)
    for k in range(1000):
        if k % 100 == 0:
            w.keepalive()
        w.tick()
    got = w.telemetry[n0:]
    assert len(got) == 250
    assert [s.axis for s in got[0].axes] == [0, 2]
    assert all(s.loop == M.Loop.ANGLE for s in got[0].axes)
    dt = np.diff([t.time_us for t in got])
    assert set(dt) == {4000}
    assert np.all(np.diff([t.counter for t in got]) == 1)
    r = w.request(M.TelemetryConfig(rate_hz=2000, axis_mask=1, loop=0))
    assert (r.code, r.detail) == (RC.BAD_PARAMETER, 0)


def test_telemetry_config_refuses_an_unknown_level_and_ignores_absent_axes():
    # protocol/SPEC.md 13.2: an unknown loop level is BAD_PARAMETER (it was acknowledged and
    # the outer loop reported); mask bits of absent axes are ignored (they were UNSUPPORTED)
    w = in_state(S.ARMED, "gimbal-quad")
    r = w.request(M.TelemetryConfig(rate_hz=100, axis_mask=1, loop=7))
    assert isinstance(r, M.Refuse) and (r.code, r.detail) == (RC.BAD_PARAMETER, 3)
    r = w.request(M.TelemetryConfig(rate_hz=100, axis_mask=0xFF, loop=0))
    assert isinstance(r, M.Ack)
    n0 = len(w.telemetry)
    w.tick(30)
    assert len(w.telemetry) > n0
    assert [s.axis for s in w.telemetry[-1].axes] == [0, 1, 2]


def test_a_telemetry_sample_is_stamped_with_the_tick_of_its_values():
    # protocol/SPEC.md 13.2: the sample of tick k carries t_k, the time of that tick's events;
    # it carried t_k+1, so the sample stamped with a kill's time still showed live outputs
    w = in_state(S.RUNNING, "gimbal-quad")
    w.request(M.TelemetryConfig(rate_hz=1000, axis_mask=0b111, loop=0))
    w.keepalive()
    w.tick(20)
    w.request(M.Kill(reason=M.KillReason.HOST_OPERATOR, value=0.0))
    w.tick(3)
    trip = [e for e in w.events if e.kind == EK.KILL_TRIPPED][-1]
    at = [t for t in w.telemetry if t.time_us == trip.time_us]
    before = [t for t in w.telemetry if t.time_us < trip.time_us]
    assert len(at) == 1 and at[0].state == S.KILLED
    assert all(a.output == 0.0 for a in at[0].axes)
    assert before[-1].state == S.RUNNING and trip.time_us - before[-1].time_us == 1000


def test_telemetry_reports_the_experiment_level_and_relay_state():
    w = in_state(S.ARMED, "gimbal-quad")
    w.request(M.TelemetryConfig(rate_hz=1000, axis_mask=0b11, loop=0))
    w.request(relay(axis=M.Axis.PITCH, loop=M.Loop.ANGLE, amplitude=0.3, tag=12))
    w.keepalive()
    w.tick(50)
    t = w.telemetry[-1]
    assert t.tag == 12 and t.state == S.RUNNING
    pitch = [s for s in t.axes if s.axis == M.Axis.PITCH][0]
    roll = [s for s in t.axes if s.axis == M.Axis.ROLL][0]
    assert pitch.loop == M.Loop.ANGLE and pitch.relay in (1, -1)
    assert abs(pitch.output) == pytest.approx(0.3, rel=1e-6)
    assert roll.loop == M.Loop.RATE and roll.relay == 0


# ------------------------------------------------------------------ determinism


def test_same_seed_same_run_and_other_seed_other_noise():
    def trace(seed):
        fw = Firmware("gimbal-quad", seed=seed)
        fw.arm_now()
        fw.start_experiment(relay(amplitude=0.1, duration_s=5))
        out = []
        for _ in range(500):
            fw.tick(0.0)
            out.append(fw.level_signals("roll", "rate")[1])
        return out

    assert trace(3) == trace(3)
    assert trace(3) != trace(4)
    assert not any(math.isnan(v) for v in trace(3))


def test_cross_coupling_disturbs_the_other_axis():
    # the coupling matrix feeds 3 % of the roll torque into pitch (gimbal-quad.toml); without it
    # the held pitch axis only sees its own noise
    def pitch_excursion(coupled: bool) -> float:
        sc = load_scenario("gimbal-quad")
        if not coupled:
            sc = dataclasses.replace(sc, coupling=None)
        fw = Firmware(sc, seed=6)
        fw.arm_now()
        fw.start_experiment(relay(amplitude=0.5, duration_s=5, kill_rate_rad_s=50,
                                  kill_angle_rad=3))
        worst = 0.0
        for _ in range(2000):
            fw.tick(0.0)
            worst = max(worst, abs(fw.plant("pitch").w))
        return worst

    assert pitch_excursion(True) > 3 * pitch_excursion(False)


def test_scenario_faults_are_applied(tmp_path):
    text = (load_scenario("single-axis").source and
            open(load_scenario("single-axis").source).read())
    f = tmp_path / "faulty.toml"
    f.write_text(text.replace('name = "single-axis"', 'name = "faulty"')
                 + '\n[faults]\nstuck = "roll@0.1"\nblock = "roll"\n')
    fw = Firmware(str(f))
    assert fw.plant("roll").blocked
    w = Wire(fw)
    w.tick(100 + STUCK_TICKS + 2)
    assert fw.state == S.KILLED


def test_disarm_while_running_ends_the_experiment_then_disarms():
    w = in_state(S.RUNNING)
    n = len(w.events)
    r = w.request(M.Disarm())
    assert r.state == S.DISARMED and w.fw.state == S.DISARMED
    assert w.kinds()[n:] == [EK.EXPERIMENT_FINISHED, EK.STATE_CHANGED]
    assert w.events[n].reason == M.FinishReason.DISARMED
    assert all(e.state == S.DISARMED for e in w.events[n:])
    assert all(v == 0.0 for v in w.fw.outputs.values())


def test_a_sensor_still_stuck_after_a_clear_trips_again():
    fw = Firmware("single-axis", seed=2)
    fw.schedule_stuck_sensor("roll", 0.0)
    w = Wire(fw)
    w.tick(STUCK_TICKS + 5)
    assert fw.state == S.KILLED
    n_trips = w.kinds().count(EK.KILL_TRIPPED)
    w.tick(50)
    assert w.kinds().count(EK.KILL_TRIPPED) == n_trips  # no event storm while killed
    w.request(M.KillClear())
    w.tick(2)
    assert fw.state == S.KILLED  # still stuck: the board refuses to stay cleared


@pytest.mark.parametrize("name, value", [("heave.heave.b", 0.0), ("heave.heave.kp", 1.5),
                                         ("heave.rate.ff", 0.3)])
def test_writing_gains_to_a_running_loop_is_bumpless(name, value):
    # Bumpless parameter change (Astrom & Hagglund 1995, PID Controllers; value from memory):
    # the integrator absorbs the step of the feed-forward and proportional terms. Without it,
    # setpoint weight b = 0 on the height loop jumps the output by kp * height at once (seen as
    # a kill on the heave stand when tuned gains were written).
    fw = Firmware("heave-rail", seed=1)
    fw.set_setting("heave.heave.ki", 0.2)
    fw.set_setting("heave.heave.i_limit", 2.0)
    fw.set_setting("heave.rate.i_limit", 1.0)
    fw.arm_now()
    # lift the frame 0.5 m off the bottom stop with a step on the height loop; afterwards the
    # board holds it there (with b = 0 the jump would be kp * 0.5 m)
    fw.start_experiment(M.ExperimentStart(
        tag=3, kind=M.ExperimentKind.STEP, axis=M.Axis.HEAVE, loop=M.Loop.HEAVE,
        amplitude=0.5, setpoint=0.0, step_at_s=0.1, duration_s=6.0))
    for _ in range(8000):  # the step, then 2 s of hold
        fw.tick(0.0)
    assert fw.state == S.ARMED and fw.level_signals("heave", "heave")[1] > 0.4
    level = name.split(".")[1]
    _, _, u_before = fw.level_signals("heave", level)
    fw.set_setting(name, value)
    fw.tick(0.0)
    _, _, u_after = fw.level_signals("heave", level)
    assert abs(u_after - u_before) < 0.02, (u_before, u_after)


def test_an_unknown_quirk_is_refused_by_name():
    with pytest.raises(ValueError, match="unknown board quirk.*no-such-thing.*known: "):
        Firmware("single-axis", quirks={"no-such-thing"})
