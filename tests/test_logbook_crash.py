"""Crash safety: a writer process killed with SIGKILL at random moments leaves a log the reader
always opens, with every sample flushed before the kill, bit-exact, and nothing corrupted."""

from __future__ import annotations

import json
import os
import random
import signal
import subprocess
import sys
import time
from pathlib import Path

import numpy as np

from agent.logbook import read_session

CHILD = r"""
import sys
import numpy as np
from agent.logbook import Logbook
from protocol.messages import AxisSample, Telemetry

log_dir, flush_rows, explicit_every = sys.argv[1], int(sys.argv[2]), int(sys.argv[3])
book = Logbook(log_dir, min_free_bytes=0, flush_rows=flush_rows, flush_interval_s=0.02,
               fsync_interval_s=0.05)
s = book.open_session(device={"device_id": "crash"}, settings_before={"k": 1.0}, plan={},
                      tool_version="0", protocol_version="1.0", name="crash")
e = s.experiment("e1", {"kind": "relay", "axis": 0, "loop": 0})
print("ready", flush=True)
f32 = np.float32
k = 0
while True:
    axes = tuple(AxisSample(a, 0, float(f32(0.5 * a)), float(f32(np.sin(k * 1e-3 + a))),
                            float(f32(k * 1e-4)), 1 if k % 2 else -1) for a in range(4))
    e.append(1000.0 + k * 1e-3, Telemetry(time_us=250 * k, counter=k, state=2, tag=1, axes=axes))
    k += 1
    if k % explicit_every == 0:
        e.flush()
        print(f"flushed {k}", flush=True)
    if k % 997 == 0:
        s.event("kill_tripped", device_time_us=250 * k, reason="test", k=k)
        print(f"kill {k}", flush=True)
    if k % 613 == 0:
        s.update_manifest(progress=k, settings_after={"k": float(k)})
        print(f"manifest {k}", flush=True)
"""


def expected_axis(k: np.ndarray, a: int) -> dict[str, np.ndarray]:
    f32 = np.float32
    return {"measurement": np.array([float(f32(np.sin(i * 1e-3 + a))) for i in k]),
            "output": np.array([float(f32(i * 1e-4)) for i in k]),
            "setpoint": np.full(k.size, float(f32(0.5 * a)))}


def run_and_kill(tmp: Path, seed: int, flush_rows: int, explicit_every: int) -> tuple[int, list]:
    rng = random.Random(seed)
    proc = subprocess.Popen([sys.executable, "-c", CHILD, str(tmp), str(flush_rows),
                             str(explicit_every)], stdout=subprocess.PIPE, stderr=subprocess.PIPE,
                            cwd=Path(__file__).resolve().parents[1])
    try:
        first = proc.stdout.readline()
        assert first == b"ready\n", (first, proc.stderr.read())
        time.sleep(rng.uniform(0.0, 0.35))  # a random moment, not a timing check
        os.kill(proc.pid, signal.SIGKILL)
        rest = proc.stdout.read()
    finally:
        if proc.poll() is None:
            proc.kill()
        proc.wait()
        proc.stdout.close()
        proc.stderr.close()
    assert proc.returncode == -signal.SIGKILL
    # only whole lines count: the child may die while printing
    lines = [ln.decode() for ln in rest.split(b"\n")[:-1]]
    flushed = max([int(ln.split()[1]) for ln in lines if ln.startswith("flushed")], default=0)
    return flushed, lines


def test_sigkill_at_random_moments_loses_nothing_flushed(tmp_path):
    # (seed, flush_rows, explicit flush every): row-by-row writes, small batches, the shipped
    # policy with only the background flusher, tiny batches with frequent explicit flushes
    cases = [(1, 1, 1), (2, 50, 37), (4, 800, 10_000_000), (5, 7, 3)]
    for seed, flush_rows, every in cases:
        tmp = tmp_path / f"run{seed}"
        flushed, lines = run_and_kill(tmp, seed, flush_rows, every)
        r = read_session(tmp / "crash")  # must not raise
        assert any("not closed" in n for n in r.notes)
        x = r.experiments["e1"]
        rows = x.recovered_rows
        # the rows are exactly the first `rows` rows written, in order: no gap, no duplicate,
        # no garbage. A write cut by the kill may end inside a sample (some of its axis rows).
        assert np.array_equal(x.columns["counter"], np.repeat(np.arange(rows // 4 + 1), 4)[:rows])
        assert np.array_equal(x.columns["axis"], np.tile(np.arange(4), rows // 4 + 1)[:rows])
        n_samples = rows // 4  # complete samples
        assert n_samples >= flushed, (seed, n_samples, flushed)
        for a in range(4):
            col = x.axis(a)
            k = col["counter"]
            assert np.array_equal(col["time_us"], 250 * k)
            for name, want in expected_axis(k, a).items():
                assert np.array_equal(col[name], want), (seed, a, name)
        # events printed as logged were fsynced before the print: all of them are there
        kills_logged = {int(ln.split()[1]) for ln in lines if ln.startswith("kill")}
        kills_read = {ev["k"] for ev in r.events if ev["kind"] == "kill_tripped"}
        assert kills_logged <= kills_read
        # every telemetry row up to a kill event was flushed before it
        if kills_read:
            assert n_samples >= max(kills_read)
        # the manifest is always whole, old or new, never a mix
        m = json.loads((tmp / "crash" / "manifest.json").read_text())
        done = [int(ln.split()[1]) for ln in lines if ln.startswith("manifest")]
        if done:
            assert m["progress"] >= max(done)
            assert m["settings_after"] == {"k": float(m["progress"])}
        assert not any(n.startswith("e1:") and "damaged" in n for n in r.notes)
