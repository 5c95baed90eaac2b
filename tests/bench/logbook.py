"""Benchmark: logbook write speed, CPU cost at 2 kHz four-axis telemetry, and bytes on disk.

Figures only, no pass/fail: ``python tests/bench/logbook.py [--json] [--seconds S] [--dir D]``.

1. ``burst``: appends pre-built four-axis samples as fast as possible through the shipped policy
   (``Logbook()`` defaults: write every 800 rows or 100 ms, fsync every 1 s and at close) and
   reports samples/s and CPU microseconds per sample (process CPU time, the flusher thread
   included).
2. ``paced``: appends at 2,000 samples/s of wall time for ``--seconds`` and reports the process
   CPU time per second of telemetry, minus the CPU time of the same pacing loop without the
   logbook (the cost of the logbook itself, in % of one core).
3. ``disk``: bytes per sample (four axes) and per row of the telemetry file.
4. ``binary_twin``: what a compact binary twin (one 38-byte packed record per row, f32 values)
   would add if written beside the CSV, so the choice of CSV alone can be judged.

Telemetry values are noisy floats (every digit of '%.9g' used), the worst case for CSV size.
"""

from __future__ import annotations

import argparse
import json
import os
import platform
import struct
import sys
import tempfile
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parents[2]))

import numpy as np  # noqa: E402

from agent.logbook import Logbook, read_session  # noqa: E402
from protocol.messages import AxisSample, Telemetry  # noqa: E402

RATE_HZ = 2000
N_AXES = 4


def samples(n: int, seed: int = 0) -> list[Telemetry]:
    rng = np.random.default_rng(seed)
    vals = rng.normal(0.0, 0.3, size=(n, N_AXES, 3)).astype(np.float32).astype(float)
    out = []
    for k in range(n):
        axes = tuple(AxisSample(a, 0, vals[k, a, 0], vals[k, a, 1], vals[k, a, 2],
                                1 if (k >> 4) & 1 else -1) for a in range(N_AXES))
        out.append(Telemetry(time_us=500 * k, counter=k, state=2, tag=1, axes=axes))
    return out


def open_exp(root: Path, name: str):
    s = Logbook(root, min_free_bytes=0).open_session(
        device={"device_id": "bench"}, settings_before={}, plan={}, tool_version="bench",
        protocol_version="1.0", name=name)
    return s, s.experiment("e1", {"kind": "relay", "axis": 0, "loop": 0})


def burst(root: Path, pool: list[Telemetry], rounds: int = 3) -> dict:
    best_rate, best_cpu = 0.0, float("inf")
    n = len(pool)
    for r in range(rounds):
        s, e = open_exp(root, f"burst{r}")
        c0, t0 = time.process_time(), time.perf_counter()
        h = 1.8e9
        for k, tel in enumerate(pool):
            e.append(h + k * 5e-4, tel)
        e.close()
        c1, t1 = time.process_time(), time.perf_counter()
        s.close("bench")
        best_rate = max(best_rate, n / (t1 - t0))
        best_cpu = min(best_cpu, (c1 - c0) / n * 1e6)
    return {"samples_per_s": best_rate, "cpu_us_per_sample": best_cpu,
            "rows_per_s": best_rate * N_AXES}


def _paced_loop(pool: list[Telemetry], seconds: float, append) -> tuple[float, float, int]:
    n = int(seconds * RATE_HZ)
    batch = 20  # a serial reader hands over samples in small bursts (10 ms here)
    period = batch / RATE_HZ
    c0, t0 = time.process_time(), time.perf_counter()
    k = 0
    while k < n:
        now = time.perf_counter()
        for _ in range(batch):
            append(now, pool[k % len(pool)])
            k += 1
        wait = t0 + k / RATE_HZ - time.perf_counter()
        if wait > 0:
            time.sleep(wait)
        elif wait < -period * 5:
            pass  # falling behind: keep going, the rate figure will show it
    c1, t1 = time.process_time(), time.perf_counter()
    return c1 - c0, t1 - t0, n


