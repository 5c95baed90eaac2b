"""The one way to turn logged telemetry rows into an analysis record.

The online relay workflow and the offline re-analysis (``tetherloop analyze``) both call
:func:`relay_record_from_rows` with the same columns and the same ``analysis_input`` dict, so the
two cannot build different records. :func:`columns_from_telemetry` gives the online side the very
columns the reader returns from disk (same dtypes, floats rounded to f32 exactly as stored).
"""

from __future__ import annotations

from dataclasses import dataclass, fields
from typing import Any, Iterable

import numpy as np

from .format import COLUMNS, INT_COLUMNS, LogbookError

ANALYSIS_INPUT_KEYS = ("axis", "t_start_us", "t_end_us", "amplitude", "hysteresis", "bias",
                       "setpoint", "sample_time_s", "sampling_delay_s")


@dataclass(frozen=True)
class AnalysisInput:
    """Exactly the window and parameters an analysis reads (the logbook's ``analysis_input``).

    The relay workflow builds one; the logbook stores ``to_dict()`` in the experiment's
    results.json; the offline re-analysis reads it back with ``from_dict``, so both build the
    same record and the same tuning arguments. Times are the board's (µs, inclusive).
    ``integrating`` is the host's prior (True for angle and height loops, None: unknown);
    ``at_rest`` False when the window starts mid-oscillation (None in older logs: the fit
    decides); ``max_output_noise`` bounds what measurement noise may do to the output (None:
    no bound); ``loop`` None in older logs (every level of the axis).
    """

    axis: int
    t_start_us: int
    t_end_us: int
    amplitude: float
    hysteresis: float
    bias: float
    setpoint: float
    sample_time_s: float
    sampling_delay_s: float
    loop: int | None = None
    controller: str | None = None
    ms_target: float | None = None
    integrating: bool | None = None
    at_rest: bool | None = None
    output_limit: float | None = None
    max_output_noise: float | None = None

    def __post_init__(self) -> None:
        if not self.t_end_us >= self.t_start_us:
            raise LogbookError(f"analysis input window ends ({self.t_end_us} us) before it "
                               f"starts ({self.t_start_us} us)")
        if not self.sample_time_s > 0:
            raise LogbookError(f"analysis input sample_time_s must be > 0, got "
                               f"{self.sample_time_s!r}")

    def to_dict(self) -> dict:
        """The logbook form (every key, None where unknown)."""
        return {f.name: getattr(self, f.name) for f in fields(self)}

    @classmethod
    def from_dict(cls, d: "dict | AnalysisInput") -> "AnalysisInput":
        """Read the logbook form; unknown keys are ignored (newer logs), missing required ones
        raise LogbookError naming them."""
        if isinstance(d, AnalysisInput):
            return d
        if not isinstance(d, dict):
            raise LogbookError("the analysis input must be a dict naming the window and relay "
                               f"parameters, got {type(d).__name__}.")
        missing = [k for k in ANALYSIS_INPUT_KEYS if k not in d]
        if missing:
            raise LogbookError(f"the analysis input lacks {missing}; it must name "
                               f"{list(ANALYSIS_INPUT_KEYS)}.")
        try:
            kw: dict[str, Any] = {k: int(d[k]) for k in ("axis", "t_start_us", "t_end_us")}
            kw.update({k: float(d[k]) for k in ("amplitude", "hysteresis", "bias", "setpoint",
                                               "sample_time_s", "sampling_delay_s")})
            for k in ("ms_target", "output_limit", "max_output_noise"):
                kw[k] = None if d.get(k) is None else float(d[k])
            kw["loop"] = None if d.get("loop") is None else int(d["loop"])
            kw["controller"] = None if d.get("controller") is None else str(d["controller"])
            for k in ("integrating", "at_rest"):
                v = d.get(k)
                if v is not None and not isinstance(v, bool):
                    raise LogbookError(f"analysis input {k} must be true, false or null, got {v!r}")
                kw[k] = v
        except (TypeError, ValueError) as exc:
            raise LogbookError(f"the analysis input holds a value of the wrong type: {exc}") from None
        return cls(**kw)


