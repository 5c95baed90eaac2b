"""Serial link to a board: pyserial I/O, a reader thread, keepalive, request/response matching.

The link owns the only threads of the host side's I/O edge:

* a reader thread that feeds every received byte to the protocol's ``StreamDecoder`` and
  dispatches frames: replies (FLAG_REPLY) complete the pending request with the same sequence
  number; Telemetry and Event frames go to subscribers (called on the reader thread: keep them
  short and never block);
* a keepalive thread that sends ``Keepalive`` every ``keepalive_s``, whatever else is going out,
  so the device's watchdog stays fresh while the host lives (a device may require a recent
  Keepalive itself, not just any frame, before it arms: proof that this thread runs).

Requests are numbered; a request whose reply does not come within ``timeout_s`` is resent
unchanged (same sequence number) with FLAG_RETRY, so the device answers from its reply cache and
never executes it twice. After ``retries`` resends the request fails with ``LinkTimeout``.
"""

from __future__ import annotations

import statistics
import threading
import time
from collections import deque
from dataclasses import dataclass
from typing import Any, Callable

import serial

from protocol import codec
from protocol.messages import (FLAG_REPLY, FLAG_RETRY, PROTOCOL_MAJOR, Event, Keepalive, Kill,
                               Refuse, Telemetry)


@dataclass(frozen=True)
class ForeignVersion:
    """A reply in a protocol major version this host does not speak."""

    major: int
    minor: int


from .errors import LinkError, LinkTimeout  # noqa: E402  (re-exported: agent.link.LinkError)


@dataclass
class LinkStats:
    frames_in: int = 0
    frames_out: int = 0
    bad_frames: int = 0
    retries: int = 0
    timeouts: int = 0
    foreign_version: int = 0
    telemetry: int = 0
    events: int = 0
    bytes_in: int = 0
    bytes_out: int = 0
    latency_ms_last: float = float("nan")
    latency_ms_median: float = float("nan")

    def as_dict(self) -> dict:
        return dict(self.__dict__)


class _Pending:
    __slots__ = ("seq", "frame", "event", "reply", "sent_at", "first_sent_at")

    def __init__(self, seq: int, frame: bytes):
        self.seq = seq
        self.frame = frame
        self.event = threading.Event()
        self.reply: Any = None
        self.sent_at = 0.0
        self.first_sent_at = 0.0


def open_port(port: str | Any, baudrate: int = 921600):
    """Open ``port`` (a device path or a pyserial URL such as ``socket://host:port`` or
    ``loop://``) or pass through an already open serial-like object. Errors become LinkError
    with a sentence saying what was wrong and what to try."""
    if not isinstance(port, str):
        return port
    try:
        ser = serial.serial_for_url(port, baudrate=baudrate, timeout=0.02, write_timeout=3.0,
                                    do_not_open=True)
        if hasattr(ser, "exclusive") and not port.startswith(("socket://", "loop://", "rfc2217://")):
            ser.exclusive = True
        ser.open()
    except (serial.SerialException, OSError, ValueError) as exc:
        text = str(exc)
        low = text.lower()
        if "no such file" in low or "could not open port" in low and "errno 2" in low:
            raise LinkError(f"serial port {port!r} does not exist. Check the cable and the name; "
                            "`tetherloop ports` lists the ports this machine has.") from None
        if "permission denied" in low or "errno 13" in low:
            raise LinkError(f"permission denied opening {port!r}. Add your user to the group that "
                            "owns the port (often 'dialout') or check its permissions.") from None
        if "lock" in low or "busy" in low or "errno 16" in low:
            raise LinkError(f"serial port {port!r} is busy: another program has it open. Close "
                            "that program and try again.") from None
        if "connection refused" in low or "errno 111" in low:
            raise LinkError(f"nothing is listening at {port!r} (connection refused). Start the "
                            "device or the mock first.") from None
        raise LinkError(f"could not open {port!r}: {text}") from None
    return ser


