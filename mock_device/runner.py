"""Runs a :class:`~mock_device.firmware.Firmware` in a background thread against a link, with a
clock: real time, N x real time, or as fast as possible.

Clock modes (``speed``):

* ``1.0`` / ``"realtime"``: tick k is due at ``t0 + k/loop_rate_hz`` of wall time; the thread
  sleeps to each deadline, reads the link, ticks once, writes the link. Lateness of each tick
  against its deadline is recorded (``MockHandle.jitter_s``).
* ``N`` (a float > 0): device time runs N times faster than the wall clock; ticks are run in
  batches to catch up, the link is served between batches (at least every 64 ticks).
* ``"max"``: no pacing; batches of 64 ticks, the link served between batches.

Device time (and so every result) depends only on the seed and on the bytes the host sends, never
on the wall clock. The keepalive watchdog runs on LINK time, which here is always wall time
(seconds since start), because the host lives in wall time; see :mod:`mock_device.firmware`.

The thread never blocks on the link: reads and writes are non-blocking. What a full link does not
accept waits in a bounded buffer (256 kB); beyond that the oldest whole frames are dropped and
counted (``MockHandle.stats["bytes_dropped"]``). In the accelerated modes (N and max) a slow
reader slows the clock: while more than 32 kB wait and the link still accepted bytes within the
last 0.2 s, device time pauses (the device is not blocked: its time simply does not advance); a
link that accepts nothing (nobody reading) does not stop the clock. In real time nothing pauses.
"""

from __future__ import annotations

import math
import os
import threading
import time

import numpy as np

from .faults import FaultConfig, FaultyLink, parse_stuck
from .firmware import Firmware
from .scenarios import Scenario, load_scenario
from .transports import InprocLink, PtyLink, TcpLink

BATCH_TICKS = 64
JITTER_KEEP = 200_000
PENDING_LIMIT = 256 * 1024  # bytes waiting for a slow link; beyond, oldest whole frames dropped
BACKPRESSURE_BYTES = 32 * 1024  # accelerated clocks pause while this much waits ...
STALL_S = 0.2  # ... unless the link accepted nothing for this long (nobody reads: drop instead)


def parse_speed(speed) -> float:
    """``1.0``, ``"realtime"``, ``"10"``, ``10``, ``"max"`` -> factor (inf for max)."""
    if isinstance(speed, str):
        s = speed.strip().lower()
        if s in ("realtime", "real", "rt"):
            return 1.0
        if s in ("max", "inf", "fast"):
            return math.inf
        try:
            speed = float(s.rstrip("x"))
        except ValueError:
            raise ValueError(f"speed {speed!r} not understood; expected 'realtime', a factor "
                             f"like 10 (times real time) or 'max'") from None
    v = float(speed)
    if not v > 0:
        raise ValueError(f"speed must be > 0, got {speed!r}")
    return v


