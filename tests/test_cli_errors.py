"""Errors a user meets: each gives a clear message, a non-zero exit and sends nothing to arm."""

from __future__ import annotations

import os
import pty
import select
import threading
import tty

import pytest
import serial

from protocol import codec
from protocol import messages as m
from tests.conftest import run_cli


class FakePort:
    """A raw pty whose device end we hold: records every byte the host sends and can answer
    with frames of our choosing (e.g. another protocol major version)."""

    def __init__(self, answer_version: int | None = None):
        self.master, slave = pty.openpty()
        tty.setraw(slave)
        self.path = os.ttyname(slave)
        self._slave = slave
        self.received = bytearray()
        self.answer_version = answer_version
        self._stop = threading.Event()
        self._th = threading.Thread(target=self._serve, daemon=True)
        self._th.start()

    def _serve(self):
        dec = codec.StreamDecoder()
        while not self._stop.is_set():
            r, _, _ = select.select([self.master], [], [], 0.05)
            if not r:
                continue
            try:
                data = os.read(self.master, 4096)
            except OSError:
                return
            self.received += data
            if self.answer_version is None:
                continue
            for fr in dec.feed(data):
                if isinstance(fr.msg, m.Hello):
                    reply = m.HelloReply(device_id="other", firmware_version="9",
                                         protocol_major=self.answer_version >> 4,
                                         protocol_minor=0, loop_rate_hz=1000)
                    os.write(self.master, codec.encode(reply, fr.seq, m.FLAG_REPLY,
                                                       version=self.answer_version))

    def frames(self):
        return [f.msg for f in codec.StreamDecoder().feed(bytes(self.received))]

    def close(self):
        self._stop.set()
        self._th.join(1)
        os.close(self.master)
        os.close(self._slave)


def assert_nothing_armed(port: FakePort):
    kinds = {type(x).__name__ for x in port.frames()}
    assert not kinds & {"ArmRequest", "ArmConfirm", "ExperimentStart", "SettingWrite"}, kinds


def test_missing_port(tmp_path):
    r = run_cli("tune", "--port", "/dev/tetherloop-no-such-port", "--axis", "roll", "--loop",
                "rate", "--confirm-safe", log_dir=tmp_path)
    assert r.returncode != 0
    assert "does not exist" in r.stderr and "tetherloop ports" in r.stderr
    assert "Traceback" not in r.stderr


def test_busy_port(tmp_path):
    port = FakePort()
    holder = serial.Serial(port.path, exclusive=True)  # another program holds the port
    try:
        r = run_cli("autotune", "--port", port.path, "--confirm-safe", log_dir=tmp_path)
    finally:
        holder.close()
        port.close()
    assert r.returncode != 0
    assert "busy" in r.stderr and "Traceback" not in r.stderr
    assert port.received == b""


def test_permission_denied(tmp_path, monkeypatch, capsys):
    # As root every device opens, so the denial is produced the way pyserial reports it on a
    # port owned by another group (the text of serialposix's SerialException for EACCES).
    from agent import cli

    class Denied:
        exclusive = False

        def open(self):
            raise serial.SerialException(13, "could not open port /dev/ttyACM7: [Errno 13] "
                                             "Permission denied: '/dev/ttyACM7'")

    monkeypatch.setattr(serial, "serial_for_url", lambda *a, **k: Denied())
    code = cli.main(["autotune", "--port", "/dev/ttyACM7", "--confirm-safe",
                     "--log-dir", str(tmp_path)])
    err = capsys.readouterr().err
    assert code != 0
    assert "permission denied" in err.lower() and "dialout" in err


def test_nothing_answering(tmp_path):
    port = FakePort()
    try:
        r = run_cli("autotune", "--port", port.path, "--confirm-safe", log_dir=tmp_path,
                    timeout=60)
    finally:
        port.close()
    assert r.returncode != 0
    assert "nothing answered" in r.stderr and "Traceback" not in r.stderr
    assert_nothing_armed(port)
    assert any(isinstance(x, m.Hello) for x in port.frames())  # it did try


def test_wrong_protocol_version(tmp_path):
    port = FakePort(answer_version=0x20)  # a board speaking protocol 2.0
    try:
        r = run_cli("autotune", "--port", port.path, "--confirm-safe", log_dir=tmp_path,
                    timeout=60)
    finally:
        port.close()
    assert r.returncode != 0
    assert "protocol 2.0" in r.stderr and "Major versions must match" in r.stderr
    assert_nothing_armed(port)


@pytest.mark.parametrize("plan, needle", [
    ('[[loop]]\naxis = "wobble"\nloop = "rate"\n', "axis = 'wobble' is not known"),
    ('[limits]\nangle_deg = 170\n[[loop]]\naxis = "roll"\nloop = "rate"\n', "out of range"),
])
def test_bad_plan_is_refused_before_anything_is_sent(tmp_path, plan, needle):
    port = FakePort()
    p = tmp_path / "plan.toml"
    p.write_text(plan)
    try:
        r = run_cli("autotune", "--port", port.path, "--plan", str(p), "--confirm-safe",
                    log_dir=tmp_path)
    finally:
        port.close()
    assert r.returncode != 0
    assert needle in r.stderr and "Traceback" not in r.stderr
    assert port.received == b""  # not even an identify


def test_gains_outside_board_bounds_are_not_written(tmp_path, mock_pty):
    h = mock_pty("gimbal-quad")
    before = h.firmware.settings.values["roll.rate.kp"]
    r = run_cli("settings", "--port", h.port, "--set", "roll.rate.kp=0.25",
                "--set", "roll.rate.ki=1e9", log_dir=tmp_path)
    assert r.returncode != 0
    assert "roll.rate.ki" in r.stderr and "outside the board's bounds" in r.stderr
    # all-or-nothing: the good value was not written either
    assert h.firmware.settings.values["roll.rate.kp"] == before


def test_cautions_need_confirmation_in_scripted_runs(tmp_path, mock_pty):
    h = mock_pty("gimbal-quad")
    r = run_cli("tune", "--port", h.port, "--axis", "roll", "--loop", "rate", log_dir=tmp_path)
    assert r.returncode != 0
    assert "--confirm-safe" in r.stderr
    from protocol.messages import DeviceState
    assert h.firmware.state == DeviceState.DISARMED
