"""The link and the session under faults: writes whose replies are lost, sets of writes that
fail part-way, a rollback that cannot be confirmed, settings discovery at 1 % byte loss, a
stall long enough for the board's watchdog to kill. The host's record of the board's settings
must never disagree with the board.

Two kinds of far end: ``DictBoard``, a scripted board over ``tests.test_link.FakePeer`` that
keeps a small settings table and can lose requests or replies on purpose; and the simulated
board in process, behind ``FaultyPort``, which loses the frames a test picks or stalls.
"""

from __future__ import annotations

import json
import threading
import time
from pathlib import Path
from typing import Callable

import pytest

from agent import operations
from agent.errors import LinkError
from agent.link import Link
from agent.plan import LoopPlan, Plan
from agent.session import DeviceRefused, Session
from agent.stand import KillTripped
from agent.workflows import LoopResult, LoopStatus
from mock_device.runner import start_mock
from protocol import codec
from protocol import messages as m
from protocol.messages import DeviceState, RefuseCode
from tests.test_link import FakePeer, ack, reply, wait_for

# ---------------------------------------------------------------- a scripted board


def f32(x: float) -> float:
    """``x`` as binary32, as the board stores it."""
    return codec.struct.unpack("<f", codec.struct.pack("<f", x))[0]


NAMES = ("roll.rate.kp", "roll.rate.ki", "roll.rate.kd")


class DictBoard:
    """A board with three settings (ids 1, 2, 3; bounds 0..10) that executes what arrives,
    answers retries from a (seq, type) reply cache as SPEC 9 says, and loses what the test
    says: ``lose_request(frame)`` drops a request before it is executed, ``lose_reply(frame)``
    drops its reply after it was executed."""

    def __init__(self):
        self.values = {1: 1.0, 2: 2.0, 3: 3.0}
        self.cache: dict[tuple[int, int], bytes] = {}
        self.lose_request: Callable[[codec.Frame], bool] = lambda f: False
        self.lose_reply: Callable[[codec.Frame], bool] = lambda f: False
        self.writes: list[tuple[int, float]] = []  # executed, in order

    def board_values(self) -> dict[str, float]:
        return {NAMES[i - 1]: v for i, v in self.values.items()}

    def respond(self, frame: codec.Frame):
        msg = frame.msg
        if isinstance(msg, m.Keepalive) or self.lose_request(frame):
            return ()
        key = (frame.seq, frame.type_id)
        if frame.flags & m.FLAG_RETRY and key in self.cache:
            out = self.cache[key]
        else:
            out = self._execute(frame, msg)
            self.cache[key] = out
        return () if self.lose_reply(frame) else [out]

    def _execute(self, frame, msg) -> bytes:
        if isinstance(msg, m.Hello):
            return reply(frame, m.HelloReply(
                device_id="dict-board", firmware_version="0", protocol_major=m.PROTOCOL_MAJOR,
                protocol_minor=0, loop_rate_hz=500, capabilities=0, setting_count=3,
                axes=(m.AxisInfo(0, 1),)))
        if isinstance(msg, m.SettingDescribe):
            return reply(frame, m.SettingInfo(index=msg.index, setting_id=msg.index + 1,
                                              name=NAMES[msg.index], type=0, unit="", minimum=0.0,
                                              maximum=10.0, default=1.0, flags=0))
        if isinstance(msg, m.SettingRead):
            return reply(frame, m.SettingValue(setting_id=msg.setting_id,
                                               value=self.values[msg.setting_id]))
        if isinstance(msg, m.SettingWrite):
            self.values[msg.setting_id] = f32(msg.value)
            self.writes.append((msg.setting_id, f32(msg.value)))
            return reply(frame, m.SettingValue(setting_id=msg.setting_id,
                                               value=self.values[msg.setting_id]))
        return ack(frame)


@pytest.fixture
def dict_board():
    """(session, board): a connected Session over a DictBoard with short waits."""
    board = DictBoard()
    link = Link(FakePeer(board.respond), timeout_s=0.02, retries=2)
    session = Session(link)
    session.connect()
    yield session, board
    link.close()


def writes_of(setting_id: int) -> Callable[[codec.Frame], bool]:
    return lambda f: isinstance(f.msg, m.SettingWrite) and f.msg.setting_id == setting_id


def agrees(session: Session, board: DictBoard) -> bool:
    """Every value the host records is the board's (unknown ones are not recorded)."""
    held = board.board_values()
    return all(held[k] == v for k, v in session.values.items())


# ---------------------------------------------------------------- single writes

def test_a_write_whose_reply_was_lost_is_read_back_and_recorded(dict_board):
    session, board = dict_board
    board.lose_reply = writes_of(1)  # executed, but no reply ever arrives
    assert session.write("roll.rate.kp", 4.5) == 4.5
    assert board.values[1] == 4.5 and session.values["roll.rate.kp"] == 4.5
    assert board.writes == [(1, 4.5)]  # executed once: the resends met the reply cache
    assert agrees(session, board)


