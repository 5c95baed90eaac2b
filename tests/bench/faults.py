"""Fault campaign: single-loop tunes against the simulated board under link faults, and the
board's own safety after a link drop or the host's death mid-relay.

Per link condition (byte loss both ways, bit flips, latency, a stall mid-relay): runs, verified,
stopped with a reason (which reasons, counted), record disagreements (a setting whose value in
the host's record differs from the board's after the run: the host wrote or believed something
the board does not hold), settings left unknown (the host could not confirm them and says so),
samples missing (bridged in the relay's analysed periods plus lost in the step test), the link's
resends, replies of another kind and time-outs, and wall time per run.

Per safety condition (the link cut both ways mid-relay; the host process SIGKILLed mid-relay,
both through ``tetherloop tune`` on a pseudo-terminal): trials, kills by the board's watchdog
within watchdog_s plus one tick (the time is the board's own measure of the silence, the
KILL_TRIPPED event's value, in link time), the range of that time, the trials where the relay
was running, and for SIGKILL whether the session log reads back. The safety trials run the board
in real time (``--safety-speed 1``): the watchdog runs on link (wall) time, and an accelerated
board checks it only between tick batches.

    python tests/bench/faults.py [--json] [--runs 10] [--trials 20] [--only NAME[,NAME]]
                                 [--speed 5] [--safety-speed 1]

Goals (issue "Fault tolerance on a real link"): with 1 % byte loss both ways, and separately bit
flips at 1e-4 per byte, a single-loop tune converges and verifies in at least 9 of 10 runs; no
record disagreement anywhere; after a link drop or host SIGKILL mid-relay the board is safe within
its watchdog plus one tick in 20 of 20 trials. The scenario is invented (the bundled single-axis
beam).
"""

from __future__ import annotations

import argparse
import collections
import dataclasses
import json
import os
import re
import signal
import subprocess
import sys
import tempfile
import threading
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[2]
sys.path.insert(0, str(ROOT))

# name -> (board faults, stall of the host's port in s once the relay runs)
CONDITIONS = {
    "clean": ({}, 0.0),
    "loss-1%": ({"loss": 0.01}, 0.0),
    "loss-0.1%": ({"loss": 0.001}, 0.0),
    "flip-1e-4": ({"flip": 1e-4}, 0.0),
    "flip-1e-5": ({"flip": 1e-5}, 0.0),
    "latency-20ms": ({"latency_s": 0.02}, 0.0),
    "stall-1.5s": ({}, 1.5),
}
KILL_TRIPPED = 4
WATCHDOG = 9


def wait_for(cond, timeout: float, poll: float = 0.01) -> bool:
    end = time.monotonic() + timeout
    while time.monotonic() < end:
        if cond():
            return True
        time.sleep(poll)
    return False


class StallPort:
    """The host's end of the in-process port; ``stall(s)`` holds both directions for ``s``
    seconds (what the host writes meanwhile goes out after it, what the board sent arrives
    after it), as a stalled USB adapter does."""

    def __init__(self, port):
        self._port = port
        self.name = "in-process board"
        self._until = 0.0
        self._held: list[bytes] = []
        self._lock = threading.Lock()

    def stall(self, seconds: float) -> None:
        self._until = time.monotonic() + seconds

    def _stalled(self) -> bool:
        return time.monotonic() < self._until

    @property
    def in_waiting(self) -> int:
        return 0 if self._stalled() else self._port.in_waiting

    def read(self, size: int = 1) -> bytes:
        if self._stalled():
            time.sleep(0.005)
            return b""
        return self._port.read(size)

    def write(self, data: bytes) -> int:
        with self._lock:
            if self._stalled():
                self._held.append(data)
                return len(data)
            held, self._held = self._held, []
            for chunk in held:
                self._port.write(chunk)
            return self._port.write(data)

    def close(self) -> None:
        self._port.close()


def _relay_running(fw) -> bool:
    from protocol.messages import ExperimentKind
    exp = fw.exp
    return exp is not None and exp.kind == ExperimentKind.RELAY


def _short(text: str) -> str:
    """A stop reason without object addresses and figures, so equal causes count together."""
    text = re.sub(r" at 0x[0-9a-f]+", "", text)
    text = re.sub(r"\d+(\.\d+)?", "#", text)
    return text[:160]


