"""Benchmark of the mock board: accelerated speed and real-time tick jitter.

    python tests/bench/mock.py [--json] [--seconds S] [--realtime-seconds S]

Figures (goals from the mock's issue: >= 100x real time accelerated for one axis at 1 kHz;
99th-percentile tick lateness < 1 ms in real time):

* ``speed_x_one_axis``: simulated seconds per wall second, single-axis stand (roll, 1 kHz), board
  ARMED with a relay running on roll.rate and the angle loop idle, ``Firmware.tick`` called
  directly (no link);
* ``speed_x_one_axis_runner``: the same through ``start_mock(speed="max")`` with the in-process
  link served between batches and telemetry at 100 Hz;
* ``speed_x_three_axes``: gimbal-quad (three axes, cascades closed), ticks called directly;
* ``jitter_*_ms``: lateness of each real-time tick against its deadline (median, p99, max),
  pty link, nobody talking;
* ``platform_sleep_*_ms``: the same statistics for a bare Python loop sleeping to 1 ms deadlines
  on this machine at the same time, the floor any Python real-time loop here can reach.

Speed figures are printed, never asserted (tests/ never time anything).
"""

from __future__ import annotations

import argparse
import json
import os
import sys
import time

import numpy as np

sys.path.insert(0, os.path.join(os.path.dirname(__file__), "..", ".."))

from mock_device.firmware import Firmware  # noqa: E402
from mock_device.runner import start_mock  # noqa: E402
from protocol import messages as M  # noqa: E402


def _armed_relay(fw: Firmware, axis=M.Axis.ROLL) -> None:
    fw.arm_now()
    fw.start_experiment(M.ExperimentStart(tag=1, kind=M.ExperimentKind.RELAY, axis=axis,
                                          loop=M.Loop.RATE, amplitude=0.05, duration_s=1e6,
                                          kill_rate_rad_s=50, kill_angle_rad=3,
                                          kill_saturation_s=30))


def speed_direct(scenario: str, seconds: float) -> float:
    fw = Firmware(scenario, seed=1)
    _armed_relay(fw)
    n = int(seconds * fw.loop_rate_hz)
    tick = fw.tick
    t0 = time.perf_counter()
    for _ in range(n):
        tick(0.0)
    wall = time.perf_counter() - t0
    assert fw.state == M.DeviceState.RUNNING, "benchmark run was killed"
    return n * fw.ts / wall


def speed_runner(scenario: str, seconds: float) -> float:
    with start_mock(scenario, transport="inproc", speed="max", seed=1) as h:
        fw = h.firmware
        fw.configure_telemetry(100)
        t0 = time.perf_counter()
        d0 = fw.device_time_s
        time.sleep(seconds)
        wall = time.perf_counter() - t0
        return (fw.device_time_s - d0) / wall


def jitter_realtime(seconds: float) -> dict:
    with start_mock("single-axis", transport="pty", speed="realtime", seed=1) as h:
        time.sleep(seconds)
        j = h.jitter_s[1:] * 1e3
    return {"median": float(np.median(j)), "p99": float(np.percentile(j, 99)),
            "max": float(np.max(j)), "ticks": int(j.size)}


def platform_sleep(seconds: float) -> dict:
    pc = time.perf_counter
    t0 = pc()
    n = int(seconds * 1000)
    late = np.empty(n)
    for k in range(n):
        deadline = t0 + (k + 1) * 0.001
        w = deadline - pc()
        if w > 0:
            time.sleep(w)
        late[k] = pc() - deadline
    late *= 1e3
    return {"median": float(np.median(late)), "p99": float(np.percentile(late, 99)),
            "max": float(np.max(late))}


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--json", action="store_true", help="print one JSON object")
    ap.add_argument("--seconds", type=float, default=20.0,
                    help="simulated seconds per accelerated figure (default 20)")
    ap.add_argument("--realtime-seconds", type=float, default=5.0,
                    help="wall seconds of the real-time jitter run (default 5)")
    args = ap.parse_args(argv)
    res = {
        "speed_x_one_axis": speed_direct("single-axis", args.seconds),
        "speed_x_one_axis_runner": speed_runner("single-axis", min(args.seconds / 10, 3.0)),
        "speed_x_three_axes": speed_direct("gimbal-quad", args.seconds / 2),
    }
    jit = jitter_realtime(args.realtime_seconds)
    base = platform_sleep(min(args.realtime_seconds, 3.0))
    for k, v in jit.items():
        res[f"jitter_{k}_ms" if k != "ticks" else "jitter_ticks"] = v
    for k, v in base.items():
        res[f"platform_sleep_{k}_ms"] = v
    res["cpu_count"] = os.cpu_count()
    res["load_average_1min"] = os.getloadavg()[0]
    if args.json:
        print(json.dumps(res, indent=2))
    else:
        print(f"accelerated, one axis (direct ticks):     {res['speed_x_one_axis']:8.0f} x real time"
              f"   (goal >= 100)")
        print(f"accelerated, one axis (runner, inproc):   {res['speed_x_one_axis_runner']:8.0f} x")
        print(f"accelerated, three axes (direct ticks):   {res['speed_x_three_axes']:8.0f} x")
        print(f"real-time tick lateness: median {res['jitter_median_ms']:.3f} ms, "
              f"p99 {res['jitter_p99_ms']:.3f} ms, max {res['jitter_max_ms']:.3f} ms "
              f"over {res['jitter_ticks']} ticks   (goal p99 < 1 ms)")
        print(f"platform floor (bare sleep loop): median {res['platform_sleep_median_ms']:.3f} ms,"
              f" p99 {res['platform_sleep_p99_ms']:.3f} ms, max "
              f"{res['platform_sleep_max_ms']:.3f} ms")
        print(f"machine: {res['cpu_count']} cpus, load average {res['load_average_1min']:.2f}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
