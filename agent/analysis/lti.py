"""Linear time-invariant helpers shared by identification and design.

A continuous model is a triple ``(num, den, delay_s)``: ``G(s) = num(s)/den(s) * exp(-s*delay_s)``
with polynomial coefficients in descending powers of ``s`` (the scipy convention).

* :func:`zoh_discretize` gives the exact zero-order-hold discretisation of such a model,
  including a dead time that is not a whole number of samples (the input held over a tick is
  split at the fractional delay; see e.g. Åström & Wittenmark, Computer-Controlled Systems, on
  sampling systems with time delay). The result is a pair of polynomials in ``z^-1`` for
  :func:`scipy.signal.lfilter` plus a whole-sample shift.
* :func:`freq_response` evaluates ``G(jw)``.
* :func:`phase_crossover` finds the ultimate point (first frequency where the phase is -180°).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import linalg, optimize, signal

__all__ = [
    "DiscreteModel",
    "as_tf",
    "freq_response",
    "lsim_zoh",
    "phase_crossover",
    "zoh_discretize",
]


def _trim_leading(p: np.ndarray) -> np.ndarray:
    """``p`` without its leading zero coefficients (what ``np.trim_zeros(p, "f")`` does)."""
    nz = np.flatnonzero(p)
    return p[nz[0]:] if len(nz) else p[:0]


def as_tf(model) -> tuple[np.ndarray, np.ndarray, float]:
    """Return ``(num, den, delay_s)`` from a tuple or from anything with a ``tf()`` method.

    Parameters
    ----------
    model
        ``(num, den, delay_s)`` or an object with a ``tf()`` method returning that.

    Returns
    -------
    tuple
        ``(num, den, delay_s)`` as float arrays and a float.
    """
    if hasattr(model, "tf"):
        model = model.tf()
    num, den, delay = model
    num = _trim_leading(np.atleast_1d(np.asarray(num, dtype=float)))
    den = _trim_leading(np.atleast_1d(np.asarray(den, dtype=float)))
    if len(num) == 0:
        num = np.zeros(1)
    return num, den, float(delay)


@dataclass(frozen=True)
class DiscreteModel:
    """ZOH-equivalent of a continuous model: ``y = lfilter(b, a, u delayed by shift samples)``.

    Also keeps the state-space matrices (``phi``, ``g0``, ``g1``, ``c``, ``d``) so that a
    sample-by-sample simulation (a relay acting on the output) uses the same numbers:
    ``x[k+1] = phi x[k] + g0 u[k-shift] + g1 u[k-shift-1]``, ``y[k] = c x[k] + d u_delayed``.
    """

    b: np.ndarray
    a: np.ndarray
    shift: int
    phi: np.ndarray
    g0: np.ndarray
    g1: np.ndarray
    c: np.ndarray
    d: float
    frac: bool


def _expm_small(M: np.ndarray) -> np.ndarray:
    """Matrix exponential of a small matrix by scaling and squaring of a Taylor series.

    For the few-state models used here this is much faster than :func:`scipy.linalg.expm`
    (whose per-call overhead dominates) and agrees with it to rounding; larger matrices are
    handed to scipy.
    """
    n = M.shape[0]
    if n > 12:
        return linalg.expm(M)
    nrm = float(np.max(np.sum(np.abs(M), axis=1))) if n else 0.0
    s = max(0, int(np.ceil(np.log2(nrm / 0.25))) if nrm > 0.25 else 0)
    A = M / (2.0 ** s)
    E = np.eye(n)
    term = np.eye(n)
    for k in range(1, 13):  # ||A|| <= 1/4: the remainder is below 1e-16
        term = term @ A / k
        E = E + term
    for _ in range(s):
        E = E @ E
    return E


def _tf2ss_siso(num: np.ndarray, den: np.ndarray):
    """Controller canonical form of a proper SISO ``num/den`` (the same realisation as
    :func:`scipy.signal.tf2ss`, built directly: that function's generality costs more than the
    discretisation itself inside a fit loop)."""
    den = np.asarray(den, dtype=float)
    num = np.asarray(num, dtype=float)
    a = den / den[0]
    b = np.concatenate([np.zeros(len(den) - len(num)), num]) / den[0]
    n = len(a) - 1
    A = np.zeros((n, n))
    A[0, :] = -a[1:]
    if n > 1:
        A[1:, :-1] = np.eye(n - 1)
    B = np.zeros((n, 1))
    B[0, 0] = 1.0
    D = np.array([[b[0]]])
    C = (b[1:] - b[0] * a[1:]).reshape(1, n)
    return A, B, C, D


def _phi_gamma(A: np.ndarray, B: np.ndarray, tau: float) -> tuple[np.ndarray, np.ndarray]:
    n = A.shape[0]
    M = np.zeros((n + 1, n + 1))
    M[:n, :n] = A * tau
    M[:n, n:] = B * tau
    E = _expm_small(M)
    return E[:n, :n], E[:n, n:]


def zoh_discretize(num, den, delay_s: float, dt: float) -> DiscreteModel:
    """Exact zero-order-hold discretisation of ``num/den * exp(-s delay_s)`` at step ``dt``.

    The dead time is split into ``m`` whole samples and a fraction ``theta < dt``; over one tick
    the delayed input takes the previous held value for ``theta`` seconds and the current one for
    the rest, which gives two input matrices and is exact for piecewise-constant inputs.

    Parameters
    ----------
    num, den : array_like
        Polynomials in descending powers of s.
    delay_s : float
        Dead time (s).
    dt : float
        Sample time (s).

    Returns
    -------
    DiscreteModel
    """
    num, den, _ = as_tf((num, den, 0.0))
    if len(num) > len(den):
        raise ValueError("model must be proper (numerator degree <= denominator degree)")
    delay_s = max(float(delay_s), 0.0)
    m = int(np.floor(delay_s / dt + 1e-9))
    theta = delay_s - m * dt
    if theta < 1e-9 * dt:
        theta = 0.0
    if len(den) == 1:  # static gain
        g = num[-1] / den[0]
        phi = np.zeros((0, 0))
        e = np.zeros((0, 1))
        if theta > 0:
            b = np.array([0.0, g])
        else:
            b = np.array([g])
        return DiscreteModel(b, np.array([1.0]), m, phi, e, e, np.zeros((1, 0)), g, theta > 0)
    A, B, C, D = _tf2ss_siso(num, den)
    n = A.shape[0]
    phi_a, g0 = _phi_gamma(A, B, dt - theta)
    if theta > 0:
        phi_th, gth = _phi_gamma(A, B, theta)
        g1 = phi_a @ gth
        phi = phi_a @ phi_th  # exp(A dt) = exp(A (dt - theta)) exp(A theta)
    else:
        g1 = np.zeros((n, 1))
        phi = phi_a
    d = float(D.ravel()[0]) if D.size else 0.0
    a = np.real(np.poly(phi))
    num0 = _markov_numerator(phi, g0, C.ravel(), a)
    num1 = _markov_numerator(phi, g1, C.ravel(), a)
    b = np.zeros(n + 2)
    b[: n + 1] += num0
    b[1:] += num1
    if d != 0.0:
        if theta > 0:
            b[1:] += d * a
        else:
            b[: n + 1] += d * a
    a_full = np.concatenate([a, [0.0]])
    return DiscreteModel(b, a_full, m, phi, g0.ravel(), g1.ravel(), C.ravel(), d, theta > 0)


def _markov_numerator(phi: np.ndarray, g: np.ndarray, c: np.ndarray, a: np.ndarray
                      ) -> np.ndarray:
    """Numerator (in ``z^-1``, length n+1) of ``c (zI - phi)^-1 g`` given its denominator ``a``.

    The transfer function's expansion in ``z^-1`` is the Markov sequence ``h_k = c phi^(k-1) g``
    (``h_0 = 0``); multiplying by ``a`` and truncating after ``n`` terms gives the numerator
    exactly (what :func:`scipy.signal.ss2tf` returns, at a fraction of its cost).
    """
    n = phi.shape[0]
    g = np.asarray(g, dtype=float).ravel()
    h = np.zeros(n + 1)
    v = g
    for k in range(1, n + 1):
        h[k] = float(c @ v)
        v = phi @ v
    return np.convolve(a, h)[: n + 1]


def lsim_zoh(model, dt: float, u: np.ndarray, u_before: float = 0.0) -> np.ndarray:
    """Response, from zero state, of a continuous model to a held input sequence ``u``.

    ``u_before`` is the input value assumed before the first sample (it matters only through
    the dead time).

    Parameters
    ----------
    model
        ``(num, den, delay_s)`` or anything :func:`as_tf` accepts.
    dt : float
        Sample time (s).
    u : ndarray
        Input held over each sample.
    u_before : float
        Input before the first sample.

    Returns
    -------
    ndarray
        Output at the sample instants.
    """
    num, den, delay = as_tf(model)
    dm = zoh_discretize(num, den, delay, dt)
    u = np.asarray(u, dtype=float)
    w = _shift(u, dm.shift, u_before)
    zi_in = np.zeros(max(len(dm.a), len(dm.b)) - 1)
    y = signal.lfilter(dm.b, dm.a, w - u_before, zi=zi_in)[0]
    # the constant u_before from the far past contributes its static response where defined
    return y + _static_part(num, den, u_before)


def _static_part(num, den, u0: float) -> float:
    if u0 == 0.0:
        return 0.0
    if abs(den[-1]) < 1e-300:
        return 0.0
    return float(num[-1] / den[-1] * u0)


def _shift(u: np.ndarray, m: int, fill: float) -> np.ndarray:
    if m <= 0:
        return u
    if m >= len(u):
        return np.full_like(u, fill)
    return np.concatenate([np.full(m, fill), u[:-m]])


def freq_response(model, w: np.ndarray) -> np.ndarray:
    """``G(jw)`` of a continuous model ``(num, den, delay_s)`` at angular frequencies ``w``.

    Parameters
    ----------
    model
        ``(num, den, delay_s)`` or anything :func:`as_tf` accepts.
    w : ndarray
        Angular frequencies (rad/s).

    Returns
    -------
    ndarray
        Complex ``G(jw)``.
    """
    num, den, delay = as_tf(model)
    s = 1j * np.asarray(w, dtype=float)
    return np.polyval(num, s) / np.polyval(den, s) * np.exp(-s * delay)


def _ref_frequency(num, den, delay) -> float:
    roots = np.concatenate([np.roots(den), np.roots(num)]) if len(num) > 1 else np.roots(den)
    mags = np.abs(roots[np.abs(roots) > 1e-12])
    scales = list(mags)
    if delay > 0:
        scales.append(1.0 / delay)
    if not scales:
        return 1.0
    return float(np.exp(np.mean(np.log(scales))))


def phase_crossover(model, w_min: float | None = None, w_max: float | None = None
                    ) -> tuple[float, float] | None:
    """Ultimate point of a continuous model: ``(ku, wu)`` at the first -180° phase crossing.

    The phase is unwrapped from low frequency, so integrators start at -90° and a right
    half-plane zero counts as lag. Returns ``None`` when the phase never reaches -180° in the
    searched range (then the loop has no ultimate gain).

    Parameters
    ----------
    model
        ``(num, den, delay_s)`` or anything :func:`as_tf` accepts.
    w_min, w_max : float, optional
        Searched frequency range (rad/s); by default derived from the model's time constants.

    Returns
    -------
    tuple of float or None
        ``(ku, wu)``, or None without a crossing.
    """
    num, den, delay = as_tf(model)
    wr = _ref_frequency(num, den, delay)
    lo = w_min if w_min is not None else wr * 1e-4
    hi = w_max if w_max is not None else wr * 1e4
    w = np.geomspace(lo, hi, 4000)
    g = freq_response((num, den, delay), w)
    ph = np.unwrap(np.angle(g))
    # align the unwrapped phase with the true low-frequency phase (integrators, sign of gain)
    ph0 = _low_freq_phase(num, den)
    ph = ph + 2 * np.pi * np.round((ph0 - ph[0]) / (2 * np.pi))
    idx = np.nonzero(ph <= -np.pi)[0]
    if len(idx) == 0:
        return None
    i = int(idx[0])
    if i == 0:
        return None
    w1, w2 = w[i - 1], w[i]
    p1 = ph[i - 1]
    g1 = g[i - 1]

    def f(x: float) -> float:
        return p1 + np.angle(freq_response((num, den, delay), np.array([x]))[0] / g1) + np.pi

    wu = optimize.brentq(f, w1, w2, xtol=1e-14 * w2, rtol=1e-13)
    ku = 1.0 / abs(freq_response((num, den, delay), np.array([wu]))[0])
    return float(ku), float(wu)


def _low_freq_phase(num, den) -> float:
    """Asymptotic phase as w -> 0: -90° per integrator, 180° for a negative gain."""
    n_int = 0
    d = np.array(den, dtype=float)
    while len(d) > 1 and abs(d[-1]) < 1e-300:
        d = d[:-1]
        n_int += 1
    n_diff = 0
    nn = np.array(num, dtype=float)
    while len(nn) > 1 and abs(nn[-1]) < 1e-300:
        nn = nn[:-1]
        n_diff += 1
    sign = np.sign(nn[-1] / d[-1])
    base = 0.0 if sign > 0 else -np.pi
    return base - (n_int - n_diff) * np.pi / 2
