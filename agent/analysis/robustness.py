"""Robustness of a loop: maximum sensitivity Ms, gain and phase margins.

The loop transfer is ``L(jw) = C(jw) G(jw)`` with ``C`` the board's feedback path
(:func:`agent.analysis.controller.controller_freq`) and ``G`` a continuous model with dead time
(use the loop model, which includes the board's sampling delay). ``Ms = max |1/(1 + L)|``
(Åström & Hägglund 2006, Advanced PID Control).
"""

from __future__ import annotations

import numpy as np
from scipy import optimize

from .controller import controller_freq
from .lti import _low_freq_phase, as_tf, freq_response, phase_crossover

__all__ = ["frequency_grid", "margins", "sensitivity_peak"]


def frequency_grid(model, n: int = 1500) -> np.ndarray:
    """Log-spaced grid around the model's phase crossover (1e-3 to 1e2 times it).

    Parameters
    ----------
    model
        ``(num, den, delay_s)`` or anything with ``tf()``.
    n : int
        Number of frequencies.

    Returns
    -------
    ndarray
        Angular frequencies (rad/s).
    """
    r = phase_crossover(model)
    wu = r[1] if r is not None else 1.0
    return wu * np.geomspace(1e-3, 1e2, n)


def sensitivity_peak(model, kp: float, ki: float, kd: float, tf_s: float,
                     w: np.ndarray | None = None) -> tuple[float, float]:
    """``(Ms, w_ms)``: peak of ``|1/(1 + C G)|`` on a grid, refined by a local search.

    Parameters
    ----------
    model
        Loop model (``(num, den, delay_s)`` or anything with ``tf()``).
    kp, ki, kd, tf_s : float
        Controller gains and derivative filter time (s).
    w : ndarray, optional
        Frequency grid (default :func:`frequency_grid`).

    Returns
    -------
    tuple of float
        ``(Ms, w_ms)``, the peak and its angular frequency (rad/s).
    """
    if w is None:
        w = frequency_grid(model)
    g = freq_response(model, w)
    s = np.abs(1.0 / (1.0 + controller_freq(kp, ki, kd, tf_s, w) * g))
    i = int(np.argmax(s))
    lo, hi = w[max(i - 1, 0)], w[min(i + 1, len(w) - 1)]

    def neg(x: float) -> float:
        gx = freq_response(model, np.array([x]))
        return -float(np.abs(1 / (1 + controller_freq(kp, ki, kd, tf_s, np.array([x])) * gx))[0])

    if hi > lo:
        r = optimize.minimize_scalar(neg, bounds=(lo, hi), method="bounded",
                                     options={"xatol": 1e-10 * hi})
        if -r.fun > s[i]:
            return float(-r.fun), float(r.x)
    return float(s[i]), float(w[i])


def margins(model, kp: float, ki: float, kd: float, tf_s: float,
            w: np.ndarray | None = None) -> tuple[float, float, float, float]:
    """``(gm, pm_deg, w_pc, w_gc)``: smallest gain margin and phase margin of the loop.

    ``gm`` is ``inf`` (and ``w_pc`` nan) when the phase never crosses -180°; ``pm_deg`` is
    ``inf`` when ``|L|`` never crosses 1.

    Parameters
    ----------
    model
        Loop model (``(num, den, delay_s)`` or anything with ``tf()``).
    kp, ki, kd, tf_s : float
        Controller gains and derivative filter time (s).
    w : ndarray, optional
        Frequency grid (default :func:`frequency_grid`).
    """
    num, den, delay = as_tf(model)
    if w is None:
        w = frequency_grid(model, 4000)
    g = freq_response(model, w)
    c = controller_freq(kp, ki, kd, tf_s, w)
    L = c * g
    ph = np.unwrap(np.angle(L))
    ph_asym = _low_freq_phase(num, den) + (-np.pi / 2 if ki > 0 else 0.0)
    ph = ph + 2 * np.pi * np.round((ph_asym - ph[0]) / (2 * np.pi))
    mag = np.abs(L)

    def Lx(x: float) -> complex:
        return complex(controller_freq(kp, ki, kd, tf_s, np.array([x]))[0] *
                       freq_response(model, np.array([x]))[0])

    gm, wpc = np.inf, np.nan
    # crossings of -180° - k*360°
    for k in range(4):
        target = -np.pi - 2 * np.pi * k
        idx = np.nonzero(np.diff(np.sign(ph - target)) != 0)[0]
        for i in idx:
            p1, l1 = ph[i], L[i]

            def f(x, p1=p1, l1=l1, target=target):
                return p1 + np.angle(Lx(x) / l1) - target

            try:
                x = optimize.brentq(f, w[i], w[i + 1], xtol=1e-13 * w[i + 1])
            except ValueError:
                x = w[i]
            g_here = 1.0 / abs(Lx(x))
            if g_here < gm:
                gm, wpc = g_here, x
    pm, wgc = np.inf, np.nan
    idx = np.nonzero(np.diff(np.sign(mag - 1.0)) != 0)[0]
    for i in idx:
        def fm(x):
            return abs(Lx(x)) - 1.0
        try:
            x = optimize.brentq(fm, w[i], w[i + 1], xtol=1e-13 * w[i + 1])
        except ValueError:
            x = w[i]
        p = ph[i] + np.angle(Lx(x) / L[i])
        pm_here = np.degrees(p + np.pi)
        # wrap to (-180, 180]
        pm_here = (pm_here + 180.0) % 360.0 - 180.0
        if pm_here < pm:
            pm, wgc = pm_here, x
    return float(gm), float(pm), float(wpc), float(wgc)
