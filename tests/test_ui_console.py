"""The stand console driven from the keyboard with textual's headless pilot, against the built-in
simulated stand (an invented gimbal rig, accelerated clock).

Waits below poll the app until a condition holds and fail with a message if it never does; no
assertion is about how long anything took.
"""

from __future__ import annotations

import asyncio
import re
import time

import numpy as np
import pytest

from agent.ui.app import ConsoleOptions, StandConsole
from agent.ui.caution import CautionScreen
from protocol.messages import DeviceState, ExperimentKind

SPEED = "5"


@pytest.fixture(autouse=True)
def _pilot_idle_with_a_busy_simulator(monkeypatch):
    """The pilot waits after each key until the process's CPU time stops growing (at most 1 s,
    twice per key). The simulated board runs in this process and never idles, so every key
    would cost 2 s. Waiting a few milliseconds instead is enough: the pilot still waits for
    every widget to process its pending messages after each key (``_wait_for_screen``)."""
    import textual.app
    import textual.pilot

    async def short_idle(min_sleep: float = 0.0, max_sleep: float = 0.0) -> None:
        await asyncio.sleep(0.01)

    monkeypatch.setattr(textual.app, "wait_for_idle", short_idle)
    monkeypatch.setattr(textual.pilot, "wait_for_idle", short_idle)
WAIT_LIMIT_S = 60.0  # a guard against a hung test, not a speed requirement


def _text(widget) -> str:
    """The plain text a Static-like widget shows."""
    r = widget.render()
    return getattr(r, "plain", None) or str(r)


def screen_lines(app) -> list[str]:
    """The screen as plain text lines (what a person sees, colours dropped)."""
    return [strip.text for strip in app.screen._compositor.render_strips()]


async def wait_for(pilot, cond, what: str, limit_s: float = WAIT_LIMIT_S) -> None:
    end = time.monotonic() + limit_s
    while not cond():
        if time.monotonic() > end:
            lines = "\n".join(screen_lines(pilot.app))
            pytest.fail(f"gave up waiting for: {what}\nscreen:\n{lines}")
        await pilot.pause(0.1)


def demo_app(tmp_path, speed=SPEED) -> StandConsole:
    return StandConsole(ConsoleOptions(demo=True, log_dir=str(tmp_path / "logs"), speed=speed,
                                       seed=1))


async def connected(pilot) -> None:
    app = pilot.app
    await wait_for(pilot, lambda: app.controller.stand is not None and app.controller.busy is None,
                   "the simulated stand to connect")
    await pilot.pause(0.2)


async def plan_one_loop(pilot, verify: bool) -> None:
    """On the Plan tab, keep only the first loop (roll.rate) and set verification, by keys."""
    app = pilot.app
    await pilot.press("f4")
    await pilot.pause(0.1)
    sl = app.query_one("#plan-loops")
    assert app.focused is sl, "F4 should put the focus on the loop list"
    n = len(sl.options)
    assert n == 6, "the gimbal stand offers rate and angle loops on three axes"
    for _ in range(n - 1):
        await pilot.press("down", "space")
    assert list(sl.selected) == ["roll.rate"]
    if not verify:
        for _ in range(30):
            if app.focused is not None and app.focused.id == "plan-verify":
                break
            await pilot.press("tab")
        assert app.focused.id == "plan-verify", "the verify box is reachable with Tab"
        await pilot.press("space")
    await pilot.pause(0.1)
    plan = app.query_one("#plan").plan
    assert plan is not None, _text(app.query_one("#plan-status"))
    assert [lp.key for lp in plan.loops] == ["roll.rate"]
    assert plan.verify is verify


async def start_and_confirm(pilot) -> None:
    app = pilot.app
    await pilot.press("f5")
    await pilot.press("g")
    await wait_for(pilot, lambda: isinstance(app.screen, CautionScreen)
                   and getattr(app.focused, "id", None) == "caution-input", "the safety check")
    assert app.controller.stand.state == DeviceState.DISARMED, \
        "nothing is armed before the confirmation"
    await pilot.press("y", "e", "s", "enter")


