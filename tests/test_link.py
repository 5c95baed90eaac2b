"""Unit tests of agent.link against a scripted peer (no pty, no simulated physics).

``FakePeer`` sits on the far end of the simulated board's in-process port: every frame the
host writes is decoded, kept in ``frames`` and handed to ``respond(frame)``; the bytes it
returns go back to the host at once. ``push(data)`` sends unsolicited bytes (telemetry, events,
garbage); ``cut()`` makes the port fail like an unplugged adapter. pyserial's ``loop://`` URL
covers a port that Link opens (and owns) itself.
"""

from __future__ import annotations

import threading
import time
from typing import Callable, Iterable

import pytest

from agent.errors import LinkError, LinkTimeout
from agent.link import ForeignVersion, Link, open_port
from mock_device.transports import InprocLink
from protocol import cobs, codec
from protocol import messages as m


def wait_for(cond: Callable[[], object], timeout_s: float = 5.0) -> bool:
    """Poll ``cond`` until it is true or ``timeout_s`` passed; True if it became true."""
    end = time.monotonic() + timeout_s
    while time.monotonic() < end:
        if cond():
            return True
        time.sleep(0.002)
    return bool(cond())


def reply(frame: codec.Frame, msg) -> bytes:
    """The bytes of ``msg`` sent as the reply to ``frame``."""
    return codec.encode(msg, frame.seq, m.FLAG_REPLY)


def ack(frame: codec.Frame, state: int = m.DeviceState.DISARMED) -> bytes:
    return reply(frame, m.Ack(acked_type=frame.type_id, state=int(state)))


class FakePeer:
    """A serial-like port whose far end is a script (see the module docstring)."""

    def __init__(self, respond: Callable[[codec.Frame], Iterable[bytes] | None] | None = None):
        self._dev = InprocLink()
        self._host = self._dev.port
        self._host.timeout = 0.01  # the reader wakes often, so close() returns at once
        self.name = "fake-peer"
        self.respond = respond or (lambda frame: ())
        self.decoder = codec.StreamDecoder()
        self.frames: list[codec.Frame] = []

    # -- the host's side, shaped like serial.Serial
    @property
    def in_waiting(self) -> int:
        return self._host.in_waiting

    def read(self, size: int = 1) -> bytes:
        return self._host.read(size)

    def write(self, data: bytes) -> int:
        n = self._host.write(data)
        for frame in self.decoder.feed(self._dev.read()):
            self.frames.append(frame)
            for out in self.respond(frame) or ():
                self._dev.write(out)
        return n

    def close(self) -> None:
        self._host.close()

    # -- the script's side
    def push(self, data: bytes) -> None:
        self._dev.write(data)

    def cut(self) -> None:
        """Fail every later read and write of the host (OSError), as a pulled cable does."""
        self._host.is_open = False

    def of_type(self, cls) -> list[codec.Frame]:
        return [f for f in list(self.frames) if isinstance(f.msg, cls)]


def silent(frame):
    return ()


def ask(link: Link, msg, outcome: list, timeout_s: float = 30.0) -> None:
    """Thread body: one request with a long time-out; its reply or its exception -> outcome."""
    try:
        outcome.append(link.request(msg, timeout_s=timeout_s, retries=0))
    except Exception as exc:  # noqa: BLE001 - the test looks at what was raised
        outcome.append(exc)


@pytest.fixture
def links():
    """Factory: a Link over a FakePeer; every link is closed at the end of the test."""
    made: list[Link] = []

    def make(respond=None, **kw) -> tuple[Link, FakePeer]:
        peer = FakePeer(respond)
        kw.setdefault("timeout_s", 0.05)
        link = Link(peer, **kw)
        made.append(link)
        return link, peer

    yield make
    for link in made:
        link.close()


