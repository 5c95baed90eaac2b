"""Identification from one relay record: cycles, ultimate points, models, quality.

:func:`identify` is the entry point. Pure: arrays in, a frozen :class:`Identification` out.

Bases (see :mod:`agent.analysis.records`): every ultimate point says whether it describes the
``loop`` (as the controller sees it, the board's sampling delay included; use it for discrete
gains) or the ``plant`` (that delay removed). ``ultimate`` holds the loop points,
``ultimate_plant`` the plant points.

The model is fitted from relay output to measurement with the hold simulated exactly, so its
dead time contains any whole-tick output delay of the board but not the half-tick of the hold.
The loop model adds the half tick; the plant model removes the part of ``sampling_delay_s``
beyond the half tick.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from .cycles import CycleStats, detect_cycles
from .families import FAMILIES
from .models import Model, fit_models, select_model
from .records import RecordError, RelayRecord, validate_record
from .ultimate import (
    UltimatePoint,
    anchored_crossover,
    describing_function_point,
    first_harmonic,
    hysteresis_point,
)

__all__ = ["METHODS", "Identification", "identify"]

METHODS = ("describing_function", "hysteresis_corrected", "first_harmonic", "model_fit")


@dataclass(frozen=True)
class Identification:
    """Result of :func:`identify`.

    Attributes
    ----------
    cycles : CycleStats
    ultimate, ultimate_plant : dict[str, UltimatePoint]
        Ultimate points by method on the loop and on the plant basis.
    best, best_plant : UltimatePoint
        The recommended estimate (``model_fit`` when the model reproduces the waveform within
        5 % of the amplitude, else ``first_harmonic``).
    model : Model
        Chosen model as fitted (relay output to measurement, basis ``"record"``).
    models : dict[str, Model]
        Every fitted family (a richer family is absent when a simpler one it extends already
        reproduces the record down to the noise; see ``models.fit_models``).
    model_loop, model_plant : Model
        The chosen model on the loop basis (for design and discrete gains) and on the plant basis.
    bias_estimate : float or None
        Mean relay output over the stationary whole periods: the trim that holds the measurement
        at its mean (for an integrating plant: the load to be compensated).
    static_gain : float or None
        Gain of the chosen model if self-regulating, else None.
    static_gain_dc : float or None
        Berner (2017) asymmetric-relay estimate ``∫(y - y0) / ∫(u - bias)`` over whole periods,
        ``y0`` the measurement at the start; only when the relay mean differs from its bias.
    noise_std : float
        Measurement noise standard deviation estimate.
    warnings : tuple[str, ...]
        Quality flags in plain words.
    """

    cycles: CycleStats
    ultimate: dict[str, UltimatePoint]
    best: UltimatePoint
    model: Model
    models: dict[str, Model]
    bias_estimate: float | None
    static_gain: float | None
    noise_std: float
    warnings: tuple[str, ...]
    ultimate_plant: dict[str, UltimatePoint] = field(default_factory=dict)
    best_plant: UltimatePoint | None = None
    model_loop: Model | None = None
    model_plant: Model | None = None
    static_gain_dc: float | None = None
    relay_amplitude: float = float("nan")
    hysteresis: float = 0.0
    sample_time_s: float = float("nan")
    sampling_delay_s: float = 0.0
    spread: dict[str, float] = field(default_factory=dict)

    def to_dict(self) -> dict:
        """JSON-ready dictionary (floats, lists, strings)."""
        def opt(x):
            return None if x is None else float(x)
        return {
            "cycles": self.cycles.to_dict(),
            "ultimate": {k: v.to_dict() for k, v in self.ultimate.items()},
            "ultimate_plant": {k: v.to_dict() for k, v in self.ultimate_plant.items()},
            "best": self.best.to_dict(),
            "best_plant": self.best_plant.to_dict() if self.best_plant else None,
            "model": self.model.to_dict(),
            "models": {k: m.to_dict() for k, m in self.models.items()},
            "model_loop": self.model_loop.to_dict() if self.model_loop else None,
            "model_plant": self.model_plant.to_dict() if self.model_plant else None,
            "bias_estimate": opt(self.bias_estimate),
            "static_gain": opt(self.static_gain),
            "static_gain_dc": opt(self.static_gain_dc),
            "noise_std": float(self.noise_std),
            "warnings": list(self.warnings),
            "relay_amplitude": float(self.relay_amplitude),
            "hysteresis": float(self.hysteresis),
            "sample_time_s": float(self.sample_time_s),
            "sampling_delay_s": float(self.sampling_delay_s),
            "spread": {k: float(v) for k, v in self.spread.items()},
        }


def _noise_mad(y: np.ndarray) -> float:
    d2 = np.diff(y, 2)
    mad = np.median(np.abs(d2 - np.median(d2)))
    return float(1.4826 * mad / np.sqrt(6.0))


def _clipped(y: np.ndarray, span: float) -> str | None:
    tol = 1e-9 * max(span, 1e-300)
    for name, ext in (("maximum", np.max(y)), ("minimum", np.min(y))):
        at = np.abs(y - ext) <= tol
        # longest run of consecutive samples sitting exactly at the extreme
        run = best = 0
        n_runs = 0
        for v in at:
            if v:
                run += 1
            else:
                if run >= 4:
                    n_runs += 1
                best = max(best, run)
                run = 0
        if run >= 4:
            n_runs += 1
        best = max(best, run)
        if best >= 4 and (n_runs >= 2 or at.sum() > 0.01 * len(y)):
            return (f"The measurement sits flat at its {name} ({ext:.6g}) for up to {best} "
                    "consecutive samples: the sensor or the loop saturated, so the oscillation "
                    "amplitude is unknown. Lower the relay amplitude or widen the sensor range, "
                    "then repeat the experiment.")
    return None


def identify(record: RelayRecord) -> Identification:
    """Identify the loop from one relay record.

    Steps: validate the record; detect cycles and stationarity; estimate the ultimate point by
    the describing function, with hysteresis correction, by first harmonics and from the fitted
    model; fit the model families of :mod:`agent.analysis.models` to the whole waveform and
    choose one; estimate the
    trim/bias and static gain; collect quality warnings.

    Parameters
    ----------
    record : RelayRecord
        One relay experiment (see :class:`agent.analysis.records.RelayRecord`).

    Returns
    -------
    Identification

    Raises
    ------
    RecordError
        For records that cannot be analysed (non-finite values, no oscillation, fewer than two
        cycles, a clipped measurement, inconsistent sampling), with the reason.
    """
    t, y, u = validate_record(record)
    dt = float(record.sample_time_s)
    d_nom = float(record.amplitude)
    eps = float(record.hysteresis)
    warnings: list[str] = []

    if np.ptp(y) <= 1e-12 * max(1.0, float(np.max(np.abs(y)))):
        raise RecordError(
            "The measurement did not move during the experiment; expected it to oscillate with "
            "the relay. Check that the board's output reaches the actuator and that the sensor "
            "is live, then repeat.")
    cyc = detect_cycles(t, y, u)
    if cyc.amplitude > 0:  # again, with the tolerances widened to what the noise explains
        cyc = detect_cycles(t, y, u, noise_ratio=_noise_mad(y) / cyc.amplitude)
    clip = _clipped(y, float(np.ptp(y)))
    if clip:
        raise RecordError(clip)
    if cyc.amplitude <= 0:
        raise RecordError("The oscillation has zero amplitude; the record cannot be analysed.")

    jitter = float(np.max(np.abs(np.diff(t) - dt)) / dt)
    if jitter > 0.2:
        warnings.append(f"Sample times jitter by up to {jitter:.0%} of a tick; the model fit "
                        "assumes uniform sampling, so results are less accurate.")
    if not cyc.stationary:
        warnings.append(
            f"The oscillation did not settle: only {cyc.n_stationary} of {cyc.n_cycles} cycles "
            "agree within 5 % in period and 10 % in amplitude (3 needed). Run the relay longer.")
    elif cyc.n_stationary < 4:
        warnings.append(f"Only {cyc.n_stationary} steady cycles were recorded; 5 or more give "
                        "tighter estimates.")
    if cyc.chatter_pulses:
        warnings.append(f"The relay chattered {cyc.chatter_pulses} time(s) (noise-triggered "
                        "switching); raise the hysteresis above about three noise deviations.")
    d_eff = 0.5 * (cyc.u_high - cyc.u_low)
    if abs(d_eff - d_nom) > 0.05 * d_nom:
        warnings.append(
            f"The relay output swung ±{d_eff:.4g} instead of the requested ±{d_nom:.4g}: the "
            "actuator saturated or the output was limited. The measured swing is used.")
    d = d_eff
    per = cyc.period_s
    if per < 8 * dt:
        warnings.append(f"The oscillation period ({per:.4g} s) spans only {per / dt:.1f} samples; "
                        "the sampling limits the accuracy. Lower the relay amplitude or sample "
                        "faster.")

    # --- first harmonic over the stationary whole periods
    i0, i1 = cyc.window_tight
    n_per = max(int(round((t[i1] - t[i0]) / per)), 1) if i1 > i0 else 1
    g_fh, w0 = first_harmonic(t, y, u, i0, i1, n_per)
    i0, i1 = cyc.window

    # --- models
    noise_mad = _noise_mad(y)
    # the host's prior knowledge of the loop's physics: only families of that kind are fitted
    kinds = tuple(k for k, f in FAMILIES.items()
                  if record.integrating is None or f.integrating == bool(record.integrating))
    models = fit_models(dt, u, y, per, cyc.amplitude, kinds=kinds, u_ref=float(record.bias),
                        noise_std=noise_mad, at_rest=record.at_rest)
    model = select_model(models, len(y), cyc.amplitude, noise_std=noise_mad)
    ts_half = 0.5 * dt
    extra = max(float(record.sampling_delay_s) - ts_half, 0.0)
    L = model.params["L"]
    loop_model = model.with_delay(L + ts_half, "loop")
    plant_model = model.with_delay(L - extra, "plant")
    # delay of the loop over the plant as used for the plant basis of the measured points
    ls = float(record.sampling_delay_s)

    # --- ultimate points
    a = cyc.amplitude
    shape = loop_model.freq
    loop: dict[str, UltimatePoint] = {}
    plant: dict[str, UltimatePoint] = {}
    g_df = describing_function_point(a, d)
    loop["describing_function"] = UltimatePoint("describing_function", 4 * d / (np.pi * a),
                                                per, "loop")
    ku_p, wu_p = anchored_crossover(g_df, 2 * np.pi / per, shape, ls)
    plant["describing_function"] = UltimatePoint("describing_function", ku_p, 2 * np.pi / wu_p,
                                                 "plant")
    if abs(eps) >= a:
        warnings.append(f"The hysteresis ({eps:.4g}) is not smaller than the oscillation "
                        f"amplitude ({a:.4g}); the hysteresis correction is unreliable.")
    g_hy = hysteresis_point(a, d, eps)
    for basis, dest, rem in (("loop", loop, 0.0), ("plant", plant, ls)):
        ku, wu = anchored_crossover(g_hy, 2 * np.pi / per, shape, rem)
        dest["hysteresis_corrected"] = UltimatePoint("hysteresis_corrected", ku, 2 * np.pi / wu,
                                                     basis)
        ku, wu = anchored_crossover(g_fh, w0, shape, rem)
        dest["first_harmonic"] = UltimatePoint("first_harmonic", ku, 2 * np.pi / wu, basis)
    for basis, dest, mdl in (("loop", loop, loop_model), ("plant", plant, plant_model)):
        ku, tu = mdl.ultimate()
        dest["model_fit"] = UltimatePoint("model_fit", ku, tu, basis)

    # --- noise and quality
    noise = min(_noise_mad(y), model.rmse) if np.isfinite(model.rmse) else _noise_mad(y)
    if noise > 0.25 * a:
        warnings.append(f"The measurement noise ({noise:.3g}) is {noise / a:.0%} of the "
                        "oscillation amplitude; results are unreliable. Raise the relay "
                        "amplitude or filter the sensor.")
    elif noise > 1e-3 * a and abs(eps) < 2 * noise:
        warnings.append(f"The hysteresis ({eps:.3g}) is below twice the noise ({noise:.3g}); "
                        "switching can be triggered by noise. Use about three times the noise.")
    # the residual beyond the measurement noise (white noise adds in quadrature) judges the fit
    misfit = float(np.sqrt(max(model.rmse ** 2 - noise_mad ** 2, 0.0))) / a \
        if np.isfinite(model.rmse) else float("inf")
    fit_ok = np.isfinite(model.rel_rmse) and misfit <= 0.05
    if not fit_ok:
        warnings.append(f"The best model ({model.kind}) reproduces the waveform only within "
                        f"{model.rel_rmse:.0%} of the amplitude ({misfit:.0%} beyond the noise); "
                        "the first-harmonic estimate is used instead of the model.")
    key = "model_fit" if fit_ok and np.isfinite(loop["model_fit"].ku) else "first_harmonic"
    best, best_plant = loop[key], plant[key]

    # --- per-cycle spread of the describing-function gain and of the period
    kus = 4 * d / (np.pi * cyc.amplitudes[-max(cyc.n_stationary, 2):])
    pers = cyc.periods_s[-max(cyc.n_stationary, 2):]
    spread = {"ku_cycle_spread": float(np.std(kus) / np.mean(kus)),
              "tu_cycle_spread": float(np.std(pers) / np.mean(pers)),
              "fit_rel_rmse": float(model.rel_rmse),
              "methods_ku_spread": float(np.std([p.ku for p in loop.values()]) /
                                         np.mean([p.ku for p in loop.values()]))}

    # --- bias / trim and static gain
    u_mean = float(np.mean(u[i0:i1])) if i1 > i0 else float(np.mean(u))
    bias_est = u_mean
    static_gain = float(model.params["K"]) if not model.integrating else None
    static_gain_dc = None
    if not model.integrating and abs(u_mean - record.bias) > 0.05 * d and i1 > i0:
        static_gain_dc = float((np.mean(y[i0:i1]) - y[0]) / (u_mean - record.bias))
    if model.integrating and abs(cyc.asymmetry) > 0.05:
        warnings.append(
            f"The half-periods differ by {abs(cyc.asymmetry):.0%}: a load acts on this "
            f"integrating loop; the trim is about {bias_est:.4g} (relay centred on "
            f"{record.bias:.4g}). Centre the relay on the trim for a symmetric test.")

    return Identification(
        cycles=cyc, ultimate=loop, best=best, model=model, models=models,
        bias_estimate=bias_est, static_gain=static_gain, noise_std=float(noise),
        warnings=tuple(warnings), ultimate_plant=plant, best_plant=best_plant,
        model_loop=loop_model, model_plant=plant_model, static_gain_dc=static_gain_dc,
        relay_amplitude=d, hysteresis=eps, sample_time_s=dt,
        sampling_delay_s=float(record.sampling_delay_s), spread=spread)