def one_tune(faults: dict, stall_s: float, seed: int, speed: float, log_dir: str) -> dict:
    from agent import operations
    from agent.plan import LoopPlan, Plan
    from agent.session import f32
    from agent.workflows import LoopStatus
    from mock_device.runner import start_mock
    plan = Plan(loops=(LoopPlan("roll", "rate"),))
    h = start_mock("single-axis", transport="inproc", speed=speed, seed=seed, faults=faults)
    h.port.timeout = 0.01
    port = StallPort(h.port)
    out = {"verified": False, "reason": None, "disagreements": 0, "unknown": 0,
           "samples_missing": 0, "link": {}, "wall_s": 0.0}
    st = None
    done = threading.Event()

    def stall_once():
        if wait_for(lambda: done.is_set() or _relay_running(h.firmware), 300) \
                and not done.is_set():
            time.sleep(0.3)
            port.stall(stall_s)

    if stall_s:
        threading.Thread(target=stall_once, daemon=True).start()
    t0 = time.monotonic()
    try:
        st = operations.connect(port, mock=h)
        operations.open_session(st, plan, operations.Confirmation(
            operations.ConfirmedBy.FLAG, what="fault bench"), log_dir)
        lr = operations.tune_one(st, plan.loops[0], plan)
        out["verified"] = lr.status == LoopStatus.VERIFIED
        if not out["verified"]:
            out["reason"] = f"{lr.status}: {lr.message}"
        out["samples_missing"] = (int((lr.verification or {}).get("samples_missing") or 0)
                                  + int((lr.relay or {}).get("samples_bridged") or 0))
    except Exception as exc:  # a bench counts failures, it does not stop on them
        out["reason"] = f"{type(exc).__name__}: {exc}"
    finally:
        done.set()
        out["wall_s"] = time.monotonic() - t0
        if st is not None:
            board = {k: f32(v) for k, v in h.firmware.settings.values.items()}
            out["disagreements"] = sum(1 for k, v in st.session.values.items()
                                       if k in board and board[k] != v)
            out["unknown"] = len(st.session.unknown)
            s = st.link.stats
            out["link"] = {"retries": s.retries, "timeouts": s.timeouts,
                           "wrong_replies": s.wrong_replies, "bad_frames": s.bad_frames}
            operations.close(st, "bench")
        h.stop()
    if out["reason"]:
        out["reason"] = _short(out["reason"])
    return out


