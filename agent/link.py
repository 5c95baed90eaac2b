"""Serial link to a board: pyserial I/O, a reader thread, keepalive, request/response matching.

The link owns the only threads of the host side's I/O edge:

* a reader thread that feeds every received byte to the protocol's ``StreamDecoder`` and
  dispatches frames: a reply (FLAG_REPLY) completes the pending request it answers; Telemetry
  and Event frames go to subscribers (called on the reader thread: keep them short and never
  block). A subscriber that raises is counted (``LinkStats.subscriber_errors``) and skipped: one
  faulty listener must not stop the replies, nor the safety monitor that listens beside it;
* a keepalive thread that sends ``Keepalive`` every ``keepalive_s``, whatever else is going out,
  so the device's watchdog stays fresh while the host lives (a device may require a recent
  Keepalive itself, not just any frame, before it arms: proof that this thread runs).

Matching (protocol/SPEC.md 8). A reply answers a request only if its seq matches AND its type is
one the message table lists for that request (``@message(..., replies=...)``): an Ack or a
Refuse must name the request's type id, a SettingValue or SettingInfo the setting id or index
asked for. A Refuse answers any request but a Kill (never refused). Anything else with the
request's seq is counted (``wrong_replies``), remembered for the request's error and ignored.
Requests (and Kills) take the next number of the request counter; Keepalives, which have no
reply and are never cached by the board, carry a counter of their own, so the request counter
advances only with requests (it wraps after 65536 of them, harmlessly: nothing outstanding is
ever 16 requests old).

Retries (SPEC 9). A try that gets no matching reply within its wait is resent unchanged (same
seq) with FLAG_RETRY, so a board that did execute it answers from its reply cache and never
executes it twice. The first wait adapts to the link (four times the median round trip of
requests answered at their first try, Karn's rule, bounded by ``timeout_s``); each further wait
is ``BACKOFF`` times longer, up to ``MAX_WAIT_S``. A request gives up after ``retries`` resends,
or sooner when not a single byte has arrived for ``silent_s`` (a silent link: the board's
watchdog has killed by then if it was armed) or when ``WRONG_GIVE_UP`` replies with its seq
were all of another kind (a board that does not follow the protocol, not a lossy link); while the link stays silent after such a failure,
later requests get one resend only, so that shutting down on a dead link does not take minutes.
The ``LinkTimeout`` it raises says what arrived meanwhile (damaged frames, replies of another
kind, intact frames, nothing at all) and, when the board reported a kill during the wait, names
that kill first (its ``report`` attribute holds the figures as a :class:`RequestReport`).

A Kill is written at once and resent with FLAG_RETRY until its own Ack arrives or the link
ends; the board executes every Kill frame it receives (never from its cache).

The link ends in one of two ways. *Lost*: a read or write of the port failed (cable pulled,
adapter gone, the other end closed); ``lost_reason`` says why in one line, the ``on_lost``
subscribers are told once, and every request (waiting or new) raises ``LinkError``. *Closed*:
``close()`` was called; requests waiting and new ones raise ``LinkError`` at once, nothing more
is written and no loss is reported.
"""

from __future__ import annotations

import errno
import random
import re
import statistics
import threading
import time
from collections import deque
from dataclasses import dataclass
from typing import Any, Callable

import serial

from protocol import codec
from protocol import messages as m
from protocol.messages import (FLAG_REPLY, FLAG_RETRY, PROTOCOL_MAJOR, DeviceState, Event,
                               EventKind, Keepalive, Kill, Telemetry)

from .errors import LinkError, LinkTimeout  # re-exported: agent.link.LinkError
from .replies import (DAMAGE_KINDS, ForeignVersion, RequestReport, answers, kind_of,
                      loss_reason)

TIMEOUT_S = 0.2  # the longest first wait of a request (the adaptive wait is usually shorter)
MIN_WAIT_S = 0.05  # the shortest first wait
RETRIES = 9  # resends after the first try
BACKOFF = 1.5  # each wait this much longer than the one before ...
MAX_WAIT_S = 1.0  # ... up to this
SILENT_S = 3.0  # give up when not one byte arrived for this long (longer than a watchdog)
WRONG_GIVE_UP = 3  # give up after this many replies of another kind (a protocol mismatch)
KILL_MAX_WAIT_S = 0.5  # a Kill is resent at least this often until acknowledged


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
    wrong_replies: int = 0  # replies with a waiting request's seq but of another kind: ignored
    late_replies: int = 0  # replies nobody waits for (after a time-out, a second copy)
    kills_acknowledged: int = 0
    latency_ms_last: float = float("nan")
    latency_ms_median: float = float("nan")

    def as_dict(self) -> dict:
        """The counters by name (for the session log's manifest)."""
        return dict(self.__dict__)


