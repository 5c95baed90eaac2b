"""The one way to turn logged telemetry rows into an analysis record.

The online relay workflow and the offline re-analysis (``tetherloop analyze``) both call
:func:`relay_record_from_rows` with the same columns and the same ``analysis_input`` dict, so the
two cannot build different records. :func:`columns_from_telemetry` gives the online side the very
columns the reader returns from disk (same dtypes, floats rounded to f32 exactly as stored).
"""

from __future__ import annotations

from typing import Any, Iterable

import numpy as np

from .format import COLUMNS, INT_COLUMNS, LogbookError

ANALYSIS_INPUT_KEYS = ("axis", "t_start_us", "t_end_us", "amplitude", "hysteresis", "bias",
                       "setpoint", "sample_time_s", "sampling_delay_s")


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


def tune_kwargs(analysis_input: dict) -> dict:
    """Keyword arguments for ``agent.analysis.tune`` named by an analysis input (the keys it
    does not name keep tune's own defaults)."""
    ai = analysis_input
    kw: dict = {"sample_time_s": float(ai["sample_time_s"])}
    if ai.get("controller") is not None:
        kw["controller"] = str(ai["controller"])
    if ai.get("ms_target") is not None:
        kw["ms_target"] = float(ai["ms_target"])
    if ai.get("output_limit") is not None:
        kw["output_limit"] = float(ai["output_limit"])
    if ai.get("max_output_noise") is not None:
        kw["max_output_noise"] = float(ai["max_output_noise"])
    return kw


def window_mask(columns: dict[str, np.ndarray], analysis_input: dict) -> np.ndarray:
    """Rows of the analysed axis (and loop, when named) inside [t_start_us, t_end_us]."""
    ai = analysis_input
    t = columns["time_us"]
    mask = (columns["axis"] == int(ai["axis"])) & (t >= int(ai["t_start_us"])) \
        & (t <= int(ai["t_end_us"]))
    if ai.get("loop") is not None:
        mask &= columns["loop"] == int(ai["loop"])
    return mask


def relay_record_from_rows(columns: dict[str, np.ndarray], analysis_input: dict):
    """Build the :class:`agent.analysis.RelayRecord` that an analysis input names.

    Parameters
    ----------
    columns
        Long telemetry columns (from :func:`columns_from_telemetry` online or
        :class:`ExperimentRecord.columns` offline).
    analysis_input
        ``{"axis", "t_start_us", "t_end_us", "amplitude", "hysteresis", "bias", "setpoint",
        "sample_time_s", "sampling_delay_s", ...}``; optional ``"loop"`` restricts the rows to
        that loop level too.

    Returns
    -------
    RelayRecord
        ``t_s = time_us * 1e-6``, ``y = measurement``, ``u = output`` (float64) of the rows of
        that axis inside the window, in time order, duplicates of a device time dropped.

    Raises
    ------
    LogbookError
        The analysis input lacks a key or the window holds no rows.
    """
    from agent.analysis.records import RelayRecord

    if not isinstance(analysis_input, dict):
        raise LogbookError("the analysis input must be a dict naming the window and relay "
                           f"parameters, got {type(analysis_input).__name__}.")
    missing = [k for k in ANALYSIS_INPUT_KEYS if k not in analysis_input]
    if missing:
        raise LogbookError(f"the analysis input lacks {missing}; it must name "
                           f"{list(ANALYSIS_INPUT_KEYS)}.")
    mask = window_mask(columns, analysis_input)
    t_us = columns["time_us"][mask]
    if t_us.size == 0:
        ai = analysis_input
        raise LogbookError(
            f"no telemetry rows of axis {ai['axis']} between device times {ai['t_start_us']} us "
            f"and {ai['t_end_us']} us; the record was cut short or the window is wrong.")
    order = np.argsort(t_us, kind="stable")
    t_us = t_us[order]
    keep = np.ones(t_us.size, dtype=bool)
    keep[1:] = np.diff(t_us) > 0  # a sample logged twice (retransmission) counts once
    idx = order[keep]
    t_s = t_us[keep].astype(np.float64) * 1e-6
    y = np.asarray(columns["measurement"][mask][idx], dtype=np.float64)
    u = np.asarray(columns["output"][mask][idx], dtype=np.float64)
    ai = analysis_input
    return RelayRecord(t_s=t_s, y=y, u=u, setpoint=float(ai["setpoint"]),
                       amplitude=float(ai["amplitude"]), hysteresis=float(ai["hysteresis"]),
                       bias=float(ai["bias"]), sample_time_s=float(ai["sample_time_s"]),
                       sampling_delay_s=float(ai["sampling_delay_s"]),
                       integrating=ai.get("integrating"), at_rest=ai.get("at_rest"))
