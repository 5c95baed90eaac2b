"""Device-side links of the mock board: pseudo-terminal, TCP and an in-process pair.

Every device side offers ``read() -> bytes`` and ``write(data) -> int`` that never block: a read
returns what is there (possibly nothing); a write accepts what fits and returns the count, the
caller drops and counts the rest. ``port`` is what a host opens: a device path for pyserial, a
``socket://127.0.0.1:PORT`` URL, or (in-process) a pyserial-like object.
"""

from __future__ import annotations

import errno
import os
import socket
import threading
import time
import tty


class PtyLink:
    """A pseudo-terminal in raw mode. The mock keeps the slave open too, so the master never
    sees EIO when a host closes and re-opens the path."""

    def __init__(self):
        self._master, self._slave = os.openpty()
        tty.setraw(self._slave)  # no echo, no CR/LF translation, no signals, 8-bit clean
        os.set_blocking(self._master, False)
        self.port = os.ttyname(self._slave)

    def read(self) -> bytes:
        try:
            return os.read(self._master, 65536)
        except BlockingIOError:
            return b""
        except OSError as exc:
            if exc.errno in (errno.EIO, errno.EAGAIN):
                return b""
            raise

    def write(self, data: bytes) -> int:
        if not data:
            return 0
        try:
            return os.write(self._master, data)
        except BlockingIOError:
            return 0  # nobody reads: the pty is full
        except OSError as exc:
            if exc.errno in (errno.EIO, errno.EAGAIN):
                return 0
            raise

    def close(self) -> None:
        for fd in (self._master, self._slave):
            try:
                os.close(fd)
            except OSError:
                pass


class TcpLink:
    """A TCP listener on 127.0.0.1 serving one client at a time (a newer client replaces an
    older one). Hosts open ``socket://127.0.0.1:PORT`` with pyserial."""

    def __init__(self, port: int = 0):
        self._srv = socket.socket(socket.AF_INET, socket.SOCK_STREAM)
        self._srv.setsockopt(socket.SOL_SOCKET, socket.SO_REUSEADDR, 1)
        try:
            self._srv.bind(("127.0.0.1", port))
        except OSError as exc:
            self._srv.close()
            raise OSError(f"cannot listen on 127.0.0.1:{port} ({exc.strerror}); choose another "
                          f"port or 0 for any free one") from None
        self._srv.listen(1)
        self._srv.setblocking(False)
        self.tcp_port = self._srv.getsockname()[1]
        self.port = f"socket://127.0.0.1:{self.tcp_port}"
        self._client: socket.socket | None = None

    def _accept(self) -> None:
        try:
            c, _ = self._srv.accept()
        except (BlockingIOError, OSError):
            return
        c.setblocking(False)
        c.setsockopt(socket.IPPROTO_TCP, socket.TCP_NODELAY, 1)
        if self._client is not None:
            self._client.close()
        self._client = c

    def read(self) -> bytes:
        self._accept()
        c = self._client
        if c is None:
            return b""
        try:
            data = c.recv(65536)
        except (BlockingIOError, InterruptedError):
            return b""
        except OSError:
            data = b""
        if not data:  # peer closed
            c.close()
            self._client = None
        return data

    def write(self, data: bytes) -> int:
        c = self._client
        if c is None or not data:
            return 0
        try:
            return c.send(data)
        except (BlockingIOError, InterruptedError):
            return 0
        except OSError:
            c.close()
            self._client = None
            return 0

    def close(self) -> None:
        if self._client is not None:
            self._client.close()
        self._srv.close()


class _Pipe:
    """One direction of the in-process pair: a bounded byte buffer with a condition."""

    def __init__(self, limit: int):
        self.buf = bytearray()
        self.cond = threading.Condition()
        self.limit = limit
        self.closed = False

    def put(self, data: bytes) -> int:
        with self.cond:
            room = self.limit - len(self.buf)
            n = min(room, len(data))
            if n > 0:
                self.buf += data[:n]
                self.cond.notify_all()
            return max(n, 0)

    def take(self, size: int | None = None) -> bytes:
        with self.cond:
            if size is None or size >= len(self.buf):
                out = bytes(self.buf)
                self.buf.clear()
            else:
                out = bytes(self.buf[:size])
                del self.buf[:size]
            return out


class InprocSerial:
    """Host end of the in-process link, shaped like ``serial.Serial`` (read, write, in_waiting,
    timeout, read_until, reset_input_buffer, flush, close, is_open)."""

    def __init__(self, to_device: _Pipe, from_device: _Pipe, timeout: float | None = 1.0):
        self._tx = to_device
        self._rx = from_device
        self.timeout = timeout
        self.write_timeout = None
        self.port = "inproc://mock"
        self.is_open = True
        self.baudrate = 115200

    @property
    def in_waiting(self) -> int:
        return len(self._rx.buf)

    def read(self, size: int = 1) -> bytes:
        if not self.is_open:
            raise OSError("in-process port is closed")
        deadline = None if self.timeout is None else time.monotonic() + self.timeout
        rx = self._rx
        with rx.cond:
            while len(rx.buf) < size and not rx.closed:
                if deadline is None:
                    rx.cond.wait(0.1)
                    continue
                left = deadline - time.monotonic()
                if left <= 0:
                    break
                rx.cond.wait(left)
            n = min(size, len(rx.buf))
            out = bytes(rx.buf[:n])
            del rx.buf[:n]
            return out

    def read_until(self, expected: bytes = b"\n", size: int | None = None) -> bytes:
        out = bytearray()
        while size is None or len(out) < size:
            c = self.read(1)
            if not c:
                break
            out += c
            if out.endswith(expected):
                break
        return bytes(out)

    def write(self, data: bytes) -> int:
        if not self.is_open:
            raise OSError("in-process port is closed")
        return self._tx.put(bytes(data))

    def flush(self) -> None:
        pass

    def reset_input_buffer(self) -> None:
        self._rx.take()

    def reset_output_buffer(self) -> None:
        pass

    def close(self) -> None:
        self.is_open = False

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        self.close()


class InprocLink:
    """Device end of the in-process pair; ``port`` is the host's :class:`InprocSerial`."""

    def __init__(self, limit: int = 4 << 20):
        self._to_device = _Pipe(limit)
        self._from_device = _Pipe(limit)
        self.port = InprocSerial(self._to_device, self._from_device)

    def read(self) -> bytes:
        return self._to_device.take() if self._to_device.buf else b""

    def write(self, data: bytes) -> int:
        return self._from_device.put(data)

    def close(self) -> None:
        with self._from_device.cond:
            self._from_device.closed = True
            self._from_device.cond.notify_all()
