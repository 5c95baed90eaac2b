"""Relay supervision during an experiment: amplitude ramp, bias centring, convergence. Pure.

The workflow feeds the samples received so far; :meth:`RelaySupervisor.decide` returns a
:class:`Decision` whose :class:`Action` says what to do next: wait, adjust the relay (new
amplitude and bias), stop because the oscillation has converged, or give up with a reason.
Nothing here does I/O or reads a clock: time is the device's, from the telemetry.

Ramp
    A relay starts at a small amplitude (the workflow uses a fifth of its ceiling) so the first
    kick is gentle; each time a full period is seen after the last change, the amplitude is
    scaled by target/measured (bounded to x0.5..x2.5 per step and by the ceiling) until the
    oscillation amplitude is within ``amp_band`` of the target.
Bias
    A relay on a loop with a load (gravity on heave, a centre-of-gravity offset) is centred on
    the trim when the mean relay output over a whole period equals its centre, so the bias is
    moved towards that mean (for an integrating loop it is exactly the trim that holds the body
    still): half-way first, then by the secant through the last two tries, at most
    ``max_bias_moves`` times. The mean is taken over two whole periods since noise on the
    switching instants makes one period's mean noisy.
Convergence
    After the last change ``settle_periods`` are discarded as transient; the oscillation has
    converged once ``stable_periods`` consecutive periods agree within ``period_tol`` and
    ``amp_tol`` (the amplitude judged on each period's first harmonic, which averages noise
    out). On a noisy measurement (``noise_std``, from the hold) the periods scatter even when
    the limit cycle is stationary, so the tolerances widen to what the noise alone produces: a
    switching instant moves by about sigma / (a w) when the measurement crosses the switching
    level with slope a w (common practice, no source), so one period varies by a multiple of
    sigma/a, and the jittered switching makes the first-harmonic amplitude vary too. The
    tolerances are the 95th percentile of the range of three such periods, ``RANGE3_P95``
    standard deviations (scipy.stats.studentized_range.ppf(0.95, 3, inf)) of a scatter of
    ``PERIOD_SCATTER`` and ``AMP_SCATTER`` sigma/a, plus two samples of period quantisation
    for the period: a stationary cycle then passes its first three periods about nine times in
    ten. The scatter constants are calibrated on the simulated stand (agent/analysis/README.md).
Precision
    Convergence says the limit cycle is steady, not that enough of it has been seen. On a noisy
    loop the identified ultimate gain scatters by about ``GAIN_SCATTER`` (sigma/a) / sqrt(n)
    over n recorded periods, so the relay keeps running at the converged setting until that is
    below ``precision``, at most ``max_record_periods`` periods and ``max_record_s`` seconds;
    ``periods_after_ramp`` still reports when the oscillation converged, ``periods_recorded``
    how many periods the window holds.
"""


from __future__ import annotations

import enum
from dataclasses import dataclass, field

import numpy as np

__all__ = ["Action", "Decision", "Reason", "RelaySupervisor"]

# scatter of a stationary relay cycle in units of sigma/a (standard deviation of one period's
# length and of its first-harmonic amplitude, relative); calibrated, see the README
PERIOD_SCATTER = 0.65
AMP_SCATTER = 1.3
RANGE3_P95 = 3.31  # 95th percentile of the range of three normal samples, in deviations
# scatter of the identified ultimate gain over one recorded period, in units of sigma/a
GAIN_SCATTER = 0.75


def _harmonic_amplitude(seg: np.ndarray) -> float:
    """Amplitude of the fundamental of one whole period of samples."""
    n = len(seg)
    if n < 2:
        return 0.0
    phase = np.exp(-2j * np.pi * np.arange(n) / n)
    return float(2.0 * abs(np.dot(seg - seg.mean(), phase)) / n)


class Action(enum.StrEnum):
    """What the workflow does next with the relay."""

    WAIT = "wait"  # keep the relay running and call again with more samples
    ADJUST = "adjust"  # send the new amplitude and bias to the board
    CONVERGED = "converged"  # stop: ``Decision.window`` holds the periods to analyse
    FAIL = "fail"  # stop: the experiment cannot succeed (``Decision.reason`` says why)


class Reason(enum.StrEnum):
    """Why the supervisor decided as it did (a fixed code; ``Decision.reason`` has words)."""

    NONE = ""
    RECORDING = "recording"  # converged; recording more periods for precision
    AMPLITUDE = "amplitude"  # adjusted: the oscillation amplitude is off the target
    BIAS = "bias"  # adjusted: the relay is not centred on the trim
    AMPLITUDE_AND_BIAS = "amplitude and bias"
    NOT_STATIONARY = "not stationary"  # converged only at the period limit
    NO_SWITCHING = "no switching"  # failed: the loop does not oscillate
    NO_SETTLING = "no settling"  # failed: amplitude and bias kept changing


