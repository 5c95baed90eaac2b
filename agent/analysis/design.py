"""Robustness-constrained design: the PI/PID that minimises the IAE of a load step subject to
a maximum sensitivity ``Ms <= ms_target`` (Garpinger, Hägglund & Åström 2014, "Performance and
robustness trade-offs in PID control", J. Process Control 24(5)).

The load step enters at the plant input; its IAE is computed by simulating the sampled loop
(:class:`agent.analysis.predict.LoopSim`), ``Ms`` on a dense logarithmic frequency grid of the
continuous loop (controller with its derivative filter ``tf_s = Td/N``, at least ``min_tf_s``).

Search: for each proportional gain (and derivative time, for PID) on a grid, the largest
integral gain that keeps ``Ms <= ms_target`` is found by bisection (the IAE optimum under an Ms
bound usually lies on that boundary); the best point is refined with Nelder–Mead
(:func:`scipy.optimize.minimize`) on a penalised objective and finally pulled back onto the
constraint. Points whose load response has not settled within the horizon are discarded, which
also excludes unstable loops.

Measurement noise: with ``noise_gain_max`` the controller's noise gain (output deviation per unit
of white measurement noise, :func:`agent.analysis.controller.noise_gain`) is bounded too: the
derivative filter is lengthened as far as that needs (its phase lag then counts in Ms and the
IAE), but never beyond ``Td/2`` (N = 2: a longer filter leaves a lag, not a derivative; common
practice, no source), and a proportional gain above the bound is not considered (no filter
helps there). Such points are infeasible, so the search moves to a smaller kp or kd.

A PD controller has no integral action, so its load IAE is unbounded; its design maximises
``kp`` (the load stiffness) under the same Ms bound.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import optimize

from .controller import controller_freq, filter_for_noise
from .lti import freq_response
from .predict import LoopSim
from .robustness import sensitivity_peak

__all__ = ["Design", "ms_constrained_design"]

MIN_FILTER_N = 2.0  # the noise bound may lengthen the derivative filter to Td/2, no further


@dataclass(frozen=True)
class Design:
    """Outcome of :func:`ms_constrained_design`."""

    kp: float
    ki: float
    kd: float
    tf_s: float
    ms: float
    iae_load: float
    settled: bool
    success: bool
    message: str = ""


class _Problem:
    def __init__(self, model, ms_target, sample_time_s, filter_n, min_tf_s, extra_models=(),
                 noise_gain_max=None):
        self.model = model
        self.ts = sample_time_s
        self.noise_gain_max = noise_gain_max
        self.sim = LoopSim(model, sample_time_s)
        self.wu, self.tu = self.sim.wu, self.sim.tu
        g_u = freq_response(model, np.array([self.wu]))[0]
        self.ku = 1.0 / abs(g_u)
        self.w = self.wu * np.geomspace(10 ** -2.5, 10 ** 1.6, 700)
        self.g = freq_response(model, self.w)
        # plausible alternatives: Ms must hold on each of them too (robust over the models the
        # record cannot tell apart)
        self.g_extra = [freq_response(m, self.w) for m in extra_models]
        self.ms_target = ms_target
        self.filter_n = filter_n
        self.min_tf = min_tf_s
        self.horizon = 40 * self.tu

    def tf_of(self, kp, kd):
        if kd <= 0:
            return 0.0
        tf = max(kd / kp / self.filter_n, self.min_tf)
        if self.noise_gain_max is not None:
            tf = max(tf, filter_for_noise(kp, kd, self.ts, self.noise_gain_max))
        return tf

    def feasible(self, kp, kd):
        """False when the noise bound cannot be met: kp alone amplifies the noise beyond it, or
        the derivative would need a filter longer than Td/MIN_FILTER_N."""
        if self.noise_gain_max is None:
            return True
        if kp >= self.noise_gain_max:
            return False
        return kd <= 0 or self.tf_of(kp, kd) <= kd / kp / MIN_FILTER_N

    def ms(self, kp, ki, kd):
        if not self.feasible(kp, kd):
            return float("inf")
        c = controller_freq(kp, ki, kd, self.tf_of(kp, kd), self.w)
        ms = float(np.max(np.abs(1.0 / (1.0 + c * self.g))))
        for g in self.g_extra:
            ms = max(ms, float(np.max(np.abs(1.0 / (1.0 + c * g)))))
        return ms

    def iae(self, kp, ki, kd):
        v, settled = self.sim.load_iae(kp, ki, kd, self.tf_of(kp, kd), self.horizon)
        return v, settled

    def ki_max(self, kp, kd):
        """Largest ki with Ms <= target, reached continuously from small ki.

        Scanning upward matters: beyond the first violation the loop can become unstable while
        the computed peak of |S| drops again, so a plain bisection could land there.
        """
        ki = kp * self.wu * 1e-4
        if self.ms(kp, ki, kd) > self.ms_target:
            return None
        hi_lim = kp * self.wu * 50
        while True:
            nxt = ki * 1.5
            if nxt > hi_lim:
                return ki
            if self.ms(kp, nxt, kd) > self.ms_target:
                break
            ki = nxt
        llo, lhi = np.log(ki), np.log(nxt)
        for _ in range(20):
            mid = 0.5 * (llo + lhi)
            if self.ms(kp, np.exp(mid), kd) <= self.ms_target:
                llo = mid
            else:
                lhi = mid
        return float(np.exp(llo))

    def kp_max(self, td):
        kp = self.ku * 1e-3
        if self.ms(kp, 0.0, kp * td) > self.ms_target:
            return None
        while True:
            nxt = kp * 1.3
            if nxt > self.ku * 10:
                return kp
            if self.ms(nxt, 0.0, nxt * td) > self.ms_target:
                break
            kp = nxt
        llo, lhi = np.log(kp), np.log(nxt)
        for _ in range(20):
            mid = 0.5 * (llo + lhi)
            k = np.exp(mid)
            if self.ms(k, 0.0, k * td) <= self.ms_target:
                llo = mid
            else:
                lhi = mid
        return float(np.exp(llo))


def _objective(p: _Problem, with_d: bool):
    def f(x):
        kp, ki = np.exp(x[0]), np.exp(x[1])
        kd = np.exp(x[2]) if with_d else 0.0
        ms = p.ms(kp, ki, kd)
        if not np.isfinite(ms):
            return 1e30
        v, settled = p.iae(kp, ki, kd)
        if not np.isfinite(v) or not settled:
            return 1e30
        if ms > p.ms_target:
            return v * (1.0 + 200.0 * (ms - p.ms_target))
        return v
    return f


def ms_constrained_design(model, controller: str = "pi", ms_target: float = 1.4,
                          sample_time_s: float | None = None, filter_n: float = 10.0,
                          min_tf_s: float = 0.0, extra_models: tuple = (),
                          noise_gain_max: float | None = None) -> Design:
    """IAE-optimal PI/PID for a unit load step under ``Ms <= ms_target`` on ``model``
    (or the stiffest PD under the same bound); see the module docstring.

    ``extra_models``: other plausible models of the same loop; the Ms bound is then enforced
    on every one of them (the IAE is still judged on ``model``). ``noise_gain_max``: bound on
    the controller's noise gain (needs ``sample_time_s``).

    Parameters
    ----------
    model
        Loop model (``(num, den, delay_s)`` or anything with ``tf()``).
    controller : {"pi", "pid", "pd"}
        Controller structure.
    ms_target : float
        Bound on the maximum sensitivity.
    sample_time_s : float, optional
        The board's sample time (discrete-time evaluation and the noise bound).
    filter_n : float
        Derivative filter ratio ``Td / Tf``.
    min_tf_s : float
        Shortest derivative filter time (s).
    extra_models : tuple
        Other plausible models of the loop.
    noise_gain_max : float, optional
        Bound on the controller's noise gain.

    Returns
    -------
    Design
    """
    if ms_target <= 1.0:
        raise ValueError(f"ms_target must exceed 1 (got {ms_target}); 1.2–2.0 is the usual range.")
    if noise_gain_max is not None and not (noise_gain_max > 0 and sample_time_s):
        raise ValueError("a noise-gain bound needs a positive bound and the sample time")
    p = _Problem(model, ms_target, sample_time_s, filter_n, min_tf_s, tuple(extra_models),
                 noise_gain_max)
    why_none = (" and the noise-gain bound" if noise_gain_max is not None else "")
    if controller == "pd":
        best = None
        for td in p.tu * np.array([0.01, 0.03, 0.06, 0.1, 0.15, 0.22, 0.3, 0.45]):
            kp = p.kp_max(td)
            if kp is not None and (best is None or kp > best[0]):
                best = (kp, td)
        if best is None:
            return Design(0, 0, 0, 0, float("nan"), float("inf"), False, False,
                          f"no PD meets the Ms bound{why_none}")
        kp, td = best
        kd = kp * td
        tf_s = p.tf_of(kp, kd)
        ms = max([sensitivity_peak(model, kp, 0.0, kd, tf_s)[0]] +
                 [sensitivity_peak(m, kp, 0.0, kd, tf_s)[0] for m in extra_models])
        v, settled = p.iae(kp, 0.0, kd)
        return Design(kp, 0.0, kd, tf_s, ms, v, settled, True, "stiffest PD under the Ms bound")

    with_d = controller == "pid"
    tds = p.tu * np.array([0.02, 0.05, 0.09, 0.14, 0.2, 0.3]) if with_d else np.array([0.0])
    cands = []
    for kp in p.ku * np.geomspace(0.01, 1.2 if with_d else 1.0, 24 if not with_d else 14):
        for td in tds:
            kd = kp * td
            ki = p.ki_max(kp, kd)
            if ki is None:
                continue
            v, settled = p.iae(kp, ki, kd)
            if settled and np.isfinite(v):
                cands.append((v, kp, ki, kd))
    if not cands:
        return Design(0, 0, 0, 0, float("nan"), float("inf"), False, False,
                      f"no stable controller meets the Ms bound{why_none} on this model")
    cands.sort(key=lambda c: c[0])
    f = _objective(p, with_d)
    best_x, best_v = None, np.inf
    for v, kp, ki, kd in cands[:2]:
        x0 = [np.log(kp), np.log(ki)] + ([np.log(kd)] if with_d else [])
        r = optimize.minimize(f, x0, method="Nelder-Mead",
                              options={"xatol": 1e-4, "fatol": 1e-6 * v,
                                       "maxfev": 400 if with_d else 200})
        if r.fun < best_v:
            best_x, best_v = r.x, r.fun
    kp, ki = float(np.exp(best_x[0])), float(np.exp(best_x[1]))
    kd = float(np.exp(best_x[2])) if with_d else 0.0
    if not p.feasible(kp, kd):
        _, kp, ki, kd = cands[0]
    if p.ms(kp, ki, kd) > ms_target:
        ki2 = p.ki_max(kp, kd)
        if ki2 is not None and ki2 < ki:
            ki = ki2
    v, settled = p.iae(kp, ki, kd)
    if not settled or not np.isfinite(v) or v > cands[0][0]:
        _, kp, ki, kd = cands[0]
    tf_s = p.tf_of(kp, kd)
    ms = max([sensitivity_peak(model, kp, ki, kd, tf_s)[0]] +
             [sensitivity_peak(m, kp, ki, kd, tf_s)[0] for m in extra_models])
    v, settled = p.iae(kp, ki, kd)
    ok = settled and ms <= ms_target * 1.01
    return Design(kp, ki, kd, tf_s, ms, v, settled, ok,
                  "IAE-optimal under the Ms bound" if ok else "constraint not met")