def telemetry(counter: int) -> m.Telemetry:
    return m.Telemetry(time_us=1000 * counter, counter=counter, state=int(m.DeviceState.ARMED),
                       tag=0, axes=(m.AxisSample(0, 0, 0.0, 0.25 * counter, 0.0, 0),))  # f32-exact


def event(kind=m.EventKind.STATE_CHANGED, state=m.DeviceState.ARMED) -> m.Event:
    return m.Event(time_us=5, kind=int(kind), state=int(state), reason=0, axis=255, value=0.0,
                   threshold=0.0, tag=0, text="armed")


# ---------------------------------------------------------------- request / response

def test_a_reply_is_matched_on_seq_and_a_stale_reply_is_ignored():
    held: list[codec.Frame] = []

    def respond(frame):
        if isinstance(frame.msg, m.SettingRead) and frame.msg.setting_id == 1:
            held.append(frame)  # never answered in time
            return ()
        if isinstance(frame.msg, m.SettingRead):
            # the first request's reply arrives late, just before this request's own reply
            return [reply(held[0], m.SettingValue(setting_id=1, value=111.0)),
                    reply(frame, m.SettingValue(setting_id=2, value=222.0))]
        return ()

    peer = FakePeer(respond)
    with Link(peer, timeout_s=0.05, retries=0) as link:
        with pytest.raises(LinkTimeout):
            link.request(m.SettingRead(setting_id=1))
        got = link.request(m.SettingRead(setting_id=2))
        assert got == m.SettingValue(setting_id=2, value=222.0)
        assert link.stats.latency_ms_last >= 0.0
        assert link.latency_ms_median() >= 0.0


def test_a_frame_without_the_reply_flag_is_not_taken_as_the_reply(links):
    def respond(frame):
        if isinstance(frame.msg, m.SettingRead):
            # an event that happens to carry the request's seq, then the real reply
            return [codec.encode(event(), frame.seq),
                    reply(frame, m.SettingValue(setting_id=3, value=1.5))]
        return ()

    link, peer = links(respond)
    seen = []
    link.on_event(lambda t, ev: seen.append(ev))
    assert link.request(m.SettingRead(setting_id=3)).value == 1.5
    assert wait_for(lambda: seen == [event()])


def test_a_lost_reply_is_asked_again_with_the_retry_flag_and_the_same_seq(links):
    def respond(frame):  # drops the first try, answers the resend
        if isinstance(frame.msg, m.SettingWrite) and frame.flags & m.FLAG_RETRY:
            return [reply(frame, m.SettingValue(setting_id=7, value=2.0))]
        return ()

    link, peer = links(respond, retries=3)
    assert link.request(m.SettingWrite(setting_id=7, value=2.0)).value == 2.0
    tries = peer.of_type(m.SettingWrite)
    assert [f.flags for f in tries] == [0, m.FLAG_RETRY]
    assert tries[0].seq == tries[1].seq
    assert link.stats.retries == 1 and link.stats.timeouts == 0


def test_no_reply_raises_link_timeout_after_every_try(links):
    link, peer = links(silent, timeout_s=0.02, retries=2)
    with pytest.raises(LinkTimeout, match=r"no reply to Disarm from fake-peer after 3 tries over "
                       r".*: nothing arrived at all: is the board powered"):
        link.request(m.Disarm())
    tries = peer.of_type(m.Disarm)
    assert len(tries) == 3 and len({f.seq for f in tries}) == 1
    assert [f.flags for f in tries] == [0, m.FLAG_RETRY, m.FLAG_RETRY]
    assert link.stats.timeouts == 1 and link.stats.retries == 2
    # the per-call arguments win over the link's
    with pytest.raises(LinkTimeout, match="after 1 try "):
        link.request(m.Disarm(), retries=0)
    assert len(peer.of_type(m.Disarm)) == 4