def test_a_write_whose_request_was_lost_is_sent_again_after_the_read_back(dict_board):
    session, board = dict_board
    lost = []

    def first_write_lost(frame):  # every try of the first SettingWrite is lost
        if isinstance(frame.msg, m.SettingWrite) and (not lost or lost[0] == frame.seq):
            lost.append(frame.seq)
            return True
        return False

    board.lose_request = first_write_lost
    assert session.write("roll.rate.kp", 6.0) == 6.0
    assert board.writes == [(1, 6.0)] and session.values["roll.rate.kp"] == 6.0


def test_a_write_that_cannot_be_read_back_leaves_the_setting_unknown(dict_board):
    session, board = dict_board
    board.lose_reply = lambda f: isinstance(f.msg, (m.SettingWrite, m.SettingRead))
    with pytest.raises(LinkError, match=r"write roll\.rate\.kp = 7: no reply to SettingWrite .*"
                       r"could not be read back either, so what the board holds is unknown"):
        session.write("roll.rate.kp", 7.0)
    assert board.values[1] == 7.0  # it was executed; the host cannot know
    assert "roll.rate.kp" not in session.values and session.unknown == {"roll.rate.kp"}
    assert agrees(session, board)
    board.lose_reply = lambda f: False
    session.reread_unknown()
    assert session.values["roll.rate.kp"] == 7.0 and not session.unknown


# ---------------------------------------------------------------- sets of writes

def test_write_many_undoes_a_set_that_fails_part_way_and_says_what_the_board_holds(dict_board):
    session, board = dict_board
    board.lose_request = writes_of(3)  # the third write never reaches the board
    with pytest.raises(LinkError) as err:
        session.write_many({"roll.rate.kp": 5.0, "roll.rate.ki": 6.0, "roll.rate.kd": 7.0})
    text = str(err.value)
    assert text.startswith("writing roll.rate.kd failed: write roll.rate.kd = 7: no reply")
    assert ("the settings written before it were restored and read back; the board holds its "
            "previous values: roll.rate.kp=1, roll.rate.ki=2, roll.rate.kd=3") in text
    assert board.values == {1: 1.0, 2: 2.0, 3: 3.0}
    assert err.value.board.restored and err.value.board.unknown == ()
    assert session.values == board.board_values()


def test_write_many_on_a_link_that_dies_records_nothing_it_could_not_read(dict_board):
    session, board = dict_board
    dead = threading.Event()

    def lose(frame):
        if writes_of(3)(frame):
            dead.set()  # executed, its reply lost, and the link quiet from then on
        return dead.is_set()

    board.lose_reply = lose
    with pytest.raises(LinkError) as err:
        session.write_many({"roll.rate.kp": 5.0, "roll.rate.ki": 6.0, "roll.rate.kd": 7.0})
    assert "the set could not be restored" in str(err.value)
    assert err.value.board.unknown == NAMES and not err.value.board.restored
    # the undo did reach the board (only the replies are lost), but nothing could confirm it:
    # the host records none of the three
    assert board.writes[-3:] == [(3, 3.0), (2, 2.0), (1, 1.0)]
    assert agrees(session, board) and session.unknown == set(NAMES)


def test_write_many_undoes_a_set_the_board_refuses_part_way(dict_board):
    session, board = dict_board

    def respond(frame):
        if writes_of(2)(frame):
            return [reply(frame, m.Refuse(refused_type=0x14, code=int(RefuseCode.BUSY),
                                          detail=0, text="an experiment is running"))]
        return DictBoard.respond(board, frame)

    session.link._ser.respond = respond
    with pytest.raises(DeviceRefused, match=r"refused write roll\.rate\.ki: BUSY — an experiment "
                       r"is running \(the settings written before it were restored") as err:
        session.write_many({"roll.rate.kp": 5.0, "roll.rate.ki": 6.0})
    assert err.value.code == RefuseCode.BUSY
    assert board.values[1] == 1.0 and session.values == board.board_values()


# ---------------------------------------------------------------- the simulated board

class FaultyPort:
    """The host's end of the in-process port, with faults a test switches on: ``drop_out``
    decides for each frame the host writes whether it is lost; ``stall()`` holds both
    directions for a while (what was written meanwhile goes out after it, what the board sent
    arrives after it), as a stalled adapter does."""

    def __init__(self, port):
        self._port = port
        self.name = "faulty-port"
        self.drop_out: Callable[[codec.Frame], bool] = lambda f: False
        self._stalled_until = 0.0
        self._held: list[bytes] = []
        self._lock = threading.Lock()

    def stall(self, seconds: float) -> None:
        self._stalled_until = time.monotonic() + seconds

    def _stalled(self) -> bool:
        return time.monotonic() < self._stalled_until

    @property
    def in_waiting(self) -> int:
        return 0 if self._stalled() else self._port.in_waiting

    def read(self, size: int = 1) -> bytes:
        if self._stalled():
            time.sleep(0.005)
            return b""
        return self._port.read(size)

    def write(self, data: bytes) -> int:
        with self._lock:
            if self._stalled():
                self._held.append(data)
                return len(data)
            held, self._held = self._held, []
            for chunk in held:
                self._port.write(chunk)
            frames = codec.StreamDecoder().feed(data)
            if frames and self.drop_out(frames[0]):
                return len(data)
            return self._port.write(data)

    def close(self) -> None:
        self._port.close()