# Samples lost on the link are bridged on the board's tick grid (the analysis needs uniform
# samples): the measurement linearly, the controller output by holding its last value (it is
# piecewise constant under a relay). A record is refused when more than half of its samples are
# missing or one gap is longer than MAX_GAP_TICKS: past that the waveform between the samples is
# guessed, not measured (common practice, no source).
MAX_BRIDGED_FRACTION = 0.5
MAX_GAP_TICKS = 20


@dataclass(frozen=True)
class Bridged:
    """Samples on the full tick grid, and how many of them were bridged."""

    t_us: np.ndarray
    y: np.ndarray
    u: np.ndarray
    bridged: int
    longest_gap_ticks: int


def bridge_gaps(t_us: np.ndarray, y: np.ndarray, u: np.ndarray, tick_us: float) -> Bridged:
    """Fill samples lost on the link on the board's tick grid.

    Parameters
    ----------
    t_us : ndarray
        Board time stamps (µs), increasing, at multiples of ``tick_us`` from the first.
    y, u : ndarray
        Measurement and controller output at those times.
    tick_us : float
        The board's tick (µs).

    Returns
    -------
    Bridged
        Unchanged arrays when nothing was lost; else every tick from the first to the last
        sample, ``y`` interpolated linearly and ``u`` held, with the count of bridged samples
        and the longest gap (in ticks, 0 when none).
    """
    t_us = np.asarray(t_us)
    if t_us.size < 2:
        return Bridged(t_us, np.asarray(y), np.asarray(u), 0, 0)
    k = np.rint((t_us - t_us[0]) / tick_us).astype(np.int64)
    steps = np.diff(k)
    if np.all(steps == 1):
        return Bridged(t_us, np.asarray(y), np.asarray(u), 0, 0)
    full = np.arange(int(k[-1]) + 1)
    y_full = np.interp(full, k, y)
    u_full = np.asarray(u)[np.searchsorted(k, full, side="right") - 1]
    t_full = t_us[0] + np.rint(full * tick_us).astype(np.int64)
    return Bridged(t_full, y_full, u_full, int(full.size - k.size), int(steps.max() - 1))


def columns_from_telemetry(samples: Iterable[tuple[float, Any]]) -> dict[str, np.ndarray]:
    """Long-format columns from ``(host_time_s, Telemetry)`` pairs, as :func:`read_session`
    returns them (one row per axis entry; f32 wire values as exact float64)."""
    rows: dict[str, list] = {c: [] for c in COLUMNS}
    for host_time_s, tel in samples:
        for a in tel.axes:
            rows["host_time_s"].append(round(float(host_time_s), 6))  # as the CSV keeps it
            rows["time_us"].append(tel.time_us)
            rows["counter"].append(tel.counter)
            rows["state"].append(tel.state)
            rows["tag"].append(tel.tag)
            rows["axis"].append(a.axis)
            rows["loop"].append(a.loop)
            rows["setpoint"].append(a.setpoint)
            rows["measurement"].append(a.measurement)
            rows["output"].append(a.output)
            rows["relay"].append(a.relay)
    out = {}
    for c in COLUMNS:
        if c in INT_COLUMNS:
            out[c] = np.asarray(rows[c], dtype=np.int64)
        elif c == "host_time_s":
            out[c] = np.asarray(rows[c], dtype=np.float64)
        else:
            out[c] = np.asarray(rows[c], dtype=np.float64).astype(np.float32).astype(np.float64)
    return out


