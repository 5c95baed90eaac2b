"""Benchmark: encode/decode throughput of telemetry frames versus what a serial link carries.

Prints frames/s and MB/s for 1 and 4 axes, the on-wire frame size, the frame rate a 2,000,000 baud
8N1 link (10 bits per byte) can carry with the same frames, and the ratio between the two. Figures
only, no pass/fail: ``python tests/bench/link.py [--json] [--seconds S]``.
"""

from __future__ import annotations

import argparse
import json
import os
import platform
import sys
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parents[2]))

from protocol.codec import StreamDecoder, encode  # noqa: E402
from protocol.messages import AxisSample, Telemetry  # noqa: E402

BITS_PER_BYTE = 10  # 8N1: start bit, 8 data bits, stop bit
LINK_BAUD = 2_000_000


def telemetry(n_axes: int, k: int) -> Telemetry:
    """A realistic sample whose floats change every sample (and are exact in f32)."""
    axes = tuple(AxisSample(axis=a, loop=0, setpoint=0.25 * a, measurement=(k % 997) / 1024 - 0.25,
                            output=-(k % 499) / 512, relay=1 if k & 8 else -1)
                 for a in range(n_axes))
    return Telemetry(time_us=2500 * k, counter=k, state=2, tag=7, axes=axes)


def _rate(fn, seconds: float, rounds: int = 5) -> float:
    """Best rate over ``rounds`` runs of ``seconds / rounds`` CPU seconds each. ``fn`` processes one
    batch and returns its frame count. Time is this process's CPU time (one core), so other busy
    processes on the machine disturb the figure little; the best run is the least disturbed one
    (the usual practice for micro-benchmarks, as the timeit documentation advises)."""
    clock = time.process_time
    best = 0.0
    for _ in range(rounds):
        frames = 0
        t0 = clock()
        while True:
            frames += fn()
            dt = clock() - t0
            if dt >= seconds / rounds:
                break
        best = max(best, frames / dt)
    return best


def bench(n_axes: int, seconds: float, batch: int = 2000) -> dict:
    msgs = [telemetry(n_axes, k) for k in range(batch)]
    frames = [encode(m, seq=k & 0xFFFF) for k, m in enumerate(msgs)]
    stream = b"".join(frames)
    frame_bytes = sum(map(len, frames)) / len(frames)

    def do_encode() -> int:
        for k, m in enumerate(msgs):
            encode(m, k)
        return batch

    def do_decode() -> int:
        dec = StreamDecoder()
        out = []
        for i in range(0, len(stream), 256):  # arrive in read()-sized chunks
            out += dec.feed(stream[i:i + 256])
        if len(out) != batch or dec.stats.good != batch:
            raise SystemExit(f"decoder lost frames: {len(out)} of {batch}")
        return batch

    # check once that the decoded messages are the encoded ones
    dec = StreamDecoder()
    got = [f.msg for f in dec.feed(stream)]
    if got != msgs:
        raise SystemExit("decode(encode(m)) != m in the benchmark data")

    enc_fps = _rate(do_encode, seconds)
    dec_fps = _rate(do_decode, seconds)
    link_fps = LINK_BAUD / BITS_PER_BYTE / frame_bytes
    return {
        "axes": n_axes,
        "frame_bytes_on_wire": frame_bytes,
        "encode_frames_per_s": enc_fps,
        "encode_mb_per_s": enc_fps * frame_bytes / 1e6,
        "decode_frames_per_s": dec_fps,
        "decode_mb_per_s": dec_fps * frame_bytes / 1e6,
        "link_baud": LINK_BAUD,
        "link_frames_per_s": link_fps,
        "encode_to_link_ratio": enc_fps / link_fps,
        "decode_to_link_ratio": dec_fps / link_fps,
    }


def _load() -> float | None:
    try:
        return round(os.getloadavg()[0], 2)
    except (AttributeError, OSError):
        return None


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--json", action="store_true", help="print one JSON object instead of a table")
    ap.add_argument("--seconds", type=float, default=2.0,
                    help="time spent on each measurement, split in 5 runs of which the best "
                         "counts (default 2.0)")
    args = ap.parse_args(argv)
    if not args.seconds > 0:
        ap.error(f"--seconds must be a positive number of seconds, got {args.seconds}")
    results = [bench(n, args.seconds) for n in (1, 4)]
    if args.json:
        print(json.dumps({"python": platform.python_version(), "load_average": _load(),
                          "results": results}, indent=2))
        return 0
    print(f"telemetry frame codec, Python {platform.python_version()}, one core; link "
          f"{LINK_BAUD} baud 8N1 ({LINK_BAUD // BITS_PER_BYTE} bytes/s); load average "
          f"{_load()} (frames per CPU-second, best of 5 runs each)")
    print(f"{'axes':>4} {'bytes':>6} {'encode f/s':>11} {'enc MB/s':>9} {'decode f/s':>11} "
          f"{'dec MB/s':>9} {'link f/s':>9} {'enc/link':>9} {'dec/link':>9}")
    for r in results:
        print(f"{r['axes']:>4} {r['frame_bytes_on_wire']:>6.0f} {r['encode_frames_per_s']:>11.0f} "
              f"{r['encode_mb_per_s']:>9.2f} {r['decode_frames_per_s']:>11.0f} "
              f"{r['decode_mb_per_s']:>9.2f} {r['link_frames_per_s']:>9.0f} "
              f"{r['encode_to_link_ratio']:>8.1f}x {r['decode_to_link_ratio']:>8.1f}x")
    return 0


if __name__ == "__main__":
    sys.exit(main())
