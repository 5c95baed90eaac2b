"""The board's PID controller: form, frequency response and discretisation.

Form on the board (parallel, derivative on the filtered measurement, set-point weight ``b``)::

    u = kp*(b*r - y) + ki * ∫(r - y) dt - kd * d(y_f)/dt,    tf_s * d(y_f)/dt + y_f = y

Standard (ideal) form: ``K = kp``, ``Ti = kp/ki``, ``Td = kd/kp``, ``N = Td/tf_s``.

Discretisation (backward Euler at the loop's sample time ``Ts``), what the board runs each tick::

    I[k]   = I[k-1] + ki*Ts*e[k],  then clamp I to ±i_limit          (anti-windup by clamping)
    yf[k]  = alpha*yf[k-1] + (1 - alpha)*y[k],   alpha = tf_s/(tf_s + Ts)
    D[k]   = -kd*(yf[k] - yf[k-1])/Ts
    u[k]   = kp*(b*r[k] - y[k]) + I[k] + D[k]

Noise gain: white measurement noise of deviation sigma_n reaches the output through the
proportional and derivative terms as ``sigma_u = noise_gain * sigma_n``, the H2 norm
``sqrt(sum h_k^2)`` of ``kp + D(z)``: with ``g = kd/(tf_s + Ts)`` the impulse response is
``h_0 = kp + g``, ``h_k = g alpha^(k-1) (alpha - 1)``, so
``noise_gain^2 = (kp + g)^2 + g^2 (1 - alpha)/(1 + alpha)``. The integral term is left out: it
integrates the noise only at low frequency, where the closed loop removes it. The derivative
filter is the usual way to bound it (Åström & Hägglund 2006, Advanced PID Control, ISA, on
filtering the derivative against measurement noise; reference from memory); how much output noise is acceptable is
the user's (the workflow allows a tenth of the actuator range by default: common practice, no
source).

Backward Euler keeps the filter and the integrator stable for any ``Ts`` and needs no
pre-warping; at loop rates 20x or more above the crossover its phase error is a few degrees,
which the designs absorb because they are made on the loop model (hold included).
"""

from __future__ import annotations

import numpy as np

__all__ = ["controller_freq", "discrete_polys", "discretize", "filter_for_noise", "noise_gain",
           "standard_form"]


def controller_freq(kp: float, ki: float, kd: float, tf_s: float, w: np.ndarray) -> np.ndarray:
    """Feedback path ``C(jw) = kp + ki/(jw) + kd*jw/(tf_s*jw + 1)``.

    Parameters
    ----------
    kp, ki, kd : float
        Proportional, integral (per second) and derivative (seconds) gains.
    tf_s : float
        Derivative filter time constant (s).
    w : ndarray
        Angular frequencies (rad/s).

    Returns
    -------
    ndarray
        Complex ``C(jw)``.
    """
    s = 1j * np.asarray(w, dtype=float)
    c = kp + 0 * s
    if ki:
        c = c + ki / s
    if kd:
        c = c + kd * s / (tf_s * s + 1)
    return c


def noise_gain(kp: float, kd: float, tf_s: float, sample_time_s: float) -> float:
    """Output deviation per unit of white measurement noise, through the proportional and
    filtered derivative terms as the board runs them (see the module docstring).

    Parameters
    ----------
    kp, kd, tf_s : float
        Proportional and derivative gains, derivative filter time (s).
    sample_time_s : float
        The board's loop sample time.

    Returns
    -------
    float
        Standard deviation of the output per unit standard deviation of the noise.
    """
    if not kd:
        return abs(float(kp))
    ts = float(sample_time_s)
    alpha = tf_s / (tf_s + ts)
    g = kd / (tf_s + ts)
    return float(np.sqrt((kp + g) ** 2 + g * g * (1.0 - alpha) / (1.0 + alpha)))