def plant_ultimate_point(num, den, delay_s) -> tuple[float, float]:
    """Ultimate gain and period of num/den·e^(-s·delay): the phase crossover of the frequency
    response, Ku = 1/|G(jωu)|, Tu = 2π/ωu (Ziegler & Nichols 1942 define the ultimate point;
    Åström & Hägglund 1984 relate it to the relay oscillation)."""
    def G(w):
        s = 1j * w
        return np.polyval(num, s) / np.polyval(den, s) * np.exp(-s * delay_s)

    ws = np.logspace(-1, 5, 200_000)
    phase = np.unwrap(np.angle(G(ws)))
    i = int(np.argmax(phase < -np.pi))
    assert i > 0, "no phase crossover on the grid"
    wu = float(np.interp(-np.pi, [phase[i], phase[i - 1]], [ws[i], ws[i - 1]]))
    return 1.0 / abs(G(wu)), 2 * np.pi / wu


def kv_value(text: str, label: str) -> float:
    m = re.search(rf"^{re.escape(label)}\s+(-?[0-9.eE+-]+)", text, re.M)
    assert m, f"{label!r} not shown in:\n{text}"
    return float(m.group(1))


# ------------------------------------------------------------------------------ tests


def test_autotune_from_the_keyboard(tmp_path):
    async def run():
        app = demo_app(tmp_path)
        async with app.run_test(size=(80, 24)) as pilot:
            await connected(pilot)
            ident = _text(app.query_one("#identity"))
            assert "mock-gimbal-quad" in ident and "1000 Hz" in ident
            assert "protocol" in ident and "firmware" in ident
            await plan_one_loop(pilot, verify=False)
            await start_and_confirm(pilot)
            states = set()

            def finished():
                if app.controller.stand is not None:
                    states.add(app.controller.stand.state)
                return app.controller.busy is None and app.controller.result is not None

            await wait_for(pilot, finished, "the run to finish")
            assert app.controller.stand.confirmed
            assert DeviceState.RUNNING in states, "the strip polled a running board"
            result = app.controller.result
            assert result.outcome == "ok", result.message
            from agent.logbook import read_session
            cautions = read_session(result.session_path).manifest["confirmations"]
            assert cautions["by"] == "console" and "run the plan" in cautions["what"], cautions
            assert [lr.status for lr in result.loops] == ["applied"]
            checklist = _text(app.query_one("#checklist"))
            assert "[+] 1. roll.rate" in checklist and "applied" in checklist
            runlog = "\n".join(s.text for s in app.query_one("#run-log").lines)
            assert "outcome: ok" in runlog and "Ku" in runlog
            assert app.controller.stand.state == DeviceState.DISARMED
            # the strip is redrawn when the run's worker ends: wait for that drawing
            await wait_for(pilot, lambda: screen_lines(app)[0].startswith(" DISARMED")
                           and "running the plan" not in screen_lines(app)[0],
                           "the state strip to show DISARMED, no longer running")

            await pilot.press("f6")
            await pilot.pause(0.3)
            text = _text(app.query_one("#results-ident"))
            # what is shown is what the workflow computed (the console computes nothing)
            lr = app.controller.result.loops[0]
            best, plant = lr.identification.best, lr.identification.best_plant
            assert kv_value(text, "Ku") == pytest.approx(best.ku, rel=1e-3)
            assert kv_value(text, "Tu") == pytest.approx(best.tu_s, rel=1e-3)
            assert kv_value(text, "plant Ku") == pytest.approx(plant.ku, rel=1e-3)
            # plausible: the same order as the true ultimate point of the simulated plant (its
            # transfer function from the scenario, sampling delay excluded); the accuracy of
            # the identification itself is the end-to-end tests' business
            num, den, delay = _ground_truth()
            ku_true, tu_true = plant_ultimate_point(num, den, delay)
            ku, tu = kv_value(text, "plant Ku"), kv_value(text, "plant Tu")
            assert ku_true / 2.5 < ku < ku_true * 2.5, (ku, ku_true, text)
            assert tu_true / 2.5 < tu < tu_true * 2.5, (tu, tu_true, text)
            assert "model" in text
            table = app.query_one("#candidates")
            assert table.row_count >= 2, "several candidates with margins"
            rows = [table.get_row_at(i) for i in range(table.row_count)]
            assert any(str(r[0]).startswith("*") for r in rows), "the chosen one is marked"
            for r in rows:
                ms = float(r[4])
                assert 1.0 <= ms < 5.0, f"Ms is at least 1 by definition: {r}"
            # choose another candidate and apply it, then roll back, all from the keyboard
            app.query_one("#candidates").focus()
            before = dict(lr.applied_gains)
            chosen_row = next(i for i, r in enumerate(rows) if str(r[0]).startswith("*"))
            other = 0 if chosen_row != 0 else 1
            table.move_cursor(row=other)
            await pilot.pause(0.1)
            await pilot.press("a")
            await wait_for(pilot, lambda: app.controller.busy is None
                           and lr.applied_gains != before,
                           "the other candidate to be applied")
            kp_name = "roll.rate.kp"
            assert app.controller.stand.session.values[kp_name] == pytest.approx(
                lr.tuning.candidates[other].kp, rel=1e-5)
            await pilot.press("b")
            await wait_for(pilot, lambda: app.controller.busy is None
                           and lr.status == "rolled_back",
                           "the roll back")
            assert app.controller.stand.session.values[kp_name] == pytest.approx(
                before[kp_name], rel=1e-5)
            await pilot.press("ctrl+q")

    asyncio.run(run())


