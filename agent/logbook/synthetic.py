"""An invented demo session written through the real logbook writer.

Everything here is made up for demos, tests and benchmarks: the board, its firmware, the plant
(a first-order-plus-dead-time roll-rate loop simulated exactly by
:func:`agent.analysis.simulate_relay`) and the verification step (the chosen candidate's
predicted response plus noise). No real stand was involved. The online half of the relay
workflow is imitated faithfully: the record is analysed from the same columns the logbook keeps,
through :func:`relay_record_from_rows`, so an offline re-analysis must reproduce it.
"""

from __future__ import annotations

import time
from pathlib import Path

import numpy as np

from protocol.messages import AxisSample, Telemetry

from .records import columns_from_telemetry, relay_record_from_rows, tune_kwargs
from .writer import Logbook, SessionLog

DEMO_DEVICE = {"device_id": "demo-board-01", "firmware_version": "demo-fw 0.0 (invented)",
               "protocol": "1.0", "loop_rate_hz": 500, "stand": "invented gimbal stand"}
DEMO_PLANT = {"K": 6.0, "T": 0.12, "L": 0.008}  # invented roll-rate loop (rad/s per unit output)
DT = 0.002
T0_US = 5_000_000


def _f32(x) -> float:
    return float(np.float32(x))


def _telemetry(k: int, t_us: int, tag: int, main: AxisSample, state: int, rng) -> Telemetry:
    idle = AxisSample(0 if main.axis == 1 else 1, 0, 0.0, _f32(rng.normal(0, 0.003)),
                      _f32(0.001 * rng.normal()), 0)
    return Telemetry(time_us=t_us, counter=k, state=state, tag=tag, axes=(main, idle))


def _relay_samples(rec, axis: int, tag: int, k0: int, t0_us: int, rng,
                   n: int | None = None) -> list[tuple[float, Telemetry]]:
    out = []
    n = len(rec.t_s) if n is None else n
    for i in range(n):
        u = rec.u[i]
        relay = 1 if u > rec.bias else -1
        main = AxisSample(axis, 0, _f32(rec.setpoint), _f32(rec.y[i]), _f32(u), relay)
        t_us = t0_us + int(round(i * DT * 1e6))
        out.append((time.time(), _telemetry(k0 + i, t_us, tag, main, 2, rng)))
    return out


