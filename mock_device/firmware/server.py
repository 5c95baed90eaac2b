"""The board's protocol v1 server: frames from the host -> checks -> one handler per request.

Each frame is processed in the order of protocol/SPEC.md 11.1: a frame of another major is
refused VERSION, unless it is a Kill, which is executed (type 0x40 is Kill in every major);
every other intact frame refreshes the watchdog; unknown types, device-only types and payloads
that do not decode are refused, in that order (a Kill that does not decode is still a kill,
with reason HOST_OPERATOR); a Keepalive has no reply; a retry of the same seq and type is
answered from the reply cache (section 9), except a Kill, which is executed every time it
arrives (a kill done twice is harmless, a kill skipped is not); a request not legal in the
present state is refused by the rule of the legality table (``protocol.describe.refusal_in``);
otherwise its handler checks its own parameters, replies and acts. A reply precedes the events
its request causes. Only replies that report something done are cached: refusals and a Kill's
Ack never are, and every request that gets this far drops the cached reply of its seq.

The handlers are found through :data:`HANDLERS`, built from the message table
(protocol/messages.py): one entry per message the host sends, so a message added to the table
without a handler here stops the import with the name of what is missing.

The server calls the board (``board.py``, its underscore methods are the package's internal
commands) for everything that changes the device's state; it owns the decoder, the reply cache,
the arming token and the times of the last host frames (the board's watchdog reads them).
"""

from __future__ import annotations

import math
from collections import OrderedDict
from collections.abc import Callable

from protocol import codec
from protocol import messages as M
from protocol.describe import refusal_in
from protocol.messages import DeviceState, FinishReason, KillReason, RefuseCode

from .axes import LOOP_ID, NO_AXIS
from .experiment import Refusal, check_adjust, check_request

FIRMWARE_VERSION = "tetherloop-mock 0.1.0"
ARM_TOKEN_VALID_MS = 3000
REPLY_CACHE_SIZE = 16  # protocol/SPEC.md section 9
CAPABILITIES = (M.Capability.RELAY | M.Capability.STEP | M.Capability.HOLD
                | M.Capability.PERSIST | M.Capability.KILL_BUTTON
                | M.Capability.BACK_CALCULATION | M.Capability.RELAY_ADJUST)
_KILL = M.BY_CLASS[M.Kill].type_id
# ArmConfirm refusals: Refuse.detail of INTERLOCK (protocol/SPEC.md 12.3)
NO_TOKEN, TOKEN_EXPIRED, WRONG_RESPONSE, NOT_CONFIRMED = 1, 2, 3, 4


class ReplyCache:
    """The last REPLY_CACHE_SIZE replies by request seq, with the request's type id
    (protocol/SPEC.md 9). A reply answers a retry only of the same seq AND type: after the host's
    seq has wrapped, or under a new session, a seq can meet the cached reply of another request.
    """

    def __init__(self, size: int = REPLY_CACHE_SIZE):
        self._size = size
        self._entries: OrderedDict[int, tuple[int, bytes]] = OrderedDict()

    def store(self, seq: int, type_id: int, reply: bytes) -> None:
        """Cache a reply; it replaces any entry of the same seq; the oldest entries go."""
        self._entries[seq] = (type_id, reply)
        self._entries.move_to_end(seq)
        while len(self._entries) > self._size:
            self._entries.popitem(last=False)

    def lookup(self, seq: int, type_id: int, seq_only: bool = False) -> bytes | None:
        """The cached reply that answers a retry of (seq, type_id), or None. ``seq_only`` is
        the test-only quirk that ignores the type."""
        hit = self._entries.get(seq)
        return hit[1] if hit is not None and (seq_only or hit[0] == type_id) else None

    def discard(self, seq: int) -> None:
        """Forget the reply cached under ``seq`` (a new request of that seq is executed)."""
        self._entries.pop(seq, None)

    def clear(self) -> None:
        self._entries.clear()


_Handler = Callable[["ProtocolServer", codec.Frame, object], None]
_handlers: dict[type, _Handler] = {}