def _ground_truth():
    from mock_device.scenarios import load_scenario
    return load_scenario("gimbal-quad").ground_truth("roll", "rate")


def test_kill_key_during_the_relay(tmp_path):
    async def run():
        app = demo_app(tmp_path, speed="5")
        async with app.run_test(size=(80, 24)) as pilot:
            await connected(pilot)
            await plan_one_loop(pilot, verify=False)
            await start_and_confirm(pilot)
            run_pane = app.query_one("#run")
            fw = app.controller.stand.mock.firmware
            # the "ramp" stage is announced just before the relay is started on the board:
            # wait until the board runs it
            await wait_for(pilot, lambda: run_pane.stage in ("ramp", "relay")
                           and fw.exp is not None and fw.exp.kind == ExperimentKind.RELAY
                           and app.controller.stand.state == DeviceState.RUNNING,
                           "the relay experiment")
            await pilot.press("ctrl+k")
            await wait_for(pilot, lambda: app.controller.stand.mock.firmware.state
                           == DeviceState.KILLED,
                           "the simulated board to report KILLED")
            await wait_for(pilot, lambda: app.controller.busy is None, "the workflow to end")
            result = app.controller.result
            assert result is None or result.outcome in ("killed", "failed")
            await wait_for(pilot, lambda: app.controller.stand.state == DeviceState.KILLED
                           and "KILLED" in screen_lines(app)[0]
                           and "host_operator" in screen_lines(app)[0],
                           "the strip to show KILLED by host_operator")
            box = _text(app.query_one("#kill-box"))
            assert "host_operator" in box and "host" in box
            # nothing can be armed while killed
            await pilot.press("g")
            await pilot.pause(0.2)
            assert not isinstance(app.screen, CautionScreen)
            # clear the kill, by key, and the board is usable again
            await pilot.press("x")
            await wait_for(pilot, lambda: app.controller.busy is None
                           and not app.controller.stand.killed,
                           "the kill to clear")
            assert app.controller.stand.mock.firmware.state == DeviceState.DISARMED
            assert not app.query_one("#kill-box").display
            await pilot.press("ctrl+q")

    asyncio.run(run())


def test_kill_key_on_the_safety_check_and_without_a_board(tmp_path):
    async def run():
        app = StandConsole(ConsoleOptions(log_dir=str(tmp_path / "logs")))
        async with app.run_test(size=(80, 24)) as pilot:
            await pilot.press("ctrl+k")  # no board: says so, does not crash
            await pilot.pause(0.1)
            assert app.controller.stand is None
            assert any("nothing to kill" in n.message for n in app._notifications)
        app = demo_app(tmp_path)
        async with app.run_test(size=(80, 24)) as pilot:
            await connected(pilot)
            await plan_one_loop(pilot, verify=True)
            await start_and_confirm_only_show(pilot)
            await pilot.press("ctrl+k")  # the modal is on top: the kill still goes out
            await wait_for(pilot, lambda: app.controller.stand.mock.firmware.state
                           == DeviceState.KILLED,
                           "the board to be killed from the safety check")
            await pilot.press("escape")
            await pilot.pause(0.1)
            assert not isinstance(app.screen, CautionScreen)
            assert not app.controller.stand.confirmed, "cancelled: nothing confirmed, nothing armed"
            await pilot.press("ctrl+q")

    asyncio.run(run())


