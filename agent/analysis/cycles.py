"""Cycle detection and steadiness of a relay oscillation.

Switching instants are read from the relay output (the sign of ``u`` about the middle of its two
levels); brief pulses caused by noise-triggered chattering are merged away. A cycle runs from one
upward switch to the next. The oscillation is called stationary when, over the last ``n_stable``
cycles or more, every period and every peak-to-peak amplitude is within a relative tolerance of
their median. Unequal half-periods (``asymmetry``) reveal a load or a relay not centred on the
trim, e.g. gravity on heave (Berner 2017, asymmetric relay).

Measurement noise moves each switching instant and each peak, so on a noisy loop single cycles
of a steady oscillation scatter by more than the fixed tolerances. Given the noise as a fraction
of the amplitude (``noise_ratio``, sigma/a), the tolerances widen to three robust deviations of
the last 20 cycles, but never beyond three times the scatter noise can explain: 0.8 sigma/a for
a period and 1.6 sigma/a for a half peak-to-peak amplitude (the largest per-cycle scatter of a
steady cycle, calibrated on the simulated stand: README.md), and never beyond 25 % and 35 %, so that a change of the relay setting (the amplitude ramp's steps
are 2.5-fold) or a larger drift still ends the stationary run. On a noisy loop the run ends
at two failing cycles in a row; a single stray cycle is taken as noise.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from .records import RecordError

__all__ = ["CycleStats", "detect_cycles"]

# per-cycle scatter of a steady relay oscillation caused by measurement noise, in sigma/a
# (own measurement, see the module docstring)
NOISE_PERIOD_SCATTER = 0.8
NOISE_AMP_SCATTER = 1.6
# ... but a change of the relay setting (the ramp raises it 2.5-fold) must still end the run
MAX_NOISE_PERIOD_TOL = 0.25
MAX_NOISE_AMP_TOL = 0.35


def _robust_spread(x: np.ndarray) -> float:
    """Relative standard deviation from the median absolute deviation (1.4826 MAD/median)."""
    med = float(np.median(x))
    if med <= 0:
        return 0.0
    return float(1.4826 * np.median(np.abs(x - med)) / med)


@dataclass(frozen=True)
class CycleStats:
    """Cycle statistics of a relay record (times in s, amplitudes in measurement units).

    ``amplitude`` is half the peak-to-peak swing of ``y``, averaged over the stationary cycles;
    spreads are relative standard deviations over those cycles. ``window`` is the sample index
    range ``[start, stop)`` spanning the stationary cycles exactly (upward switch to upward
    switch), used for whole-period averages.
    """

    n_cycles: int
    period_s: float
    period_spread: float
    half_period_up_s: float
    half_period_down_s: float
    asymmetry: float
    amplitude: float
    amplitude_spread: float
    stationary: bool
    switch_times_s: np.ndarray
    n_stationary: int = 0
    window: tuple[int, int] = (0, 0)
    window_tight: tuple[int, int] = (0, 0)
    u_high: float = float("nan")
    u_low: float = float("nan")
    chatter_pulses: int = 0
    periods_s: np.ndarray = field(default_factory=lambda: np.zeros(0))
    amplitudes: np.ndarray = field(default_factory=lambda: np.zeros(0))

    def to_dict(self) -> dict:
        """JSON-ready dictionary (floats, lists, strings)."""
        return {
            "n_cycles": int(self.n_cycles),
            "period_s": float(self.period_s),
            "period_spread": float(self.period_spread),
            "half_period_up_s": float(self.half_period_up_s),
            "half_period_down_s": float(self.half_period_down_s),
            "asymmetry": float(self.asymmetry),
            "amplitude": float(self.amplitude),
            "amplitude_spread": float(self.amplitude_spread),
            "stationary": bool(self.stationary),
            "n_stationary": int(self.n_stationary),
            "switch_times_s": [float(x) for x in self.switch_times_s],
            "u_high": float(self.u_high),
            "u_low": float(self.u_low),
            "chatter_pulses": int(self.chatter_pulses),
        }


def _switches(u: np.ndarray) -> tuple[np.ndarray, np.ndarray, float, float, int]:
    hi, lo = float(np.max(u)), float(np.min(u))
    if hi - lo <= 1e-12 * max(1.0, abs(hi)):
        raise RecordError(
            "The relay output never switched, so the loop did not oscillate; expected the output "
            "to alternate between two levels. Check that the relay acts on the right measurement "
            "with the right sign, and raise the relay amplitude or lower the hysteresis."
        )
    mid = 0.5 * (hi + lo)
    s = np.where(u > mid, 1, -1)
    idx = np.nonzero(np.diff(s) != 0)[0] + 1
    # merge chattering: drop pulses much shorter than the typical half-period, but only once
    # the oscillation has built up (a relay started at the setpoint grows through short cycles)
    chatter = 0
    if len(idx) >= 4:
        med0 = np.median(np.diff(idx))
        built = np.nonzero(np.diff(idx) >= 0.5 * med0)[0]
        first = int(built[0]) if len(built) else 0
        while len(idx) - first >= 4:
            gaps = np.diff(idx)
            med = np.median(gaps[first:])
            short = np.nonzero(gaps[first:] < 0.25 * med)[0] + first
            if len(short) == 0:
                break
            j = int(short[np.argmin(gaps[short])])
            idx = np.delete(idx, [j, j + 1]) if j + 1 < len(idx) else np.delete(idx, [j])
            chatter += 1
    up = np.array([i for i in idx if s[i] > 0], dtype=int)
    down = np.array([i for i in idx if s[i] < 0], dtype=int)
    u_high = float(np.median(u[s > 0]))
    u_low = float(np.median(u[s < 0]))
    return up, down, u_high, u_low, chatter


def detect_cycles(t_s: np.ndarray, y: np.ndarray, u: np.ndarray, n_stable: int = 3,
                  period_tol: float = 0.05, amplitude_tol: float = 0.10,
                  noise_ratio: float = 0.0) -> CycleStats:
    """Find switching instants, periods, half-periods and amplitudes; judge stationarity.

    ``noise_ratio`` (measurement noise over oscillation amplitude, sigma/a) widens the
    tolerances to what noise explains (see the module docstring); 0 keeps them fixed.

    Parameters
    ----------
    t_s, y, u : ndarray
        Sample times, measurement and relay output.
    n_stable : int
        Consecutive cycles that must agree for the oscillation to be stationary.
    period_tol, amplitude_tol : float
        Relative agreement of periods and amplitudes on a quiet record.
    noise_ratio : float
        Measurement noise over oscillation amplitude (sigma/a).

    Returns
    -------
    CycleStats

    Raises
    ------
    RecordError
        If the relay never switched or fewer than two complete cycles were recorded.
    """
    up, down, u_high, u_low, chatter = _switches(u)
    switches = np.sort(np.concatenate([up, down]))
    n_cycles = max(len(up) - 1, 0)
    if n_cycles < 2:
        raise RecordError(
            f"The record holds {n_cycles} complete oscillation cycle(s) "
            f"({len(switches)} relay switches); expected at least 2, better 5 or more. "
            "Run the relay experiment longer."
        )
    periods = np.diff(t_s[up])
    amps = np.array([0.5 * (np.max(y[up[i]:up[i + 1]]) - np.min(y[up[i]:up[i + 1]]))
                     for i in range(n_cycles)])
    # high half-periods: each up switch to the following down switch
    h_up = []
    h_dn = []
    for i in range(n_cycles):
        d_in = down[(down > up[i]) & (down < up[i + 1])]
        if len(d_in):
            h_up.append(t_s[d_in[0]] - t_s[up[i]])
            h_dn.append(t_s[up[i + 1]] - t_s[d_in[0]])
        else:
            h_up.append(np.nan)
            h_dn.append(np.nan)
    h_up = np.array(h_up)
    h_dn = np.array(h_dn)
    # stationary suffix
    k = min(n_stable, n_cycles)
    ref_p = np.median(periods[-k:])
    ref_a = np.median(amps[-k:])
    tight_p, tight_a = 0.01, 0.03
    if noise_ratio > 0:
        tail = slice(max(n_cycles - 20, 0), n_cycles)
        noise_p = min(3.0 * _robust_spread(periods[tail]),
                      3.0 * NOISE_PERIOD_SCATTER * noise_ratio, MAX_NOISE_PERIOD_TOL)
        noise_a = min(3.0 * _robust_spread(amps[tail]), 3.0 * NOISE_AMP_SCATTER * noise_ratio,
                      MAX_NOISE_AMP_TOL)
        period_tol, amplitude_tol = max(period_tol, noise_p), max(amplitude_tol, noise_a)
        tight_p, tight_a = max(tight_p, noise_p), max(tight_a, noise_a)

    def ok(i: int) -> bool:
        return (abs(periods[i] / ref_p - 1) <= period_tol
                and abs(amps[i] / ref_a - 1) <= amplitude_tol)

    j = n_cycles
    while j > 0 and ok(j - 1):
        j -= 1
    if noise_ratio > 0:
        # on a noisy loop a single stray cycle is noise: the run ends at two in a row
        while j > 1 and ok(j - 2):
            j -= 2
            while j > 0 and ok(j - 1):
                j -= 1
    n_stat = n_cycles - j
    # a tighter suffix (1 % period, 3 % amplitude, or what the noise explains) for whole-period
    # Fourier averages: cycles still growing after start-up would otherwise leak a transient
    # into the harmonics
    jt = n_cycles
    while jt > 0 and abs(periods[jt - 1] / ref_p - 1) <= tight_p and \
            abs(amps[jt - 1] / ref_a - 1) <= tight_a:
        jt -= 1
    if n_cycles - jt < 2:
        jt = max(j, n_cycles - 2) if n_stat >= 2 else max(n_cycles - 2, 0)
    stationary = n_stat >= n_stable
    sel = slice(j, n_cycles) if n_stat >= 2 else slice(max(n_cycles - 2, 0), n_cycles)
    P = periods[sel]
    A = amps[sel]
    hu = float(np.nanmean(h_up[sel]))
    hd = float(np.nanmean(h_dn[sel]))
    first = sel.start
    return CycleStats(
        n_cycles=int(n_cycles),
        period_s=float(np.mean(P)),
        period_spread=float(np.std(P) / np.mean(P)) if len(P) > 1 else 0.0,
        half_period_up_s=hu,
        half_period_down_s=hd,
        asymmetry=float((hu - hd) / (hu + hd)),
        amplitude=float(np.mean(A)),
        amplitude_spread=float(np.std(A) / np.mean(A)) if len(A) > 1 and np.mean(A) > 0 else 0.0,
        stationary=bool(stationary),
        switch_times_s=t_s[switches].astype(float),
        n_stationary=int(n_stat),
        window=(int(up[first]), int(up[n_cycles])),
        window_tight=(int(up[jt]), int(up[n_cycles])),
        u_high=u_high,
        u_low=u_low,
        chatter_pulses=int(chatter),
        periods_s=periods.astype(float),
        amplitudes=amps.astype(float),
    )
