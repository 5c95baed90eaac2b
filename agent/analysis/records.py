"""Relay experiment records and the error raised for unusable ones.

A :class:`RelayRecord` is what one relay experiment leaves behind: uniformly sampled time stamps,
the measurement ``y`` the relay acted on and the relay output ``u`` actually applied (bias
included). Everything is in SI units. The record is validated by :func:`validate_record`, which
raises :class:`RecordError` with a sentence a person understands (what was wrong, what was
expected, what to do) instead of letting a numerical routine fail later.

Sampling convention
-------------------
``u[k]`` is computed from ``y[k]`` and held by a zero-order hold over ``[t_k, t_k + T_s)``.
``sampling_delay_s`` is the delay the board's sampling adds to the continuous plant: half a
tick for the zero-order hold, plus one tick if the board applies its output on the next tick
(``1.5 * T_s`` then). Results computed "on the loop" include it, results "on the plant" have it
removed.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

__all__ = ["RecordError", "RelayRecord", "validate_record"]


from ..errors import RecordError  # noqa: E402  (re-exported: agent.analysis.RecordError)


@dataclass(frozen=True)
class RelayRecord:
    """One relay experiment, arrays in, nothing else.

    Parameters
    ----------
    t_s : ndarray
        Sample times in seconds, uniformly spaced by ``sample_time_s``.
    y : ndarray
        Measurement the relay acted on (rad/s, rad, m/s ...).
    u : ndarray
        Relay output actually applied, bias included (normalised actuator units or a setpoint of
        the inner loop).
    setpoint : float
        Reference the relay switched around.
    amplitude : float
        Relay half-swing ``d`` (output is ``bias +/- d``).
    hysteresis : float
        Relay hysteresis ``eps`` in measurement units; negative means the relay switched early.
    bias : float
        Relay centre (trim) in output units.
    sample_time_s : float
        Loop sample time of the board.
    sampling_delay_s : float
        Delay added by the board's sampling (see the module docstring); 0 when unknown.
    at_rest : bool or None
        Whether the series starts at rest (True: the loop was still before the first sample,
        with the output at ``bias``), mid-oscillation (False: a window of a running relay), or
        unknown (None: the model fit decides). A wrong True biases the fitted gain strongly
        while hardly raising its residual, so the workflow states False for its windows.
    integrating : bool or None
        What the host knows of the loop's physics: True when the measurement integrates the
        loop's output (an angle loop around a rate loop, a height loop around a climb-rate
        loop), False when it cannot, None to let the data decide. With True or False only
        model families of that kind are fitted candidates for the choice.
    """

    t_s: np.ndarray
    y: np.ndarray
    u: np.ndarray
    setpoint: float
    amplitude: float
    hysteresis: float
    bias: float
    sample_time_s: float
    sampling_delay_s: float = 0.0
    integrating: bool | None = None
    at_rest: bool | None = None


def _finite_scalar(name: str, value: object) -> float:
    try:
        v = float(value)  # type: ignore[arg-type]
    except (TypeError, ValueError):
        raise RecordError(
            f"The record's {name} is {value!r}, which is not a number; expected a finite float. "
            "Check how the experiment settings were stored."
        ) from None
    if not np.isfinite(v):
        raise RecordError(
            f"The record's {name} is {v}; expected a finite number. "
            "Check how the experiment settings were stored."
        )
    return v


def validate_record(rec: RelayRecord) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Check a record and return ``(t_s, y, u)`` as 1-D float arrays.

    Parameters
    ----------
    rec : RelayRecord
        The record to check.

    Returns
    -------
    tuple of ndarray
        ``(t_s, y, u)``.

    Raises
    ------
    RecordError
        With a reason for: mismatched lengths, too few samples, non-finite values, time stamps
        that do not increase or disagree with the sample time, non-positive relay amplitude or
        sample time.
    """
    arrays = []
    for name in ("t_s", "y", "u"):
        try:
            a = np.asarray(getattr(rec, name), dtype=float).ravel()
        except (TypeError, ValueError):
            raise RecordError(
                f"The record's {name} series could not be read as numbers; expected a 1-D array "
                "of floats. Re-export the experiment or re-run it."
            ) from None
        arrays.append(a)
    t, y, u = arrays
    if not (len(t) == len(y) == len(u)):
        raise RecordError(
            f"The record's series have different lengths (t_s {len(t)}, y {len(y)}, u {len(u)}); "
            "expected one value of each per sample. The log is probably truncated: re-run the "
            "experiment."
        )
    if len(t) < 20:
        raise RecordError(
            f"The record holds only {len(t)} samples; a relay analysis needs several oscillation "
            "cycles (hundreds of samples). Run the experiment longer."
        )
    for name, a in (("t_s", t), ("y", y), ("u", u)):
        bad = ~np.isfinite(a)
        if bad.any():
            first = int(np.argmax(bad))
            raise RecordError(
                f"The record's {name} contains {int(bad.sum())} missing or non-finite values "
                f"(NaN/inf), the first at sample {first}; expected finite numbers throughout. "
                "Telemetry was probably lost: re-run the experiment or cut the record before the gap."
            )
    ts = _finite_scalar("sample_time_s", rec.sample_time_s)
    if ts <= 0:
        raise RecordError(
            f"The record's sample_time_s is {ts}; expected the loop's positive sample time in seconds."
        )
    d = _finite_scalar("amplitude", rec.amplitude)
    if d <= 0:
        raise RecordError(
            f"The relay amplitude is {d}; expected a positive half-swing of the relay output."
        )
    for name in ("setpoint", "hysteresis", "bias", "sampling_delay_s"):
        _finite_scalar(name, getattr(rec, name))
    if float(rec.sampling_delay_s) < 0:
        raise RecordError(
            f"The record's sampling_delay_s is {rec.sampling_delay_s}; expected a delay >= 0 s "
            "(half a tick for the hold, plus a tick if the output is applied on the next tick)."
        )
    dt = np.diff(t)
    if np.any(dt <= 0):
        k = int(np.argmax(dt <= 0))
        raise RecordError(
            f"The record's time stamps do not increase at sample {k + 1} "
            f"({t[k]:.6g} s then {t[k + 1]:.6g} s); expected strictly increasing times. "
            "Samples were reordered or duplicated: re-export the experiment."
        )
    med = float(np.median(dt))
    if abs(med - ts) > 0.05 * ts:
        raise RecordError(
            f"The record's samples are {med:.6g} s apart but its sample_time_s says {ts:.6g} s; "
            "expected the two to agree. Store the loop's real sample time with the record."
        )
    return t, y, u