async def start_and_confirm_only_show(pilot) -> None:
    app = pilot.app
    await pilot.press("f5", "g")
    await wait_for(pilot, lambda: isinstance(app.screen, CautionScreen)
                   and getattr(app.focused, "id", None) == "caution-input", "the safety check")
    await wait_for(pilot, lambda: "Propellers OFF" in "\n".join(screen_lines(app)),
                   "the cautions on screen")
    assert "Type 'yes'" in "\n".join(screen_lines(app))


def test_plan_errors_are_shown_before_anything_is_armed(tmp_path):
    async def run():
        app = demo_app(tmp_path)
        async with app.run_test(size=(80, 24)) as pilot:
            await connected(pilot)
            plan = app.query_one("#plan")
            await pilot.press("f4")
            plan.set_field("ms_target", "9")
            await pilot.pause(0.1)
            status = _text(app.query_one("#plan-status"))
            assert "NOT valid" in status and "ms_target" in status and "1.1" in status
            plan.set_field("ms_target", "1.4")
            plan.set_field("angle_deg", "lots")
            await pilot.pause(0.1)
            status = _text(app.query_one("#plan-status"))
            assert "angle_deg" in status and "not a number" in status
            await pilot.press("f5", "g")
            await pilot.pause(0.2)
            assert not isinstance(app.screen, CautionScreen), "an invalid plan never asks to arm"
            assert app.query_one("#tabs").active == "tab-plan", "sent back to the plan"
            assert app.controller.stand.state == DeviceState.DISARMED
            plan.set_field("angle_deg", "30")
            plan.select_loops([])
            await pilot.pause(0.1)
            assert "no [[loop]]" in _text(app.query_one("#plan-status"))
            await pilot.press("ctrl+q")

    asyncio.run(run())


def test_wrong_confirmation_word_does_not_arm(tmp_path):
    async def run():
        app = demo_app(tmp_path)
        async with app.run_test(size=(80, 24)) as pilot:
            await connected(pilot)
            await plan_one_loop(pilot, verify=False)
            await start_and_confirm_only_show(pilot)
            await pilot.press("o", "k", "enter")
            await pilot.pause(0.1)
            assert isinstance(app.screen, CautionScreen), "'ok' is not the confirmation word"
            assert "is not 'yes'" in _text(app.screen.query_one("#caution-hint"))
            await pilot.press("escape")
            await pilot.pause(0.2)
            stand = app.controller.stand
            assert stand.state == DeviceState.DISARMED and not stand.confirmed
            assert app.controller.busy is None
            await pilot.press("ctrl+q")

    asyncio.run(run())


@pytest.mark.parametrize("argv, words", [
    (["ui", "--demo", "--speed", "fast-ish"], ["--speed", "max"]),
    (["ui", "--demo", "--speed", "0"], ["--speed", "above 0"]),
    (["ui", "--scenario", "heave-rail"], ["--scenario", "--demo"]),
    (["ui", "--demo", "--scenario", "no-such-stand"], ["no-such-stand", "gimbal-quad"]),
])
def test_ui_command_rejects_bad_options_with_a_message(argv, words, capsys):
    from agent.cli import main
    code = main(argv)
    err = capsys.readouterr().err
    assert code == 2
    assert "Traceback" not in err
    for w in words:
        assert w in err, err


