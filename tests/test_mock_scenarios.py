"""Scenarios, ground truth and relay experiments on the mock against outside references."""

from __future__ import annotations

import dataclasses
import math

import control
import numpy as np
import pytest

from mock_device.firmware import Firmware
from mock_device.scenarios import (ScenarioError, frequency_response, list_scenarios,
                                   load_scenario, pade, scenario_from_dict, ultimate_point)
from protocol import messages as M

NAMES = [n for n, _ in list_scenarios()]


def test_bundled_scenarios_are_listed_invented_and_load():
    assert {"gimbal-quad", "heave-rail", "single-axis", "tf-third-order", "tf-fopdt"} <= set(NAMES)
    for name, desc in list_scenarios():
        assert "INVENTED" in desc
        sc = load_scenario(name)
        assert sc.name == name
        assert sc.axes
        assert sc.sampling_delay_s == pytest.approx(1.5 / sc.loop_rate_hz)


def test_unknown_scenario_name_gives_a_helpful_error():
    with pytest.raises(ScenarioError, match="bundled scenarios: .*gimbal-quad"):
        load_scenario("no-such-stand")


def test_bad_plant_table_errors_say_what_to_fix():
    base = {"plant": {"kind": "transfer_function", "axis": "roll", "loop": "rate", "num": [1.0],
                      "den": [1.0, 1.0]}}
    scenario_from_dict(base)
    for change, msg in [({"axis": "tail"}, "axis must be one of"),
                        ({"loop": "heave"}, "loop for axis roll"),
                        ({"den": [1.0, -1.0]}, "stable or have at most one integrator"),
                        ({"num": [1.0, 2.0, 3.0]}, "proper"),
                        ({"kind": "table"}, "kind must be"),
                        ({"num": "1"}, "non-empty list of numbers"),
                        ({"gain": 3}, "unknown key")]:
        d = {"plant": {**base["plant"], **change}}
        with pytest.raises(ScenarioError, match=msg):
            scenario_from_dict(d)


def test_generic_plant_toml_form(tmp_path):
    f = tmp_path / "mine.toml"
    f.write_text('''
[plant]
kind = "transfer_function"
axis = "pitch"            # roll | pitch | yaw | heave
loop = "angle"            # rate | angle | heave
num = [2.0]
den = [1.0, 3.0, 3.0, 1.0]
delay_s = 0.05
noise_std = 0.01
output_limit = 0.5
''')
    sc = load_scenario(str(f))
    assert sc.name == "mine"
    assert sc.axes == {"pitch": ("angle",)}
    assert sc.ground_truth("pitch", "angle") == ([2.0], [1.0, 3.0, 3.0, 1.0], 0.05)
    assert sc.noise_std("pitch", "angle") == 0.01
    with pytest.raises(ScenarioError, match="has no loop level"):
        sc.ground_truth("pitch", "rate")


def test_third_order_ultimate_point_is_the_textbook_one():
    # 1/(s+1)^3: Ku = 8, wu = sqrt(3) rad/s (textbook; e.g. Astrom & Hagglund 1995, PID
    # Controllers: Theory, Design and Tuning, ISA)
    sc = load_scenario("tf-third-order")
    ku, tu = sc.ultimate_point("roll", "rate", with_sampling_delay=False)
    assert ku == pytest.approx(8.0, rel=1e-6)
    assert tu == pytest.approx(2 * math.pi / math.sqrt(3), rel=1e-6)


def _control_margin(num, den, delay_s):
    """Ku and Tu from python-control's margin on the model with a 5th-order Pade delay."""
    g = control.tf(num, den)
    if delay_s > 0:
        g = g * control.tf(*control.pade(delay_s, 5))
    gm, _pm, wcg, _wcp = control.margin(g)
    return gm, 2 * math.pi / wcg


