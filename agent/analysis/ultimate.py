"""Ultimate point (ultimate gain ``ku`` and period ``tu_s``) from a relay oscillation.

Four estimates are reported, each on a stated basis (``"loop"``: as the controller sees it,
board sampling delay included; ``"plant"``: that delay removed):

``describing_function``
    Ideal-relay describing function N(a) = 4d/(πa) (Åström & Hägglund 1984, Automatica 20(5)):
    ``ku = 4d/(πa)`` with ``a`` the peak amplitude and ``tu`` the oscillation period, assuming the
    oscillation sits exactly at the -180° crossing.
``hysteresis_corrected``
    Relay with hysteresis ε: N(a) = 4d/(πa)(sqrt(1-(ε/a)^2) - jε/a), so the oscillation is the
    point ``G(jω0) = -(πa/4d) exp(j asin(ε/a))`` (Åström & Hägglund, PID Controllers, ISA 1995).
``first_harmonic``
    Ratio of the first Fourier coefficients of ``y`` and ``u`` over a whole number of periods,
    which equals ``G(jω0)`` exactly in a periodic steady state of a linear loop.
``model_fit``
    The -180° crossing of the fitted model (:mod:`agent.analysis.models`).

The point ``G(jω0)`` a relay measures lies a few degrees off -180°. To report an ultimate point
the measured point is carried along the fitted model's frequency-response shape,
``G(jω) ≈ G(jω0) · M(jω)/M(jω0)``, to the -180° crossing: the measurement fixes the value, the
model only the local slope, so model errors enter to second order. The same construction with
``exp(jω·delay)`` removes the board's sampling delay for the ``plant`` basis.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass

import numpy as np
from scipy import optimize

__all__ = [
    "UltimatePoint",
    "anchored_crossover",
    "describing_function_point",
    "first_harmonic",
    "hysteresis_point",
]


@dataclass(frozen=True)
class UltimatePoint:
    """Ultimate gain and period by one method, on the stated basis ("loop" or "plant")."""

    method: str
    ku: float
    tu_s: float
    basis: str

    def to_dict(self) -> dict:
        """JSON-ready dictionary (floats, lists, strings)."""
        return {"method": self.method, "ku": float(self.ku), "tu_s": float(self.tu_s),
                "basis": self.basis}


def first_harmonic(t_s: np.ndarray, y: np.ndarray, u: np.ndarray, start: int, stop: int,
                   n_periods: int) -> tuple[complex, float]:
    """``(G(jω0), ω0)`` from the first Fourier coefficients over ``[start, stop)``.

    ``start``/``stop`` must span ``n_periods`` whole periods (upward switch to upward switch).
    The means are removed first (they do not contribute over whole periods, but removing them
    reduces leakage from the ±1-sample uncertainty of the window ends).

    Parameters
    ----------
    t_s, y, u : ndarray
        Sample times, measurement and relay output.
    start, stop : int
        Sample window.
    n_periods : int
        Whole periods in the window.
    """
    t = t_s[start:stop]
    dt = float(np.median(np.diff(t_s)))
    w0 = 2 * np.pi * n_periods / (t_s[stop] - t_s[start]) if stop < len(t_s) else \
        2 * np.pi * n_periods / (len(t) * dt)
    e = np.exp(-1j * w0 * (t - t[0]))
    yy = y[start:stop] - np.mean(y[start:stop])
    uu = u[start:stop] - np.mean(u[start:stop])
    Y = np.sum(yy * e)
    U = np.sum(uu * e)
    return complex(Y / U), float(w0)


def describing_function_point(amplitude_y: float, d: float) -> complex:
    """``G(jω0)`` implied by the ideal-relay describing function: ``-πa/(4d)``.

    Parameters
    ----------
    amplitude_y : float
        Oscillation amplitude of the measurement.
    d : float
        Relay amplitude.

    Returns
    -------
    complex
    """
    return complex(-np.pi * amplitude_y / (4 * d))


def hysteresis_point(amplitude_y: float, d: float, eps: float) -> complex:
    """``G(jω0)`` implied by the hysteresis describing function: ``-(πa/4d) exp(j asin(ε/a))``.

    Parameters
    ----------
    amplitude_y : float
        Oscillation amplitude of the measurement.
    d : float
        Relay amplitude.
    eps : float
        Relay hysteresis (measurement units).

    Returns
    -------
    complex
    """
    r = np.clip(eps / amplitude_y, -0.99, 0.99)
    return complex(-np.pi * amplitude_y / (4 * d) * np.exp(1j * np.arcsin(r)))


def anchored_crossover(g0: complex, w0: float, shape: Callable[[np.ndarray], np.ndarray] | None,
                       delay_removed_s: float = 0.0) -> tuple[float, float]:
    """Carry a measured point ``g0 = G(jω0)`` to the -180° crossing; return ``(ku, wu)``.

    ``shape(w)`` is a model frequency response used only for its local shape; with ``None`` the
    phase slope of a pure delay through the point is assumed. ``delay_removed_s`` is removed
    (phase advance ``ω·delay``) to move from the loop to the plant basis.

    Parameters
    ----------
    g0 : complex
        Measured frequency response at ``w0``.
    w0 : float
        Oscillation frequency (rad/s).
    shape : callable or None
        Model frequency response ``shape(w)``.
    delay_removed_s : float
        Delay removed from the point (s).
    """
    ph0 = float(np.angle(g0))
    if ph0 > 0:
        ph0 -= 2 * np.pi  # a point near the negative real axis: phase in (-2π, 0]
    if shape is None:
        # pure-delay slope: phase(ω) = ph0 - (ω - ω0)·(π/ω0)
        def phase(w: float) -> float:
            return ph0 - (w - w0) * np.pi / w0 + w * delay_removed_s

        def mag(w: float) -> float:
            return abs(g0)
    else:
        m0 = complex(shape(np.array([w0]))[0])

        def ratio(w: float) -> complex:
            return complex(shape(np.array([w]))[0]) / m0

        def phase(w: float) -> float:
            return ph0 + float(np.angle(ratio(w))) + w * delay_removed_s

        def mag(w: float) -> float:
            return abs(g0) * abs(ratio(w))

    def f(w: float) -> float:
        return phase(w) + np.pi

    f0 = f(w0)
    if abs(f0) < 1e-15:
        return 1.0 / mag(w0), w0
    # phase decreases with frequency: too much phase (f0 > 0) -> crossing above w0
    grid = w0 * (np.geomspace(1.0, 2.5, 40) if f0 > 0 else np.geomspace(1.0, 1 / 2.5, 40))
    prev = w0
    for w in grid[1:]:
        if np.sign(f(w)) != np.sign(f0):
            wu = optimize.brentq(f, min(prev, w), max(prev, w), xtol=1e-13 * w0)
            return 1.0 / mag(wu), float(wu)
        prev = w
    return 1.0 / mag(w0), w0  # no crossing nearby: report the measured point itself