def test_a_kill_on_the_board_is_shown_with_its_reason(tmp_path):
    async def run():
        app = demo_app(tmp_path)
        async with app.run_test(size=(80, 24)) as pilot:
            await connected(pilot)
            await pilot.press("f3")  # any tab: the strip and the Run tab's box both show it
            app.controller.stand.mock.firmware.press_kill_button()  # the board's own kill input
            await wait_for(pilot, lambda: app.controller.last_kill is not None,
                           "the board's kill event")
            assert app.controller.last_kill["origin"] == "device"
            # the status reply can turn the strip KILLED before the kill event arrives; the
            # strip must then gain the reason as well (CI once read it in between)
            shown = f"device: {app.controller.last_kill['reason']}"
            await wait_for(pilot, lambda: screen_lines(app)[0].startswith(" KILLED")
                           and shown in screen_lines(app)[0], "the strip to show KILLED and why")
            box = _text(app.query_one("#kill-box"))
            assert "by the board" in box and app.controller.last_kill["reason"] in box
            await pilot.press("ctrl+q")

    asyncio.run(run())


def test_the_ultimate_point_helper_on_a_textbook_plant():
    # 1/(s+1)^3: Ku = 8, ωu = √3 rad/s (textbook result; e.g. Åström & Hägglund 1995, PID
    # Controllers: Theory, Design and Tuning, ISA)
    ku, tu = plant_ultimate_point([1.0], [1.0, 3.0, 3.0, 1.0], 0.0)
    assert ku == pytest.approx(8.0, rel=1e-3)
    assert tu == pytest.approx(2 * np.pi / np.sqrt(3.0), rel=1e-3)


def test_results_list_the_fallback_candidate_that_was_applied():
    # After a missed step the workflow may apply a candidate designed afterwards (the robust
    # fallback); the results table must show it and mark it as the chosen one.
    from dataclasses import replace

    from agent.analysis import identify, simulate_relay, tune
    from agent.workflows import LoopResult

    rec = simulate_relay([1], [1, 3, 3, 1], 0.0, 1.0, 0.0, 0.0, 0.01, 40.0)
    tuning = tune(identify(rec), controller="pid")
    lr = LoopResult("roll.rate", "roll", "rate", "pid", tuning=tuning)
    lr.chosen = replace(tuning.candidates[-1], rule="fallback_ms1.2")
    rows = lr.all_candidates()  # what the Results table lists
    assert rows[-1] is lr.chosen and len(rows) == len(tuning.candidates) + 1
    # the JSON record (autotune --json) names a chosen rule that is among its candidates
    d = lr.to_dict()
    assert d["chosen"] == "fallback_ms1.2"
    assert [c["rule"] for c in d["candidates"]][-1] == "fallback_ms1.2"
    assert d["candidates"][-1]["kp"] == pytest.approx(lr.chosen.kp)
    assert all("output_noise" in c for c in d["candidates"])  # what each makes of the noise
    lr.chosen = tuning.candidates[0]
    assert lr.all_candidates() == list(tuning.candidates)


@pytest.mark.parametrize("x, digits, shown", [
    (1734.2, 3, "1734"),        # a telemetry rate: whole, not 1.73e+03
    (0.16412, 2, "0.16"),
    (458.366, 4, "458.4"),
    (2.5e6, 3, "2.5e+06"),     # beyond a million: exponent again
    (-1999.6, 3, "-2000"),
    (None, 3, "-"),
    (float("nan"), 3, "-"),
])
def test_numbers_for_people(x, digits, shown):
    from agent.ui.widgets import fmt
    assert fmt(x, digits) == shown


# ------------------------------------------------------------------------------ one path for gains
# The Results tab's apply, verify and roll back go through agent.operations, the same path as
# `tune --apply` and autotune; each test below failed while the console had its own copies.


def _made_up_result(key: str, b: float, operating_point: float, previous_gains: dict):
    """A tuned loop's result with one candidate of setpoint weight ``b`` (invented numbers: the
    design of a textbook plant 1/(s+1)^3 with its gains replaced), as if a run had produced it."""
    from dataclasses import replace

    from agent.analysis import identify, simulate_relay, tune
    from agent.workflows import LoopResult, LoopStatus

    rec = simulate_relay([1], [1, 3, 3, 1], 0.0, 1.0, 0.0, 0.0, 0.01, 40.0)
    ident = identify(rec)
    base = tune(ident, controller="pid")
    cand = replace(base.candidates[0], rule="made_up", kp=0.8, ki=0.4, kd=0.0, tf_s=0.0, b=b,
                   i_limit=0.1)
    tuning = replace(base, candidates=(cand,), recommended="made_up")
    axis, loop = key.split(".")
    lr = LoopResult(key, axis, loop, "pid", status=LoopStatus.TUNED, identification=ident,
                    tuning=tuning, chosen=cand, operating_point=operating_point,
                    previous_gains=dict(previous_gains))
    return lr, cand