class _Pending:
    """One request waiting for its reply: the reader thread fills ``reply`` and sets ``event``
    (only with a reply that answers it); a lost or closed link sets ``event`` with ``reply``
    still None. The counters at its start let its error say what arrived meanwhile."""

    __slots__ = ("seq", "msg", "event", "reply", "sent_at", "tries", "t0", "bytes0",
                 "frames0", "damage0", "other")

    def __init__(self, seq: int, msg: Any, link: "Link"):
        self.seq = seq
        self.msg = msg
        self.event = threading.Event()
        self.reply: Any = None
        self.sent_at = 0.0
        self.tries = 0
        self.t0 = link.clock()
        self.bytes0 = link.stats.bytes_in
        self.frames0 = link.stats.frames_in
        self.damage0 = link._damage_counts()
        self.other: list[str] = []


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
        The longest first wait of a request for its reply (default for ``request``); the
        waits after it grow by ``BACKOFF`` up to ``MAX_WAIT_S``.
    retries : int
        Resends after the first try (default for ``request``).
    keepalive_s : float
        Period of the keepalive thread; keep it well under the board's ``watchdog_s``.
    clock : callable
        Host time in s for stats, the keepalive stamp and the subscribers' time argument.
    first_seq : int, optional
        The first request's sequence number (SPEC 8: a random start by default).

    Raises
    ------
    LinkError
        From :func:`open_port` when the port cannot be opened.

    Starting the link starts its reader and keepalive threads (daemons); ``close()`` ends them.
    """

    def __init__(self, port: str | Any, *, baudrate: int = 921600, timeout_s: float = TIMEOUT_S,
                 retries: int = RETRIES, keepalive_s: float = 0.1,
                 clock: Callable[[], float] = time.monotonic, first_seq: int | None = None):
        self.port_name = port if isinstance(port, str) else (
            getattr(port, "name", None) or getattr(port, "port", None) or type(port).__name__)
        if not isinstance(self.port_name, str):
            self.port_name = type(port).__name__
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
        start = random.randrange(0x10000) if first_seq is None else int(first_seq)
        self._seq = (start - 1) & 0xFFFF  # the request counter: requests and kills only
        self._ka_seq = 0  # the keepalives' own counter
        self._pending: dict[int, _Pending] = {}
        self._telemetry_subs: list[Callable[[float, Telemetry], None]] = []
        self._event_subs: list[Callable[[float, Event], None]] = []
        self._lost_subs: list[Callable[[str], None]] = []
        self._latencies: deque[float] = deque(maxlen=200)
        self._silent_mark: int | None = None  # bytes_in when a request last found the link mute
        self.board_state: DeviceState | None = None  # as the board's telemetry and events say
        self.killed_at: float | None = None  # host time the board was last seen to become KILLED
        self.last_kill: Event | None = None  # the board's latest KILL_TRIPPED event
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
                self._mark_lost(loss_reason("write", exc))
                raise self._ended() from None
            self.stats.frames_out += 1
            self.stats.bytes_out += len(data)

    def send(self, msg) -> int:
        """Send a message that expects no reply (Keepalive), numbered on the keepalives' own
        counter; any thread.

        Returns
        -------
        int
            The frame's sequence number.

        Raises
        ------
        LinkError
            The link is closed or lost, or the write failed (the link is then lost).
        """
        with self._seq_lock:
            self._ka_seq = (self._ka_seq + 1) & 0xFFFF
            seq = self._ka_seq
        self._write(codec.encode(msg, seq))
        return seq

    def _first_wait(self, timeout_s: float) -> float:
        """Four round trips of this link (median of first-try replies), within [MIN_WAIT_S,
        timeout_s]; ``timeout_s`` until a round trip was measured."""
        vals = list(self._latencies)
        if len(vals) < 5:
            return timeout_s
        return min(timeout_s, max(MIN_WAIT_S, 4e-3 * statistics.median(vals)))

    def _damage_counts(self) -> tuple[int, ...]:
        st = self.decoder.stats
        return tuple(getattr(st, name) for name, _ in DAMAGE_KINDS)

    def request(self, msg, *, timeout_s: float | None = None, retries: int | None = None,
                silent_s: float = SILENT_S):
        """Send ``msg`` and wait for the reply that answers it (seq and type, see the module
        docstring); any thread but the reader's (which delivers the reply).

        Parameters
        ----------
        msg : a host message of protocol.messages
        timeout_s, retries : float, int, optional
            Override the link's defaults for this call (the first wait's bound, resends).
        silent_s : float
            Give up once not a single byte has arrived for this long.

        Returns
        -------
        The reply message (Ack, Refuse or the data reply), or a :class:`ForeignVersion` when
        the reply came in another protocol major. Refusals are returned, not raised.

        Raises
        ------
        LinkTimeout
            No answer after every try; its text (and ``report``) says what arrived meanwhile.
        LinkError
            The link is closed or lost, before or while waiting.
        """
        timeout_s = self.timeout_s if timeout_s is None else timeout_s
        retries = self.retries if retries is None else retries
        if self._silent_mark is not None and self.stats.bytes_in == self._silent_mark:
            retries = min(retries, 1)  # still mute since the last request found it so
        seq = self._next_seq()
        pend = _Pending(seq, msg, self)
        self._pending[seq] = pend
        wait = self._first_wait(timeout_s)
        try:
            for attempt in range(retries + 1):
                frame = codec.encode(msg, seq, FLAG_RETRY if attempt else 0)
                if attempt:
                    self.stats.retries += 1
                pend.sent_at = self.clock()
                pend.tries += 1
                self._write(frame)
                if pend.event.wait(wait):
                    if pend.reply is None:  # woken by a loss or by close(), not by a reply
                        raise self._ended()
                    self._silent_mark = None
                    return pend.reply
                if self.lost_reason is not None or self._closed:
                    raise self._ended()
                if self.stats.bytes_in == pend.bytes0 and self.clock() - pend.t0 >= silent_s:
                    break
                if len(pend.other) >= WRONG_GIVE_UP:  # answered, but never in kind: no loss
                    break
                wait = min(wait * BACKOFF, max(MAX_WAIT_S, timeout_s))
            self.stats.timeouts += 1
            report = self._report(pend)
            if report.bytes_in == 0:
                self._silent_mark = self.stats.bytes_in
            exc = LinkTimeout(report.describe(self.port_name))
            exc.report = report
            raise exc
        finally:
            self._pending.pop(seq, None)

    def _report(self, pend: _Pending) -> RequestReport:
        now = self.clock()
        damage = tuple((label, n - n0) for (_, label), n, n0 in
                       zip(DAMAGE_KINDS, self._damage_counts(), pend.damage0))
        kill = self.last_kill if (self.last_kill is not None and self.killed_at is not None
                                  and self.killed_at >= pend.t0) else None
        killed = self.killed_at is not None and self.killed_at >= pend.t0
        return RequestReport(type(pend.msg).__name__, pend.tries, now - pend.t0,
                             self.stats.bytes_in - pend.bytes0,
                             self.stats.frames_in - pend.frames0, damage, tuple(pend.other),
                             kill, killed)

    def send_kill(self, reason: int, value: float = 0.0) -> float:
        """Write a Kill frame at once, without waiting; safe from any thread, the reader's too.

        A thread of its own then makes sure of it: until the Kill's own Ack arrives (a reply of
        another kind with its seq does not count), it resends the frame with FLAG_RETRY, first
        after ``timeout_s``, then at growing intervals up to ``KILL_MAX_WAIT_S``, and stops only
        when the link is lost or closed (the board's watchdog kills then).

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
        pend = _Pending(seq, msg, self)
        self._pending[seq] = pend
        try:
            self._write(codec.encode(msg, seq))
        except LinkError:
            self._pending.pop(seq, None)
            raise
        t = self.clock()

        def confirm():  # on the tetherloop-kill-confirm thread
            wait = min(self.timeout_s, KILL_MAX_WAIT_S)
            try:
                while not pend.event.wait(wait):
                    if self.lost_reason is not None or self._closed:
                        return
                    self.stats.retries += 1
                    self._write(codec.encode(msg, seq, FLAG_RETRY))
                    wait = min(wait * BACKOFF, KILL_MAX_WAIT_S)
                if pend.reply is not None:
                    self.stats.kills_acknowledged += 1
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
                self._mark_lost(loss_reason("read", exc))
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
            self._take_reply(now, frame.seq, msg)
            return
        if isinstance(msg, Telemetry):
            self.stats.telemetry += 1
            self._note_state(now, msg.state)
            self._tell(self._telemetry_subs, now, msg)
        elif isinstance(msg, Event):
            self.stats.events += 1
            if msg.kind == EventKind.KILL_TRIPPED:
                self.last_kill = msg
                self.killed_at = now
            self._note_state(now, msg.state)
            self._tell(self._event_subs, now, msg)

    def _take_reply(self, now: float, seq: int, msg: Any) -> None:
        pend = self._pending.get(seq)
        if pend is None or pend.event.is_set():
            # late (after a time-out) or a second copy (the board's cache answering a resend)
            self.stats.late_replies += 1
            return
        if not answers(pend.msg, msg):
            self.stats.wrong_replies += 1
            pend.other.append(kind_of(msg))
            return
        pend.reply = msg
        lat = (now - pend.sent_at) * 1000.0
        self.stats.latency_ms_last = lat
        if pend.tries == 1:  # Karn's rule: a resent request's round trip is ambiguous
            self._latencies.append(lat)
        if isinstance(msg, m.Ack):
            self._note_state(now, msg.state)
        pend.event.set()

    def _note_state(self, now: float, state: int) -> None:
        if state not in DeviceState._value2member_map_:
            return
        state = DeviceState(state)
        if state == DeviceState.KILLED and self.board_state != DeviceState.KILLED:
            self.killed_at = now
        self.board_state = state

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
        """Median round trip (ms) of the last 200 requests answered at their first try, NaN
        before the first; also stored in ``stats.latency_ms_median``."""
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