def paced(root: Path, pool: list[Telemetry], seconds: float) -> dict:
    base_cpu, base_wall, _ = _paced_loop(pool, min(seconds, 2.0), lambda h, t: None)
    s, e = open_exp(root, "paced")
    cpu, wall, n = _paced_loop(pool, seconds, e.append)
    c0 = time.process_time()
    e.close()
    s.close("bench")
    close_cpu = time.process_time() - c0
    base_per_s = base_cpu / base_wall
    log_cpu_per_s = (cpu + close_cpu) / wall - base_per_s
    return {"seconds": wall, "achieved_samples_per_s": n / wall,
            "cpu_percent_total": 100 * (cpu + close_cpu) / wall,
            "cpu_percent_pacing_only": 100 * base_per_s,
            "cpu_percent_logbook": 100 * log_cpu_per_s,
            "cpu_ms_per_telemetry_second": 1000 * log_cpu_per_s * wall / (n / RATE_HZ)}


def disk(root: Path) -> dict:
    sess = read_session(root / "paced")
    f = root / "paced" / "e1" / "telemetry.csv"
    rows = sess.experiments["e1"].recovered_rows
    size = f.stat().st_size
    return {"file_bytes": size, "rows": rows, "bytes_per_row": size / rows,
            "bytes_per_sample": size / (rows / N_AXES),
            "mb_per_minute_at_2khz": size / (rows / N_AXES) * RATE_HZ * 60 / 1e6}


def binary_twin(root: Path, pool: list[Telemetry]) -> dict:
    rec = struct.Struct("<dQIBHBBfffb")  # host time, time_us, counter, state, tag, axis, loop,
    path = root / "twin.bin"                # setpoint, measurement, output, relay
    c0 = time.process_time()
    with open(path, "wb") as fh:
        buf = []
        h = 1.8e9
        for k, tel in enumerate(pool):
            for a in tel.axes:
                buf.append(rec.pack(h + k * 5e-4, tel.time_us, tel.counter, tel.state, tel.tag,
                                    a.axis, a.loop, a.setpoint, a.measurement, a.output,
                                    a.relay))
            if len(buf) >= 800:
                fh.write(b"".join(buf))
                buf.clear()
        fh.write(b"".join(buf))
    cpu = time.process_time() - c0
    return {"bytes_per_row": rec.size, "bytes_per_sample": rec.size * N_AXES,
            "extra_cpu_us_per_sample": cpu / len(pool) * 1e6}


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--json", action="store_true", help="print one JSON object")
    ap.add_argument("--seconds", type=float, default=5.0, help="paced run length (s)")
    ap.add_argument("--dir", help="folder to write in (default: a temporary folder)")
    args = ap.parse_args()
    pool = samples(20_000)
    with tempfile.TemporaryDirectory(dir=args.dir) as tmp:
        root = Path(tmp)
        res = {"burst": burst(root, pool), "paced": paced(root, pool, args.seconds)}
        res["disk"] = disk(root)
        res["binary_twin"] = binary_twin(root, pool)
    res["policy"] = {"flush_rows": 800, "flush_interval_s": 0.1, "fsync_interval_s": 1.0,
                     "fsync_on": ["kill* events", "result", "experiment close", "session close"]}
    res["machine"] = {"python": platform.python_version(), "cpus": os.cpu_count(),
                      "platform": platform.platform()}
    if args.json:
        print(json.dumps(res, indent=2))
        return 0
    b, p, d, t = res["burst"], res["paced"], res["disk"], res["binary_twin"]
    print(f"burst:  {b['samples_per_s']:,.0f} four-axis samples/s "
          f"({b['rows_per_s']:,.0f} rows/s), {b['cpu_us_per_sample']:.1f} us CPU per sample")
    print(f"paced:  {p['achieved_samples_per_s']:,.0f} samples/s for {p['seconds']:.1f} s; "
          f"logbook CPU {p['cpu_percent_logbook']:.1f} % of one core "
          f"(total {p['cpu_percent_total']:.1f} %, pacing loop alone "
          f"{p['cpu_percent_pacing_only']:.1f} %)")
    print(f"disk:   {d['bytes_per_sample']:.0f} bytes per four-axis sample "
          f"({d['bytes_per_row']:.1f} per row), {d['mb_per_minute_at_2khz']:.0f} MB per minute "
          "at 2 kHz")
    print(f"binary twin (not shipped): +{t['bytes_per_sample']} bytes and "
          f"+{t['extra_cpu_us_per_sample']:.1f} us CPU per sample")
    return 0


if __name__ == "__main__":
    sys.exit(main())