@pytest.fixture
def sim(tmp_path):
    """Factory: (stand, firmware, port) of the single-axis board in process behind a
    FaultyPort, with a session log open in tmp_path; closed at the end."""
    made = []

    def make(**faults):
        h = start_mock("single-axis", transport="inproc", speed=1.0, seed=3, faults=faults)
        h.port.timeout = 0.01
        port = FaultyPort(h.port)
        st = operations.connect(port, mock=h)
        made.append(st)
        operations.open_session(st, Plan(loops=(LoopPlan("roll", "rate"),)),
                                operations.Confirmation(operations.ConfirmedBy.FLAG),
                                str(tmp_path))
        return st, h.firmware, port

    yield make
    for st in made:
        operations.close(st, "test over")


def board_disagreements(st, fw) -> list[str]:
    return [k for k, v in st.session.values.items() if f32(fw.settings.values[k]) != v]


def test_the_manifest_records_what_the_board_holds_after_a_lost_reply(sim, tmp_path):
    st, fw, port = sim()
    st.link.timeout_s, st.link.retries = 0.02, 2
    # the write reaches the board, but every answer to it is lost on the way back
    real_take = st.link._take_reply

    def lose_write_replies(now, seq, msg):
        pend = st.link._pending.get(seq)
        if pend is not None and isinstance(pend.msg, m.SettingWrite):
            return
        real_take(now, seq, msg)

    st.link._take_reply = lose_write_replies
    assert st.session.write("roll.rate.kp", 0.37) == f32(0.37)  # confirmed by reading back
    st.link._take_reply = real_take
    assert f32(fw.settings.values["roll.rate.kp"]) == f32(0.37)
    assert board_disagreements(st, fw) == []
    path = Path(st.log.path)
    operations.close(st, "test over")
    manifest = json.loads((path / "manifest.json").read_text())
    after = manifest["settings_after"]
    assert after["roll.rate.kp"] == pytest.approx(f32(0.37), rel=1e-7)
    assert all(f32(fw.settings.values[k]) == pytest.approx(v, rel=1e-7) for k, v in after.items())


def test_a_rollback_that_cannot_be_confirmed_reports_the_boards_values(sim):
    st, fw, port = sim()
    st.link.timeout_s, st.link.retries = 0.02, 2
    ki_id = st.session.setting("roll.rate.ki").setting_id
    port.drop_out = lambda f: isinstance(f.msg, m.SettingWrite) and f.msg.setting_id == ki_id
    before = {k: st.session.values[k] for k in ("roll.rate.kp", "roll.rate.ki")}
    lr = LoopResult("roll.rate", "roll", "rate", "pid")
    lr.previous_gains = {"roll.rate.kp": 0.2, "roll.rate.ki": 3.0}
    assert operations.roll_back(st, lr, why="step missed") is False
    assert lr.status == LoopStatus.ROLLBACK_FAILED
    # the kp written first was undone; the board's values are in the message
    assert f32(fw.settings.values["roll.rate.kp"]) == before["roll.rate.kp"]
    assert lr.message.startswith("ROLLBACK FAILED: writing roll.rate.ki failed")
    assert (f"roll.rate.kp={before['roll.rate.kp']:.6g}, roll.rate.ki={before['roll.rate.ki']:.6g}"
            in lr.message)
    assert lr.message.endswith("(rolling back: step missed)")
    assert board_disagreements(st, fw) == []


def test_a_stall_that_lets_the_watchdog_kill_ends_as_the_watchdog_kill(sim):
    st, fw, port = sim()
    st.arm()
    assert fw.state == DeviceState.ARMED
    port.stall(1.5)  # longer than the board's watchdog_s (1 s): it kills
    value = st.session.read("roll.rate.kp")  # rides through the stall
    assert value == f32(fw.settings.values["roll.rate.kp"])
    assert fw.state == DeviceState.KILLED
    assert wait_for(lambda: st.killed)
    with pytest.raises(KillTripped, match="KILL: watchdog") as err:
        st.check_kill()
    assert err.value.info["origin"] == "device"


@pytest.mark.parametrize("seed", [1, 2, 3])
def test_settings_discovery_survives_one_percent_byte_loss_both_ways(seed):
    h = start_mock("single-axis", transport="inproc", speed=5.0, seed=seed,
                   faults={"loss": 0.01})
    h.port.timeout = 0.01
    # a board left streaming by an earlier session: connect turns its telemetry off first
    h.firmware.configure_telemetry(500)
    link = Link(h.port)
    try:
        session = Session(link)
        session.connect()
        assert set(session.values) == set(session.settings) and not session.unknown
        assert all(f32(h.firmware.settings.values[k]) == v for k, v in session.values.items())
        assert h.firmware._telemetry.rate_hz == 0
        assert link.stats.retries > 0  # the loss was real
    finally:
        link.close()
        h.stop()
