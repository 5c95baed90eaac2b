"""Plan files: validation with clear messages, cascade order."""

import math

import pytest

from agent.plan import PlanError, check_against_device, load_plan, plan_from_dict


def write(tmp_path, text):
    p = tmp_path / "plan.toml"
    p.write_text(text)
    return p


def test_cascade_order_is_enforced_whatever_the_file_order(tmp_path):
    # common practice, no source: inner (rate) loops are tuned before the loops around them
    p = write(tmp_path, """
[[loop]]
axis = "heave"
loop = "heave"
[[loop]]
axis = "roll"
loop = "angle"
[[loop]]
axis = "heave"
loop = "rate"
[[loop]]
axis = "pitch"
loop = "rate"
[[loop]]
axis = "roll"
loop = "rate"
""")
    plan = load_plan(p)
    assert [lp.key for lp in plan.loops] == ["roll.rate", "pitch.rate", "roll.angle",
                                             "heave.rate", "heave.heave"]


def test_limits_are_converted_to_si(tmp_path):
    plan = load_plan(write(tmp_path, """
[limits]
angle_deg = 20
rate_deg_s = 300
[[loop]]
axis = "roll"
loop = "rate"
"""))
    assert plan.limits.angle_rad == pytest.approx(math.radians(20))
    assert plan.limits.rate_rad_s == pytest.approx(math.radians(300))
    assert plan.output_noise_fraction == 0.1  # the default noise allowance


def test_output_noise_allowance_reaches_the_tuning(tmp_path):
    from agent.logbook.records import tune_kwargs
    plan = load_plan(write(tmp_path, """
[stand]
output_noise_fraction = 0.05
[[loop]]
axis = "roll"
loop = "rate"
"""))
    assert plan.output_noise_fraction == 0.05
    # the analysis input the workflow logs carries the bound to tune() (and to re-analysis)
    kw = tune_kwargs({"sample_time_s": 0.001, "max_output_noise": 0.05 * 2.0})
    assert kw["max_output_noise"] == pytest.approx(0.1)


@pytest.mark.parametrize("text, needle", [
    ('[[loop]]\naxis = "rol"\nloop = "rate"\n', "axis = 'rol' is not known"),
    ('[[loop]]\naxis = "roll"\nloop = "heave"\n', "has no 'heave' loop"),
    ('[[loop]]\naxis = "heave"\nloop = "angle"\n', "has no 'angle' loop"),
    ('[limits]\nangle_deg = 400\n[[loop]]\naxis = "roll"\nloop = "rate"\n', "out of range"),
    ('[limits]\nangel_deg = 4\n[[loop]]\naxis = "roll"\nloop = "rate"\n', "unknown key 'angel_deg'"),
    ('[stand]\ncontroller = "pidd"\n[[loop]]\naxis = "roll"\nloop = "rate"\n', "pidd"),
    ('[stand]\nms_target = 0.5\n[[loop]]\naxis = "roll"\nloop = "rate"\n', "ms_target"),
    ('[stand]\n', "no [[loop]] entries"),
    ('[[loop]]\naxis = "roll"\nloop = "rate"\n[[loop]]\naxis = "roll"\nloop = "rate"\n', "twice"),
    ('this is = = not toml', "not valid TOML"),
    ('[stand]\nverfy = false\n[[loop]]\naxis = "roll"\nloop = "rate"\n', "unknown key 'verfy'"),
    ('[stand]\nverify_time_factor = 0.5\n[[loop]]\naxis = "roll"\nloop = "rate"\n',
     "verify_time_factor"),
    ('[stand]\noutput_noise_fraction = 0\n[[loop]]\naxis = "roll"\nloop = "rate"\n',
     "output_noise_fraction = 0 is out of range"),
])
def test_bad_plans_give_clear_errors(tmp_path, text, needle):
    with pytest.raises(PlanError) as err:
        load_plan(write(tmp_path, text))
    assert needle in str(err.value)


def test_missing_plan_file(tmp_path):
    with pytest.raises(PlanError, match="does not exist"):
        load_plan(tmp_path / "nope.toml")