def test_a_reply_in_another_major_version_is_handed_back_as_foreign(links):
    def respond(frame):
        if isinstance(frame.msg, m.Hello):
            return [codec.encode(m.Ack(acked_type=1, state=0), frame.seq, m.FLAG_REPLY,
                                 version=0x23)]
        return ()

    link, _ = links(respond)
    assert link.request(m.Hello(host_name="test")) == ForeignVersion(2, 3)
    assert link.stats.foreign_version == 1


# ---------------------------------------------------------------- keepalive and kill

def test_keepalives_go_out_at_their_period_until_close(links):
    link, peer = links(silent, keepalive_s=0.01)
    assert wait_for(lambda: len(peer.of_type(m.Keepalive)) >= 5)
    times = [f.msg.host_time_ms for f in peer.of_type(m.Keepalive)]
    assert times == sorted(times)
    # a request waiting for its reply does not hold the keepalives back
    outcome = []
    worker = threading.Thread(target=ask, args=(link, m.Disarm(), outcome), daemon=True)
    worker.start()
    assert wait_for(lambda: peer.of_type(m.Disarm))
    n = len(peer.of_type(m.Keepalive))
    assert wait_for(lambda: len(peer.of_type(m.Keepalive)) >= n + 3)
    assert not outcome
    link.close()
    assert not link._keeper.is_alive() and not link._reader.is_alive()
    # closing wakes the waiting request: it fails at once, as closed
    assert wait_for(lambda: outcome), "the request kept waiting after close()"
    assert isinstance(outcome[0], LinkError) and "closed" in str(outcome[0])


def test_send_kill_writes_at_once_and_resends_until_acknowledged(links):
    def respond(frame):  # the first kill frame is lost; the resend is acknowledged
        if isinstance(frame.msg, m.Kill) and frame.flags & m.FLAG_RETRY:
            return [ack(frame, m.DeviceState.KILLED)]
        return ()

    link, peer = links(respond)
    before = link.clock()
    sent_at = link.send_kill(m.KillReason.HOST_OPERATOR, 1.5)
    assert before <= sent_at <= link.clock()
    kills = peer.of_type(m.Kill)
    assert kills and kills[0].msg == m.Kill(reason=int(m.KillReason.HOST_OPERATOR), value=1.5)
    assert wait_for(lambda: not link._pending)  # the confirming thread saw the Ack and ended
    kills = peer.of_type(m.Kill)
    assert [f.flags for f in kills] == [0, m.FLAG_RETRY] and kills[0].seq == kills[1].seq


# ---------------------------------------------------------------- the reader

def test_telemetry_and_events_reach_subscribers_in_order_on_the_reader_thread(links):
    link, peer = links(silent)
    got = []
    link.on_telemetry(lambda t, tel: got.append((threading.current_thread().name, t, tel)))
    link.on_event(lambda t, ev: got.append((threading.current_thread().name, t, ev)))
    frames = [telemetry(1), telemetry(2), event(), telemetry(3)]
    start = link.clock()
    peer.push(b"".join(codec.encode(msg, 100 + i) for i, msg in enumerate(frames)))
    assert wait_for(lambda: len(got) == 4)
    assert [msg for _, _, msg in got] == frames
    assert {name for name, _, _ in got} == {"tetherloop-reader"}
    assert all(start <= t <= link.clock() for _, t, _ in got)
    assert (link.stats.telemetry, link.stats.events) == (3, 1)


def test_garbage_is_counted_and_the_next_frame_still_arrives(links):
    link, peer = links(silent)
    got = []
    link.on_telemetry(lambda t, tel: got.append(tel))
    good = codec.encode(telemetry(9), 1)
    peer.push(b"\x05garbage\x00" + good[:-3] + b"\x00" + good)  # junk, a truncated frame, a frame
    assert wait_for(lambda: got == [telemetry(9)])
    assert link.stats.bad_frames >= 1