@pytest.mark.parametrize("name", NAMES)
def test_ground_truth_agrees_with_python_control_margins(name):
    # python-control 0.10 (reference library): margin() gives the gain margin (= Ku) and the
    # phase-crossover frequency (= 2*pi/Tu) of the same model
    sc = load_scenario(name)
    for axis, levels in sc.axes.items():
        if sc.rotation.get(axis) is not None and sc.rotation[axis].blocked:
            continue  # a locked stand has no dynamics to cross -180 degrees
        for loop in levels:
            num, den, d = sc.ground_truth(axis, loop)
            total = d + sc.sampling_delay_s
            ku, tu = ultimate_point(num, den, total)
            ku_c, tu_c = _control_margin(num, den, total)
            assert ku == pytest.approx(ku_c, rel=2e-3), (axis, loop)
            assert tu == pytest.approx(tu_c, rel=2e-3), (axis, loop)


def test_stand_loops_have_multirotor_like_ultimate_periods():
    # brief: rate loops 30-80 ms, angle loops 0.2-0.6 s, heave 1-4 s (at 1 kHz)
    for name in ("gimbal-quad", "single-axis", "heave-rail"):
        sc = load_scenario(name)
        for axis, levels in sc.axes.items():
            for loop in levels:
                _, tu = sc.ultimate_point(axis, loop)
                lo, hi = {("rate", False): (0.03, 0.08), ("angle", False): (0.2, 0.6),
                          ("heave", True): (1.0, 4.0), ("rate", True): (0.1, 0.5)}[
                    (loop, axis == "heave")]
                assert lo <= tu <= hi, (name, axis, loop, tu)


def test_default_gains_are_stable_and_detuned():
    # default gains below the ultimate gain (stable) but far from Ziegler-Nichols' 0.6 Ku
    # (Ziegler & Nichols 1942) so tuning has room to improve
    for name in NAMES:
        sc = load_scenario(name)
        for axis, levels in sc.axes.items():
            if sc.rotation.get(axis) is not None and sc.rotation[axis].blocked:
                continue
            for loop in levels:
                ku, _ = sc.ultimate_point(axis, loop)
                kp = sc.default_gains(axis, loop).get("kp", 0.0)
                assert 0 < kp < 0.45 * ku, (name, axis, loop, kp, ku)


def test_pade_matches_the_delay_phase_at_low_frequency():
    # Pade approximant of exp(-sT): exact magnitude 1 and phase -wT for wT well below its order
    n, d = pade(0.01)
    w = np.array([1.0, 10.0, 100.0])
    h = np.polyval(n, 1j * w) / np.polyval(d, 1j * w)
    np.testing.assert_allclose(np.abs(h), 1.0, rtol=1e-12)
    np.testing.assert_allclose(np.angle(h), -w * 0.01, rtol=1e-9)


def _relay_run(fw, axis, loop, amplitude, seconds, setpoint=0.0, hysteresis=0.0):
    fw.arm_now()
    fw.start_experiment(M.ExperimentStart(
        tag=1, kind=M.ExperimentKind.RELAY, axis=M.Axis[axis.upper()],
        loop=M.Loop[loop.upper()], amplitude=amplitude, hysteresis=hysteresis,
        setpoint=setpoint, duration_s=seconds + 1, kill_rate_rad_s=50, kill_angle_rad=3,
        kill_heave_m=3, kill_saturation_s=30))
    n = int(round(seconds / fw.ts))
    y = np.empty(n)
    u = np.empty(n)
    for k in range(n):
        fw.tick(0.0)  # link time frozen: the watchdog never expires in this pure test
        _, y[k], u[k] = fw.level_signals(axis, loop)
    assert fw.state == M.DeviceState.RUNNING
    return y, u