def handles(cls: type) -> Callable[[_Handler], _Handler]:
    """Register the decorated method as the handler of host message ``cls``."""
    def deco(fn: _Handler) -> _Handler:
        assert cls not in _handlers, f"two handlers for {cls.__name__}"
        _handlers[cls] = fn
        return fn
    return deco


class ProtocolServer:
    """Serves the host's requests for one board (``fw``, a :class:`~.board.Firmware`)."""

    def __init__(self, fw, rng):
        self.fw = fw
        self._rng = rng  # draws the arming tokens
        self.decoder = codec.StreamDecoder()
        self.pending: list = []  # frames received, handled at the next tick
        self.cache = ReplyCache()
        self.token: int | None = None  # the arming token issued and not yet used
        self._token_expiry = 0.0
        self.last_rx_link = -math.inf  # link time of the last intact host frame (watchdog)
        self.prev_rx_link = -math.inf  # ... and of the one before (arming needs it recent)
        self._drop_next = False  # test-only quirk "drop-frame-after-oversize"

    def receive(self, data: bytes) -> None:
        if data:
            before = self.decoder.stats.oversize
            frames = self.decoder.feed(data)
            if "drop-frame-after-oversize" in self.fw.quirks:
                if self.decoder.stats.oversize != before:
                    self._drop_next = True
                if frames and self._drop_next:
                    self._drop_next = False
                    frames = frames[1:]
            self.pending.extend(frames)

    def handle_pending(self) -> None:
        frames, self.pending = self.pending, []
        for f in frames:
            self.handle(f)

    def handle(self, frame) -> None:
        """protocol/SPEC.md 11.1, steps 2-12; a reply that reports something done is cached
        under the request's seq and type (section 9)."""
        fw = self.fw
        fw.stats["frames_in"] += 1
        out = fw.outbox
        out.begin_request()
        cacheable = False
        try:
            cacheable = self._process(frame)
        finally:
            deferred = out.end_request()
        if cacheable and out.last_reply:
            self.cache.store(frame.seq, frame.type_id, out.last_reply)
        for data in deferred:
            out.queue(data)

    def _process(self, frame) -> bool:
        """Steps 2-12 of SPEC.md 11.1; True when the reply sent may be cached."""
        fw = self.fw
        if frame.major != M.PROTOCOL_MAJOR:  # step 2
            if frame.type_id == _KILL:  # a Kill of any major is executed, never refused
                self._on_kill(frame, M.Kill(reason=KillReason.HOST_OPERATOR, value=0.0))
            else:
                self._refuse(frame, RefuseCode.VERSION,
                             f"protocol major {frame.major} not supported; device speaks "
                             f"{M.PROTOCOL_MAJOR}.{M.PROTOCOL_MINOR}", frame.major)
            return False
        self.prev_rx_link = self.last_rx_link  # step 3: any intact frame of our major
        self.last_rx_link = fw.link_time
        spec = M.MESSAGES.get(frame.type_id)
        if spec is None:  # step 4
            self._refuse(frame, RefuseCode.UNKNOWN_TYPE,
                         f"unknown message type 0x{frame.type_id:02x}", frame.type_id)
            return False
        if spec.sender != "host":  # step 5
            self._refuse(frame, RefuseCode.NOT_A_REQUEST,
                         f"{spec.name} is sent by a device, not accepted by one", frame.type_id)
            return False
        msg = frame.msg
        if msg is None:  # step 6
            if spec.cls is not M.Kill:
                self._refuse(frame, RefuseCode.MALFORMED, frame.error or "malformed payload")
                return False
            reason = 0 if "malformed-kill-reason-zero" in fw.quirks else KillReason.HOST_OPERATOR
            msg = M.Kill(reason=reason, value=0.0)  # never refused
        if isinstance(msg, M.Keepalive):  # step 7
            return False
        if frame.flags & M.FLAG_RETRY and spec.cls is not M.Kill:  # step 8: a kill always acts
            cached = self.cache.lookup(frame.seq, frame.type_id,
                                       seq_only="cache-seq-only" in fw.quirks)
            if cached is not None:
                fw.stats["replies_from_cache"] += 1
                fw.outbox.queue(cached)
                return False
        fw.stats["requests"] += 1
        self.cache.discard(frame.seq)  # executed anew: an older reply of this seq is stale
        if spec.cls is M.Kill:  # step 9
            self._on_kill(frame, msg)
            return False
        code = refusal_in(spec, fw.state)  # step 10
        if code == RefuseCode.BUSY and "busy-as-wrong-state" in fw.quirks:
            code = RefuseCode.WRONG_STATE
        if code is not None:
            st = fw.state
            text = {RefuseCode.KILL_LATCHED: "a kill is latched: send kill_clear first",
                    RefuseCode.BUSY: "an experiment is running: stop it first"}.get(
                        code, f"{spec.name} not legal in state {st.name}")
            self._refuse(frame, code, text, int(st))
            return False
        HANDLERS[spec.cls](self, frame, msg)  # steps 11-12
        return not fw.outbox.last_reply_refused

    # -- replies

    def _reply(self, frame, msg) -> None:
        self.fw.outbox.send(msg, frame.seq, reply=True)

    def _refuse(self, frame, code: RefuseCode, text: str, detail: int = 0) -> None:
        self.fw.stats["refused"] += 1
        self._reply(frame, M.Refuse(refused_type=frame.type_id & 0xFF, code=int(code),
                                    detail=detail & 0xFFFFFFFF, text=text[:64]))

    def _refuse_with(self, frame, refusal: Refusal) -> None:
        self._refuse(frame, refusal.code, refusal.text, refusal.detail)

    def _ack(self, frame, state: DeviceState | None = None) -> None:
        """Ack with the state now, or with the state the request leads to (the reply precedes
        the request's events)."""
        st = self.fw.state if state is None else state
        self._reply(frame, M.Ack(acked_type=frame.type_id, state=int(st)))

    # -- handlers, one per host message of the table

    @handles(M.Hello)
    def _on_hello(self, frame, msg) -> None:
        fw = self.fw
        self.cache.clear()
        caps = CAPABILITIES
        axes = tuple(M.AxisInfo(a.axis_id, sum(1 << LOOP_ID[lv] for lv in a.levels))
                     for a in sorted(fw.controllers, key=lambda x: x.axis_id))
        self._reply(frame, M.HelloReply(
            device_id=fw.scenario.device_id[:64], firmware_version=FIRMWARE_VERSION,
            protocol_major=M.PROTOCOL_MAJOR, protocol_minor=M.PROTOCOL_MINOR,
            loop_rate_hz=fw.loop_rate_hz, capabilities=int(caps),
            setting_count=len(fw.settings), axes=axes))

    @handles(M.Kill)
    def _on_kill(self, frame, msg) -> None:
        """Executed in every state and every major; a reason the board does not know is
        executed and echoed as it came."""
        reason = msg.reason
        name = KillReason(reason).name.lower() if reason in KillReason._value2member_map_ \
            else f"reason {reason}"
        self.fw._kill(reason, msg.value, 0.0, NO_AXIS, f"host kill: {name}")
        self._ack(frame)

    @handles(M.SettingDescribe)
    def _on_setting_describe(self, frame, msg) -> None:
        defs = self.fw.settings.defs
        if not 0 <= msg.index < len(defs):
            self._refuse(frame, RefuseCode.UNKNOWN_SETTING,
                         f"no setting at index {msg.index}; indexes 0..{len(defs) - 1}",
                         msg.index)
            return
        d = defs[msg.index]
        self._reply(frame, M.SettingInfo(index=d.index, setting_id=d.setting_id, name=d.name,
                                         type=int(d.type), unit=d.unit, minimum=d.minimum,
                                         maximum=d.maximum, default=d.default, flags=d.flags))

    @handles(M.SettingRead)
    def _on_setting_read(self, frame, msg) -> None:
        settings = self.fw.settings
        d = settings.by_id.get(msg.setting_id)
        if d is None:
            self._refuse(frame, RefuseCode.UNKNOWN_SETTING, f"no setting with id {msg.setting_id}",
                         msg.setting_id)
            return
        self._reply(frame, M.SettingValue(setting_id=d.setting_id, value=settings.values[d.name]))

    @handles(M.SettingWrite)
    def _on_setting_write(self, frame, msg) -> None:
        fw = self.fw
        d = fw.settings.by_id.get(msg.setting_id)
        if d is None:
            self._refuse(frame, RefuseCode.UNKNOWN_SETTING, f"no setting with id {msg.setting_id}",
                         msg.setting_id)
            return
        if d.flags & M.SettingFlags.READ_ONLY:
            self._refuse(frame, RefuseCode.READ_ONLY, f"{d.name} is read-only", d.setting_id)
            return
        if d.flags & M.SettingFlags.DISARMED_ONLY and fw.state != DeviceState.DISARMED:
            self._refuse(frame, RefuseCode.WRONG_STATE, f"{d.name} may only be written while "
                         f"disarmed", int(fw.state))
            return
        err = fw.settings.check(d, msg.value)
        if err and "accept-above-maximum" in fw.quirks and msg.value > d.maximum:
            err = None
        if err:
            self._refuse(frame, RefuseCode.OUT_OF_BOUNDS, err, d.setting_id)
            return
        fw.settings.values[d.name] = float(msg.value)
        fw._apply_setting(d.name)
        self._reply(frame, M.SettingValue(setting_id=d.setting_id,
                                          value=fw.settings.values[d.name]))

    @handles(M.SettingsPersist)
    def _on_settings_persist(self, frame, msg) -> None:
        fw = self.fw
        values = dict(fw.settings.values)
        if fw.on_persist is not None:
            try:
                fw.on_persist(values)  # the store file (see mock_device.store)
            except OSError as exc:
                self._refuse(frame, RefuseCode.STORAGE, f"persist failed: {exc}")
                return
        fw.persisted = values  # the mock's non-volatile copy
        self._ack(frame)

    @handles(M.ArmRequest)
    def _on_arm_request(self, frame, msg) -> None:
        fw = self.fw
        self.token = int(self._rng.integers(1, 0xFFFFFFFF))
        self._token_expiry = fw.link_time + ARM_TOKEN_VALID_MS / 1000.0
        self._reply(frame, M.ArmChallenge(token=self.token, valid_ms=ARM_TOKEN_VALID_MS))

    @handles(M.ArmConfirm)
    def _on_arm_confirm(self, frame, msg) -> None:
        fw = self.fw
        token, self.token = self.token, None  # one confirm per token, accepted or refused
        if token is None:
            self._refuse(frame, RefuseCode.INTERLOCK, "no arming challenge: send arm_request",
                         NO_TOKEN)
            return
        if fw.link_time > self._token_expiry:
            self._refuse(frame, RefuseCode.INTERLOCK, "arming token expired: request a new one",
                         TOKEN_EXPIRED)
            return
        if msg.response != (token ^ 0xFFFFFFFF):
            self._refuse(frame, RefuseCode.INTERLOCK, "wrong response to the arming token",
                         WRONG_RESPONSE)
            return
        if msg.operator_confirmed != 1 and "arm-ignores-operator-flag" not in fw.quirks:
            self._refuse(frame, RefuseCode.INTERLOCK, "operator did not confirm the cautions",
                         NOT_CONFIRMED)
            return
        quiet = fw.link_time - self.prev_rx_link  # any host frame counts (SPEC.md 12.3)
        if quiet > fw.settings.values["watchdog_s"]:
            self._refuse(frame, RefuseCode.NO_KEEPALIVE,
                         "no host frame within watchdog_s before arming: send keepalives",
                         min(int(quiet * 1000), 0xFFFFFFFF) if math.isfinite(quiet)
                         else 0xFFFFFFFF)
            return
        self._ack(frame, DeviceState.ARMED)
        fw._arm()

    @handles(M.Disarm)
    def _on_disarm(self, frame, msg) -> None:
        fw = self.fw
        after = fw.state if fw.state in (DeviceState.DISARMED, DeviceState.KILLED) \
            else DeviceState.DISARMED
        self._ack(frame, after)
        fw.disarm()

    @handles(M.ExperimentStart)
    def _on_experiment_start(self, frame, msg) -> None:
        fw = self.fw
        refusal = check_request(msg, fw.axis_by_id, CAPABILITIES)
        if refusal is not None:
            self._refuse_with(frame, refusal)
            return
        self._ack(frame, DeviceState.RUNNING)
        fw._begin_experiment(msg)

    @handles(M.ExperimentStop)
    def _on_experiment_stop(self, frame, msg) -> None:
        fw = self.fw
        e = fw.exp
        stops = e is not None and (msg.tag in (0, e.tag) or "stop-any-tag" in fw.quirks)
        self._ack(frame, DeviceState.ARMED if stops else fw.state)
        if stops:  # its tag or 0; another tag changes nothing (protocol/SPEC.md 11.2)
            fw._finish(FinishReason.STOPPED)

    @handles(M.ExperimentAdjust)
    def _on_experiment_adjust(self, frame, msg) -> None:
        e = self.fw.exp
        refusal = check_adjust(msg, e, CAPABILITIES)
        if refusal is not None:
            self._refuse_with(frame, refusal)
            return
        e.amplitude, e.hysteresis, e.bias = msg.amplitude, msg.hysteresis, msg.bias
        self._ack(frame)

    @handles(M.KillClear)
    def _on_kill_clear(self, frame, msg) -> None:
        fw = self.fw
        after = DeviceState.DISARMED if fw.state == DeviceState.KILLED else fw.state
        self._ack(frame, after)
        fw.clear_kill()

    @handles(M.TelemetryConfig)
    def _on_telemetry_config(self, frame, msg) -> None:
        fw = self.fw
        limit = telemetry_limit_hz(fw)
        if msg.rate_hz > limit:
            self._refuse(frame, RefuseCode.BAD_PARAMETER,
                         f"rate_hz {msg.rate_hz} above this board's limit {limit}", 0)
            return
        if msg.loop not in M.Loop._value2member_map_:
            self._refuse(frame, RefuseCode.BAD_PARAMETER, f"loop level {msg.loop} unknown", 3)
            return
        # bits of axes the board lacks are ignored (protocol/SPEC.md 13.2)
        fw.configure_telemetry(msg.rate_hz, tuple(a.name for a in fw.controllers
                                                  if msg.axis_mask & (1 << a.axis_id)),
                               msg.loop)
        self._ack(frame)


def _dispatch_table() -> dict[type, _Handler]:
    """Message class -> handler for every message the host sends (Keepalive has no reply and
    is handled in the processing steps); refuses to build if the table and the handlers
    disagree."""
    requests = [s.cls for s in M.MESSAGES.values()
                if s.sender == "host" and s.cls is not M.Keepalive]
    missing = [c.__name__ for c in requests if c not in _handlers]
    extra = [c.__name__ for c in _handlers if c not in requests]
    if missing or extra:
        raise ImportError(f"mock_device.firmware.server: host messages without a handler: "
                          f"{missing or 'none'}; handlers of no host message: {extra or 'none'}. "
                          f"Add an @handles method per host message of protocol/messages.py")
    return {c: _handlers[c] for c in requests}


HANDLERS = _dispatch_table()


def telemetry_limit_hz(fw) -> int:
    """The highest TelemetryConfig rate: the loop rate, or the read-only
    ``telemetry.max_rate_hz`` setting where it is lower (protocol/SPEC.md 13.2)."""
    cap = fw.settings.values.get("telemetry.max_rate_hz")
    return fw.loop_rate_hz if cap is None else min(fw.loop_rate_hz, int(cap))
