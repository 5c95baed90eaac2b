"""Step responses predicted on a model, metrics of measured steps, closed-loop bandwidth.

Predictions simulate the sampled loop exactly: the model's zero-order-hold equivalent (dead
time included) in feedback with the board's backward-Euler controller
(:mod:`agent.analysis.controller`), as polynomials in ``z^-1`` run through
:func:`scipy.signal.lfilter`. The step ``h`` is the board's sample time when the oscillation
spans 100 samples or fewer (then the prediction is the board's own loop), otherwise a hundredth
of the ultimate period with the dead time reduced by ``h/2`` so that the hold of the simulation
is not counted twice (the loop model already contains the board's hold).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import signal

from .controller import controller_freq, discrete_polys
from .lti import as_tf, freq_response, phase_crossover, zoh_discretize

__all__ = [
    "LoopSim",
    "StepMetrics",
    "StepPrediction",
    "denoise_step",
    "loop_bandwidth",
    "predict_step",
    "step_metrics",
]


@dataclass(frozen=True)
class StepMetrics:
    """Overshoot (fraction of the step), 10–90 % rise time, 2 % settling time, IAE."""

    overshoot: float
    rise_s: float
    settling_s: float
    iae: float

    def to_dict(self) -> dict:
        """JSON-ready dictionary (floats, lists, strings)."""
        return {k: float(getattr(self, k)) for k in ("overshoot", "rise_s", "settling_s", "iae")}


@dataclass(frozen=True)
class StepPrediction:
    """Predicted unit set-point step and unit load step (at the plant input) on a model."""

    overshoot: float
    rise_s: float
    settling_s: float
    iae_setpoint: float
    iae_load: float
    t_s: np.ndarray
    y_setpoint: np.ndarray
    y_load: np.ndarray
    load_peak: float = float("nan")
    settled: bool = True

    def to_dict(self, with_series: bool = False) -> dict:
        """JSON-ready dictionary of the prediction.

        Parameters
        ----------
        with_series : bool
            Include the simulated series.

        Returns
        -------
        dict
            JSON-ready values.
        """
        d = {"overshoot": float(self.overshoot), "rise_s": float(self.rise_s),
             "settling_s": float(self.settling_s), "iae_setpoint": float(self.iae_setpoint),
             "iae_load": float(self.iae_load), "load_peak": float(self.load_peak),
             "settled": bool(self.settled)}
        if with_series:
            d["t_s"] = [float(x) for x in self.t_s]
            d["y_setpoint"] = [float(x) for x in self.y_setpoint]
            d["y_load"] = [float(x) for x in self.y_load]
        return d


def _odd_window(n: int, n_max: int) -> int:
    n = int(max(5, min(n, n_max)))
    return n if n % 2 else n - 1


def _rise_time(t: np.ndarray, z: np.ndarray) -> float:
    i10 = np.nonzero(z >= 0.1)[0]
    i90 = np.nonzero(z >= 0.9)[0]
    return float(t[i90[0]] - t[i10[0]]) if len(i10) and len(i90) else float("nan")


def _settling_time(t: np.ndarray, z: np.ndarray, band: np.ndarray | float) -> float:
    out = np.nonzero(np.abs(z - 1.0) > band)[0]
    if len(out) == 0:
        return 0.0
    if out[-1] == len(z) - 1:
        return float("nan")
    return float(t[out[-1] + 1] - t[0])


def denoise_step(t_s, y, y0: float, r: float, noise_std: float
                 ) -> tuple[np.ndarray, np.ndarray, float, float, int, int]:
    """Zero-phase smoothing of a noisy measured step, with windows tied to the response.

    Savitzky–Golay smoothing (cubic, :func:`scipy.signal.savgol_filter`; a symmetric FIR
    filter, so no phase lag) over a window as long as the response's 10–90 % rise time,
    found iteratively from a pilot smoothing over a twentieth of the record. A cubic over one
    rise time follows the rise and the first peak closely while averaging ``W`` samples of
    noise. The settled part (after the peak plus half the long window) is smoothed again over
    four rise times for the settling time.

    Parameters
    ----------
    t_s, y : ndarray
        Sample times (uniformly spaced) and measurement.
    y0, r : float
        Start value and reference of the step.
    noise_std : float
        Measurement noise (standard deviation).

    Returns
    -------
    (y_fast, y_tail, sigma_fast, sigma_tail, w_fast, w_tail)
        The two smoothed series, the noise deviation left in each (``noise_std`` times the
        2-norm of the filter's coefficients, in measurement units) and the windows (samples).
    """
    t = np.asarray(t_s, dtype=float)
    y = np.asarray(y, dtype=float)
    n = len(y)
    n_max = n if n % 2 else n - 1
    step = float(r) - float(y0)
    dt = float(np.median(np.diff(t)))
    w = _odd_window(n // 20, n_max)
    for _ in range(3):
        ys = signal.savgol_filter(y, w, 3, mode="interp")
        tr = _rise_time(t, (ys - y0) / step)
        if not np.isfinite(tr) or tr <= 0:
            break
        w_new = _odd_window(round(tr / dt), n_max)
        if w_new == w:
            break
        w = w_new
    y_fast = signal.savgol_filter(y, w, 3, mode="interp")
    w_tail = _odd_window(4 * w, n_max)
    y_tail = signal.savgol_filter(y, w_tail, 3, mode="interp")
    s_fast = float(noise_std) * float(np.sqrt(np.sum(signal.savgol_coeffs(w, 3) ** 2)))
    s_tail = float(noise_std) * float(np.sqrt(np.sum(signal.savgol_coeffs(w_tail, 3) ** 2)))
    return y_fast, y_tail, s_fast, s_tail, w, w_tail


def step_metrics(t_s, y, y0: float, r: float, noise_std: float | None = None) -> StepMetrics:
    """Metrics of a step from ``y0`` to reference ``r`` (measured or simulated).

    Overshoot is the peak beyond ``r`` as a fraction of ``r - y0``; rise time from 10 % to 90 %
    of the step; settling time until the response stays within 2 % of the step around ``r``
    (nan if it never does); IAE is ``∫|r - y| dt`` (trapezoidal). Common practice, no source.

    ``noise_std`` (measurement units, e.g. the gyro noise found by the noise check): when
    given and positive, the record is first smoothed without phase lag
    (:func:`denoise_step`; samples should be uniformly spaced), so that noise peaks are not
    read as overshoot. Overshoot and rise time then come from the response smoothed over one
    rise time; the settling time and the IAE's tail from the settled part (after the peak)
    smoothed over four rise times, and for the settling time excursions
    count only beyond the 2 % band plus two deviations of the noise left after smoothing. If
    that leftover noise exceeds 0.25 % of the step (an eighth of the band), a 2 % settling
    time cannot be resolved from the record and it is nan (record more samples or a larger
    step). The settling time is a discontinuous measure: it jumps by half an oscillation
    period when a late peak touches the band. Accuracy: tests/test_analysis_tuning.py and
    README.md.

    Parameters
    ----------
    t_s, y : ndarray
        Sample times and response.
    y0, r : float
        Start value and reference of the step.
    noise_std : float, optional
        Measurement noise (standard deviation); smooths the record first when positive.

    Returns
    -------
    StepMetrics

    Raises
    ------
    ValueError
        If the arrays differ in length, hold fewer than 3 samples (11 with ``noise_std``) or
        non-finite values, the step has zero size, or ``noise_std`` is negative or not finite.
    """
    t = np.asarray(t_s, dtype=float).ravel()
    y = np.asarray(y, dtype=float).ravel()
    if len(t) != len(y) or len(t) < 3:
        raise ValueError(f"step_metrics needs equal-length time and response arrays of at least "
                         f"3 samples (got {len(t)} and {len(y)}).")
    if not (np.all(np.isfinite(t)) and np.all(np.isfinite(y))):
        raise ValueError("step_metrics got NaN or infinite samples; cut the record before the gap.")
    step = float(r) - float(y0)
    if step == 0:
        raise ValueError("step_metrics got a step of zero size (r equals y0); expected r != y0.")
    band: np.ndarray | float = 0.02
    if noise_std is not None:
        try:
            sd = float(noise_std)
        except (TypeError, ValueError):
            sd = float("nan")
        if not np.isfinite(sd) or sd < 0:
            raise ValueError(f"step_metrics got noise_std={noise_std!r}; expected the "
                             "measurement noise standard deviation, a finite number >= 0 "
                             "(or None for a noise-free response).")
        if sd > 0:
            if len(t) < 11:
                raise ValueError(f"step_metrics with noise_std needs at least 11 samples to "
                                 f"smooth the response (got {len(t)}); record the step longer.")
            y_fast, y_tail, s_fast, s_tail, _, w_tail = denoise_step(t, y, y0, r, sd)
            z = (y_fast - y0) / step
            zt = (y_tail - y0) / step
            start = min(int(np.argmax(z)) + w_tail // 2, len(z))
            z_settle = np.concatenate([z[:start], zt[start:]])
            band = 0.02 + 2.0 * np.concatenate([np.full(start, s_fast),
                                                np.full(len(z) - start, s_tail)]) / abs(step)
            overshoot = max(0.0, float(np.max(z)) - 1.0)
            rise = _rise_time(t, z)
            settling = _settling_time(t, z_settle, band)
            if s_tail > 0.0025 * abs(step):
                settling = float("nan")
            y_iae = np.concatenate([y_fast[:start], y_tail[start:]])
            e = np.abs(r - y_iae)
            iae = float(np.sum(0.5 * (e[1:] + e[:-1]) * np.diff(t)))
            return StepMetrics(overshoot, rise, settling, iae)
    z = (y - y0) / step
    overshoot = max(0.0, float(np.max(z)) - 1.0)
    rise = _rise_time(t, z)
    settling = _settling_time(t, z, band)
    iae = float(np.trapezoid(np.abs(r - y), t)) if hasattr(np, "trapezoid") else \
        float(np.trapz(np.abs(r - y), t))
    return StepMetrics(overshoot, rise, settling, iae)


class LoopSim:
    """Sampled closed loop of a model and the board's controller (see module docstring)."""

    def __init__(self, model, sample_time_s: float | None = None, h: float | None = None):
        num, den, delay = as_tf(model)
        self.tf = (num, den, delay)
        r = phase_crossover(self.tf)
        self.wu = r[1] if r is not None else 1.0
        self.tu = 2 * np.pi / self.wu
        if h is None:
            if sample_time_s is not None and self.tu / sample_time_s <= 100:
                h = float(sample_time_s)
            else:
                h = self.tu / 100
        self.h = float(h)
        # the loop model holds the board's half tick already; the simulation adds h/2 again
        sim_delay = max(delay - self.h / 2, 0.0)
        dm = zoh_discretize(num, den, sim_delay, self.h)
        self.bp = dm.b
        self.ap = dm.a
        self.m = dm.shift

    def _polys(self, kp, ki, kd, tf_s, b):
        dc, ny, nr = discrete_polys(kp, ki, kd, tf_s, b, self.h)
        sh = np.zeros(self.m)
        bny = np.concatenate([sh, np.convolve(self.bp, ny)])
        ad = np.convolve(self.ap, dc)
        n = max(len(bny), len(ad))
        char = np.zeros(n)
        char[: len(ad)] += ad
        char[: len(bny)] += bny
        return dc, ny, nr, char, sh

    def responses(self, kp, ki, kd, tf_s, b, horizon_s: float):
        """``(t, y_setpoint, y_load)`` for unit steps at time 0.

        Parameters
        ----------
        kp, ki, kd, tf_s, b : float
            Controller gains, derivative filter time (s) and set-point weight.
        horizon_s : float
            Simulated time (s).

        Returns
        -------
        tuple of ndarray
        """
        dc, ny, nr, char, sh = self._polys(kp, ki, kd, tf_s, b)
        n = int(np.ceil(horizon_s / self.h)) + 1
        step = np.ones(n)
        num_r = np.concatenate([sh, np.convolve(self.bp, nr)])
        num_d = np.concatenate([sh, np.convolve(self.bp, dc)])
        with np.errstate(all="ignore"):
            ysp = signal.lfilter(num_r, char, step)
            yld = signal.lfilter(num_d, char, step)
        return np.arange(n) * self.h, ysp, yld

    def load_iae(self, kp, ki, kd, tf_s, horizon_s: float) -> tuple[float, bool]:
        """IAE of the unit load step response and whether it settled within the horizon.

        Parameters
        ----------
        kp, ki, kd, tf_s : float
            Controller gains and derivative filter time (s).
        horizon_s : float
            Simulated time (s).

        Returns
        -------
        tuple
            ``(iae, settled)``.
        """
        dc, ny, nr, char, sh = self._polys(kp, ki, kd, tf_s, 1.0)
        n = int(np.ceil(horizon_s / self.h)) + 1
        num_d = np.concatenate([sh, np.convolve(self.bp, dc)])
        with np.errstate(all="ignore"):
            y = signal.lfilter(num_d, char, np.ones(n))
        if not np.all(np.isfinite(y)):
            return float("inf"), False
        iae = float(np.sum(np.abs(y)) * self.h)
        k = int(0.8 * n)
        tail = y[k:]
        peak = float(np.max(np.abs(y))) or 1.0
        if float(np.ptp(tail)) < 0.02 * peak:
            return iae, True
        # slow but converging without oscillation (a long integral time): add the exponential
        # tail beyond the horizon, estimated from the decay over the last fifth
        y0, y1 = tail[0], tail[-1]
        if ki > 0 and np.all(np.sign(tail) == np.sign(y1)) and 0 < abs(y1) < abs(y0) and \
                np.all(np.abs(np.diff(tail)) * np.sign(-y1) * np.sign(np.diff(tail)) >= 0):
            tau = (len(tail) - 1) * self.h / np.log(abs(y0) / abs(y1))
            return iae + abs(y1) * tau, True
        return iae, False

    def default_horizon(self, ki: float, kp: float) -> float:
        """Simulation horizon long enough for the integral action to settle.

        Parameters
        ----------
        ki, kp : float
            Integral and proportional gains.

        Returns
        -------
        float
            Twenty ultimate periods or eight integral times, whichever is longer, at most sixty
            ultimate periods (s).
        """
        ti = kp / ki if ki > 0 else 0.0
        return float(min(max(20 * self.tu, 8 * ti), 60 * self.tu))


def predict_step(model, cand, sample_time_s: float | None = None,
                 horizon_s: float | None = None) -> StepPrediction:
    """Predict unit set-point and load steps of ``cand`` (anything with kp, ki, kd, tf_s, b) on
    ``model`` (use the loop model: ``Identification.model_loop``).

    Parameters
    ----------
    model
        Loop model (``(num, den, delay_s)`` or anything with ``tf()``).
    cand
        Gains: anything with ``kp``, ``ki``, ``kd``, ``tf_s``, ``b``.
    sample_time_s : float, optional
        Simulate the discrete controller at this step (default: continuous).
    horizon_s : float, optional
        Simulated time (default: :meth:`LoopSim.default_horizon`).

    Returns
    -------
    StepPrediction
    """
    sim = LoopSim(model, sample_time_s)
    kp, ki, kd, tf_s, b = cand.kp, cand.ki, cand.kd, cand.tf_s, cand.b
    if horizon_s is None:
        horizon_s = sim.default_horizon(ki, kp)
    t, ysp, yld = sim.responses(kp, ki, kd, tf_s, b, horizon_s)
    finite = np.all(np.isfinite(ysp)) and np.all(np.isfinite(yld))
    if not finite or np.max(np.abs(ysp)) > 1e6:
        nan = float("nan")
        return StepPrediction(nan, nan, nan, float("inf"), float("inf"), t,
                              np.nan_to_num(ysp), np.nan_to_num(yld), nan, False)
    y_final = ysp[-1]
    ref = 1.0
    if ki <= 0:
        # without integral action the response settles at its own final value
        ref = y_final if abs(y_final) > 1e-12 else 1.0
    met = step_metrics(t, ysp, 0.0, ref)
    iae_sp = float(np.sum(np.abs(1.0 - ysp)) * sim.h)
    # load IAE with the same tail treatment as the design (slow exponential tails included)
    iae_ld, settled = sim.load_iae(kp, ki, kd, tf_s, horizon_s)
    return StepPrediction(met.overshoot, met.rise_s, met.settling_s, iae_sp, iae_ld, t, ysp, yld,
                          float(np.max(np.abs(yld))), bool(settled))


def loop_bandwidth(model, cand) -> float:
    """Closed-loop -3 dB bandwidth (rad/s) of ``T = L/(1+L)`` on ``model``, relative to its
    low-frequency gain (the feedback path; set-point weighting does not change it).

    Parameters
    ----------
    model
        Loop model (``(num, den, delay_s)`` or anything with ``tf()``).
    cand
        Gains: anything with ``kp``, ``ki``, ``kd``, ``tf_s``.

    Returns
    -------
    float
        Bandwidth (rad/s); nan when the response never drops 3 dB in the searched range.
    """
    r = phase_crossover(model)
    wu = r[1] if r is not None else 1.0
    w = wu * np.geomspace(1e-4, 1e2, 4000)
    L = controller_freq(cand.kp, cand.ki, cand.kd, cand.tf_s, w) * freq_response(model, w)
    T = np.abs(L / (1 + L))
    ref = T[0]
    below = np.nonzero(T < ref / np.sqrt(2))[0]
    if len(below) == 0:
        return float(w[-1])
    i = int(below[0])
    if i == 0:
        return float(w[0])
    # log-linear interpolation between the two grid points
    t1, t2 = T[i - 1], T[i]
    target = ref / np.sqrt(2)
    f = (t1 - target) / (t1 - t2) if t1 != t2 else 0.0
    return float(np.exp(np.log(w[i - 1]) + f * (np.log(w[i]) - np.log(w[i - 1]))))
