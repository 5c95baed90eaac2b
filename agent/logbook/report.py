"""A self-contained HTML report of one session: plots (PNG, base64-embedded) and tables.

Plots use matplotlib's object API with the Agg canvas (no pyplot, no global backend state).
"""

from __future__ import annotations

import base64
import html
import io
import json
import math
from pathlib import Path
from typing import Any

import numpy as np

from .format import LogbookError, is_kill
from .reader import ExperimentRecord, SessionRecord, read_session

# Colours picked for contrast and colour-blind safety (Okabe–Ito palette, common practice).
C_MEAS = "#0072B2"
C_SET = "#555555"
C_OUT = "#E69F00"
C_MODEL = "#D55E00"
C_SWITCH = "#009E73"
C_KILL = "#CC0000"
C_WINDOW = "#56B4E9"
CAND_COLOURS = ("#0072B2", "#D55E00", "#009E73", "#CC79A7", "#E69F00", "#56B4E9", "#000000")

_CSS = """
body{font-family:system-ui,-apple-system,'Segoe UI',sans-serif;margin:24px auto;max-width:1180px;
color:#1b1b1b;line-height:1.4;padding:0 16px}
h1{font-size:1.7em;margin-bottom:.2em} h2{border-bottom:2px solid #ddd;padding-bottom:4px;
margin-top:2em} h3{margin-top:1.4em}
table{border-collapse:collapse;margin:.6em 0 1em 0;font-size:.92em}
th,td{border:1px solid #ccc;padding:3px 8px;text-align:left;vertical-align:top}
th{background:#f1f3f5} td.num{text-align:right;font-variant-numeric:tabular-nums}
tr.kill td{background:#fde2e2;color:#8a0000;font-weight:600} tr.changed td{background:#fff4d6}
tr.chosen td{background:#e3f5e8;font-weight:600}
.note{background:#fff8e1;border-left:4px solid #f0b400;padding:6px 12px;margin:.6em 0}
.bad{background:#fde2e2;border-left:4px solid #cc0000;padding:6px 12px;margin:.6em 0}
.ok{background:#e3f5e8;border-left:4px solid #2e7d32;padding:6px 12px;margin:.6em 0}
img{max-width:100%;border:1px solid #ddd;margin:.4em 0}
.caption{color:#555;font-size:.9em;margin-top:-.2em} code{background:#f4f4f4;padding:0 3px}
"""


def _esc(x: Any) -> str:
    return html.escape(str(x))


def _fmt(x: Any) -> str:
    if x is None:
        return "–"
    if isinstance(x, bool):
        return "yes" if x else "no"
    if isinstance(x, float):
        if math.isnan(x):
            return "NaN"
        if math.isinf(x):
            return "∞" if x > 0 else "−∞"
        return f"{x:.5g}"
    if isinstance(x, (list, tuple)):
        if len(x) > 8:
            return f"[{len(x)} values]"
        return ", ".join(_fmt(v) for v in x)
    if isinstance(x, dict):
        return json.dumps(x, default=str)[:200]
    return str(x)


def _table(headers: list[str], rows: list[list[Any]], row_classes: list[str] | None = None) -> str:
    out = ["<table><tr>" + "".join(f"<th>{_esc(h)}</th>" for h in headers) + "</tr>"]
    for i, row in enumerate(rows):
        cls = row_classes[i] if row_classes else ""
        cells = "".join(
            f"<td class='num'>{_esc(_fmt(v))}</td>" if isinstance(v, (int, float))
            and not isinstance(v, bool) else f"<td>{_esc(_fmt(v))}</td>" for v in row)
        out.append(f"<tr class='{cls}'>{cells}</tr>" if cls else f"<tr>{cells}</tr>")
    out.append("</table>")
    return "".join(out)


def _kv_table(d: dict, keys: list[str] | None = None) -> str:
    keys = keys if keys is not None else list(d)
    return _table(["item", "value"], [[k, d.get(k)] for k in keys if k in d])


def _flatten(d: Any, prefix: str = "") -> list[tuple[str, Any]]:
    out = []
    if isinstance(d, dict):
        for k, v in d.items():
            out += _flatten(v, f"{prefix}.{k}" if prefix else str(k))
    else:
        out.append((prefix, d))
    return out


def _png(fig) -> str:
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    FigureCanvasAgg(fig)
    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=100)
    return base64.b64encode(buf.getvalue()).decode("ascii")


