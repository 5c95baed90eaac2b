"""Physics of the mock stands against textbook results."""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import signal

from mock_device.plant import (G_M_S2, Gauss, HeaveAxis, HeaveParams, RotationAxis,
                               RotationParams, TransferFunctionParams, TransferFunctionPlant)

TS = 0.001


def _gauss(seed=0):
    return Gauss(np.random.default_rng(seed))


def test_free_inertia_under_constant_torque_turns_tau_t2_over_2j():
    # theta = tau*t^2/(2J) for a free body under constant torque (Newton's second law for
    # rotation; any mechanics textbook, e.g. Halliday, Resnick & Walker, Fundamentals of Physics)
    j, tau = 0.0045, 0.02
    ax = RotationAxis(RotationParams(inertia_kg_m2=j, torque_per_unit_nm=0.3, motor_tau_s=0.02,
                                     disturbance_nm=tau), TS, _gauss())
    for _ in range(1000):
        ax.step(0.0)
    t = 1.0
    assert ax.th == pytest.approx(tau * t * t / (2 * j), rel=1e-9)
    assert ax.w == pytest.approx(tau * t / j, rel=1e-9)


def test_motor_lag_reaches_63_percent_at_its_time_constant():
    # a first-order lag reaches 1 - e^-1 = 63.2 % of a step at t = T (common practice, no
    # source: the definition of the time constant)
    tau_m = 0.025
    ax = RotationAxis(RotationParams(inertia_kg_m2=0.005, torque_per_unit_nm=0.3,
                                     motor_tau_s=tau_m), TS, _gauss())
    for _ in range(int(round(tau_m / TS))):
        ax.step(1.0)
    assert ax.m == pytest.approx(1 - math.exp(-1), rel=1e-9)
    assert ax.m == pytest.approx(0.632, abs=5e-4)


def test_pendulum_small_oscillation_period():
    # compound pendulum: T = 2*pi*sqrt(J/(m*g*l)) for small swings (e.g. Halliday, Resnick &
    # Walker, Fundamentals of Physics, "physical pendulum")
    j, m, l = 0.0045, 0.6, 0.008
    ax = RotationAxis(RotationParams(inertia_kg_m2=j, torque_per_unit_nm=0.3, motor_tau_s=0.02,
                                     pendulum_mass_kg=m, cg_below_m=l, initial_angle_rad=0.01),
                      TS, _gauss())
    th = []
    for _ in range(12000):
        ax.step(0.0)
        th.append(ax.th)
    th = np.array(th)
    up = np.flatnonzero((th[:-1] < 0) & (th[1:] >= 0))
    # interpolate the crossing instants
    tc = (up - th[up] / (th[up + 1] - th[up])) * TS
    period = np.mean(np.diff(tc))
    assert period == pytest.approx(2 * math.pi * math.sqrt(j / (m * G_M_S2 * l)), rel=1e-3)
    # no damping given: the amplitude stays
    assert np.max(np.abs(th[-2000:])) == pytest.approx(0.01, rel=1e-3)


def test_coulomb_friction_holds_a_body_below_breakaway_torque():
    # static friction holds while the applied torque is below the friction torque (common
    # practice, no source)
    ax = RotationAxis(RotationParams(inertia_kg_m2=0.005, torque_per_unit_nm=0.1,
                                     motor_tau_s=0.001, coulomb_nm=0.02), TS, _gauss())
    for _ in range(500):
        ax.step(0.15)  # 0.015 N m < 0.02 N m
    assert ax.w == 0.0 and ax.th == 0.0
    for _ in range(500):
        ax.step(0.5)  # 0.05 N m > 0.02 N m: net 0.03 N m
    assert ax.w > 0.0


def test_dead_band_and_quantisation_of_the_actuator():
    ax = RotationAxis(RotationParams(inertia_kg_m2=0.005, torque_per_unit_nm=0.1,
                                     motor_tau_s=0.02, dead_band=0.01, quant_step=0.01), TS,
                      _gauss())
    ax.step(0.004)
    assert ax.u_eff == 0.0
    ax.step(0.0234)
    assert ax.u_eff == pytest.approx(0.02)
    ax.step(3.0)
    assert ax.u_eff == pytest.approx(1.0)  # saturation at output_limit