def write_demo_session(log_dir: Path | str, name: str | None = None, seed: int = 0,
                       with_kill: bool = True, duration_s: float = 2.4) -> Path:
    """Write an invented session (relay on roll rate, verification step, and optionally a
    killed pitch experiment) and return its folder."""
    from agent import __version__
    from agent.analysis import identify, simulate_relay, step_metrics, tune

    rng = np.random.default_rng(seed)
    book = Logbook(log_dir, min_free_bytes=0)
    before = {"roll.rate.kp": 0.02, "roll.rate.ki": 0.0, "roll.rate.kd": 0.0,
              "pitch.rate.kp": 0.02, "kill.rate_rad_s": 8.0}
    s: SessionLog = book.open_session(
        device=DEMO_DEVICE, settings_before=before, tool_version=__version__,
        protocol_version="1.0", name=name,
        plan={"note": "invented demo session", "steps": ["roll.rate relay", "verify step",
                                                         "pitch.rate relay"],
              "limits": {"kill_rate_rad_s": 8.0, "relay_amplitude_max": 0.15},
              "controller": "pi", "ms_target": 1.4},
        confirmations={"propellers_off_or_guarded": True, "stand_secured": True,
                       "people_clear": True, "kill_within_reach": True})
    s.event("armed", device_time_us=T0_US - 100_000)

    # --- relay on roll rate -------------------------------------------------------------------
    amp, hyst = 0.08, 0.02
    meta = {"kind": "relay", "axis": 0, "loop": 0, "axis_name": "roll", "loop_name": "rate",
            "sample_time_s": DT, "sampling_delay_s": DT / 2, "amplitude": amp,
            "hysteresis": hyst, "bias": 0.0, "setpoint": 0.0, "tag": 1,
            "invented": True}
    e = s.experiment("e01-roll-rate-relay", meta)
    sim = simulate_relay([DEMO_PLANT["K"]], [DEMO_PLANT["T"], 1.0], DEMO_PLANT["L"], amp, hyst,
                         0.0, DT, duration_s, noise_std=0.004, seed=seed)
    s.event("experiment_started", device_time_us=T0_US, tag=1,
            source="device")
    samples = _relay_samples(sim, 0, 1, 0, T0_US, rng)
    for h, t in samples:
        e.append(h, t)
    t_end_us = samples[-1][1].time_us
    s.event("experiment_finished", device_time_us=t_end_us, tag=1,
            reason="stopped", source="device")
    ai = {"axis": 0, "loop": 0, "t_start_us": T0_US + int(0.6e6), "t_end_us": t_end_us,
          "amplitude": amp, "hysteresis": hyst, "bias": 0.0, "setpoint": 0.0,
          "sample_time_s": DT, "sampling_delay_s": DT / 2, "controller": "pi",
          "ms_target": 1.4}
    cols = columns_from_telemetry(samples)  # what the online workflow analyses
    ident = identify(relay_record_from_rows(cols, ai))
    tuning = tune(ident, **tune_kwargs(ai))
    cand = tuning.recommended_candidate
    chosen = {"rule": cand.rule, "kp": cand.kp, "ki": cand.ki, "kd": cand.kd, "tf_s": cand.tf_s,
              "b": cand.b, "settings": {"roll.rate.kp": cand.kp, "roll.rate.ki": cand.ki,
                                        "roll.rate.kd": cand.kd}}

    # --- verification step (invented: the predicted response plus noise) ---------------------
    step_amp, step_at = 0.5, 0.2
    pred = cand.predicted
    horizon = float(min(pred.t_s[-1], 1.5))
    n = int((step_at + horizon) / DT)
    t = np.arange(n) * DT
    y_pred = np.interp(t - step_at, pred.t_s, pred.y_setpoint, left=0.0) * step_amp
    y_pred[t < step_at] = 0.0
    y_meas = y_pred + rng.normal(0, 0.004, n)
    sp = np.where(t >= step_at, step_amp, 0.0)
    u = cand.kp * (cand.b * sp - y_meas)  # indicative output trace for the plot
    e2 = s.experiment("e02-roll-rate-step", {
        "kind": "step", "axis": 0, "loop": 0, "axis_name": "roll", "loop_name": "rate",
        "amplitude": step_amp, "step_at_s": step_at, "setpoint": 0.0, "sample_time_s": DT,
        "gains": chosen, "invented": True})
    t0 = t_end_us + 2_000_000
    k0 = len(samples)
    for i in range(n):
        main = AxisSample(0, 0, _f32(sp[i]), _f32(y_meas[i]), _f32(u[i]), 0)
        e2.append(time.time(), _telemetry(k0 + i, t0 + int(round(i * DT * 1e6)), 2, main, 2,
                                            rng))
    after = t >= step_at
    measured = step_metrics(t[after] - step_at, y_meas[after], 0.0, step_amp).to_dict()
    verification = {"exp_id": "e02-roll-rate-step", "metrics": measured,
                    "predicted_metrics": {"overshoot": pred.overshoot, "rise_s": pred.rise_s,
                                          "settling_s": pred.settling_s},
                    "predicted": {"t_s": [float(x) for x in pred.t_s],
                                  "y": [float(x) * step_amp for x in pred.y_setpoint],
                                  "t_offset_s": step_at}}
    e2.result({"verification": verification})
    e2.close()
    e.result({"analysis_input": ai, "identification": ident.to_dict(),
              "tuning": tuning.to_dict(), "chosen": chosen, "verification": verification})
    e.close()

    # --- a pitch relay that trips the device's rate kill --------------------------------------
    if with_kill:
        amp3 = 0.15
        e3 = s.experiment("e03-pitch-rate-relay", {
            "kind": "relay", "axis": 1, "loop": 0, "axis_name": "pitch", "loop_name": "rate",
            "sample_time_s": DT, "sampling_delay_s": DT / 2, "amplitude": amp3,
            "hysteresis": hyst, "bias": 0.0, "setpoint": 0.0, "tag": 3, "invented": True})
        sim3 = simulate_relay([DEMO_PLANT["K"] * 1.6], [DEMO_PLANT["T"], 1.0], DEMO_PLANT["L"],
                              amp3, hyst, 0.0, DT, 1.2, noise_std=0.004, seed=seed + 1)
        t3 = t0 + n * 2000 + 2_000_000
        kill_i = int(0.9 / DT)
        samp3 = _relay_samples(sim3, 1, 3, k0 + n, t3, rng, n=kill_i)
        for h, tt in samp3:
            e3.append(h, tt)
        kill_us = samp3[-1][1].time_us + 2000
        s.event("kill_tripped", device_time_us=kill_us,
                source="device", reason="rate_limit", axis=1,
                value=_f32(abs(sim3.y[kill_i]) + 7.0), threshold=8.0, tag=3,
                text="invented demo: pitch rate beyond the kill threshold")
        s.event("experiment_finished", device_time_us=kill_us,
                tag=3, reason="killed", source="device")
        e3.result({"aborted": "killed by the device (rate limit)"})
        e3.close()
        s.event("kill_cleared", device_time_us=kill_us + 3_000_000)
    s.update_manifest(settings_after={**before, **chosen["settings"]})
    s.close("killed during pitch.rate (demo)" if with_kill else "completed")
    return s.path