def _img(fig, alt: str, caption: str) -> str:
    return (f"<img alt='{_esc(alt)}' src='data:image/png;base64,{_png(fig)}'>"
            f"<div class='caption'>{_esc(caption)}</div>")


def _figure(height_in: float, nrows: int = 1, sharex: bool = True):
    from matplotlib.figure import Figure
    fig = Figure(figsize=(11.0, height_in), layout="constrained")
    axes = fig.subplots(nrows, 1, sharex=sharex, squeeze=False)[:, 0]
    for ax in axes:
        ax.grid(True, alpha=0.35)
        ax.tick_params(labelsize=10)
    return fig, axes


# ---------------------------------------------------------------------------- helpers on data

def _units(meta: dict) -> tuple[str, str]:
    loop = meta.get("loop")
    axis = meta.get("axis")
    if loop == 1:
        return "rad", "output"
    if loop == 2:
        return "m", "output"
    if loop == 0:
        return ("m/s" if axis == 3 else "rad/s"), "output"
    return "", "output"


def _kill_times(sess: SessionRecord, rec: ExperimentRecord, cols: dict) -> list[tuple[float, str]]:
    """Kill events that fall inside this experiment, as device times (us) and labels."""
    t = cols["time_us"]
    if t.size == 0:
        return []
    lo, hi = int(t.min()), int(t.max())
    host = cols["host_time_s"]
    out = []
    for ev in sess.events:
        kind = str(ev.get("kind", ""))
        if not is_kill(kind):
            continue
        dev = ev.get("device_time_us")
        if dev is None and ev.get("host_time_s") is not None and host.size > 1:
            h = float(ev["host_time_s"])
            if host.min() - 0.5 <= h <= host.max() + 0.5:
                order = np.argsort(host)
                dev = float(np.interp(h, host[order], t[order].astype(float)))
        if dev is None or not (lo - 200_000 <= dev <= hi + 200_000):
            continue
        reason = ev.get("reason")
        out.append((float(dev), f"{kind}" + (f" ({reason})" if reason else "")))
    return out


def _mark_kills(axes, kills, t0_us: float) -> None:
    for dev, label in kills:
        x = (dev - t0_us) * 1e-6
        for ax in axes:
            ax.axvline(x, color=C_KILL, lw=2.2, ls="--", zorder=5)
        lo, hi = axes[0].get_xlim()
        right = hi > lo and (x - lo) / (hi - lo) > 0.6
        axes[0].annotate(f"KILL: {label}", xy=(x, 1.0), xycoords=("data", "axes fraction"),
                         xytext=(-6 if right else 6, -16), textcoords="offset points",
                         ha="right" if right else "left", color=C_KILL, fontsize=10,
                         fontweight="bold",
                         bbox=dict(boxstyle="round,pad=0.2", fc="white", ec=C_KILL, alpha=0.9),
                         zorder=6)


def _switch_indices(relay: np.ndarray, u: np.ndarray) -> np.ndarray:
    sig = relay if np.any(relay != 0) else np.sign(u - np.median(u))
    change = np.nonzero((sig[1:] != sig[:-1]) & (sig[1:] != 0))[0] + 1
    return change


# ---------------------------------------------------------------------------- plots

