"""A minimal synchronous protocol client for the mock's own tests and demos.

It is NOT the agent's link layer (agent/link.py): no reader thread, no retries beyond what a test
asks for. It works on anything shaped like ``serial.Serial`` (a pty opened with pyserial, a
``socket://`` URL, the in-process port) and sets the port's read time-out to 0.
"""

from __future__ import annotations

import time

from protocol import codec
from protocol import messages as M


class HostClient:
    def __init__(self, port, clock=time.monotonic):
        self.port = port
        port.timeout = 0  # reads return what is there; the client does its own waiting
        self.decoder = codec.StreamDecoder()
        self.seq = 1
        self.telemetry: list = []
        self.events: list = []
        self.others: list = []
        self._clock = clock

    def send(self, msg, flags: int = 0, seq: int | None = None) -> int:
        if seq is None:
            seq = self.seq
            self.seq = (self.seq + 1) & 0xFFFF
        self.port.write(codec.encode(msg, seq, flags))
        return seq

    def poll(self, wait_s: float = 0.0) -> list:
        """Read what is there (waiting up to ``wait_s`` for the first bytes); sort frames."""
        frames = []
        end = self._clock() + wait_s
        while True:
            data = self.port.read(65536) if self.port.in_waiting else b""
            if data:
                for f in self.decoder.feed(data):
                    frames.append(f)
                    if isinstance(f.msg, M.Telemetry):
                        self.telemetry.append(f.msg)
                    elif isinstance(f.msg, M.Event):
                        self.events.append(f.msg)
                    else:
                        self.others.append(f)
            if frames or self._clock() >= end:
                return frames
            if not data:
                time.sleep(0.001)

    def request(self, msg, timeout_s: float = 2.0, flags: int = 0, seq: int | None = None):
        """Send and wait for the reply frame with the same seq; returns the Frame."""
        seq = self.send(msg, flags, seq)
        end = self._clock() + timeout_s
        while self._clock() < end:
            for f in self.poll(0.01):
                if f.flags & M.FLAG_REPLY and f.seq == seq:
                    self.others.remove(f)
                    return f
        raise TimeoutError(f"no reply to {type(msg).__name__} (seq {seq}) within {timeout_s} s")

    def wait_event(self, kind, timeout_s: float = 5.0):
        end = self._clock() + timeout_s
        while True:
            for e in self.events:
                if e.kind == kind:
                    self.events.remove(e)
                    return e
            if self._clock() >= end:
                raise TimeoutError(f"no {M.EventKind(kind).name} event within {timeout_s} s")
            self.poll(0.01)

    def arm(self, keepalive: bool = True):
        """Keepalive, ArmRequest, ArmConfirm; returns the confirm's reply Frame."""
        if keepalive:
            self.send(M.Keepalive(host_time_ms=int(self._clock() * 1000) & 0xFFFFFFFF))
        ch = self.request(M.ArmRequest())
        if not isinstance(ch.msg, M.ArmChallenge):
            return ch
        return self.request(M.ArmConfirm(response=ch.msg.token ^ 0xFFFFFFFF,
                                          operator_confirmed=1))