def test_heave_hover_equilibrium():
    # at hover the thrust F*u balances m*g - wind: the frame neither climbs nor sinks
    # (Newton's second law; common practice, no source)
    p = HeaveParams(mass_kg=1.6, thrust_per_unit_n=36.0, motor_tau_s=0.06, drag_n_s_m=0.8,
                    wind_n=-0.5, initial_height_m=1.0, rail_height_m=100.0)
    hv = HeaveAxis(p, TS, _gauss())
    u = p.hover_command
    assert u == pytest.approx((1.6 * G_M_S2 + 0.5) / 36.0)
    hv.thrust = u
    for _ in range(5000):
        hv.step(u)
    assert hv.h == pytest.approx(1.0, abs=1e-9)
    assert abs(hv.v) < 1e-9
    # 5 % more thrust: terminal climb rate (F*du)/c once the drag balances the excess
    for _ in range(20000):
        hv.step(u * 1.05)
    assert hv.v == pytest.approx(36.0 * u * 0.05 / 0.8, rel=1e-3)


def test_heave_rests_on_the_bottom_stop_without_thrust():
    hv = HeaveAxis(HeaveParams(mass_kg=1.0, thrust_per_unit_n=20.0, motor_tau_s=0.05,
                               initial_height_m=0.2), TS, _gauss())
    for _ in range(2000):
        hv.step(0.0)
    assert hv.h == 0.0 and hv.v == 0.0


def test_sensor_delay_is_whole_ticks():
    ax = RotationAxis(RotationParams(inertia_kg_m2=0.005, torque_per_unit_nm=0.1,
                                     motor_tau_s=0.02, disturbance_nm=0.01,
                                     sensor_delay_s=0.003), TS, _gauss())
    truth = []
    meas = []
    for _ in range(50):
        ax.step(0.0)
        ax.sample()
        truth.append(ax.th)
        meas.append(ax.y_angle)
    assert meas[10] == truth[7]


@pytest.mark.parametrize("num,den", [([1.0], [1.0, 3.0, 3.0, 1.0]),
                                     ([2.0, 1.0], [0.5, 1.5, 1.0]),
                                     ([1.0], [0.05, 1.0, 0.0])])
def test_transfer_function_plant_matches_scipy_zoh_step(num, den):
    # exact ZOH discretisation: the sampled step response equals scipy's continuous one at the
    # sample instants (scipy.signal.step, reference implementation)
    plant = TransferFunctionPlant(TransferFunctionParams(tuple(num), tuple(den), output_limit=10),
                                  0.01, _gauss())
    ys = []
    for _ in range(300):
        ys.append(plant.y_true)
        plant.step(1.0)
    t = np.arange(300) * 0.01
    _, ref = signal.step(signal.TransferFunction(num, den), T=t)
    np.testing.assert_allclose(ys, ref, atol=1e-9)


def test_transfer_function_fractional_delay_is_exact():
    # FOPDT step response K*(1 - exp(-(t-L)/T)) for t > L (textbook first-order response)
    K, T, L, ts = 2.0, 0.5, 0.2037, 0.01
    plant = TransferFunctionPlant(TransferFunctionParams((K,), (T, 1.0), delay_s=L,
                                                         output_limit=10), ts, _gauss())
    assert plant.d_ticks == 20 and plant.frac == pytest.approx(0.37)
    ys = []
    for _ in range(200):
        ys.append(plant.y_true)
        plant.step(1.0)
    t = np.arange(200) * ts
    ref = np.where(t > L, K * (1 - np.exp(-(t - L) / T)), 0.0)
    np.testing.assert_allclose(ys, ref, atol=1e-9)


def test_noise_is_seeded_and_has_the_given_std():
    p = TransferFunctionParams((1.0,), (1.0, 1.0), noise_std=0.05)
    a = TransferFunctionPlant(p, TS, _gauss(3))
    b = TransferFunctionPlant(p, TS, _gauss(3))
    ya, yb = [], []
    for _ in range(20000):
        a.sample()
        b.sample()
        ya.append(a.y)
        yb.append(b.y)
    assert ya == yb
    assert np.std(ya) == pytest.approx(0.05, rel=0.03)


def test_improper_transfer_function_is_refused_with_a_message():
    with pytest.raises(ValueError, match="proper"):
        TransferFunctionPlant(TransferFunctionParams((1.0, 0.0, 0.0), (1.0, 1.0)), TS, _gauss())
