"""Relay supervisor (amplitude ramp, bias centring, convergence) on a simulated relay loop."""

import math

import numpy as np
import pytest

from agent.relayramp import RelaySupervisor


def run_loop(sup, K=2.0, T=0.05, L=0.01, load=0.0, integrating=False, dt=0.001, t_max=5.0,
             poll_every=37, hysteresis=0.0):
    """Relay around setpoint 0 on K e^{-Ls}/(Ts+1) (or K e^{-Ls}/s) with an input load, exact
    zero-order-hold update per tick; the supervisor is polled every `poll_every` ticks."""
    n = int(t_max / dt)
    d = int(round(L / dt))
    a = math.exp(-dt / T)
    x = 0.0
    hist_u = [sup.bias] * (d + 1)
    t, y, u, r = [], [], [], []
    relay = 1
    for k in range(n):
        e = -x
        if e > hysteresis:
            relay = 1
        elif e < -hysteresis:
            relay = -1
        uk = sup.bias + relay * sup.amplitude
        t.append(k * dt); y.append(x); u.append(uk); r.append(relay)
        hist_u.append(uk)
        ud = hist_u[-1 - d] + load
        x = x + K * ud * dt if integrating else a * x + (1 - a) * K * ud
        if k % poll_every == poll_every - 1:
            dec = sup.decide(np.array(t), np.array(y), np.array(u), np.array(r))
            if dec.action in ("converged", "fail"):
                return dec, np.array(t), np.array(y)
    return None, np.array(t), np.array(y)


def test_ramp_reaches_target_amplitude_and_converges_within_four_periods():
    # FOPDT limit-cycle amplitude a = K d (1 - e^{-L/T}) (Yu 2006, Autotuning of PID
    # Controllers, 2nd ed.): the target is reached when d = a_target / (K (1 - e^{-L/T})).
    sup = RelaySupervisor(amplitude=0.02, bias=0.0, target=0.1, ceiling=1.0)
    dec, t, y = run_loop(sup)
    assert dec is not None and dec.action == "converged", dec
    assert dec.periods_after_ramp <= 4
    assert abs(dec.amplitude_seen - 0.1) <= 0.3 * 0.1
    d_exact = 0.1 / (2.0 * (1 - math.exp(-0.01 / 0.05)))
    # the ramp stops inside the +/-30 % band, so d is within that band of the exact value
    assert 0.7 * d_exact <= dec.amplitude <= 1.3 * d_exact
    assert sup.adjustments >= 1


def test_verdict_does_not_depend_on_poll_rate():
    outs = []
    for poll in (5, 61, 400):
        sup = RelaySupervisor(amplitude=0.02, bias=0.0, target=0.1, ceiling=1.0)
        dec, _, _ = run_loop(sup, poll_every=poll)
        outs.append(dec.periods_after_ramp)
    assert max(outs) <= 4


def test_bias_is_centred_on_the_trim_of_an_integrating_loop_with_load():
    # an integrator with an input load -0.2 is held still only by a mean input of +0.2
    # (common practice, no source: the trim is the input that cancels the load)
    sup = RelaySupervisor(amplitude=0.3, bias=0.0, target=0.02, ceiling=1.0)
    dec, t, y = run_loop(sup, K=1.0, L=0.02, load=-0.2, integrating=True, t_max=20.0)
    assert dec is not None and dec.action == "converged", dec
    assert dec.bias == pytest.approx(0.2, abs=0.02)


def test_amplitude_stays_below_ceiling():
    sup = RelaySupervisor(amplitude=0.01, bias=0.0, target=10.0, ceiling=0.05)
    dec, _, y = run_loop(sup)
    assert dec.amplitude <= 0.05 + 1e-12
    assert dec.action == "converged"  # at the ceiling the oscillation is accepted as it is


def test_no_oscillation_is_reported():
    sup = RelaySupervisor(amplitude=0.1, bias=0.0, target=0.1, ceiling=1.0, no_switch_s=0.5)
    # a plant with zero gain never crosses the setpoint again: the relay stays high
    dec, _, _ = run_loop(sup, K=0.0, t_max=2.0)
    assert dec is not None and dec.action == "fail"
    assert "did not switch" in dec.reason


@pytest.mark.parametrize("load", [0.0, -0.1, 0.15])
def test_bias_converges_on_a_loop_with_static_gain(load):
    # First order with delay, K=2: the relay is centred when its mean output cancels the input
    # load, bias = -load (common practice, no source: the trim cancels the load).
    sup = RelaySupervisor(amplitude=0.3, bias=0.0, target=0.1, ceiling=0.3)
    dec, t, y = run_loop(sup, K=2.0, T=0.5, L=0.2, load=load, t_max=60.0)
    assert dec is not None and dec.action == "converged", dec
    assert dec.bias == pytest.approx(-load, abs=0.06 * 0.3 + 1e-9)
    assert sup.bias_moves <= sup.max_bias_moves
