"""The host under faults it must survive without its record disagreeing with the board: a log
disk that fills mid-relay, a burst of lost samples during a step test, a Ctrl-C while the
analysis starts. The simulated board runs in process (or on a pty where a real terminal's
process group matters)."""

from __future__ import annotations

import errno
import os
import signal
import subprocess
import sys

import pytest

from agent import operations
from agent.errors import LogbookError
from agent.logbook.writer import ExperimentLog
from agent.plan import LoopPlan, Plan
from agent.workflows import LoopStatus, Outcome
from mock_device.runner import start_mock
from protocol.messages import DeviceState, ExperimentKind, KillReason
from tests.conftest import wait_for




@pytest.fixture
def stand(tmp_path):
    h = start_mock("single-axis", transport="inproc", speed="max", seed=2)
    st = operations.connect(h.port, mock=h)
    operations.open_session(st, Plan(loops=(LoopPlan("roll", "rate"),)),
                            operations.Confirmation(operations.ConfirmedBy.FLAG), str(tmp_path))
    yield st
    operations.close(st, "test over")


def test_a_log_disk_that_fills_mid_relay_stops_before_any_gain_is_written(stand, monkeypatch):
    # the disk fills after 300 relay samples: the relay may finish, but the gains must not be
    # written (before the fix they were, and the tune then aborted without restoring them)
    real_append = ExperimentLog.append
    calls = {"n": 0}

    def append(self, host_time_s, tel):
        if self.exp_id.endswith("relay"):
            calls["n"] += 1
            if calls["n"] > 300:
                raise OSError(errno.ENOSPC, "No space left on device")
        return real_append(self, host_time_s, tel)

    monkeypatch.setattr(ExperimentLog, "append", append)
    before = {k: v for k, v in stand.session.values.items() if k.startswith("roll.rate.")}
    plan = Plan(loops=(LoopPlan("roll", "rate"),))
    with pytest.raises(LogbookError, match="refused a write"):
        operations.tune_one(stand, plan.loops[0], plan)
    for name, value in before.items():
        assert stand.session.read(name) == value  # read back: the board's gains unchanged
    assert stand.state == DeviceState.DISARMED


def test_autotune_ends_failed_with_the_reason_when_the_log_fails(stand, monkeypatch):
    real_append = ExperimentLog.append

    def append(self, host_time_s, tel):
        if self.exp_id.endswith("hold"):
            raise OSError(errno.ENOSPC, "No space left on device")
        return real_append(self, host_time_s, tel)

    monkeypatch.setattr(ExperimentLog, "append", append)
    plan = Plan(loops=(LoopPlan("roll", "rate"),))
    result = operations.autotune(stand, plan)
    assert result.outcome == Outcome.FAILED and "refused a write" in result.message
    assert result.loops[0].status == LoopStatus.FAILED
    assert not result.loops[0].applied_gains


def test_a_step_with_a_burst_of_lost_samples_is_not_passed(stand):
    plan = Plan(loops=(LoopPlan("roll", "rate"),))
    lr = operations.tune_one(stand, plan.loops[0], plan)
    assert lr.status == LoopStatus.VERIFIED, lr.message
    # a burst of loss on the link: every sample of the step's middle third never arrives
    real_add = stand.buffer.add
    first = {}

    def lossy_add(host_t, tel):
        if stand.buffer.recording:
            t0 = first.setdefault("t", tel.time_us)
            if 0.2e6 < tel.time_us - t0 < 0.6e6:
                return
        real_add(host_t, tel)

    stand.buffer.add = lossy_add
    ver = operations.reverify(stand, lr, plan, exp_id="roll-rate-verify-lossy")
    assert ver["samples_missing"] > 0.05 * (ver["samples"] + ver["samples_missing"])
    assert not ver["passed"]
    assert any("lost on the link" in p for p in ver["problems"])
    assert lr.status == LoopStatus.APPLIED  # not verified


def test_ctrl_c_as_the_analysis_starts_ends_as_the_operators_kill(tmp_path):
    # a terminal's Ctrl-C reaches the process group just after the relay ended, while the
    # analysis worker starts: before the fix a traceback from the worker, a second kill
    # (host_error) and exit 3
    with start_mock("single-axis", transport="pty", speed=10.0, seed=3) as h:
        env = dict(os.environ, TETHERLOOP_LOG_DIR=str(tmp_path))
        proc = subprocess.Popen([sys.executable, "-m", "agent.cli", "tune", "--port", h.port,
                                 "--axis", "roll", "--loop", "rate", "--confirm-safe"],
                                env=env, stdout=subprocess.PIPE, stderr=subprocess.PIPE,
                                text=True, start_new_session=True)
        try:
            assert wait_for(lambda: h.firmware.exp is not None
                            and h.firmware.exp.kind == ExperimentKind.RELAY, 120)
            assert wait_for(lambda: h.firmware.exp is None, 120)  # relay over: analysis starts
            os.killpg(proc.pid, signal.SIGINT)
            out, err = proc.communicate(timeout=60)
        finally:
            proc.kill()
        assert proc.returncode == 5, out[-2000:] + err[-2000:]
        assert "Traceback" not in out + err, out[-3000:] + err[-3000:]
        kills = [e for e in h.firmware.events if e.kind == 4]
        assert [k.reason for k in kills] == [KillReason.HOST_OPERATOR]