def _show_result(app, loops) -> None:
    from agent.workflows import StandResult
    app.controller.set_result(StandResult(loops=list(loops)))


def test_apply_from_the_results_tab_writes_the_operating_point_i_limit(tmp_path):
    async def run():
        app = StandConsole(ConsoleOptions(demo=True, log_dir=str(tmp_path / "logs"),
                                          scenario="heave-rail", speed=SPEED, seed=1))
        async with app.run_test(size=(80, 24)) as pilot:
            await connected(pilot)
            ctl = app.controller
            stand = ctl.stand
            op = 0.6  # m: the height the loop was tuned at
            lr, cand = _made_up_result("heave.heave", b=0.5, operating_point=op,
                                       previous_gains={})
            _show_result(app, [lr])
            await pilot.press("f6")
            table = app.query_one("#candidates")
            await wait_for(pilot, lambda: table.row_count == 1, "the made-up candidate listed")
            table.focus()
            await pilot.press("a")
            await wait_for(pilot, lambda: ctl.busy is None and lr.status == "applied",
                           "the candidate to be applied")
            # With b < 1 the integrator must also hold kp*(1-b)*r0 at the operating point r0:
            # the limit covers that plus the output limit, within the board's bound (the rule
            # of workflows.gains_of, which `tune --apply` uses; common practice, no source).
            out_limit = stand.session.values["heave.heave.out_limit"]
            top = stand.session.setting("heave.heave.i_limit").maximum
            want = min(max(cand.i_limit, out_limit + cand.kp * (1 - cand.b) * op), top)
            assert want != pytest.approx(cand.i_limit), "the test needs the operating point"
            on_board = stand.mock.firmware.settings.values["heave.heave.i_limit"]
            assert on_board == pytest.approx(want, rel=1e-5)
            assert lr.applied_gains["heave.heave.i_limit"] == pytest.approx(want, rel=1e-5)
            from agent import workflows
            from agent.plan import LoopPlan
            same = workflows.gains_of(cand, LoopPlan("heave", "heave", "pid"), op, stand)
            assert on_board == pytest.approx(same["heave.heave.i_limit"], rel=1e-5)
            await pilot.press("ctrl+q")

    asyncio.run(run())


def test_verify_from_the_results_tab_uses_autotunes_arguments(tmp_path):
    async def run():
        app = demo_app(tmp_path)
        async with app.run_test(size=(80, 24)) as pilot:
            await connected(pilot)
            ctl = app.controller
            await plan_one_loop(pilot, verify=False)
            await start_and_confirm(pilot)
            await wait_for(pilot, lambda: ctl.busy is None and ctl.result is not None,
                           "the run to finish")
            lr = ctl.result.loops[0]
            assert lr.status == "applied" and lr.verification is None
            await pilot.press("f6")
            app.query_one("#candidates").focus()
            await pilot.press("v")
            await wait_for(pilot, lambda: ctl.busy is None and lr.verification is not None,
                           "the verification step")
            ver = lr.verification
            assert "step" in ver, ver
            from agent import operations, workflows
            plan = ctl.run_plan
            amp_seen = lr.relay["amplitude_seen"]
            # autotune's step: 1.5 times the relay's oscillation, sized as plan_step does (the
            # relay target's cap, the outer loop's room), timed with the relay's period
            sized = workflows.plan_step(ctl.stand, operations.loop_plan_of(lr, plan), plan,
                                        lr.chosen, 1.5 * amp_seen, lr.relay.get("period_s"))
            assert ver["step"] == pytest.approx(sized.step, rel=1e-9)
            assert ver["step"] <= 1.5 * amp_seen * (1 + 1e-9)
            # the noise allowance autotune gives the overshoot (2 sigma/step, see judge_step)
            assert lr.noise_std > 0
            assert ver["overshoot_allowance"] == pytest.approx(2 * lr.noise_std
                                                               / abs(ver["step"]), rel=1e-9)
            assert ver["setpoint"] == pytest.approx(lr.operating_point)
            await pilot.press("ctrl+q")

    asyncio.run(run())