def test_plan_against_device_axes():
    plan = plan_from_dict({"loop": [{"axis": "heave", "loop": "rate"}]})
    with pytest.raises(PlanError, match="no 'heave' axis"):
        check_against_device(plan, {"roll": ("rate", "angle")})


def test_step_verdict_allows_for_the_measurements_own_spread():
    # the verdict on a step's metrics beside the prediction (agent.workflows.judge_step): the
    # overshoot margin widens by 2 sigma/step, what the loop's own spread does to the peak and
    # the final value of a small step (common practice, no source)
    from agent.workflows import judge_step
    plan = plan_from_dict({"loop": [{"axis": "roll", "loop": "rate"}]})
    pred = {"overshoot": 0.15, "rise_s": 0.3}
    gusty = {"overshoot": 0.32, "rise_s": 0.2}
    problems, allowance = judge_step(gusty, pred, plan, None, 0.1)
    assert allowance == 0.0 and "exceeds the predicted 15% by more than 15%" in problems[0]
    problems, allowance = judge_step(gusty, pred, plan, 0.02, 0.1)  # sigma/step = 0.2
    assert allowance == pytest.approx(0.4) and problems == []
    # a large step leaves little allowance: a real miss is still a miss
    problems, allowance = judge_step(gusty, pred, plan, 0.02, 2.0)
    assert allowance == pytest.approx(0.02) and "plus 2% for the measurement" in problems[0]
    # the rise time is judged by its own factor, noise or not
    slow = {"overshoot": 0.1, "rise_s": 1.0}
    assert "rise time 1 s is outside" in judge_step(slow, pred, plan, 0.02, 0.1)[0][0]
    assert judge_step({"overshoot": None, "rise_s": None}, pred, plan, 0.02, 0.1)[0] == [
        "the step response never reached the new setpoint"]


# ---------------------------------------------------------------------------- strict validation

ROLL_RATE = '[[loop]]\naxis = "roll"\nloop = "rate"\n'


@pytest.mark.parametrize("stand_line, key, shown", [
    ('persist = "false"', "persist", "'false'"),  # a quoted false made the board persist
    ('persist = "no"', "persist", "'no'"),
    ('verify = "no"', "verify", "'no'"),  # and this still ran the step test
    ('apply = "yes"', "apply", "'yes'"),
    ("apply = 0", "apply", "0"),
])
def test_a_boolean_must_be_a_toml_boolean(tmp_path, stand_line, key, shown):
    with pytest.raises(PlanError) as err:
        load_plan(write(tmp_path, f"[stand]\n{stand_line}\n" + ROLL_RATE))
    msg = str(err.value)
    assert f"{key} = {shown} is not a boolean" in msg and "true or false" in msg, msg


@pytest.mark.parametrize("text, needle", [
    ("stand = 3\n" + ROLL_RATE, "stand = 3 is not a table"),
    ("stand = []\n" + ROLL_RATE, "stand = [] is not a table"),
    ('limits = "tight"\n' + ROLL_RATE, "limits = 'tight' is not a table"),
    ("loop = 3\n", "no [[loop]] entries"),
    ("loop = [1]\n", "1 is not a table"),
    ('[loop]\naxis = "roll"\nloop = "rate"\n', "array of tables"),
    ('[[loop]]\naxis = "roll"\n', "loop is missing"),
])
def test_every_section_must_be_a_table(tmp_path, text, needle):
    with pytest.raises(PlanError) as err:
        load_plan(write(tmp_path, text))
    assert needle in str(err.value), str(err.value)


@pytest.mark.parametrize("text, needle", [
    ('[stand]\nms_target = "1.4"\n' + ROLL_RATE, "ms_target = '1.4' is not a number"),
    ("[stand]\nrelay_target = nan\n" + ROLL_RATE, "relay_target = nan is not a number"),
    ("[limits]\nheave_m = true\n" + ROLL_RATE, "heave_m = True is not a number"),
    ('[stand]\nrule = 3\n' + ROLL_RATE, "rule = 3 is not known"),
    ('[[loop]]\naxis = "roll"\nloop = "rate"\nmax_amplitude = -1\n',
     "max_amplitude = -1 is out of range"),
    ('[[loop]]\naxis = "roll"\nloop = "rate"\nverify = true\n', "unknown key 'verify'"),
])
def test_numbers_and_names_are_checked_with_the_key_value_and_expectation(tmp_path, text,
                                                                          needle):
    with pytest.raises(PlanError) as err:
        load_plan(write(tmp_path, text))
    assert needle in str(err.value) and "expected" in str(err.value), str(err.value)