def tune_kwargs(analysis_input: "AnalysisInput | dict") -> dict:
    """Keyword arguments for ``agent.analysis.tune`` named by an analysis input (the keys it
    does not name keep tune's own defaults). A dict needs only ``sample_time_s``."""
    if isinstance(analysis_input, dict) and not set(ANALYSIS_INPUT_KEYS) <= analysis_input.keys():
        ai = dict(analysis_input)  # a partial dict: tuning arguments only
    else:
        ai = AnalysisInput.from_dict(analysis_input).to_dict()
    kw: dict = {"sample_time_s": float(ai["sample_time_s"])}
    for key, conv in (("controller", str), ("ms_target", float), ("output_limit", float),
                      ("max_output_noise", float)):
        if ai.get(key) is not None:
            kw[key] = conv(ai[key])
    return kw


def window_mask(columns: dict[str, np.ndarray], analysis_input: "AnalysisInput | dict") -> np.ndarray:
    """Rows of the analysed axis (and loop, when named) inside [t_start_us, t_end_us]."""
    ai = AnalysisInput.from_dict(analysis_input)
    t = columns["time_us"]
    mask = (columns["axis"] == ai.axis) & (t >= ai.t_start_us) & (t <= ai.t_end_us)
    if ai.loop is not None:
        mask &= columns["loop"] == ai.loop
    return mask


def relay_record_from_rows(columns: dict[str, np.ndarray], analysis_input: dict):
    """Build the :class:`agent.analysis.RelayRecord` that an analysis input names.

    Parameters
    ----------
    columns
        Long telemetry columns (from :func:`columns_from_telemetry` online or
        :class:`ExperimentRecord.columns` offline).
    analysis_input
        An :class:`AnalysisInput`, or its logbook dict form; a ``loop`` restricts the rows to
        that loop level too.

    Returns
    -------
    RelayRecord
        ``t_s = time_us * 1e-6``, ``y = measurement``, ``u = output`` (float64) of the rows of
        that axis inside the window, in time order, duplicates of a device time dropped, samples
        lost on the link bridged on the tick grid (:func:`bridge_gaps`).

    Raises
    ------
    LogbookError
        The analysis input lacks a key, the window holds no rows, or too many of its samples
        were lost to bridge.
    """
    from agent.analysis.records import RelayRecord

    ai = AnalysisInput.from_dict(analysis_input)
    mask = window_mask(columns, ai)
    t_us = columns["time_us"][mask]
    if t_us.size == 0:
        raise LogbookError(
            f"no telemetry rows of axis {ai.axis} between device times {ai.t_start_us} us "
            f"and {ai.t_end_us} us; the record was cut short or the window is wrong.")
    order = np.argsort(t_us, kind="stable")
    t_us = t_us[order]
    keep = np.ones(t_us.size, dtype=bool)
    keep[1:] = np.diff(t_us) > 0  # a sample logged twice (retransmission) counts once
    idx = order[keep]
    y = np.asarray(columns["measurement"][mask][idx], dtype=np.float64)
    u = np.asarray(columns["output"][mask][idx], dtype=np.float64)
    br = bridge_gaps(t_us[keep], y, u, ai.sample_time_s * 1e6)
    if br.bridged > MAX_BRIDGED_FRACTION * br.t_us.size or br.longest_gap_ticks > MAX_GAP_TICKS:
        raise LogbookError(
            f"{br.bridged} of {br.t_us.size} samples of the analysed window were lost on the "
            f"link (longest gap {br.longest_gap_ticks} ticks); at most "
            f"{MAX_BRIDGED_FRACTION:.0%} and gaps of {MAX_GAP_TICKS} ticks can be bridged. "
            "Check the cable and the link's error counts, or lower the telemetry load.")
    t_s, y, u = br.t_us.astype(np.float64) * 1e-6, br.y, br.u
    return RelayRecord(t_s=t_s, y=y, u=u, setpoint=ai.setpoint, amplitude=ai.amplitude,
                       hysteresis=ai.hysteresis, bias=ai.bias, sample_time_s=ai.sample_time_s,
                       sampling_delay_s=ai.sampling_delay_s, integrating=ai.integrating,
                       at_rest=ai.at_rest)