def _plot_relay(rec: ExperimentRecord, cols: dict, ai: dict | None, kills, units) -> str:
    t_us = cols["time_us"].astype(float)
    t0 = t_us[0]
    t = (t_us - t0) * 1e-6
    y, u, sp = cols["measurement"], cols["output"], cols["setpoint"]
    sw = _switch_indices(cols["relay"], u)
    from matplotlib.figure import Figure
    fig = Figure(figsize=(11.0, 8.4), layout="constrained")
    gs = fig.add_gridspec(3, 1, height_ratios=[1.25, 0.8, 1.5])
    ax1 = fig.add_subplot(gs[0])
    ax2 = fig.add_subplot(gs[1], sharex=ax1)
    ax3 = fig.add_subplot(gs[2])
    for ax in (ax1, ax2, ax3):
        ax.grid(True, alpha=0.35)
        ax.tick_params(labelsize=10)
    ax1.plot(t, y, color=C_MEAS, lw=1.0, label="measurement")
    ax1.plot(t, sp, color=C_SET, lw=1.0, ls=":", label="setpoint")
    ax2.step(t, u, where="post", color=C_OUT, lw=1.0, label="relay output")
    if ai:
        a = (float(ai["t_start_us"]) - t0) * 1e-6
        b = (float(ai["t_end_us"]) - t0) * 1e-6
        for ax in (ax1, ax2):
            ax.axvspan(a, b, color=C_WINDOW, alpha=0.15, lw=0)
        ax1.fill_between([], [], color=C_WINDOW, alpha=0.3, label="analysed window")
    else:
        a, b = float(t[0]), float(t[-1])
    _mark_kills([ax1, ax2], kills, t0)
    ax1.set_ylabel(f"measurement [{units[0]}]", fontsize=11)
    ax2.set_ylabel("relay output", fontsize=11)
    ax2.set_xlabel("time since the experiment's first sample [s]", fontsize=11)
    ax1.set_title(f"{rec.exp_id}: relay oscillation (whole record)", fontsize=13)
    ax1.legend(loc="upper left", fontsize=10, ncol=3, framealpha=0.9)
    # zoom: the last few periods of the analysed window (or before the kill)
    end = b
    if kills:
        end = min(end, (kills[0][0] - t0) * 1e-6)
    sw_t = t[sw]
    sw_in = sw_t[(sw_t >= a) & (sw_t <= end)]
    period = float(np.median(np.diff(sw_in))) * 2 if sw_in.size > 2 else (end - a) / 4
    start = max(a, end - 5 * period) if period > 0 else a
    z = (t >= start) & (t <= end)
    ax3.plot(t[z], y[z], color=C_MEAS, lw=1.6, label="measurement")
    ax3.plot(t[z], sp[z], color=C_SET, lw=1.0, ls=":")
    swz = sw[(t[sw] >= start) & (t[sw] <= end)]
    ax3.plot(t[swz], y[swz], "o", ms=7, color=C_SWITCH, label="relay switch", zorder=4)
    ax3b = ax3.twinx()
    ax3b.step(t[z], u[z], where="post", color=C_OUT, lw=1.3, alpha=0.8, label="relay output")
    ax3b.set_ylabel("relay output", fontsize=11, color=C_OUT)
    ax3.set_ylabel(f"measurement [{units[0]}]", fontsize=11, color=C_MEAS)
    ax3.set_xlabel("time since the experiment's first sample [s]", fontsize=11)
    what = "before the kill" if kills else ("analysed" if ai else "recorded")
    ax3.set_title(f"zoom: the last periods {what}, with the switching points", fontsize=12)
    h1, l1 = ax3.get_legend_handles_labels()
    h2, l2 = ax3b.get_legend_handles_labels()
    ax3.legend(h1 + h2, l1 + l2, loc="upper left", fontsize=10, ncol=3, framealpha=0.9)
    return _img(fig, "relay oscillation",
                "Top: measurement and setpoint over the whole record; middle: the relay output; "
                "shaded: the window the analysis used; red dashed lines: kills. Bottom: a zoom on "
                "the last periods analysed, green dots where the relay switched.")