def test_relay_on_fopdt_reproduces_the_exact_limit_cycle():
    # Yu, C.-C. (2006). Autotuning of PID Controllers: A Relay Feedback Approach, 2nd ed.:
    # ideal relay +-d on K e^(-Ls)/(Ts+1): a = K d (1 - e^(-L/T)), P = 2T ln(2 e^(L/T) - 1).
    # The board adds its sampling delay (1.5 ticks) to L.
    sc = load_scenario("tf-fopdt")
    K, T = 1.0, 0.5
    L = 0.2 + sc.sampling_delay_s
    d = 0.5
    y, u = _relay_run(Firmware(sc), "roll", "rate", d, 12.0)
    y, u = y[6000:], u[6000:]
    up = np.flatnonzero(np.diff(np.sign(u)) > 0)
    period = np.mean(np.diff(up)) * sc.ts
    amp = (y.max() - y.min()) / 2
    assert amp == pytest.approx(K * d * (1 - math.exp(-L / T)), rel=0.01)
    assert period == pytest.approx(2 * T * math.log(2 * math.exp(L / T) - 1), rel=0.01)


def _clean(sc):
    """The scenario without its non-linear and random parts, so the linear truth applies."""
    rot = {k: dataclasses.replace(v, gyro_noise_std=0, angle_noise_std=0, gyro_bias=0,
                                  coulomb_nm=0, dead_band=0, quant_step=0, cg_lateral_m=0,
                                  disturbance_nm=0, motor_gain_pos=1.0, motor_gain_neg=1.0)
           for k, v in sc.rotation.items()}
    hv = (dataclasses.replace(sc.heave, height_noise_std=0, climb_noise_std=0, gust_std_n=0,
                              quant_step=0, wind_n=0) if sc.heave else None)
    return dataclasses.replace(sc, rotation=rot, heave=hv, coupling=None)


@pytest.mark.parametrize("name,axis,loop,amp,seconds", [
    ("gimbal-quad", "roll", "rate", 0.15, 2.0),
    ("gimbal-quad", "pitch", "angle", 1.0, 3.0),
    ("gimbal-quad", "yaw", "angle", 0.03, 3.0),
    ("single-axis", "roll", "rate", 0.15, 2.0),
    ("heave-rail", "heave", "heave", 0.1, 14.0),
])
def test_ground_truth_matches_the_simulated_stand(name, axis, loop, amp, seconds):
    # In a periodic steady state the ratio of the first Fourier coefficients of measurement and
    # relay output over whole periods is the loop's frequency response at the oscillation
    # frequency (Fourier analysis of a linear system; common practice, no source). The truth
    # plus the board's sampling delay must match what the simulated board sees.
    sc = _clean(load_scenario(name))
    fw = Firmware(sc)
    if axis == "heave":
        fw.plant("heave").h = 0.5
        fw.plant("heave").thrust = sc.hover_command()
        fw.set_setting("heave.rate.ff", round(sc.hover_command(), 6))  # trim: relay centred
    y, u = _relay_run(fw, axis, loop, amp, seconds,
                      setpoint=0.5 if loop == "heave" else 0.0)
    n = len(y)
    up = np.flatnonzero(np.diff(np.sign(u - np.median(u))) > 0) + 1
    up = up[up > n // 2]
    assert len(up) >= 3
    i0, i1 = up[0], up[-1]
    period = (i1 - i0) / (len(up) - 1) * sc.ts
    w0 = 2 * math.pi / period
    e = np.exp(-1j * w0 * np.arange(i0, i1) * sc.ts)
    g_sim = np.sum(y[i0:i1] * e) / np.sum(u[i0:i1] * e)
    num, den, d = sc.ground_truth(axis, loop)
    g_true = frequency_response(num, den, d + sc.sampling_delay_s, np.array([w0]))[0]
    assert abs(g_sim) == pytest.approx(abs(g_true), rel=0.01)
    assert math.degrees(abs(np.angle(g_sim / g_true))) < 1.0


def test_locked_stand_reports_no_dynamics():
    sc = load_scenario("single-axis-locked")
    num, den, _ = sc.ground_truth("roll", "rate")
    assert num == [0.0]
