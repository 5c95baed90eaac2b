"""Exact simulation of a sampled relay loop around a continuous plant with dead time.

The relay runs at the loop's sample time: at tick ``k`` it reads ``y[k]`` (noise included),
decides ``u[k]`` and holds it until the next tick (zero-order hold, applied at once). The plant
is integrated exactly between ticks (:func:`agent.analysis.lti.zoh_discretize`), including a
fractional dead time. Pure: the only randomness is a seeded generator for measurement noise.
"""

from __future__ import annotations

import numpy as np

from .lti import as_tf, zoh_discretize
from .records import RelayRecord

__all__ = ["simulate_relay"]


def simulate_relay(num, den, delay_s: float, amplitude: float, hysteresis: float, bias: float,
                   dt: float, duration_s: float, noise_std: float = 0.0, seed: int = 0,
                   setpoint: float = 0.0, load: float = 0.0,
                   sampling_delay_s: float | None = None) -> RelayRecord:
    """Simulate a relay experiment on ``num/den * exp(-s delay_s)`` and return its record.

    Parameters
    ----------
    num, den, delay_s
        Continuous plant (descending powers of s) and its dead time in seconds.
    amplitude, hysteresis, bias
        Relay: output ``bias + amplitude`` while ``setpoint - y > hysteresis``, ``bias -
        amplitude`` while ``setpoint - y < -hysteresis``, unchanged in between. A negative
        hysteresis makes the relay switch early.
    dt, duration_s
        Loop sample time and record length.
    noise_std, seed
        White measurement noise (standard deviation, measurement units) from a seeded generator.
    setpoint, load
        Relay reference; constant load added to the plant input (e.g. gravity on heave).
    sampling_delay_s
        Stored in the record; defaults to ``dt / 2`` (the hold; the output is applied at once).

    Returns
    -------
    RelayRecord
        With ``u`` the applied relay output (bias included) and ``y`` the noisy measurement.

    Notes
    -----
    The plant starts at rest: at its equilibrium for the input ``bias + load`` when it has one,
    otherwise with zero state.
    """
    num, den, delay_s = as_tf((num, den, delay_s))
    if len(num) >= len(den):
        raise ValueError("simulate_relay needs a strictly proper plant (numerator degree below "
                         "the denominator's); a measurement never responds instantly.")
    n = int(round(duration_s / dt)) + 1
    dm = zoh_discretize(num, den, delay_s, dt)
    rng = np.random.default_rng(seed)
    noise = rng.standard_normal(n) * noise_std if noise_std > 0 else np.zeros(n)
    u0 = bias + load
    nx = dm.phi.shape[0]
    x = np.zeros(nx)
    if nx:
        M = np.eye(nx) - dm.phi
        rhs = (dm.g0 + dm.g1) * u0
        if abs(np.linalg.det(M)) > 1e-12:
            x = np.linalg.solve(M, rhs)
    m = dm.shift
    hist = [u0] * (m + 2)  # plant-side input history: hist[-1] is the newest applied value
    y = np.empty(n)
    u = np.empty(n)
    phi, g0, g1, c, d = dm.phi, dm.g0, dm.g1, dm.c, dm.d
    state = 1.0 if setpoint - (float(c @ x) if nx else d * u0) >= 0 else -1.0
    for k in range(n):
        y_true = float(c @ x)
        ym = y_true + noise[k]
        e = setpoint - ym
        if e > hysteresis:
            state = 1.0
        elif e < -hysteresis:
            state = -1.0
        uk = bias + state * amplitude
        y[k] = ym
        u[k] = uk
        hist.append(uk + load)
        # inputs acting over [k dt, (k+1) dt): u[k-m] after the fraction, u[k-m-1] before
        cur = hist[-1 - m]
        prev = hist[-2 - m]
        if nx:
            x = phi @ x + g0 * cur + g1 * prev
        if len(hist) > m + 4:
            del hist[0]
    t = np.arange(n) * dt
    return RelayRecord(t_s=t, y=y, u=u, setpoint=float(setpoint), amplitude=float(amplitude),
                       hysteresis=float(hysteresis), bias=float(bias), sample_time_s=float(dt),
                       sampling_delay_s=float(dt / 2 if sampling_delay_s is None else sampling_delay_s))
