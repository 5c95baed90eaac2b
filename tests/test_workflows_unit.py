"""Workflows and operations over the in-process transport (no pty): fast checks of each step's
contract on the simulated board, and of the defects the one-path layout fixed."""

from __future__ import annotations

import json
import threading
from types import SimpleNamespace

import pytest

from agent import operations, workflows
from agent.errors import ExitCode, UserError
from agent.plan import LoopPlan, Plan
from agent.workflows import LoopResult, LoopStatus, Outcome
from mock_device.runner import start_mock


@pytest.fixture
def stand_on(tmp_path):
    """Factory: a Stand on the simulated board in process, cautions recorded, log open."""
    made = []

    def make(scenario="single-axis", speed="max", seed=1, faults=None, plan=None):
        h = start_mock(scenario, transport="inproc", speed=speed, seed=seed, faults=faults)
        st = operations.connect(h.port, mock=h)
        made.append(st)
        plan = plan or Plan(loops=(LoopPlan("roll", "rate"),))
        operations.open_session(st, plan, operations.Confirmation(
            operations.ConfirmedBy.FLAG, what="unit test"), str(tmp_path))
        return st

    yield make
    for st in made:
        operations.close(st, "test over")


def _manifest(st) -> dict:
    return json.loads((st.log.path / "manifest.json").read_text())


def test_the_hold_runs_with_the_host_monitor_on(stand_on):
    # common practice, no source: every experiment that moves the frame is watched by the host;
    # before the one-path layout the hold never switched the monitor on
    st = stand_on()
    seen = []
    st.listeners.append(lambda kind, tel: kind == "telemetry" and st.buffer.recording
                        and seen.append(st.monitor.active))
    plan = Plan(loops=(LoopPlan("roll", "rate"),))
    with operations.armed(st, plan):
        out = workflows.noise_check(st, plan.loops[0], plan)
    assert out["samples"] >= 20 and out["noise_std"] > 0
    assert seen and sum(seen) > len(seen) / 2  # off only while the hold is being stopped
    assert st.monitor.active is False  # off again once the hold is over


def test_the_lift_off_is_an_experiment_in_the_log(stand_on):
    st = stand_on("heave-rail", plan=Plan(loops=(LoopPlan("heave", "heave"),)))
    plan = Plan(loops=(LoopPlan("heave", "heave"),))
    start = None
    with operations.armed(st, plan):
        workflows.experiment.full_rate_telemetry(st, 2)
        workflows.experiment.wait(st, None, 0.2)
        start = workflows.current_measurement(st, 3, 2)
        reached = workflows.lift_off(st, plan)
    assert reached is not None and start is not None and reached > start + 0.01
    ids = [e["id"] if isinstance(e, dict) else e for e in _manifest(st)["experiments"]]
    assert any("lift" in str(i) for i in ids), ids


def test_an_outer_loop_is_skipped_when_its_inner_loop_failed(stand_on):
    plan = Plan(loops=(LoopPlan("roll", "rate"), LoopPlan("roll", "angle")))
    st = stand_on(faults={"block": ["roll"]}, plan=plan)
    result = workflows.autotune(st, plan)
    inner, outer = result.loops
    assert inner.status == LoopStatus.FAILED and inner.message
    assert outer.status == LoopStatus.SKIPPED
    assert "roll.rate" in outer.message and inner.message in outer.message
    assert result.outcome == Outcome.PARTIAL and result.outcome.exit_code == ExitCode.PARTIAL


def test_a_rollback_that_cannot_be_written_is_reported_as_failed(stand_on):
    st = stand_on()
    lr = LoopResult("roll.rate", "roll", "rate", "pid")
    lr.previous_gains = {"roll.rate.kp": 1e9}  # far outside the board's bounds
    before = st.session.read("roll.rate.kp")
    assert operations.roll_back(st, lr) is False
    assert lr.status == LoopStatus.ROLLBACK_FAILED
    assert st.session.read("roll.rate.kp") == before  # nothing was written
    assert workflows.outcome_of([lr]) == Outcome.ROLLBACK_FAILED
    assert Outcome.ROLLBACK_FAILED.exit_code == ExitCode.ROLLBACK_FAILED == 6


def test_armed_disarms_after_work_and_stays_killed_after_a_kill(stand_on):
    from protocol.messages import DeviceState
    st = stand_on()
    plan = Plan(loops=(LoopPlan("roll", "rate"),))
    with operations.armed(st, plan):
        assert st.state == DeviceState.ARMED
    assert st.state == DeviceState.DISARMED
    from agent.stand import KillTripped
    with pytest.raises(KillTripped):
        with operations.armed(st, plan):
            operations.kill(st)
            stop = threading.Event()
            stop.set()
            workflows.experiment.wait(st, stop, 1.0)  # the kill wins over the stop request
    assert st.killed
    operations.clear_kill(st)
    assert not st.killed and st.state == DeviceState.DISARMED


def test_arming_needs_an_open_session_with_its_cautions_record(tmp_path):
    with start_mock("single-axis", transport="inproc", speed="max") as h:
        st = operations.connect(h.port)
        try:
            with pytest.raises(Exception, match="cautions"):
                st.arm()
        finally:
            operations.close(st)


def test_the_demo_records_a_simulated_board_not_a_confirmation(stand_on, tmp_path):
    rec = operations.Confirmation(operations.ConfirmedBy.SIMULATED).as_record()
    assert rec["by"] == "simulated" and "--confirm-safe" not in rec["cautions"]
    st = stand_on()
    assert _manifest(st)["confirmations"]["by"] == "flag"