@dataclass(frozen=True)
class Decision:
    """One verdict of :meth:`RelaySupervisor.decide`.

    Attributes
    ----------
    action : Action
        What to do next.
    amplitude, bias : float
        Relay amplitude and centre to run with (new values when ``action`` is ``ADJUST``).
    reason : str
        In words: the adjusted quantities for ``ADJUST`` (the :class:`Reason` value),
        ``"recording"`` while recording for precision, the cause for ``FAIL``, a note when the
        oscillation was accepted without being stationary, else empty.
    cause : Reason
        The same as a fixed code.
    window : tuple of int or None
        ``(first, last)`` sample indices of every whole period after settling (``CONVERGED``).
    periods_after_ramp : int
        Periods after the last change when the oscillation converged.
    periods_recorded : int
        Whole periods in the window (or recorded so far).
    amplitude_seen, period_s : float
        Oscillation amplitude (half peak-to-peak) and period seen last.
    """

    action: Action
    amplitude: float
    bias: float
    reason: str = ""
    window: tuple[int, int] | None = None
    periods_after_ramp: int = 0
    periods_recorded: int = 0
    amplitude_seen: float = float("nan")
    period_s: float = float("nan")
    cause: Reason = Reason.NONE


@dataclass
class RelaySupervisor:
    """Supervises one relay experiment (see the module docstring).

    Parameters
    ----------
    amplitude, bias : float
        Relay amplitude and centre to start with (output units).
    target : float
        Wanted oscillation amplitude of the measurement (half peak-to-peak).
    ceiling : float
        Highest relay amplitude allowed.
    amp_band : float
        Accepted relative distance of the oscillation amplitude from ``target``.
    period_tol, amp_tol : float
        Relative spread of ``stable_periods`` periods (and first-harmonic amplitudes) accepted
        as stationary on a quiet loop; widened on a noisy one (:meth:`tolerances`).
    settle_periods, stable_periods, max_periods_after_ramp : int
        Periods discarded after a change, periods that must agree, and the period count after
        which the last periods are accepted anyway (with a note).
    bias_tol : float
        Re-centre when the mean output is off the bias by more than this share of the amplitude.
    max_bias_moves : int
        Re-centrings after which the bias is left alone.
    noise_std : float
        Measurement noise (standard deviation) seen during the hold; 0 when quiet.
    precision : float
        Wanted relative scatter of the identified ultimate gain (:meth:`periods_for_precision`).
    max_record_periods : int
        At most this many periods recorded for precision.
    max_record_s : float
        At most this long recorded for precision (device seconds).
    no_switch_s : float
        Fail when the relay has not switched for this long (or three times the longest
        half-period seen, whichever is longer).
    """

    amplitude: float
    bias: float
    target: float  # wanted oscillation amplitude of the measurement (half peak-to-peak)
    ceiling: float  # highest relay amplitude allowed
    amp_band: float = 0.3  # accept |a - target| <= amp_band * target
    period_tol: float = 0.02
    amp_tol: float = 0.05
    settle_periods: int = 1
    stable_periods: int = 3
    max_periods_after_ramp: int = 10
    bias_tol: float = 0.1  # re-centre when |mean u - bias| > bias_tol * amplitude
    max_bias_moves: int = 4  # after this many re-centrings the bias is left alone
    noise_std: float = 0.0  # measurement noise (standard deviation) from the hold
    precision: float = 0.005  # wanted relative scatter of the ultimate gain (noisy loops)
    max_record_periods: int = 60
    max_record_s: float = 60.0
    no_switch_s: float = 5.0  # fail when the relay has not switched for this long (or 3x the
    # longest half-period seen, whichever is longer)
    _adjust_index: int = 0  # sample index of the last change (once the board applied it)
    _old_levels: tuple | None = None  # relay output levels before a change not yet seen applied
    adjustments: int = 0
    bias_moves: int = 0
    _bias_points: list = field(default_factory=list)

    def decide(self, t_s: np.ndarray, y: np.ndarray, u: np.ndarray, relay: np.ndarray) -> Decision:
        """Judge every sample of the experiment so far.

        The verdict depends on the samples only, not on how often it is asked: periods are
        judged in order from the last change (counted from the first sample at the new output
        levels, since the board applies a change after the samples that asked for it).

        Parameters
        ----------
        t_s : ndarray
            Device time of every sample since the relay started (s).
        y, u : ndarray
            Measurement and applied relay output of the same samples.
        relay : ndarray
            The relay's state per sample (positive while the output is high).

        Returns
        -------
        Decision
            What to do next; ``window`` is set when the action is ``CONVERGED``.
        """
        n = len(t_s)
        if n < 3:
            return Decision(Action.WAIT, self.amplitude, self.bias)
        if self._old_levels is not None:
            # the board applies a change when the request arrives, after the samples the
            # decision saw: periods count from the first sample at the new output levels
            lo, hi = self._old_levels
            tol = max(1e-3, 0.01 * self.amplitude)
            uu = u[self._adjust_index:]
            new = np.flatnonzero((np.abs(uu - lo) > tol) & (np.abs(uu - hi) > tol))
            if len(new):
                self._adjust_index += int(new[0])
                self._old_levels = None
            elif t_s[-1] - t_s[self._adjust_index] > 1.0:
                self._old_levels = None  # not recognisable (a limited output): count from the request
            else:
                return Decision(Action.WAIT, self.amplitude, self.bias)
        start = self._adjust_index
        rel = relay[start:]
        rising = np.flatnonzero((rel[1:] > 0) & (rel[:-1] <= 0)) + 1 + start
        switches = np.flatnonzero(np.diff(np.sign(rel)) != 0) + 1 + start
        last_switch_t = t_s[switches[-1]] if len(switches) else t_s[start]
        # a slow loop has long half-periods: allow three of the longest seen so far
        longest = float(np.max(np.diff(t_s[switches]))) if len(switches) > 1 else 0.0
        if t_s[-1] - last_switch_t > max(self.no_switch_s, 3.0 * longest):
            return Decision(Action.FAIL, self.amplitude, self.bias,
                            f"the relay did not switch for {t_s[-1] - last_switch_t:.1f} s: the "
                            "loop does not oscillate (output too weak, axis blocked, or wrong "
                            "sign)", cause=Reason.NO_SWITCHING)
        # whole periods since the last change, rising edge to rising edge, judged in order so
        # that the verdict does not depend on how often the caller polls
        if len(rising) < self.settle_periods + 2:
            return Decision(Action.WAIT, self.amplitude, self.bias)
        edges = rising[self.settle_periods:]
        periods = np.diff(t_s[edges])
        amps = np.array([(y[a:b].max() - y[a:b].min()) / 2 for a, b in zip(edges[:-1], edges[1:])])
        # stationarity is judged on each period's first-harmonic amplitude: the peaks of a noisy
        # record scatter with the noise, the harmonic averages it over the period
        harm = np.array([_harmonic_amplitude(y[a:b]) for a, b in zip(edges[:-1], edges[1:])])
        lo, hi = (1 - self.amp_band) * self.target, (1 + self.amp_band) * self.target
        at_ceiling = self.amplitude >= self.ceiling * 0.999
        k = self.stable_periods
        for j in range(len(periods)):
            a_j = float(amps[j])
            need_amp = (a_j < lo and not at_ceiling) or a_j > hi
            if need_amp:
                self._bias_points.clear()  # the residual depends on the amplitude
                return self._adjust(n, True, False, a_j, self.bias, float(periods[j]))
            if j >= 1 and self.bias_moves < self.max_bias_moves:
                # bias from the mean over the last two whole periods (one period's mean is
                # noisy when noise moves the switching instants; after an amplitude change
                # the first periods are still settling)
                mean_u = float(np.mean(u[edges[j - 1]:edges[j + 1]]))
                if abs(mean_u - self.bias) > self.bias_tol * self.amplitude:
                    return self._adjust(n, False, True, a_j, mean_u, float(periods[j]))
            if j + 1 >= k:
                p, a = periods[j + 1 - k:j + 1], amps[j + 1 - k:j + 1]
                h = harm[j + 1 - k:j + 1]
                p_spread = (p.max() - p.min()) / p.mean()
                a_spread = (h.max() - h.min()) / h.mean()
                p_tol, a_tol = self.tolerances(float(a.mean()), float(p.mean()),
                                               float(np.median(np.diff(t_s[-20:]))))
                stable = p_spread <= p_tol and a_spread <= a_tol
                last_chance = j + 1 + self.settle_periods >= self.max_periods_after_ramp
                if stable or last_chance:
                    note = "" if stable else (
                        f"not stationary after {j + 1} periods (period spread {p_spread:.1%}, "
                        f"amplitude spread {a_spread:.1%}); analysing the last ones anyway")
                    # every whole period since the settling one goes to the analysis; on a
                    # noisy loop more of them are recorded first (see Precision above)
                    # (the first `need` periods, or those within the time budget, so that
                    # the window does not depend on when the caller polls)
                    need = self.periods_for_precision(float(a.mean()))
                    have = len(periods)
                    spent = t_s[edges[1:]] - t_s[edges[0]]
                    in_budget = int(np.count_nonzero(spent <= self.max_record_s))
                    last = j + 1
                    if stable:
                        if have < need and in_budget == have:
                            return Decision(Action.WAIT, self.amplitude, self.bias,
                                            Reason.RECORDING.value, cause=Reason.RECORDING,
                                            periods_after_ramp=j + 1 + self.settle_periods,
                                            periods_recorded=have,
                                            amplitude_seen=float(a.mean()),
                                            period_s=float(p.mean()))
                        last = max(min(need, in_budget), j + 1)
                    return Decision(Action.CONVERGED, self.amplitude, self.bias, note,
                                    cause=Reason.NONE if stable else Reason.NOT_STATIONARY,
                                    window=(int(edges[0]), int(edges[last])),
                                    periods_after_ramp=j + 1 + self.settle_periods,
                                    periods_recorded=last,
                                    amplitude_seen=float(a.mean()), period_s=float(p.mean()))
        return Decision(Action.WAIT, self.amplitude, self.bias, amplitude_seen=float(amps[-1]),
                        period_s=float(periods[-1]))

    def periods_for_precision(self, amplitude: float) -> int:
        """Whole periods to record at this oscillation amplitude.

        Parameters
        ----------
        amplitude : float
            Oscillation amplitude of the measurement (half peak-to-peak).

        Returns
        -------
        int
            Enough periods for the ultimate gain's scatter ``GAIN_SCATTER (sigma/a) / sqrt(n)``
            to reach ``precision``; at least ``stable_periods``, at most
            ``max_record_periods``.
        """
        if self.noise_std <= 0 or amplitude <= 0:
            return self.stable_periods
        n = int(np.ceil((GAIN_SCATTER * self.noise_std / amplitude / self.precision) ** 2))
        return int(min(max(n, self.stable_periods), self.max_record_periods))

    def tolerances(self, amplitude: float, period_s: float = 0.0,
                   dt: float = 0.0) -> tuple[float, float]:
        """Period and amplitude spread accepted as stationary at this oscillation amplitude.

        Parameters
        ----------
        amplitude : float
            Oscillation amplitude of the measurement (half peak-to-peak).
        period_s, dt : float
            Oscillation period and sample time (s); with both, the period tolerance includes
            the two samples by which noise can move two edges.

        Returns
        -------
        tuple of float
            ``(period, amplitude)`` spread (max - min over mean of three periods):
            ``period_tol`` and ``amp_tol``, widened on a noisy measurement to the 95th
            percentile of the range of three stationary periods (``RANGE3_P95`` times
            ``PERIOD_SCATTER`` or ``AMP_SCATTER`` sigma/a).
        """
        ratio = self.noise_std / amplitude if amplitude > 0 and self.noise_std > 0 else 0.0
        if ratio == 0.0:
            return self.period_tol, self.amp_tol
        quant = 2.0 * dt / period_s if period_s > 0 and dt > 0 else 0.0
        return (max(self.period_tol, RANGE3_P95 * PERIOD_SCATTER * ratio + quant),
                max(self.amp_tol, RANGE3_P95 * AMP_SCATTER * ratio))

    def _adjust(self, n: int, need_amp: bool, need_bias: bool, a_seen: float, mean_u: float,
                period_s: float) -> Decision:
        if self.adjustments >= 12:
            return Decision(Action.FAIL, self.amplitude, self.bias,
                            "the relay amplitude and bias did not settle after 12 adjustments "
                            "(the loop may be strongly nonlinear)", cause=Reason.NO_SETTLING)
        new_amp = self.amplitude
        if need_amp:
            scale = float(np.clip(self.target / max(a_seen, 1e-12), 0.5, 2.5))
            new_amp = float(min(self.amplitude * scale, self.ceiling))
        new_bias = self.bias
        if need_bias:
            # The residual r(b) = mean(u) - b is zero when the relay is centred. For an
            # integrating loop r falls one-for-one with b, but a loop with a static gain reacts
            # more strongly (the oscillation's centre moves too), so a full step would
            # overshoot: the first move goes half-way, later ones use the secant through the
            # last two (b, r) points, clipped to +/- one relay amplitude.
            r = mean_u - self.bias
            prev = self._bias_points[-1] if self._bias_points else None
            step = 0.5 * r
            if prev is not None and prev[0] != self.bias and prev[1] != r:
                slope = (r - prev[1]) / (self.bias - prev[0])
                if slope < 0:
                    step = -r / slope
            step = float(np.clip(step, -self.amplitude, self.amplitude))
            self._bias_points.append((self.bias, r))
            new_bias = self.bias + step
            self.bias_moves += 1
        self._old_levels = (self.bias - self.amplitude, self.bias + self.amplitude)
        self.amplitude, self.bias = new_amp, new_bias
        self._adjust_index = n - 1
        self.adjustments += 1
        cause = (Reason.AMPLITUDE_AND_BIAS if need_amp and need_bias
                 else Reason.AMPLITUDE if need_amp else Reason.BIAS)
        return Decision(Action.ADJUST, new_amp, new_bias, cause.value, amplitude_seen=a_seen,
                        period_s=period_s, cause=cause)
