"""Serial link to a board: pyserial I/O, a reader thread, keepalive, request/response matching.

The link owns the only threads of the host side's I/O edge:

* a reader thread that feeds every received byte to the protocol's ``StreamDecoder`` and
  dispatches frames: replies (FLAG_REPLY) complete the pending request with the same sequence
  number; Telemetry and Event frames go to subscribers (called on the reader thread: keep them
  short and never block). A subscriber that raises is counted (``LinkStats.subscriber_errors``)
  and skipped: one faulty listener must not stop the replies, nor the safety monitor that
  listens beside it;
* a keepalive thread that sends ``Keepalive`` every ``keepalive_s``, whatever else is going out,
  so the device's watchdog stays fresh while the host lives (a device may require a recent
  Keepalive itself, not just any frame, before it arms: proof that this thread runs).

Requests are numbered; a request whose reply does not come within ``timeout_s`` is resent
unchanged (same sequence number) with FLAG_RETRY, so the device answers from its reply cache and
never executes it twice. After ``retries`` resends the request fails with ``LinkTimeout``.

The link ends in one of two ways. *Lost*: a read or write of the port failed (cable pulled,
adapter gone); ``lost_reason`` says why, the ``on_lost`` subscribers are told once, and every
request (waiting or new) raises ``LinkError``. *Closed*: ``close()`` was called; requests waiting
and new ones raise ``LinkError`` at once, nothing more is written and no loss is reported.
Known limit: replies are matched on seq alone, so a reply of the wrong type is accepted.
"""

from __future__ import annotations

import errno
import re
import statistics
import threading
import time
from collections import deque
from dataclasses import dataclass
from typing import Any, Callable

import serial

from protocol import codec
from protocol.messages import (FLAG_REPLY, FLAG_RETRY, PROTOCOL_MAJOR, Event, Keepalive, Kill,
                               Telemetry)


@dataclass(frozen=True)
class ForeignVersion:
    """A reply in a protocol major version this host does not speak."""

    major: int
    minor: int


from .errors import LinkError, LinkTimeout  # noqa: E402  (re-exported: agent.link.LinkError)


@dataclass
class LinkStats:
    """Counters of one link, written by its threads without a lock (each field has one writer,
    so a reader sees a recent value, never a torn one). Latencies in ms, from the last send of a
    request to its reply."""

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
    subscriber_errors: int = 0  # subscriber calls that raised (skipped; the reader goes on)
    latency_ms_last: float = float("nan")
    latency_ms_median: float = float("nan")

    def as_dict(self) -> dict:
        """The counters by name (for the session log's manifest)."""
        return dict(self.__dict__)


class _Pending:
    """One request waiting for its reply: the reader thread fills ``reply`` and sets ``event``;
    a lost or closed link sets ``event`` with ``reply`` still None."""

    __slots__ = ("seq", "frame", "event", "reply", "sent_at")

    def __init__(self, seq: int, frame: bytes):
        self.seq = seq
        self.frame = frame
        self.event = threading.Event()
        self.reply: Any = None
        self.sent_at = 0.0


def _errno_of(exc: BaseException, text: str) -> int | None:
    """The errno of a failed open: the exception's own, else the first "[Errno N]" in its text
    (pyserial often puts the OS error only in the message)."""
    if isinstance(getattr(exc, "errno", None), int):
        return exc.errno
    found = re.search(r"errno (\d+)", text, re.IGNORECASE)
    return int(found.group(1)) if found else None


def open_port(port: str | Any, baudrate: int = 921600):
    """Open a serial port, or pass an open one through.

    Parameters
    ----------
    port : str or serial-like object
        A device path, a pyserial URL (``socket://host:port``, ``loop://``, ``rfc2217://``) or
        an object that already behaves like ``serial.Serial`` (returned unchanged).
    baudrate : int
        Bits per second for a real port (URLs ignore it).

    Returns
    -------
    The open port. Device paths are opened exclusively, so a second program cannot share them.

    Raises
    ------
    LinkError
        The port does not exist, is not ours to open, is busy, nothing listens at the URL, or
        another failure; the message says what was wrong and what to try.
    """
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
        # classify by the errno number, not by its digits in the text ("errno 21" is no ENOENT)
        code = _errno_of(exc, text)
        if "no such file" in low or code == errno.ENOENT:
            raise LinkError(f"serial port {port!r} does not exist. Check the cable and the name; "
                            "`tetherloop ports` lists the ports this machine has.") from None
        if "permission denied" in low or code == errno.EACCES:
            raise LinkError(f"permission denied opening {port!r}. Add your user to the group that "
                            "owns the port (often 'dialout') or check its permissions.") from None
        if "lock" in low or "busy" in low or code == errno.EBUSY:
            raise LinkError(f"serial port {port!r} is busy: another program has it open. Close "
                            "that program and try again.") from None
        if "connection refused" in low or code == errno.ECONNREFUSED:
            raise LinkError(f"nothing is listening at {port!r} (connection refused). Start the "
                            "device or the mock first.") from None
        raise LinkError(f"could not open {port!r}: {text}") from None
    return ser