def test_a_failing_subscriber_does_not_stop_the_reader(links):
    def respond(frame):
        if isinstance(frame.msg, m.SettingRead):
            return [reply(frame, m.SettingValue(setting_id=1, value=4.0))]
        return ()

    link, peer = links(respond)
    good = []

    def broken(t, tel):
        raise RuntimeError("a subscriber's bug")

    link.on_telemetry(broken)
    link.on_telemetry(lambda t, tel: good.append(tel))
    peer.push(codec.encode(telemetry(1), 1) + codec.encode(telemetry(2), 2))
    assert wait_for(lambda: len(good) == 2), "the reader died with the first subscriber error"
    assert link.request(m.SettingRead(setting_id=1)).value == 4.0
    assert link.stats.subscriber_errors == 2


# ---------------------------------------------------------------- lost and closed links

def test_a_lost_link_tells_subscribers_once_and_fails_requests(links):
    link, peer = links(silent)
    lost = []
    link.on_lost(lambda reason: lost.append(reason))
    peer.cut()
    assert wait_for(lambda: lost)
    assert lost == [link.lost_reason] and "read failed" in lost[0]
    with pytest.raises(LinkError, match=r"the link to fake-peer is lost \(read failed"):
        link.request(m.Disarm())
    with pytest.raises(LinkError, match="is lost"):
        link.send_kill(m.KillReason.HOST_OPERATOR)
    assert len(lost) == 1


def test_a_request_waiting_when_the_link_is_lost_raises_at_once(links):
    link, peer = links(silent)
    outcome = []
    worker = threading.Thread(target=ask, args=(link, m.Disarm(), outcome), daemon=True)
    worker.start()
    assert wait_for(lambda: peer.of_type(m.Disarm))
    peer.cut()
    assert wait_for(lambda: outcome, timeout_s=5.0), "the request kept waiting for its time-out"
    assert isinstance(outcome[0], LinkError) and not isinstance(outcome[0], LinkTimeout), \
        f"expected LinkError (lost), got {outcome[0]!r}"
    assert "lost" in str(outcome[0])


def test_a_failed_write_marks_the_link_lost():
    class Unplugged(FakePeer):
        def write(self, data):
            raise OSError(5, "Input/output error")

    peer = Unplugged()
    link = Link(peer, keepalive_s=30.0)
    try:
        with pytest.raises(LinkError, match=r"is lost \(write failed: .*Input/output error"):
            link.request(m.Disarm())
        assert link.lost_reason.startswith("write failed")
    finally:
        link.close()


def test_a_closed_link_refuses_requests_without_writing(links):
    link, peer = links(silent)
    link.close()
    n = len(peer.frames)
    with pytest.raises(LinkError, match="the link to fake-peer is closed"):
        link.request(m.Disarm())
    with pytest.raises(LinkError, match="is closed"):
        link.send(m.Keepalive(host_time_ms=0))
    assert len(peer.frames) == n
    assert link.lost_reason is None  # closing on purpose is not a lost link


# ---------------------------------------------------------------- ports Link opens itself

def test_over_loop_url_a_request_seeing_its_own_echo_times_out():
    # loop:// sends every written byte back: the echo has the request's seq but no FLAG_REPLY
    with Link("loop://", timeout_s=0.02, retries=1, keepalive_s=30.0) as link:
        got = []
        link.on_telemetry(lambda t, tel: got.append(tel))
        with pytest.raises(LinkTimeout):
            link.request(m.Disarm())
        link._ser.write(codec.encode(telemetry(4), 9))
        assert wait_for(lambda: got == [telemetry(4)])
        assert link.stats.frames_in >= 3  # the echoed requests were read and set aside
    with pytest.raises(LinkError, match="is closed"):
        link.request(m.Disarm())


@pytest.mark.parametrize("port, text", [
    ("/dev/tetherloop-no-such-port", r"does not exist.*tetherloop ports"),
    ("socket://127.0.0.1:1", r"nothing is listening"),
    ("nosuchscheme://x", r"could not open 'nosuchscheme://x'"),
    ("/tmp", r"could not open '/tmp'.*Is a directory"),  # errno 21 is not errno 2
])
def test_open_port_says_what_was_wrong_and_what_to_do(port, text):
    with pytest.raises(LinkError, match=text):
        open_port(port)


