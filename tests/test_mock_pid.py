"""The board's discrete PID: parallel form, setpoint weight, derivative on measurement,
anti-windup (Astrom, K.J., Hagglund, T. (2006). Advanced PID Control. ISA, ch. 3)."""

from __future__ import annotations

import pytest

from mock_device.pid import Pid

TS = 0.001


def make(**kw) -> Pid:
    p = Pid(TS)
    for k, v in kw.items():
        setattr(p, k, v)
    p.configure()
    return p


def test_proportional_with_setpoint_weight():
    # u = kp*(b*r - y) (Astrom & Hagglund 2006, setpoint weighting)
    p = make(kp=2.0, b=0.5)
    assert p.update(1.0, 0.2) == pytest.approx(2.0 * (0.5 * 1.0 - 0.2))


def test_integral_accumulates_ki_ts_error_after_use():
    p = make(ki=10.0)
    assert p.update(1.0, 0.0) == 0.0  # I used at tick k is the one before this tick's error
    assert p.update(1.0, 0.0) == pytest.approx(10.0 * TS)
    assert p.update(1.0, 0.0) == pytest.approx(2 * 10.0 * TS)


def test_derivative_on_measurement_has_no_setpoint_kick_and_filters():
    # backward-Euler filtered derivative D[k] = tf/(tf+Ts) D[k-1] + kd/(tf+Ts) (y[k]-y[k-1])
    p = make(kd=0.1, tf=0.009)
    p.update(0.0, 0.0)
    assert p.update(5.0, 0.0) == 0.0  # setpoint step: no kick
    u = p.update(5.0, 0.01)  # measurement step of 0.01
    d = 0.1 / (0.009 + TS) * 0.01
    assert u == pytest.approx(-d)
    u2 = p.update(5.0, 0.01)
    assert u2 == pytest.approx(-d * 0.009 / (0.009 + TS))


def test_output_limit_is_around_ff_and_actuator_range():
    p = Pid(TS, act_lo=0.0, act_hi=1.0)
    p.kp, p.ff, p.out_limit = 10.0, 0.45, 0.3
    p.configure()
    assert p.update(1.0, 0.0) == pytest.approx(0.75)
    assert p.update(-1.0, 0.0) == pytest.approx(0.15)
    p.out_limit = 0.9
    p.configure()
    assert p.update(-1.0, 0.0) == 0.0  # actuator cannot go below 0


def test_clamping_anti_windup_stops_integration_in_saturation():
    # conditional integration (Astrom & Hagglund 2006, anti-windup by clamping)
    p = make(kp=1.0, ki=100.0, out_limit=0.5, aw_mode=0)
    for _ in range(2000):
        p.update(10.0, 0.0)
    assert p.saturated
    assert p.i < 0.5 + 100.0 * TS  # stopped near the limit instead of growing to 2000
    # recovers quickly when the error reverses
    n = 0
    while p.update(-1.0, 0.0) > 0 and n < 1000:
        n += 1
    assert n < 20


def test_back_calculation_tracks_the_limit():
    # back-calculation: dI = ki*Ts*e + Ts/Tt*(u - v) (Astrom & Hagglund 2006); in steady
    # saturation I settles where ki*e + (u - v)/Tt = 0
    kp, ki, tt, e = 1.0, 20.0, 0.05, 2.0
    p = make(kp=kp, ki=ki, out_limit=0.5, aw_mode=1, aw_tt=tt)
    for _ in range(5000):
        p.update(e, 0.0)
    v = kp * e + p.i
    assert ki * e + (0.5 - v) / tt == pytest.approx(0.0, abs=1e-6)


def test_integrator_clamp():
    p = make(ki=100.0, i_limit=0.2)
    for _ in range(1000):
        p.update(1.0, 0.0)
    assert p.i == pytest.approx(0.2)


def test_without_anti_windup_limit_the_integrator_winds_up():
    # the windup the anti-windup prevents: back-calculation with a huge tracking time is
    # nearly plain integration (common practice, no source)
    p = make(kp=1.0, ki=100.0, out_limit=0.5, aw_mode=1, aw_tt=100.0)
    for _ in range(2000):
        p.update(10.0, 0.0)
    assert p.i > 100.0