def test_rollback_from_the_results_tab_out_of_bounds_writes_nothing(tmp_path):
    async def run():
        app = demo_app(tmp_path)
        async with app.run_test(size=(80, 24)) as pilot:
            await connected(pilot)
            ctl = app.controller
            values = ctl.stand.mock.firmware.settings.values
            kp0, ki0 = values["roll.rate.kp"], values["roll.rate.ki"]
            # an earlier kp beyond the board's bound (0..1000) beside a legal ki
            lr, cand = _made_up_result("roll.rate", b=1.0, operating_point=0.0,
                                       previous_gains={"roll.rate.kp": 5000.0,
                                                       "roll.rate.ki": ki0 + 1.0})
            lr.status, lr.applied_gains = "applied", {"roll.rate.kp": kp0, "roll.rate.ki": ki0}
            _show_result(app, [lr])
            await pilot.press("f6")
            app.query_one("#candidates").focus()
            await pilot.press("b")

            def said() -> str:
                return " ".join(n.message for n in app._notifications)

            await wait_for(pilot, lambda: ctl.busy is None and "ROLLBACK FAILED" in said(),
                           "the roll back to be refused")
            assert "outside the board's bounds" in said(), said()
            assert values["roll.rate.kp"] == kp0 and values["roll.rate.ki"] == ki0, \
                "nothing written"
            assert lr.status == "rollback_failed", "the loop's record says so too"
            await wait_for(pilot, lambda: "rollback_failed" in _text(
                app.query_one("#results-status")), "the Results tab to show the failure")
            await pilot.press("ctrl+q")

    asyncio.run(run())


def test_the_plan_tab_is_built_from_the_plan_schema(tmp_path):
    from agent.plan import fields

    async def run():
        app = demo_app(tmp_path)
        async with app.run_test(size=(80, 24)) as pilot:
            await connected(pilot)
            await pilot.press("f4")
            pane = app.query_one("#plan")
            for f in fields("stand") + fields("limits"):
                widget = app.query_one(f"#plan-{f.name}")  # one input per plan key
                assert f.name in str(widget.tooltip) and f.expected() in str(widget.tooltip)
            labels = "\n".join(screen_lines(app))
            assert "kill: angle [deg]" in labels and "relay target" in labels
            assert pane.plan is not None and pane.plan.persist is False
            app.query_one("#plan-persist").value = True  # a switch the tab did not have before
            await wait_for(pilot, lambda: pane.plan is not None and pane.plan.persist is True,
                           "the plan to follow the persist switch")
            assert app.controller.plan is pane.plan, "the controller holds the tab's plan"
            await pilot.press("ctrl+q")

    asyncio.run(run())


def test_one_stand_worker_at_a_time_and_cancelling_it_stops_the_work(tmp_path):
    import threading

    async def run():
        app = StandConsole(ConsoleOptions(log_dir=str(tmp_path / "logs")))
        async with app.run_test(size=(80, 24)) as pilot:
            ctl = app.controller
            saw_stop = threading.Event()

            def job(stop) -> None:  # stands in for a workflow polling its stop
                end = time.monotonic() + WAIT_LIMIT_S
                while time.monotonic() < end:
                    if stop.is_set():
                        saw_stop.set()
                        return
                    time.sleep(0.01)

            assert ctl._start("holding the stand", job)
            await wait_for(pilot, lambda: ctl.busy == "holding the stand", "the worker to run")
            await wait_for(pilot, lambda: "holding the stand" in screen_lines(app)[0],
                           "the strip to say what the console is busy with")
            ctl.connect("/dev/ttyNOWHERE")  # a second action is refused, and says why
            await wait_for(pilot, lambda: any(
                n.message.startswith("busy: holding the stand. Wait for it, stop it")
                for n in app._notifications), "the refusal")
            assert ctl.stand is None and ctl.busy == "holding the stand"
            assert not saw_stop.is_set()
            app.workers.cancel_group(app, "stand")  # what textual does when the app closes
            await wait_for(pilot, saw_stop.is_set, "the work to see its worker cancelled")
            await pilot.press("ctrl+q")

    asyncio.run(run())