def test_open_port_passes_an_open_port_through():
    peer = FakePeer()
    assert open_port(peer) is peer


# ---------------------------------------------------------------- matching on seq and type

def test_a_reply_of_another_kind_with_the_requests_seq_is_counted_and_ignored(links):
    def respond(frame):
        if isinstance(frame.msg, m.SettingRead):
            return [ack(frame),  # an Ack is no answer to SettingRead (the message table)
                    reply(frame, m.SettingValue(setting_id=99, value=9.0)),  # another setting
                    reply(frame, m.Ack(acked_type=0x14, state=0)),  # an Ack of another type
                    reply(frame, m.SettingValue(setting_id=3, value=1.5))]
        return ()

    link, peer = links(respond)
    assert link.request(m.SettingRead(setting_id=3)) == m.SettingValue(setting_id=3, value=1.5)
    assert link.stats.wrong_replies == 3


def test_a_refusal_answers_only_the_request_it_names(links):
    def respond(frame):
        if isinstance(frame.msg, m.SettingsPersist):
            return [reply(frame, m.Refuse(refused_type=0x12, code=3, detail=0, text="other")),
                    reply(frame, m.Refuse(refused_type=0x15, code=15, detail=0, text="mine"))]
        return ()

    link, _ = links(respond)
    assert link.request(m.SettingsPersist()).text == "mine"
    assert link.stats.wrong_replies == 1


def test_a_kill_is_resent_until_its_own_ack_arrives(links):
    # A board that answers a retried Kill from its reply cache with another request's reply
    # (seq alone matched) must not end the resending: only an Ack of the Kill counts.
    answered = []

    def respond(frame):
        if not isinstance(frame.msg, m.Kill) or not frame.flags & m.FLAG_RETRY:
            return ()  # the first Kill frame is lost
        answered.append(frame)
        if len(answered) <= 2:
            return [reply(frame, m.SettingValue(setting_id=1, value=0.5)),
                    reply(frame, m.Ack(acked_type=0x12, state=0)),
                    reply(frame, m.Refuse(refused_type=0x40, code=3, detail=0, text=""))]
        return [ack(frame, m.DeviceState.KILLED)]

    link, peer = links(respond)
    link.send_kill(m.KillReason.HOST_MONITOR)
    assert wait_for(lambda: link.stats.kills_acknowledged == 1)
    assert wait_for(lambda: not link._pending)
    kills = peer.of_type(m.Kill)
    assert len(kills) == 4 and len({f.seq for f in kills}) == 1
    assert link.stats.wrong_replies == 6


def test_keepalives_do_not_advance_the_request_counter(links):
    def respond(frame):
        if isinstance(frame.msg, m.Disarm):
            return [ack(frame)]
        return ()

    link, peer = links(respond, keepalive_s=0.002)
    link.request(m.Disarm())
    n = len(peer.of_type(m.Keepalive))
    assert wait_for(lambda: len(peer.of_type(m.Keepalive)) >= n + 20)
    link.request(m.Disarm())
    first, second = (f.seq for f in peer.of_type(m.Disarm))
    assert second == (first + 1) & 0xFFFF
    ka = [f.seq for f in peer.of_type(m.Keepalive)]
    assert all(b == (a + 1) & 0xFFFF for a, b in zip(ka, ka[1:]))  # their own counter