def _model_over_data(ident, cols: dict, ai: dict) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Simulate the identified model on the recorded relay output from the experiment's first
    sample (the stand at rest), offset (and drift for an integrating model) matched to the
    measurement over the analysed window by least squares; returns the window."""
    from agent.analysis.lti import lsim_zoh
    model = ident.model
    t = cols["time_us"].astype(float) * 1e-6
    y, u = cols["measurement"], cols["output"]
    dt = float(ai["sample_time_s"])
    resp = lsim_zoh(model.tf(), dt, u - u[0], u_before=0.0)
    win = (cols["time_us"] >= int(ai["t_start_us"])) & (cols["time_us"] <= int(ai["t_end_us"]))
    tw = t[win] - t[win][0]
    cols_ls = [np.ones(int(win.sum()))]
    if model.integrating:
        cols_ls.append(tw)
    X = np.column_stack(cols_ls)
    coef, *_ = np.linalg.lstsq(X, y[win] - resp[win], rcond=None)
    return tw, y[win], resp[win] + X @ coef


def _plot_model(rec, ident, cols, ai, units) -> str:
    t, y, ym = _model_over_data(ident, cols, ai)
    period = float(ident.cycles.period_s)
    shown = ""
    if np.isfinite(period) and period > 0 and t[-1] > 10 * period:
        keep = t >= t[-1] - 8 * period
        t, y, ym = t[keep], y[keep], ym[keep]
        shown = " The last 8 periods are shown."
    fig, (ax,) = _figure(3.8)
    ax.plot(t, y, color=C_MEAS, lw=1.3, label="measured")
    ax.plot(t, ym, color=C_MODEL, lw=1.5, ls="--", label=f"fitted model ({ident.model.kind})")
    ax.set_xlabel("time in the analysed window [s]", fontsize=11)
    ax.set_ylabel(f"measurement [{units[0]}]", fontsize=11)
    p = ", ".join(f"{k}={v:.4g}" for k, v in ident.model.params.items())
    ax.set_title(f"{rec.exp_id}: fitted model over the data — {ident.model.kind}: {p}",
                 fontsize=12)
    ax.legend(loc="upper left", fontsize=10)
    rel = getattr(ident.model, "rel_rmse", float("nan"))
    return _img(fig, "fitted model", "The identified model driven by the recorded relay output "
                "from the start of the experiment (offset matched), over the measurement. "
                f"Fit residual {rel:.1%} of the oscillation amplitude." + shown)


def _plot_candidates(rec, tuning, chosen_rule) -> str:
    cands = list(getattr(tuning, "candidates", []) or [])
    fig, (ax1, ax2) = _figure(6.0, 2, sharex=False)
    for i, c in enumerate(cands):
        pred = getattr(c, "predicted", None)
        if pred is None:
            continue
        col = CAND_COLOURS[i % len(CAND_COLOURS)]
        is_chosen = chosen_rule is not None and c.rule == chosen_rule
        lw = 2.6 if is_chosen else 1.3
        label = f"{c.rule} (Ms {c.ms:.2f})" + ("  ← chosen" if is_chosen else "")
        ax1.plot(pred.t_s, pred.y_setpoint, color=col, lw=lw, label=label)
        if getattr(pred, "y_load", None) is not None:
            ax2.plot(pred.t_s, pred.y_load, color=col, lw=lw, label=label)
    settle = [float(c.predicted.settling_s) for c in cands
              if getattr(c, "predicted", None) is not None
              and np.isfinite(getattr(c.predicted, "settling_s", np.nan))]
    t_end = max((float(c.predicted.t_s[-1]) for c in cands
                 if getattr(c, "predicted", None) is not None), default=0.0)
    if settle and t_end > 0:
        right = min(t_end, 1.6 * max(settle))
        ax1.set_xlim(0.0, right)
        ax2.set_xlim(0.0, right)
    ax1.axhline(1.0, color=C_SET, lw=1.0, ls=":")
    ax1.set_title(f"{rec.exp_id}: predicted responses of the candidate gains", fontsize=13)
    ax1.set_ylabel("response to a unit setpoint step", fontsize=11)
    ax2.set_ylabel("response to a unit load step", fontsize=11)
    ax2.set_xlabel("time after the step [s]", fontsize=11)
    ax1.legend(loc="lower right", fontsize=10)
    ax2.legend(loc="upper right", fontsize=10)
    return _img(fig, "candidate predictions", "Each candidate's closed loop on the identified "
                "model: setpoint step (top) and load step at the plant input (bottom). "
                "Thick line: the gains that were chosen.")


def _plot_step(rec: ExperimentRecord, cols: dict, kills, units, predicted: dict | None) -> str:
    t_us = cols["time_us"].astype(float)
    t0 = t_us[0]
    t = (t_us - t0) * 1e-6
    step_at = float(rec.meta.get("step_at_s") or 0.0)
    fig, (ax1, ax2) = _figure(5.6, 2)
    ax1.plot(t, cols["measurement"], color=C_MEAS, lw=1.4, label="measured")
    ax1.plot(t, cols["setpoint"], color=C_SET, lw=1.0, ls=":", label="setpoint")
    if predicted and predicted.get("t_s") is not None and predicted.get("y") is not None:
        pt = np.asarray(predicted["t_s"], dtype=float) + float(predicted.get("t_offset_s",
                                                                             step_at))
        ax1.plot(pt, np.asarray(predicted["y"], dtype=float), color=C_MODEL, lw=1.6, ls="--",
                 label="predicted")
    ax2.plot(t, cols["output"], color=C_OUT, lw=1.2, label="controller output")
    _mark_kills([ax1, ax2], kills, t0)
    ax1.set_ylabel(f"measurement [{units[0]}]", fontsize=11)
    ax2.set_ylabel("controller output", fontsize=11)
    ax2.set_xlabel("time since the experiment's first sample [s]", fontsize=11)
    ax1.set_title(f"{rec.exp_id}: verification step, measured against predicted", fontsize=13)
    ax1.legend(loc="lower right", fontsize=10)
    return _img(fig, "verification step", "The step test with the new gains: measurement, "
                "setpoint and (dashed) the response the model predicted. Red dashed: kills.")


def _plot_trace(rec, cols, kills, units) -> str:
    t_us = cols["time_us"].astype(float)
    t0 = t_us[0]
    t = (t_us - t0) * 1e-6
    fig, (ax1, ax2) = _figure(4.6, 2)
    ax1.plot(t, cols["measurement"], color=C_MEAS, lw=1.2, label="measurement")
    ax1.plot(t, cols["setpoint"], color=C_SET, lw=1.0, ls=":", label="setpoint")
    ax2.plot(t, cols["output"], color=C_OUT, lw=1.2)
    _mark_kills([ax1, ax2], kills, t0)
    ax1.set_ylabel(f"measurement [{units[0]}]", fontsize=11)
    ax2.set_ylabel("controller output", fontsize=11)
    ax2.set_xlabel("time since the experiment's first sample [s]", fontsize=11)
    ax1.set_title(f"{rec.exp_id}: {rec.meta.get('kind', 'experiment')} record", fontsize=13)
    ax1.legend(loc="upper right", fontsize=10)
    return _img(fig, "trace", "Measurement, setpoint and controller output. Red dashed: kills.")


# ---------------------------------------------------------------------------- sections

def _experiment_axis_columns(rec: ExperimentRecord) -> dict | None:
    axis = rec.meta.get("axis")
    if axis is None and rec.result and isinstance(rec.result.get("analysis_input"), dict):
        axis = rec.result["analysis_input"].get("axis")
    if axis is None:
        if rec.recovered_rows == 0:
            return None
        axis = int(rec.columns["axis"][0])
    cols = rec.axis(int(axis))
    if rec.meta.get("loop") is not None and cols["loop"].size:
        sel = cols["loop"] == int(rec.meta["loop"])
        if sel.any():
            cols = {k: v[sel] for k, v in cols.items()}
    return cols if cols["time_us"].size else None


def _relay_section(sess, rec, cols, kills, units, reanalysis) -> list[str]:
    parts = []
    result = rec.result or {}
    ai = result.get("analysis_input") if isinstance(result.get("analysis_input"), dict) else None
    parts.append(_plot_relay(rec, cols, ai, kills, units))
    re_an, record, ident, tuning = reanalysis
    problem = None
    if ai is None:
        problem = ("no analysis input was logged (the experiment did not finish or was not "
                   "analysed)")
    elif ident is None or tuning is None:
        problem = re_an.message
    if ident is not None:
        try:
            parts.append(_plot_model(rec, ident, cols, ai, units))
        except Exception as exc:  # a plot must not sink the report; say why
            parts.append(f"<div class='note'>Model plot unavailable: {_esc(exc)}</div>")
    chosen = result.get("chosen") if isinstance(result.get("chosen"), dict) else None
    chosen_rule = chosen.get("rule") if chosen else None
    if tuning is not None:
        parts.append(_plot_candidates(rec, tuning, chosen_rule))
    if problem:
        parts.append(f"<div class='note'>Re-analysis for the plots: {_esc(problem)}</div>")
    # tables from what was logged
    li = result.get("identification")
    if isinstance(li, dict):
        parts.append("<h4>Identification (as logged)</h4>")
        rows = []
        for key in ("best", "best_plant"):
            b = li.get(key)
            if isinstance(b, dict):
                rows.append([f"ultimate point ({key})", b.get("ku"), b.get("tu_s"),
                             b.get("method"), b.get("basis")])
        for name, b in (li.get("ultimate") or {}).items():
            if isinstance(b, dict):
                rows.append([f"loop: {name}", b.get("ku"), b.get("tu_s"), b.get("method"),
                             b.get("basis")])
        if rows:
            parts.append(_table(["estimate", "Ku", "Tu [s]", "method", "basis"], rows))
        scalars = [(k, v) for k, v in _flatten({k: li[k] for k in
                                                ("model", "cycles", "bias_estimate",
                                                 "static_gain", "noise_std") if k in li})
                   if not isinstance(v, list)]
        parts.append(_table(["quantity", "value"], [[k, v] for k, v in scalars]))
        for w in li.get("warnings") or []:
            parts.append(f"<div class='note'>{_esc(w)}</div>")
    lt = result.get("tuning")
    if isinstance(lt, dict) and isinstance(lt.get("candidates"), list):
        parts.append("<h4>Candidate gains (as logged)</h4>")
        keys = ("rule", "kp", "ki", "kd", "tf_s", "b", "ms", "gm", "pm_deg", "output_noise")
        rows, classes = [], []
        for c in lt["candidates"]:
            if isinstance(c, dict):
                rows.append([c.get(k) for k in keys])
                classes.append("chosen" if chosen_rule and c.get("rule") == chosen_rule else "")
        parts.append(_table(["rule", "Kp", "Ki", "Kd", "Tf [s]", "b", "Ms", "GM", "PM [°]",
                             "noise in u"],
                            rows, classes))
        if lt.get("recommended") is not None:
            parts.append(f"<p>Recommended: <b>{_esc(_fmt(lt.get('recommended')))}</b></p>")
    if chosen:
        parts.append("<h4>Chosen gains</h4>" + _kv_table(chosen))
    ver = result.get("verification")
    if isinstance(ver, dict):
        parts.append("<h4>Verification</h4>")
        metrics = ver.get("metrics") if isinstance(ver.get("metrics"), dict) else ver
        parts.append(_table(["metric", "value"],
                            [[k, v] for k, v in _flatten(metrics) if not isinstance(v, list)]))
    return parts


def _reanalysis_html(done: dict) -> str:
    rows, classes = [], []
    for exp_id, (r, *_rest) in done.items():
        rows.append([exp_id, r.status, r.message
                     + ("; " + "; ".join(r.differences[:5]) if r.differences else "")])
        classes.append("kill" if r.status in ("differs", "error") else "")
    return _table(["experiment", "status", "detail"], rows, classes) if rows else ""


def _reanalyze(rec: ExperimentRecord):
    from .offline import Reanalysis, reanalyze_with_objects
    try:
        return reanalyze_with_objects(rec)
    except ImportError as exc:  # the analysis package is missing or broken
        return Reanalysis(rec.exp_id, "error", f"analysis unavailable: {exc}"), None, None, None


def _session_header(sess: SessionRecord) -> list[str]:
    m = sess.manifest
    dev = m.get("device") if isinstance(m.get("device"), dict) else {"device": m.get("device")}
    kills = [e for e in sess.events if is_kill(e.get("kind", ""))]
    parts = [f"<h1>tetherloop session {_esc(sess.name)}</h1>"]
    outcome = m.get("outcome") or "not closed (the program stopped or is still running)"
    cls = "bad" if kills or not m.get("outcome") else "ok"
    parts.append(f"<div class='{cls}'>Outcome: <b>{_esc(outcome)}</b> — "
                 f"{len(sess.experiments)} experiment(s), {len(kills)} kill event(s).</div>")
    summary = {
        "device": dev.get("device_id"), "firmware": dev.get("firmware_version"),
        "started (UTC)": m.get("started_at"), "ended (UTC)": m.get("ended_at"),
        "tool version": m.get("tool_version"), "protocol version": m.get("protocol_version"),
        "log format": m.get("format_version"), "host": (m.get("host") or {}).get("hostname"),
    }
    parts.append(_kv_table(summary))
    if sess.notes:
        parts.append("<h3>Recovery notes</h3>" + "".join(
            f"<div class='note'>{_esc(n)}</div>" for n in sess.notes))
    if dev:
        parts.append("<h3>Device</h3>" + _table(["item", "value"], _flatten(dev)))
    if m.get("plan"):
        parts.append("<h3>Operator's plan and limits</h3>"
                     + _table(["item", "value"], _flatten(m["plan"])))
    if m.get("confirmations"):
        parts.append("<h3>Confirmations</h3>"
                     + _table(["item", "value"], _flatten(m["confirmations"])))
    before = m.get("settings_before") or {}
    after = m.get("settings_after") or {}
    if before or after:
        def flat(s):
            return dict(_flatten(s)) if isinstance(s, dict) else {}
        fb, fa = flat(before), flat(after)
        names = list(fb) + [k for k in fa if k not in fb]
        rows, classes = [], []
        for k in names:
            b, a = fb.get(k), fa.get(k) if after else None
            changed = bool(after) and k in fa and b != a
            rows.append([k, b, a if after else "(not recorded)", "changed" if changed else ""])
            classes.append("changed" if changed else "")
        parts.append("<h3>Settings before and after</h3>"
                     + _table(["setting", "before", "after", ""], rows, classes))
    if sess.events:
        t0 = m.get("started_host_time_s") or sess.events[0].get("host_time_s") or 0.0
        rows, classes = [], []
        for ev in sess.events:
            kind = str(ev.get("kind", ""))
            extra = {k: v for k, v in ev.items()
                     if k not in ("seq", "kind", "host_time_s", "device_time_us")}
            h = ev.get("host_time_s")
            rows.append([round(float(h) - float(t0), 3) if h is not None else None,
                         ev.get("device_time_us"), kind,
                         ", ".join(f"{k}={_fmt(v)}" for k, v in extra.items())])
            classes.append("kill" if is_kill(kind) else "")
        parts.append("<h3>Events</h3>"
                     + _table(["host time [s]", "device time [us]", "kind", "details"], rows,
                              classes))
    return parts


def render_html(sess: SessionRecord) -> str:
    parts = _session_header(sess)
    done = {}
    for rec in sess.experiments.values():
        done[rec.exp_id] = _reanalyze(rec)
        meta = rec.meta or {}
        kind = meta.get("kind") or "unknown"
        parts.append(f"<h2>Experiment {_esc(rec.exp_id)} — {_esc(kind)}, "
                     f"{_esc(meta.get('axis_name', '?'))} {_esc(meta.get('loop_name', ''))}</h2>")
        parts.append(_kv_table({k: v for k, v in meta.items() if not isinstance(v, (dict,
                                                                                      list))}))
        parts.append(f"<p>{rec.recovered_rows} telemetry rows.</p>")
        for n in rec.notes:
            parts.append(f"<div class='note'>{_esc(n)}</div>")
        cols = _experiment_axis_columns(rec)
        if cols is None:
            parts.append("<div class='note'>No telemetry for this experiment's axis.</div>")
            continue
        units = _units(meta)
        kills = _kill_times(sess, rec, cols)
        try:
            if kind == "relay":
                parts += _relay_section(sess, rec, cols, kills, units, done[rec.exp_id])
            elif kind == "step":
                res = rec.result or {}
                ver = res.get("verification") if isinstance(res.get("verification"), dict) \
                    else res
                pred = ver.get("predicted") if isinstance(ver.get("predicted"), dict) else None
                parts.append(_plot_step(rec, cols, kills, units, pred))
                metrics = ver.get("metrics") if isinstance(ver.get("metrics"), dict) else None
                if metrics:
                    parts.append("<h4>Verification metrics</h4>" + _table(
                        ["metric", "value"], [[k, v] for k, v in _flatten(metrics)
                                              if not isinstance(v, list)]))
            else:
                parts.append(_plot_trace(rec, cols, kills, units))
        except Exception as exc:  # keep the rest of the report; say what failed
            parts.append(f"<div class='bad'>Plot failed: {_esc(type(exc).__name__)}: "
                         f"{_esc(exc)}</div>")
    if sess.experiments:
        parts.append("<h2>Re-analysis with the current code</h2>" + _reanalysis_html(done))
    body = "\n".join(parts)
    return (f"<!DOCTYPE html><html lang='en'><head><meta charset='utf-8'>"
            f"<title>tetherloop session {_esc(sess.name)}</title><style>{_CSS}</style></head>"
            f"<body>{body}</body></html>\n")


def report_session(path: Path | str, out_html: Path | str) -> Path:
    """Render the session at ``path`` to one self-contained HTML file and return its path."""
    sess = read_session(path)
    text = render_html(sess)
    out = Path(out_html)
    try:
        out.parent.mkdir(parents=True, exist_ok=True)
        tmp = out.with_name(f".{out.name}.tmp")
        tmp.write_text(text, encoding="utf-8")
        tmp.replace(out)
    except OSError as exc:
        raise LogbookError(f"cannot write the report {out}: {exc.strerror or exc}; choose "
                           "another file with --out.") from None
    return out