def test_kill_text_names_a_threshold_only_when_there_is_one():
    # before: "KILL by device: host_operator axis - value 0 threshold 0"
    assert operations.describe_kill({"origin": "device", "reason": "host_operator", "axis": 255,
                                     "axis_name": "-", "value": 0.0, "threshold": 0.0,
                                     "text": ""}) == "KILL by the board: host_operator"
    trip = operations.describe_kill({"origin": "host", "reason": "angle_limit",
                                     "axis_name": "roll", "value": 0.61, "threshold": 0.52})
    assert trip == "KILL by the host: angle_limit on roll (value 0.61 beyond 0.52)"


def test_apply_candidate_uses_the_loops_operating_point():
    # with setpoint weight b < 1 the integrator must hold kp*(1-b)*r0 at a height r0 (the board's
    # P term is kp*(b*r - y)): the same settings whichever shell applies the candidate
    cand = SimpleNamespace(kp=2.0, ki=1.0, kd=0.1, tf_s=0.01, b=0.5, i_limit=0.3, rule="x")
    values = {"heave.heave.out_limit": 1.0}
    setting = SimpleNamespace(maximum=5.0)
    stand = SimpleNamespace(session=SimpleNamespace(values=values,
                                                    settings={"heave.heave.i_limit": setting},
                                                    setting=lambda n: setting))
    lp = LoopPlan("heave", "heave")
    g = workflows.gains_of(cand, lp, 0.4, stand)
    assert g["heave.heave.i_limit"] == pytest.approx(1.0 + 2.0 * 0.5 * 0.4)
    assert workflows.gains_of(cand, lp, 0.0, stand)["heave.heave.i_limit"] == 0.3


def test_reverify_needs_applied_gains():
    lr = LoopResult("roll.rate", "roll", "rate", "pid")
    with pytest.raises(UserError, match="apply a candidate first"):
        operations.reverify(None, lr, Plan(loops=()))


def test_a_job_keeps_its_error_for_the_caller():
    job = operations.Job(lambda: 1 / 0).start()
    assert job.wait(5)
    assert isinstance(job.error, ZeroDivisionError) and job.result is None
    ok = operations.Job(lambda: 42).start()
    assert ok.wait(5) and ok.result == 42 and ok.error is None


def test_tune_one_verifies_on_the_simulated_board_and_the_log_has_every_step(stand_on):
    st = stand_on()
    plan = Plan(loops=(LoopPlan("roll", "rate"),))
    lr = operations.tune_one(st, plan.loops[0], plan)
    assert lr.status == LoopStatus.VERIFIED, lr.message
    assert lr.applied_gains and all(st.session.values[k] == v
                                    for k, v in lr.applied_gains.items())
    ids = [e["id"] if isinstance(e, dict) else e for e in _manifest(st)["experiments"]]
    assert {"roll-rate-hold", "roll-rate-relay", "roll-rate-verify"} <= set(map(str, ids))
    # the re-verification from a shell uses exactly autotune's step
    ver = operations.reverify(st, lr, plan, exp_id="roll-rate-verify-again")
    step = workflows.plan_step(st, plan.loops[0], plan, lr.chosen,
                               1.5 * lr.relay["amplitude_seen"], lr.relay["period_s"]).step
    assert ver["step"] == pytest.approx(step)
    assert ver["step"] == pytest.approx(lr.verification["step"])


def test_the_relay_stays_inside_the_actuators_headroom():
    # common practice, no source: bias +/- amplitude inside the output range; before, a heave
    # rail with little thrust margin ran its relay at 0.93 +/- 0.15 (clipped at full thrust)
    from agent.workflows.relay import HEADROOM_MARGIN, relay_ceiling
    stand = SimpleNamespace(session=SimpleNamespace(values={"heave.rate.out_limit": 1.0,
                                                            "heave.rate.ff": 0.0}))
    lp = LoopPlan("heave", "rate", max_amplitude=0.5)
    assert relay_ceiling(stand, lp, None, trim=0.8) == pytest.approx(1 - HEADROOM_MARGIN - 0.8)
    assert relay_ceiling(stand, lp, None, trim=0.0) == 0.5
    with pytest.raises(workflows.WorkflowError, match="no room"):
        relay_ceiling(stand, lp, None, trim=0.97)


def test_the_headroom_counts_from_the_feed_forward():
    # the board's output limit applies around its feed-forward (a hover trim): a trim at the
    # feed-forward leaves the whole limit to the relay
    from agent.workflows.relay import HEADROOM_MARGIN, relay_ceiling
    stand = SimpleNamespace(session=SimpleNamespace(values={"heave.rate.out_limit": 0.5,
                                                            "heave.rate.ff": 0.42}))
    lp = LoopPlan("heave", "rate")
    assert relay_ceiling(stand, lp, None, trim=0.44) == pytest.approx(0.25)
    assert relay_ceiling(stand, lp, None, trim=0.42 + 0.4) == pytest.approx(
        (1 - HEADROOM_MARGIN) * 0.5 - 0.4)


def test_a_step_judged_against_a_prediction_without_overshoot():
    # a candidate whose model predicts no overshoot (None) crashed the verdict's message
    plan = Plan(loops=())
    problems, _ = workflows.judge_step({"overshoot": 0.4, "rise_s": 0.1},
                                       {"overshoot": None, "rise_s": 0.1}, plan, None, 1.0)
    assert problems and "exceeds the predicted 0%" in problems[0]