def test_the_request_counter_wraps_and_replies_still_match(links):
    late = []

    def respond(frame):
        if isinstance(frame.msg, m.SettingRead):
            out = [reply(f, m.SettingValue(setting_id=f.msg.setting_id, value=-1.0))
                   for f in late]  # every earlier request's reply comes again, late
            late.append(frame)
            return out + [reply(frame, m.SettingValue(setting_id=frame.msg.setting_id,
                                                      value=float(frame.msg.setting_id)))]
        return ()

    link, peer = links(respond, first_seq=0xFFFE)
    got = [link.request(m.SettingRead(setting_id=i)).value for i in range(1, 5)]
    assert got == [1.0, 2.0, 3.0, 4.0]
    assert [f.seq for f in peer.of_type(m.SettingRead)] == [0xFFFE, 0xFFFF, 0, 1]
    assert link.stats.late_replies == 6


# ---------------------------------------------------------------- what a failed request saw

def damaged(msg, seq: int = 7) -> bytes:
    """A frame with one bit flipped inside: its COBS is sound, its CRC fails."""
    body = bytearray(cobs.decode(codec.encode(msg, seq, m.FLAG_REPLY)[:-1]))
    body[6] ^= 0x04
    return cobs.encode(bytes(body)) + b"\x00"


def test_giving_up_names_the_damaged_frames_that_arrived(links):
    def respond(frame):
        if isinstance(frame.msg, m.SettingRead):
            return [damaged(m.SettingValue(setting_id=1, value=2.0), frame.seq)] * 2
        return ()

    link, _ = links(respond, timeout_s=0.02, retries=3)
    with pytest.raises(LinkTimeout, match=r"no reply to SettingRead from fake-peer after 4 tries "
                       r"over .* s: 8 damaged frames arrived meanwhile \(8 CRC errors\): the "
                       r"link is corrupting data — check the cable") as err:
        link.request(m.SettingRead(setting_id=1))
    assert err.value.report.damaged_total == 8 and err.value.report.tries == 4


def test_giving_up_names_replies_of_another_kind(links):
    def respond(frame):
        if isinstance(frame.msg, m.SettingRead):
            return [ack(frame)]
        return ()

    link, peer = links(respond, timeout_s=0.02, retries=9)
    with pytest.raises(LinkTimeout, match=r"3 replies with its sequence number were of another "
                       r"kind \(Ack of 0x12\) and were ignored"):
        link.request(m.SettingRead(setting_id=1))
    assert len(peer.of_type(m.SettingRead)) == 3  # a board that never answers in kind


def test_giving_up_says_when_the_board_talks_but_does_not_answer(links):
    def respond(frame):
        if isinstance(frame.msg, m.SettingRead):
            return [codec.encode(telemetry(1), 5)]
        return ()

    link, _ = links(respond, timeout_s=0.02, retries=2)
    with pytest.raises(LinkTimeout, match=r"3 intact frames arrived meanwhile, none of them its "
                       r"answer"):
        link.request(m.SettingRead(setting_id=1))


def test_giving_up_after_the_boards_watchdog_killed_names_the_kill(links):
    def respond(frame):
        if isinstance(frame.msg, m.SettingRead) and not frame.flags & m.FLAG_RETRY:
            kill = m.Event(time_us=9, kind=int(m.EventKind.KILL_TRIPPED),
                           state=int(m.DeviceState.KILLED), reason=int(m.KillReason.WATCHDOG),
                           axis=255, value=1.2, threshold=1.0, text="keepalive watchdog expired")
            return [codec.encode(kill, 40)]
        return ()

    link, _ = links(respond, timeout_s=0.02, retries=2)
    with pytest.raises(LinkTimeout) as err:
        link.request(m.SettingRead(setting_id=1))
    text = str(err.value)
    assert text.startswith("the board on fake-peer killed while SettingRead waited for its "
                           "answer (its watchdog: no frame from the host reached it")
    assert "no reply to" not in text and "clear the kill" in text