class Link:
    """Framed request/response link over a serial-like port; every method is thread-safe.

    Parameters
    ----------
    port : str or serial-like object
        What :func:`open_port` accepts. A port given by name is owned (closed by ``close()``);
        an object passed in stays open and belongs to the caller.
    baudrate : int
        For a port opened by name.
    timeout_s : float
        How long one try of a request waits for its reply (default for ``request``).
    retries : int
        Resends after the first try (default for ``request``).
    keepalive_s : float
        Period of the keepalive thread; keep it well under the board's ``watchdog_s``.
    clock : callable
        Host time in s for stats, the keepalive stamp and the subscribers' time argument.

    Raises
    ------
    LinkError
        From :func:`open_port` when the port cannot be opened.

    Starting the link starts its reader and keepalive threads (daemons); ``close()`` ends them.
    """

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
        self._stop = threading.Event()
        self._closed = False
        self.lost_reason: str | None = None
        self._reader = threading.Thread(target=self._read_loop, name="tetherloop-reader",
                                        daemon=True)
        self._keeper = threading.Thread(target=self._keepalive_loop, name="tetherloop-keepalive",
                                        daemon=True)
        self._reader.start()
        self._keeper.start()

    # -------------------------------------------------------------- subscriptions
    # Subscribers are called on the reader thread in the order they subscribed; they must be
    # short and must not block (a request from inside one would wait for the very thread that
    # has to deliver its reply). A subscriber that raises is counted and skipped.

    def on_telemetry(self, fn: Callable[[float, Telemetry], None]) -> None:
        """Call ``fn(host_time_s, telemetry)`` for every Telemetry frame (reader thread)."""
        self._telemetry_subs.append(fn)

    def on_event(self, fn: Callable[[float, Event], None]) -> None:
        """Call ``fn(host_time_s, event)`` for every Event frame (reader thread)."""
        self._event_subs.append(fn)

    def on_lost(self, fn: Callable[[str], None]) -> None:
        """Call ``fn(reason)`` once when the link is lost, on the thread whose read or write
        failed (never after ``close()``)."""
        self._lost_subs.append(fn)

    # -------------------------------------------------------------- sending
    def _next_seq(self) -> int:
        with self._seq_lock:
            self._seq = (self._seq + 1) & 0xFFFF
            return self._seq

    def _ended(self) -> LinkError:
        """The error for a request on a link that was closed or lost."""
        if self._closed:
            return LinkError(f"the link to {self.port_name} is closed: this session has ended. "
                             "Open a new session to talk to the board again.")
        return LinkError(f"the link to {self.port_name} is lost ({self.lost_reason})")

    def _write(self, data: bytes) -> None:
        if self._closed or self.lost_reason is not None:
            raise self._ended()
        with self._write_lock:  # frames from several threads must not interleave on the wire
            try:
                self._ser.write(data)
            except (serial.SerialException, OSError) as exc:
                self._mark_lost(f"write failed: {exc}")
                raise LinkError(f"the link to {self.port_name} is lost: {exc}") from None
            self.stats.frames_out += 1
            self.stats.bytes_out += len(data)

    def send(self, msg) -> int:
        """Send a message that expects no reply (Keepalive); any thread.

        Returns
        -------
        int
            The frame's sequence number.

        Raises
        ------
        LinkError
            The link is closed or lost, or the write failed (the link is then lost).
        """
        seq = self._next_seq()
        self._write(codec.encode(msg, seq))
        return seq

    def request(self, msg, *, timeout_s: float | None = None, retries: int | None = None):
        """Send ``msg`` and wait for the reply with its sequence number; any thread but the
        reader's (which delivers the reply).

        Each try waits ``timeout_s``; after a time-out the same frame (same seq) is resent with
        FLAG_RETRY, up to ``retries`` times, so a board that did execute it answers from its
        reply cache instead of executing it again.

        Parameters
        ----------
        msg : a host message of protocol.messages
        timeout_s, retries : float, int, optional
            Override the link's defaults for this call.

        Returns
        -------
        The reply message (Ack, Refuse or the data reply), or a :class:`ForeignVersion` when
        the reply came in another protocol major. Refusals are returned, not raised.

        Raises
        ------
        LinkTimeout
            No reply after every try.
        LinkError
            The link is closed or lost, before or while waiting.
        """
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
                self._write(frame)
                if pend.event.wait(timeout_s):
                    if pend.reply is None:  # woken by a loss or by close(), not by a reply
                        raise self._ended()
                    return pend.reply
                if self.lost_reason is not None or self._closed:
                    raise self._ended()
            self.stats.timeouts += 1
            raise LinkTimeout(f"no reply from {self.port_name} to {type(msg).__name__} after "
                              f"{retries + 1} tries of {timeout_s * 1000:.0f} ms. Is the board "
                              "powered and running tetherloop protocol v1 at this baud rate?")
        finally:
            self._pending.pop(seq, None)

    def send_kill(self, reason: int, value: float = 0.0) -> float:
        """Write a Kill frame at once, without waiting; safe from any thread, the reader's too.

        A thread of its own then makes sure of it: while no Ack with the kill's seq has come
        within ``timeout_s``, it resends the frame with FLAG_RETRY, up to 10 times, and gives up
        quietly when the link is lost or closed (the board's watchdog kills then).

        Returns
        -------
        float
            Host time (``clock``) just after the first frame was written.

        Raises
        ------
        LinkError
            The first frame could not be written (link closed, lost or failing).
        """
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

        def confirm():  # on the tetherloop-kill-confirm thread
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
        """Keepalive thread: one Keepalive now and every ``keepalive_s`` until close or loss."""
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
        """Reader thread: read what is there (at least one byte, up to the port's timeout),
        decode, dispatch. A failing read marks the link lost, except after close()."""
        ser = self._ser
        while not self._stop.is_set():
            try:
                waiting = ser.in_waiting
                data = ser.read(waiting if waiting else 1)
            # TypeError/AttributeError: some pyserial backends fail that way on a closed port
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
        """Reader thread: complete the pending request a reply answers, or tell subscribers."""
        msg = frame.msg
        if msg is None:  # payload did not decode (counted by the decoder)
            return
        self.stats.frames_in += 1
        if frame.major != PROTOCOL_MAJOR:
            self.stats.foreign_version += 1
            msg = ForeignVersion(frame.major, frame.minor)
        if frame.flags & FLAG_REPLY:
            # a reply nobody waits for any more (late, after a time-out) is dropped here; the
            # first reply to a resent request wins, the board's cached copy is the same bytes
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
            self._tell(self._telemetry_subs, now, msg)
        elif isinstance(msg, Event):
            self.stats.events += 1
            self._tell(self._event_subs, now, msg)

    def _tell(self, subs: list, now: float, msg) -> None:
        for fn in tuple(subs):  # a copy: subscribing from another thread must not break this
            try:
                fn(now, msg)
            except Exception:  # noqa: BLE001 - see the module docstring: count, go on
                self.stats.subscriber_errors += 1

    def _mark_lost(self, reason: str) -> None:
        """Record the loss once, wake every waiting request, tell the on_lost subscribers."""
        if self.lost_reason is not None or self._closed:
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
        """Median request latency (ms) of the last 200 replies, NaN before the first; also
        stored in ``stats.latency_ms_median``."""
        vals = list(self._latencies)
        self.stats.latency_ms_median = statistics.median(vals) if vals else float("nan")
        return self.stats.latency_ms_median

    def close(self) -> None:
        """End the link: stop both threads, wake waiting requests (they raise LinkError) and
        close the port if the link opened it. Idempotent; call it from any thread but the
        reader's. Waits up to about a second per thread (the port's read timeout)."""
        self._closed = True
        self._stop.set()
        for pend in list(self._pending.values()):
            pend.event.set()
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


def list_ports() -> list[tuple[str, str, str]]:
    """(device, description, hardware id) of every serial port pyserial finds."""
    from serial.tools import list_ports as lp
    return [(p.device, p.description or "", p.hwid or "") for p in sorted(lp.comports())]