def filter_for_noise(kp: float, kd: float, sample_time_s: float, gain_max: float) -> float:
    """Shortest derivative filter time with ``noise_gain <= gain_max``: 0.0 when no filter is
    needed, ``inf`` when the proportional gain alone exceeds ``gain_max`` (no filter can help).

    Parameters
    ----------
    kp, kd : float
        Proportional and derivative gains.
    sample_time_s : float
        The board's loop sample time.
    gain_max : float
        Largest acceptable :func:`noise_gain`.

    Returns
    -------
    float
        The filter time constant (s).
    """
    from scipy.optimize import brentq
    if abs(kp) >= gain_max:
        return float("inf")
    if not kd or noise_gain(kp, kd, 0.0, sample_time_s) <= gain_max:
        return 0.0
    ts = float(sample_time_s)

    def excess(log_tf):
        return noise_gain(kp, kd, float(np.exp(log_tf)), ts) - gain_max

    hi = np.log(ts)
    while excess(hi) > 0:  # the gain falls towards |kp| as the filter lengthens
        hi += 2.0
    return float(np.exp(brentq(excess, np.log(ts) - 30.0, hi, xtol=1e-6)))


def standard_form(kp: float, ki: float, kd: float, tf_s: float) -> dict:
    """Gains in standard form ``K (1 + 1/(Ti s) + Td s)``; ``Ti = inf`` without integral.

    Parameters
    ----------
    kp, ki, kd, tf_s : float
        Parallel-form gains and derivative filter time (s).

    Returns
    -------
    dict
        ``K``, ``Ti`` (s), ``Td`` (s) and the filter ratio.
    """
    return {
        "K": float(kp),
        "Ti_s": float(kp / ki) if ki > 0 else float("inf"),
        "Td_s": float(kd / kp) if kp > 0 else 0.0,
        "N": float((kd / kp) / tf_s) if kd > 0 and tf_s > 0 and kp > 0 else float("inf"),
    }


def discretize(kp: float, ki: float, kd: float, tf_s: float, b: float, sample_time_s: float,
               i_limit: float) -> dict:
    """Coefficients of the backward-Euler controller the board runs (see module docstring).

    Parameters
    ----------
    kp, ki, kd, tf_s : float
        Controller gains and derivative filter time (s).
    b : float
        Set-point weight of the proportional term.
    sample_time_s : float
        The board's loop sample time.
    i_limit : float
        Integrator clamp (output units).

    Returns
    -------
    dict
        Coefficient names to values.
    """
    ts = float(sample_time_s)
    alpha = tf_s / (tf_s + ts) if tf_s > 0 else 0.0
    return {
        "method": "backward_euler",
        "sample_time_s": ts,
        "kp": float(kp),
        "ki_ts": float(ki * ts),
        "kd_over_ts": float(kd / ts),
        "filter_alpha": float(alpha),
        "b": float(b),
        "i_limit": float(i_limit),
    }


def discrete_polys(kp: float, ki: float, kd: float, tf_s: float, b: float, h: float
                   ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Controller polynomials in ``z^-1`` at step ``h``: ``U = (Nr R - Ny Y) / Dc``.

    Parameters
    ----------
    kp, ki, kd, tf_s : float
        Controller gains and derivative filter time (s).
    b : float
        Set-point weight of the proportional term.
    h : float
        Step (s).

    Returns
    -------
    tuple of ndarray
        ``(Nr, Ny, Dc)``.
    """
    alpha = tf_s / (tf_s + h) if tf_s > 0 else 0.0
    one_a = np.array([1.0, -alpha])
    diff = np.array([1.0, -1.0])
    if ki > 0:
        dc = np.convolve(diff, one_a)
        ny = kp * dc + np.concatenate([ki * h * one_a, [0.0]])
        nr = kp * b * dc + np.concatenate([ki * h * one_a, [0.0]])
        if kd:
            ny = ny + kd / (tf_s + h) * np.convolve(diff, diff)
    else:
        dc = one_a
        ny = kp * dc.copy()
        nr = kp * b * dc
        if kd:
            ny = ny + kd / (tf_s + h) * diff
    return dc, ny, nr
