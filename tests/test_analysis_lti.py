"""Ultimate points, discretisation and relay simulation against python-control, scipy and
published formulas."""

import control
import numpy as np
import pytest
from scipy import signal

from agent.analysis import simulate_relay
from agent.analysis.lti import freq_response, lsim_zoh, phase_crossover, zoh_discretize
from agent.analysis.models import Model

RATIONAL = [
    ([1.0], [1, 3, 3, 1]),                                   # 1/(s+1)^3
    ([1.0], np.polymul([1, 0], np.polymul([1, 1], [0.5, 1]))),  # 1/(s(s+1)(0.5s+1))
    ([-0.5, 1.0], [1, 3, 3, 1]),                             # (1-0.5s)/(s+1)^3
    ([1.0], np.poly([-1, -2, -4, -8]) / 64),                 # four lags
    ([2.0], np.poly([-1] * 8)),                              # 2/(s+1)^8
]


@pytest.mark.parametrize("num, den", RATIONAL)
def test_ultimate_point_matches_python_control_margins(num, den):
    # python-control stability_margins: gain margin = Ku at the phase crossover wu
    gm, _, wpc, _ = control.margin(control.tf(num, den))
    ku, wu = phase_crossover((num, den, 0.0))
    assert ku == pytest.approx(gm, rel=1e-6)
    assert wu == pytest.approx(wpc, rel=1e-6)


def test_third_order_lag_textbook_values():
    # textbook (value from memory): 1/(s+1)^3 has Ku = 8 and wu = sqrt(3) rad/s
    ku, wu = phase_crossover(([1], [1, 3, 3, 1], 0.0))
    assert ku == pytest.approx(8.0, rel=1e-9)
    assert wu == pytest.approx(np.sqrt(3.0), rel=1e-9)


@pytest.mark.parametrize("T, L", [(1.0, 0.2), (1.0, 1.0), (0.1, 1.0), (10.0, 1.0)])
def test_fopdt_ultimate_point_against_pade(T, L):
    # python-control: margins of the FOPDT with a 12th-order Padé delay converge on the exact
    # crossover; Model.ultimate() evaluates the delay exactly
    pn, pd = control.pade(L, 12)
    gm, _, wpc, _ = control.margin(control.tf([1], [T, 1]) * control.tf(pn, pd))
    m = Model("fopdt", {"K": 1.0, "T": T, "L": L}, 0.0, L / (L + T))
    ku, tu = m.ultimate()
    assert ku == pytest.approx(gm, rel=1e-4)
    assert tu == pytest.approx(2 * np.pi / wpc, rel=1e-4)


def test_zoh_discretisation_matches_scipy_without_delay():
    # scipy.signal.cont2discrete (zero-order hold)
    num, den = [2.0, 1.0], [1.0, 3.0, 2.0, 0.5]
    dm = zoh_discretize(num, den, 0.0, 0.05)
    bz, az, _ = signal.cont2discrete((num, den), 0.05, method="zoh")
    u = np.sin(np.arange(300) * 0.07)
    y1 = signal.lfilter(dm.b, dm.a, u)
    y2 = signal.lfilter(np.ravel(bz), az, u)
    assert np.max(np.abs(y1 - y2)) < 1e-10


def test_fractional_delay_is_exact_for_held_inputs():
    # analytic step response of K e^{-Ls}/(Ts+1): K(1 - e^{-(t-L)/T}) for t > L
    K, T, L, dt = 1.5, 0.7, 0.234, 0.05
    y = lsim_zoh(([K], [T, 1], L), dt, np.ones(100))
    t = np.arange(100) * dt
    exact = np.where(t > L, K * (1 - np.exp(-(t - L) / T)), 0.0)
    assert np.max(np.abs(y - exact)) < 1e-12


def test_frequency_response_matches_python_control():
    num, den, L = [-0.5, 1.0], [1, 3, 3, 1], 0.3
    w = np.geomspace(0.01, 10, 50)
    ref = np.array([complex(control.tf(num, den)(1j * x)) for x in w]) * np.exp(-1j * w * L)
    assert np.max(np.abs(freq_response((num, den, L), w) - ref)) < 1e-12


def test_relay_simulation_matches_yu_limit_cycle():
    # Yu (2006), Autotuning of PID Controllers: amplitude a = K d (1 - e^{-L/T}),
    # period P = 2T ln(2 e^{L/T} - 1); a fine sample time keeps the hold's effect small
    K, T, L, d, dt = 1.0, 1.0, 0.5, 0.3, 0.0005
    rec = simulate_relay([K], [T, 1], L, d, 0.0, 0.0, dt, 25.0)
    tail = rec.t_s > 15.0
    a = 0.5 * (rec.y[tail].max() - rec.y[tail].min())
    up = np.nonzero(np.diff(rec.u) > 0)[0]
    P = np.mean(np.diff(rec.t_s[up])[-4:])
    assert a == pytest.approx(K * d * (1 - np.exp(-L / T)), rel=2e-3)
    assert P == pytest.approx(2 * T * np.log(2 * np.exp(L / T) - 1), rel=2e-3)