def test_a_silent_link_is_given_up_early_and_then_tried_briefly(links):
    link, peer = links(silent, timeout_s=0.01, retries=1000)
    with pytest.raises(LinkTimeout, match="nothing arrived at all") as err:
        link.request(m.Disarm(), silent_s=0.2)
    assert err.value.report.elapsed_s >= 0.2 and err.value.report.tries < 100
    # the waits grow: 0.01 s, then 1.5 times longer each time, up to MAX_WAIT_S
    assert err.value.report.tries <= 8
    n = len(peer.of_type(m.Disarm))
    with pytest.raises(LinkTimeout):
        link.request(m.Disarm())  # still nothing since: one resend only
    assert len(peer.of_type(m.Disarm)) == n + 2


# ---------------------------------------------------------------- a lost link in one line

class FailingRead(FakePeer):
    """A peer whose reads fail with ``exc`` once ``armed`` is set."""

    def __init__(self, exc: BaseException):
        super().__init__()
        self.exc = exc
        self.armed = threading.Event()

    def read(self, size: int = 1) -> bytes:
        if self.armed.is_set():
            raise self.exc
        return super().read(size)


@pytest.mark.parametrize("exc, words", [
    # pyserial's socket:// wraps its own SerialException in a second "read failed: "
    (__import__("serial").SerialException("read failed: socket disconnected"),
     "read failed: the other end closed the connection"),
    (__import__("serial").SerialException("device reports readiness to read but returned no "
                                          "data (device disconnected or multiple access on "
                                          "port?)"),
     "read failed: the device is gone: the adapter was unplugged"),
    (OSError(5, "Input/output error"), "read failed: input/output error: the adapter was "
                                       "unplugged or lost power"),
])
def test_a_lost_link_is_one_clear_line(exc, words):
    peer = FailingRead(exc)
    link = Link(peer, keepalive_s=30.0)
    try:
        peer.armed.set()
        assert wait_for(lambda: link.lost_reason is not None)
        reason = link.lost_reason
        assert reason.startswith(words) and reason.count("read failed") == 1
        assert "\n" not in reason
        with pytest.raises(LinkError) as err:
            link.request(m.Disarm())
        assert str(err.value) == f"the link to fake-peer is lost ({reason})"
    finally:
        link.close()


# ---------------------------------------------------------------- the matching rule, by table

@pytest.mark.parametrize("spec", [s for s in m.MESSAGES.values() if s.sender == "host"
                                  and s.cls is not m.Keepalive], ids=lambda s: s.name)
def test_every_request_is_answered_only_by_the_replies_its_table_entry_lists(spec):
    from agent.replies import answers
    req = spec.cls()  # every host message has defaults for all its fields
    replies = [s for s in m.MESSAGES.values() if s.sender == "device"
               and s.cls not in (m.Telemetry, m.Event, m.Ack, m.Refuse)]
    for rs in replies:
        assert answers(req, rs.cls()) == (rs.name in spec.replies), (spec.name, rs.name)
    tid = spec.type_id
    assert answers(req, m.Ack(acked_type=tid)) == ("ack" in spec.replies)
    assert not answers(req, m.Ack(acked_type=(tid + 1) & 0xFF))
    assert answers(req, m.Refuse(refused_type=tid)) == (spec.cls is not m.Kill)
    assert not answers(req, m.Refuse(refused_type=(tid + 1) & 0xFF))
    assert not answers(req, m.UnknownMessage(0x7F, b""))
    assert answers(req, ForeignVersion(2, 0))


def test_an_echoed_setting_id_or_index_must_agree():
    from agent.replies import answers
    assert answers(m.SettingRead(setting_id=5), m.SettingValue(setting_id=5, value=1.0))
    assert not answers(m.SettingRead(setting_id=5), m.SettingValue(setting_id=6, value=1.0))
    # the value of a write's reply is what the board stored: it may differ (rounding)
    assert answers(m.SettingWrite(setting_id=5, value=0.1), m.SettingValue(setting_id=5, value=0.5))
    assert answers(m.SettingDescribe(index=2), m.SettingInfo(index=2))
    assert not answers(m.SettingDescribe(index=2), m.SettingInfo(index=3))