class Link:
    """Framed request/response link over a serial-like port. Thread-safe."""

    def __init__(self, port: str | Any, *, baudrate: int = 921600, timeout_s: float = 0.25,
                 retries: int = 3, keepalive_s: float = 0.1, clock: Callable[[], float] = time.monotonic):
        self.port_name = port if isinstance(port, str) else getattr(port, "name", repr(port))
        self.timeout_s = timeout_s
        self.retries = retries
        self.keepalive_s = keepalive_s
        self.clock = clock
        self.stats = LinkStats()
        self.decoder = codec.StreamDecoder()
        self._ser = open_port(port, baudrate)
        self._owns_port = isinstance(port, str)
        self._write_lock = threading.Lock()
        self._seq_lock = threading.Lock()
        self._seq = 0
        self._pending: dict[int, _Pending] = {}
        self._telemetry_subs: list[Callable[[float, Telemetry], None]] = []
        self._event_subs: list[Callable[[float, Event], None]] = []
        self._lost_subs: list[Callable[[str], None]] = []
        self._latencies: deque[float] = deque(maxlen=200)
        self._last_tx = 0.0
        self._stop = threading.Event()
        self.lost_reason: str | None = None
        self._reader = threading.Thread(target=self._read_loop, name="tetherloop-reader",
                                        daemon=True)
        self._keeper = threading.Thread(target=self._keepalive_loop, name="tetherloop-keepalive",
                                        daemon=True)
        self._reader.start()
        self._keeper.start()

    # -------------------------------------------------------------- subscriptions
    def on_telemetry(self, fn: Callable[[float, Telemetry], None]) -> None:
        self._telemetry_subs.append(fn)

    def on_event(self, fn: Callable[[float, Event], None]) -> None:
        self._event_subs.append(fn)

    def on_lost(self, fn: Callable[[str], None]) -> None:
        self._lost_subs.append(fn)

    def remove_subscriber(self, fn) -> None:
        for subs in (self._telemetry_subs, self._event_subs, self._lost_subs):
            if fn in subs:
                subs.remove(fn)

    # -------------------------------------------------------------- sending
    def _next_seq(self) -> int:
        with self._seq_lock:
            self._seq = (self._seq + 1) & 0xFFFF
            return self._seq

    def _write(self, data: bytes) -> None:
        if self.lost_reason is not None:
            raise LinkError(f"the link to {self.port_name} is lost ({self.lost_reason})")
        with self._write_lock:
            try:
                self._ser.write(data)
            except (serial.SerialException, OSError) as exc:
                self._mark_lost(f"write failed: {exc}")
                raise LinkError(f"the link to {self.port_name} is lost: {exc}") from None
            self._last_tx = self.clock()
            self.stats.frames_out += 1
            self.stats.bytes_out += len(data)

    def send(self, msg) -> int:
        """Send a message that expects no reply (Keepalive). Returns its sequence number."""
        seq = self._next_seq()
        self._write(codec.encode(msg, seq))
        return seq

    def request(self, msg, *, timeout_s: float | None = None, retries: int | None = None):
        """Send ``msg`` and wait for its reply (Ack, Refuse or the data reply). Resends with
        FLAG_RETRY on time-out; raises LinkTimeout when all tries are spent."""
        timeout_s = self.timeout_s if timeout_s is None else timeout_s
        retries = self.retries if retries is None else retries
        seq = self._next_seq()
        pend = _Pending(seq, codec.encode(msg, seq))
        self._pending[seq] = pend
        try:
            for attempt in range(retries + 1):
                frame = pend.frame if attempt == 0 else codec.encode(msg, seq, FLAG_RETRY)
                if attempt:
                    self.stats.retries += 1
                pend.sent_at = self.clock()
                if attempt == 0:
                    pend.first_sent_at = pend.sent_at
                self._write(frame)
                if pend.event.wait(timeout_s):
                    return pend.reply
                if self.lost_reason is not None:
                    raise LinkError(f"the link to {self.port_name} is lost ({self.lost_reason})")
            self.stats.timeouts += 1
            raise LinkTimeout(f"no reply from {self.port_name} to {type(msg).__name__} after "
                              f"{retries + 1} tries of {timeout_s * 1000:.0f} ms. Is the board "
                              "powered and running tetherloop protocol v1 at this baud rate?")
        finally:
            self._pending.pop(seq, None)

    def send_kill(self, reason: int, value: float = 0.0) -> float:
        """Write a Kill frame at once, without waiting (safe from the reader thread), then make
        sure of it in the background: resend with FLAG_RETRY until acknowledged (up to 10 tries).
        Returns the host time at which the first frame was written."""
        msg = Kill(reason=int(reason), value=float(value))
        seq = self._next_seq()
        pend = _Pending(seq, codec.encode(msg, seq))
        self._pending[seq] = pend
        try:
            self._write(pend.frame)
        except LinkError:
            self._pending.pop(seq, None)
            raise
        t = self.clock()

        def confirm():
            try:
                for _ in range(10):
                    if pend.event.wait(self.timeout_s) or self.lost_reason is not None:
                        return
                    self.stats.retries += 1
                    self._write(codec.encode(msg, seq, FLAG_RETRY))
            except LinkError:
                return
            finally:
                self._pending.pop(seq, None)

        threading.Thread(target=confirm, name="tetherloop-kill-confirm", daemon=True).start()
        return t

    # -------------------------------------------------------------- threads
    def _keepalive_loop(self) -> None:
        while True:
            if self.lost_reason is not None:
                return
            try:
                self.send(Keepalive(host_time_ms=int(self.clock() * 1000) & 0xFFFFFFFF))
            except LinkError:
                return
            if self._stop.wait(self.keepalive_s):
                return

    def _read_loop(self) -> None:
        ser = self._ser
        while not self._stop.is_set():
            try:
                waiting = ser.in_waiting
                data = ser.read(waiting if waiting else 1)
            except (serial.SerialException, OSError, TypeError, AttributeError) as exc:
                if self._stop.is_set():
                    return
                self._mark_lost(f"read failed: {exc}")
                return
            if not data:
                continue
            now = self.clock()
            self.stats.bytes_in += len(data)
            for frame in self.decoder.feed(data):
                self._dispatch(now, frame)
            self.stats.bad_frames = self.decoder.stats.bad

    def _dispatch(self, now: float, frame: codec.Frame) -> None:
        msg = frame.msg
        if msg is None:
            return
        self.stats.frames_in += 1
        if frame.major != PROTOCOL_MAJOR:
            self.stats.foreign_version += 1
            msg = ForeignVersion(frame.major, frame.minor)
        if frame.flags & FLAG_REPLY:
            pend = self._pending.get(frame.seq)
            if pend is not None and not pend.event.is_set():
                pend.reply = msg
                lat = (now - pend.sent_at) * 1000.0
                self._latencies.append(lat)
                self.stats.latency_ms_last = lat
                pend.event.set()
            return
        if isinstance(msg, Telemetry):
            self.stats.telemetry += 1
            for fn in tuple(self._telemetry_subs):
                fn(now, msg)
        elif isinstance(msg, Event):
            self.stats.events += 1
            for fn in tuple(self._event_subs):
                fn(now, msg)

    def _mark_lost(self, reason: str) -> None:
        if self.lost_reason is not None:
            return
        self.lost_reason = reason
        for pend in list(self._pending.values()):
            pend.event.set()
        for fn in tuple(self._lost_subs):
            try:
                fn(reason)
            except Exception:  # a subscriber's failure must not hide the loss
                pass

    def latency_ms_median(self) -> float:
        vals = list(self._latencies)
        self.stats.latency_ms_median = statistics.median(vals) if vals else float("nan")
        return self.stats.latency_ms_median

    def close(self) -> None:
        self._stop.set()
        self._keeper.join(timeout=1.0)
        if self._owns_port:
            try:
                self._ser.close()
            except Exception:
                pass
        self._reader.join(timeout=1.0)

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        self.close()


def is_refusal(reply) -> bool:
    return isinstance(reply, Refuse)


def list_ports() -> list[tuple[str, str, str]]:
    """(device, description, hardware id) of every serial port pyserial finds."""
    from serial.tools import list_ports as lp
    return [(p.device, p.description or "", p.hwid or "") for p in sorted(lp.comports())]