class MockHandle:
    """A running mock. ``port`` is what a host opens; ``stop()`` ends the thread (idempotent)."""

    def __init__(self, firmware: Firmware, link, speed: float, faults: FaultConfig, seed: int):
        self.firmware = firmware
        self.speed = speed
        self.faults = faults
        self._raw_link = link
        self._link = FaultyLink(link, faults, seed) if faults.link_faults else None
        self.port = link.port
        self.tcp_port = getattr(link, "tcp_port", None)
        self.stats = {"ticks": 0, "bytes_in": 0, "bytes_out": 0, "bytes_dropped": 0,
                      "late_ticks": 0, "backpressure_pauses": 0}
        self._pending = bytearray()
        self._last_progress = 0.0
        self._jitter = np.zeros(JITTER_KEEP)
        self._jitter_n = 0
        self._stop = threading.Event()
        self._lock = threading.Lock()
        self.error: BaseException | None = None
        self._thread = threading.Thread(target=self._run, name="mock-device", daemon=True)
        self._t0 = time.perf_counter()
        self._thread.start()

    # -- public
    @property
    def jitter_s(self) -> np.ndarray:
        """Lateness of real-time ticks against their deadlines (s): the last 200,000 ticks (in
        tick order until the buffer wraps)."""
        return self._jitter[:min(self._jitter_n, JITTER_KEEP)].copy()

    @property
    def running(self) -> bool:
        return self._thread.is_alive()

    def stop(self) -> None:
        self._stop.set()
        if self._thread.is_alive() and threading.current_thread() is not self._thread:
            self._thread.join(5.0)
        try:
            self._raw_link.close()
        except OSError:
            pass

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        self.stop()

    # -- thread
    def _io_in(self, wall: float) -> None:
        fw = self.firmware
        data = self._raw_link.read()
        if self._link is not None:
            data = self._link.incoming(data, wall, fw.device_time_s)
        if data:
            self.stats["bytes_in"] += len(data)
            fw.receive(data)

    def _io_out(self, wall: float) -> None:
        fw = self.firmware
        out = fw.take_output()
        if self._link is not None:
            out = self._link.outgoing(out, wall, fw.device_time_s)
        pend = self._pending
        if out:
            pend += out
        if not pend:
            self._last_progress = wall
            return
        n = self._raw_link.write(pend)
        if n:
            del pend[:n]
            self.stats["bytes_out"] += n
            self._last_progress = wall
        over = len(pend) - PENDING_LIMIT
        if over > 0:
            # drop the oldest bytes up to a frame delimiter, so the host sees whole frames
            cut = pend.find(b"\x00", over + PENDING_LIMIT // 2)
            cut = len(pend) if cut < 0 else cut + 1
            del pend[:cut]
            self.stats["bytes_dropped"] += cut

    def _backpressure(self, wall: float) -> bool:
        """Accelerated clocks: should device time pause for a slow reader?"""
        return (len(self._pending) > BACKPRESSURE_BYTES
                and wall - self._last_progress < STALL_S)

    def _run(self) -> None:
        try:
            if self.speed == 1.0:
                self._run_realtime()
            else:
                self._run_batched()
        except BaseException as exc:  # report, do not die silently
            self.error = exc
            raise

    def _run_realtime(self) -> None:
        fw = self.firmware
        ts = fw.ts
        t0 = self._t0
        pc = time.perf_counter
        k = 0
        stop = self._stop
        jit = self._jitter
        while not stop.is_set():
            deadline = t0 + k * ts
            now = pc()
            wait = deadline - now
            if wait > 0:
                time.sleep(wait)
                now = pc()
            late = now - deadline
            if late > ts:
                self.stats["late_ticks"] += 1
            jit[self._jitter_n % JITTER_KEEP] = late
            self._jitter_n += 1
            wall = now - t0
            self._io_in(wall)
            fw.tick(wall)
            self._io_out(wall)
            k += 1
            self.stats["ticks"] = k
            if late > 0.25:  # fell far behind (debugger, suspended): do not burst to catch up
                t0 += late
                self._t0 = t0

    def _run_batched(self) -> None:
        fw = self.firmware
        ts = fw.ts
        speed = self.speed
        pc = time.perf_counter
        stop = self._stop
        t0 = self._t0
        ticks = 0
        while not stop.is_set():
            now = pc()
            wall = now - t0
            if self._backpressure(wall):
                self.stats["backpressure_pauses"] += 1
                self._io_in(wall)
                self._io_out(wall)
                time.sleep(0.0005)
                continue
            if math.isinf(speed):
                n = BATCH_TICKS
            else:
                due = int(wall * speed / ts) + 1 - ticks
                if due <= 0:
                    self._io_in(wall)
                    self._io_out(wall)
                    time.sleep(min(0.001, (ticks - wall * speed / ts) * ts / speed + 1e-5))
                    continue
                n = min(due, BATCH_TICKS)
            self._io_in(wall)
            tick = fw.tick
            for _ in range(n):
                tick(wall)
            ticks += n
            self.stats["ticks"] = ticks
            self._io_out(wall)
            if math.isinf(speed):
                time.sleep(0)  # let the host's threads run


def start_mock(scenario: Scenario | str, transport: str = "pty", speed=1.0, seed: int = 0,
               faults: FaultConfig | dict | None = None, tcp_port: int = 0,
               store: str | os.PathLike | None = None) -> MockHandle:
    """Start a mock board in a background thread.

    Parameters
    ----------
    scenario : Scenario or name or path of a TOML file
    transport : "pty" | "tcp" | "inproc"
    speed : 1.0 / "realtime", a factor N (times real time), or "max"
    seed : seeds plant noise, arming tokens and link faults
    faults : extra faults (FaultConfig or mapping) on top of the scenario's [faults]
    tcp_port : port for "tcp" (0 = any free port)
    store : JSON file of the board's non-volatile settings (see mock_device.store): loaded at
        start when it exists, written on SettingsPersist; None keeps persisted values in memory

    Returns
    -------
    MockHandle with ``.port``, ``.firmware``, ``.stop()``; usable as a context manager.
    """
    sc = load_scenario(scenario) if not isinstance(scenario, Scenario) else scenario
    factor = parse_speed(speed)
    extra = faults if isinstance(faults, FaultConfig) else FaultConfig.from_mapping(faults)
    cfg = FaultConfig.from_mapping(sc.faults).merged(extra)
    fw = Firmware(sc, seed=seed)  # applies the scenario's own stuck/block faults
    if store is not None:
        from .store import StoreError, load_store, save_store
        saved = load_store(store, sc.device_id)
        for name, value in saved.items():
            try:
                fw.set_setting(name, value)
            except ValueError as exc:
                raise StoreError(f"settings store {store}: {name}: {exc}") from None
        fw.persisted = dict(fw.settings.values) if saved else None
        fw.on_persist = lambda values: save_store(store, sc.device_id, values)
    for spec in extra.stuck:
        fw.schedule_stuck_sensor(*parse_stuck(spec))
    for axis in extra.block:
        if axis not in fw.axes:
            raise ValueError(f"--block {axis}: no such axis; axes: {', '.join(fw.axes)}")
        fw.set_blocked(axis, True)
    if transport == "pty":
        link = PtyLink()
    elif transport == "tcp":
        link = TcpLink(tcp_port)
    elif transport == "inproc":
        link = InprocLink()
    else:
        raise ValueError(f"transport {transport!r} not known; expected pty, tcp or inproc")
    return MockHandle(fw, link, factor, cfg, seed)
