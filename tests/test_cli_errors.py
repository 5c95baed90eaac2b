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
    assert "no reply to Hello" in r.stderr and "nothing arrived" in r.stderr
    assert "is the board powered" in r.stderr and "Traceback" not in r.stderr
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


# ---------------------------------------------------------------------------- values checked first


@pytest.fixture
def no_port_opened(monkeypatch):
    """Every port the host would open goes through pyserial's serial_for_url: record the calls
    (and refuse them), so a test can show that nothing was connected."""
    opened = []

    def refuse(url, *args, **kwargs):
        opened.append(url)
        raise serial.SerialException(f"test: {url} must not be opened")

    monkeypatch.setattr(serial, "serial_for_url", refuse)
    return opened


@pytest.fixture
def no_board_started(monkeypatch):
    """Record (and refuse) every start of the simulated board."""
    started = []

    def refuse(*args, **kwargs):
        started.append(args)
        raise OSError("test: the simulated board must not be started")

    import mock_device.runner
    from agent import operations
    monkeypatch.setattr(operations, "start_builtin_board", refuse)
    monkeypatch.setattr(mock_device.runner, "start_mock", refuse)
    return started


TUNE = ["tune", "--port", "loop://", "--axis", "roll", "--loop", "rate", "--confirm-safe"]


@pytest.mark.parametrize("argv, words", [
    (TUNE + ["--ms", "-1"], ["argument --ms", "-1", "1.1 to 2.5"]),
    (TUNE + ["--ms", "abc"], ["argument --ms", "'abc' is not a number", "1.1 to 2.5"]),
    (TUNE + ["--ms", "nan"], ["argument --ms", "'nan'", "1.1 to 2.5"]),
    (TUNE + ["--baud", "0"], ["argument --baud", "0 is out of range", "baud rate"]),
    (["autotune", "--port", "loop://", "--baud", "-9600"], ["argument --baud", "-9600"]),
    (["settings", "--port", "loop://", "--baud", "fast"], ["argument --baud", "'fast'"]),
    (["ui", "--port", "loop://", "--baud", "0"], ["argument --baud", "0 is out of range"]),
])
def test_bad_values_are_refused_before_any_port_is_opened(argv, words, capsys, no_port_opened):
    from agent import cli
    code = cli.main(argv)
    err = capsys.readouterr().err
    assert code == 2, err
    for w in words:
        assert w in err, err
    assert "Traceback" not in err
    assert no_port_opened == []


@pytest.mark.parametrize("argv, words", [
    (["demo", "--speed", "abc"], ["argument --speed", "'abc'", "'max'"]),
    (["demo", "--speed", "0"], ["argument --speed", "'0'", "above 0"]),
    (["demo", "--speed", "-3"], ["argument --speed", "'-3'", "above 0"]),
    (["demo", "--seed", "-1"], ["argument --seed", "-1 is out of range"]),
    (["mock", "--scenario", "gimbal-quad", "--tcp", "99999"],
     ["argument --tcp", "99999", "0 to 65535"]),
    (["mock", "--scenario", "gimbal-quad", "--tcp", "-1"], ["argument --tcp", "-1"]),
    (["mock", "--scenario", "gimbal-quad", "--speed", "0"], ["argument --speed", "above 0"]),
    (["mock", "--scenario", "gimbal-quad", "--loss", "2"], ["argument --loss", "0 to 1"]),
    (["mock", "--scenario", "gimbal-quad", "--latency-ms", "-5"], ["argument --latency-ms"]),
    (["mock", "--scenario", "gimbal-quad", "--stuck", "roll"], ["argument --stuck", "AXIS@"]),
])
def test_bad_simulation_values_are_refused_before_the_board_starts(argv, words, capsys,
                                                                   no_board_started):
    from agent import cli
    code = cli.main(argv)
    err = capsys.readouterr().err
    assert code == 2, err
    for w in words:
        assert w in err, err
    assert "Traceback" not in err
    assert no_board_started == []


def test_tune_with_a_bad_ms_sends_nothing_to_the_board(tmp_path):
    # as a user runs it: the board end of the port sees no byte, not even the identify
    port = FakePort()
    try:
        r = run_cli("tune", "--port", port.path, "--axis", "roll", "--loop", "rate", "--ms", "-1",
                    "--confirm-safe", log_dir=tmp_path, timeout=60)
    finally:
        port.close()
    assert r.returncode == 2
    assert "argument --ms: -1 is out of range; expected a number from 1.1 to 2.5" in r.stderr
    assert port.received == b""


def test_good_values_are_passed_on():
    from agent.cli import build_parser
    args = build_parser().parse_args(["demo", "--speed", "10x", "--seed", "7"])
    assert (args.speed, args.seed) == ("10", 7)
    args = build_parser().parse_args(["mock", "--speed", "realtime", "--tcp", "0",
                                      "--drop-at", "inf"])
    assert (args.speed, args.tcp, args.drop_at) == ("1", 0, float("inf"))
    args = build_parser().parse_args(TUNE + ["--ms", "2.5", "--baud", "115200"])
    assert (args.ms, args.baud) == (2.5, 115200)


# ---------------------------------------------------------------------------- exit codes


def test_exit_code_of_each_error_branch():
    from agent import errors
    from agent.cli import exit_code_for
    from agent.logbook.format import LogbookVersionError
    from agent.session import DeviceRefused, SessionError
    from agent.stand import KillTripped
    E = errors.ExitCode
    cases = [(errors.UserError("x"), E.USAGE), (errors.UserError("x", code=E.DECLINED), 1),
             (errors.PlanError("x"), E.USAGE), (errors.LinkError("x"), E.FAILED),
             (errors.LinkTimeout("x"), E.FAILED), (errors.DeviceError("x"), E.FAILED),
             (SessionError("x"), E.FAILED), (errors.WorkflowError("x"), E.FAILED),
             (errors.LogbookError("x"), E.FAILED), (errors.RecordError("x"), E.FAILED),
             (LogbookVersionError("x"), E.USAGE), (errors.Cancelled("x"), E.INTERRUPTED),
             (KillTripped({"reason": "host_operator"}), E.KILLED), (KeyboardInterrupt(), 130)]
    for exc, code in cases:
        assert exit_code_for(exc) == int(code), type(exc).__name__
    assert issubclass(DeviceRefused, SessionError)


@pytest.mark.parametrize("error, code", [("LinkError", 3), ("DeviceError", 3),
                                         ("WorkflowError", 3), ("LogbookError", 3)])
def test_errors_escaping_a_command_are_printed_and_mapped(monkeypatch, capsys, error, code):
    from agent import cli, errors, link

    def fail():
        raise getattr(errors, error)("the test's failure text")

    monkeypatch.setattr(link, "list_ports", fail)
    assert cli.main(["ports"]) == code
    err = capsys.readouterr().err
    assert "the test's failure text" in err and "Traceback" not in err


def test_a_command_group_that_fails_to_import_is_an_error_not_a_missing_command(monkeypatch):
    from agent import cli
    monkeypatch.setattr(cli, "_GROUPS", cli._GROUPS + ("agent.cli.no_such_group",))
    with pytest.raises(ModuleNotFoundError, match="no_such_group"):
        cli.build_parser()


def test_help_and_version_return_zero(capsys):
    from agent import cli
    assert cli.main(["--version"]) == 0
    assert cli.main(["plan", "--help"]) == 0
    assert "--example" in capsys.readouterr().out