def tune_condition(name: str, faults: dict, stall_s: float, runs: int, speed: float) -> dict:
    rows = []
    with tempfile.TemporaryDirectory() as d:
        for seed in range(1, runs + 1):
            rows.append(one_tune(faults, stall_s, seed, speed, d))
    reasons = collections.Counter(r["reason"] for r in rows if r["reason"])
    link = {k: sum(r["link"].get(k, 0) for r in rows)
            for k in ("retries", "timeouts", "wrong_replies", "bad_frames")}
    walls = sorted(r["wall_s"] for r in rows)
    return {"condition": name, "faults": faults, "stall_s": stall_s, "runs": runs,
            "verified": sum(r["verified"] for r in rows), "stopped": dict(reasons),
            "record_disagreements": sum(r["disagreements"] for r in rows),
            "settings_unknown": sum(r["unknown"] for r in rows),
            "samples_missing": sum(r["samples_missing"] for r in rows),
            "link": link, "wall_s_median": walls[len(walls) // 2]}


def _watchdog_kill(fw):
    """The board's first KILL_TRIPPED event by its watchdog, or None."""
    return next((e for e in list(fw.events) if e.kind == KILL_TRIPPED and e.reason == WATCHDOG),
                None)


def _tune_process(port: str, log_dir: str) -> subprocess.Popen:
    env = dict(os.environ, TETHERLOOP_LOG_DIR=log_dir)
    return subprocess.Popen([sys.executable, "-m", "agent.cli", "tune", "--port", port,
                             "--axis", "roll", "--loop", "rate", "--confirm-safe"],
                            env=env, stdout=subprocess.PIPE, stderr=subprocess.STDOUT, text=True,
                            start_new_session=True, cwd=str(ROOT))


def _trial_row(h, running: bool) -> dict:
    ev = _watchdog_kill(h.firmware)
    return {"safe_s": None if ev is None else float(ev.value),  # the board's quiet time
            "watchdog_s": float(h.firmware.settings.values.get("watchdog_s", 1.0)),
            "tick_s": 1.0 / h.firmware.loop_rate_hz, "relay_was_running": running}


def drop_trial(seed: int, speed: float) -> dict:
    """The link carries nothing, both ways, from a moment in the middle of the relay on."""
    from mock_device.runner import start_mock
    with tempfile.TemporaryDirectory() as d:
        # a drop time far away makes the runner build its fault layer; it is moved to "now"
        # once the relay runs (the bench reaches into the handle for that)
        h = start_mock("single-axis", transport="pty", speed=speed, seed=seed,
                       faults={"drop_at_s": 1e9})
        proc = _tune_process(h.port, d)
        try:
            running = wait_for(lambda: _relay_running(h.firmware), 120)
            time.sleep(0.1 * (seed % 5))
            link = h._link
            link.cfg = dataclasses.replace(link.cfg, drop_at_s=h.firmware.device_time_s)
            wait_for(lambda: _watchdog_kill(h.firmware) is not None, 30)
            row = _trial_row(h, running)
            try:
                text, _ = proc.communicate(timeout=120)
            except subprocess.TimeoutExpired:
                proc.kill()
                text, _ = proc.communicate()
            lines = [ln.strip() for ln in (text or "").splitlines() if ln.strip()]
            row["host_said"] = next((ln for ln in reversed(lines) if "KILL" in ln or
                                     "error" in ln.lower()), lines[-1] if lines else "")
            row["host_exit"] = proc.returncode
            return row
        finally:
            if proc.poll() is None:
                os.killpg(proc.pid, signal.SIGKILL)
                proc.wait()
            h.stop()


def sigkill_trial(seed: int, speed: float) -> dict:
    """The host process dies (SIGKILL) mid-relay; the board must kill on its watchdog."""
    from mock_device.runner import start_mock
    with tempfile.TemporaryDirectory() as d:
        h = start_mock("single-axis", transport="pty", speed=speed, seed=seed)
        proc = _tune_process(h.port, d)
        try:
            running = wait_for(lambda: _relay_running(h.firmware), 120)
            time.sleep(0.1 + 0.1 * (seed % 5))
            os.killpg(proc.pid, signal.SIGKILL)
            proc.wait()
            wait_for(lambda: _watchdog_kill(h.firmware) is not None, 30)
            row = _trial_row(h, running)
            session = next((p for p in Path(d).iterdir() if p.is_dir()), None)
            row["log_readable"] = None
            if session is not None:
                from agent.logbook import read_session
                try:
                    read_session(session)
                    row["log_readable"] = True
                except Exception:
                    row["log_readable"] = False
            return row
        finally:
            if proc.poll() is None:
                proc.kill()
                proc.wait()
            h.stop()


def safety_condition(name: str, fn, trials: int, speed: float) -> dict:
    rows = [fn(seed, speed) for seed in range(1, trials + 1)]
    within = [r for r in rows if r["safe_s"] is not None
              and r["safe_s"] <= r["watchdog_s"] + r["tick_s"] + 1e-9]
    safe = [r["safe_s"] for r in rows if r["safe_s"] is not None]
    out = {"condition": name, "trials": trials, "speed": speed,
           "safe_within_watchdog_plus_tick": len(within),
           "no_watchdog_kill": sum(r["safe_s"] is None for r in rows),
           "safe_s_min": min(safe) if safe else None, "safe_s_max": max(safe) if safe else None,
           "watchdog_s": rows[0]["watchdog_s"], "tick_s": rows[0]["tick_s"],
           "relay_was_running": sum(bool(r["relay_was_running"]) for r in rows)}
    if any("log_readable" in r for r in rows):
        out["logs_readable"] = sum(bool(r.get("log_readable")) for r in rows)
    if any("host_said" in r for r in rows):
        out["host_said"] = dict(collections.Counter(_short(r["host_said"]) for r in rows))
        out["host_exit"] = dict(collections.Counter(str(r["host_exit"]) for r in rows))
    return out


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--json", action="store_true")
    ap.add_argument("--runs", type=int, default=10, help="tunes per link condition")
    ap.add_argument("--trials", type=int, default=20, help="drop and SIGKILL trials")
    ap.add_argument("--speed", type=float, default=5.0, help="board clock for the tunes "
                    "(x real time)")
    ap.add_argument("--safety-speed", type=float, default=1.0, help="board clock for the drop "
                    "and SIGKILL trials")
    ap.add_argument("--only", default=None, help="conditions, comma-separated (link condition "
                    "names, 'drop', 'sigkill')")
    args = ap.parse_args()
    only = None if args.only is None else set(args.only.split(","))
    known = set(CONDITIONS) | {"drop", "sigkill"}
    if only is not None and not only <= known:
        ap.error(f"--only: unknown condition(s) {sorted(only - known)}; known: {sorted(known)}")
    results = []
    for name, (faults, stall_s) in CONDITIONS.items():
        if only is None or name in only:
            results.append(tune_condition(name, faults, stall_s, args.runs, args.speed))
            if not args.json:
                print(json.dumps(results[-1]), flush=True)
    for name, fn in (("drop", drop_trial), ("sigkill", sigkill_trial)):
        if only is None or name in only:
            results.append(safety_condition(name, fn, args.trials, args.safety_speed))
            if not args.json:
                print(json.dumps(results[-1]), flush=True)
    if args.json:
        print(json.dumps({"conditions": results}, indent=2))
    return 0


if __name__ == "__main__":
    sys.exit(main())