def test_a_loop_inherits_the_stand_defaults_and_may_override_them():
    plan = plan_from_dict({"stand": {"controller": "pi", "ms_target": 1.6},
                           "loop": [{"axis": "roll", "loop": "rate"},
                                    {"axis": "roll", "loop": "angle", "controller": "pd"}]})
    rate, angle = plan.loops
    assert (rate.controller, rate.ms_target) == ("pi", 1.6)
    assert (angle.controller, angle.ms_target) == ("pd", 1.6)


# ---------------------------------------------------------------------------- board checks


class Desc:
    """A setting descriptor as the session holds it (minimum, maximum, unit)."""

    def __init__(self, minimum, maximum, unit=""):
        self.minimum, self.maximum, self.unit = minimum, maximum, unit


AXES = {"roll": ("rate", "angle")}


def test_relay_ceiling_above_the_loops_output_limit_is_refused():
    # the board's output limit is 1: a ceiling of 1e6 saturates the output and the board kills
    from agent.plan import check_against_board
    plan = plan_from_dict({"loop": [{"axis": "roll", "loop": "rate", "max_amplitude": 1e6}]})
    with pytest.raises(PlanError) as err:
        check_against_board(plan, AXES, {}, {"roll.rate.out_limit": 1.0})
    msg = str(err.value)
    assert "max_amplitude = 1e+06" in msg and "roll.rate.out_limit = 1" in msg
    assert "at most 1" in msg
    ok = plan_from_dict({"loop": [{"axis": "roll", "loop": "rate", "max_amplitude": 0.8}]})
    check_against_board(ok, AXES, {}, {"roll.rate.out_limit": 1.0})
    check_against_board(plan_from_dict({"loop": [{"axis": "roll", "loop": "rate"}]}), AXES, {},
                        {"roll.rate.out_limit": 1.0})  # default ceiling: half the limit


def test_limits_outside_the_boards_kill_bounds_are_refused():
    from agent.plan import check_against_board
    plan = plan_from_dict({"limits": {"angle_deg": 30}, "loop": [{"axis": "roll",
                                                                   "loop": "rate"}]})
    settings = {"kill.angle_rad": Desc(0.01, 0.3, "rad"), "kill.rate_rad_s": Desc(0.1, 60.0)}
    with pytest.raises(PlanError) as err:
        check_against_board(plan, AXES, settings, {})
    msg = str(err.value)
    assert "angle_deg = 30 deg" in msg and "kill.angle_rad" in msg and "0.01 to 0.3 rad" in msg
    settings["kill.angle_rad"] = Desc(0.01, 3.2, "rad")
    check_against_board(plan, AXES, settings, {})


def test_board_checks_on_the_simulated_board():
    # the simulated gimbal board declares roll.rate.out_limit and its kill.* bounds
    from agent.plan import check_against_board
    from agent.stand import Stand
    from mock_device.runner import start_mock
    h = start_mock("gimbal-quad", transport="inproc", speed=1.0, seed=3)
    h.port.timeout = 0.01
    st = Stand.connect(h.port)
    try:
        args = (st.info.axes, st.session.settings, st.session.values)
        out_limit = st.session.values["roll.rate.out_limit"]
        too_big = plan_from_dict({"loop": [{"axis": "roll", "loop": "rate",
                                            "max_amplitude": 1e6}]})
        with pytest.raises(PlanError, match="roll.rate.out_limit"):
            check_against_board(too_big, *args)
        fits = plan_from_dict({"loop": [{"axis": "roll", "loop": "rate",
                                         "max_amplitude": out_limit}]})
        check_against_board(fits, *args)
        with pytest.raises(PlanError, match="no 'heave' axis"):
            check_against_board(plan_from_dict({"loop": [{"axis": "heave", "loop": "rate"}]}),
                                *args)
    finally:
        st.close()
        h.stop()
