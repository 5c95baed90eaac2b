"""Writing session logs: crash-safe, incremental, append-only.

Policy (documented in FORMAT.md):

- Telemetry rows are formatted as CSV lines as they arrive and kept in a bounded in-memory buffer.
  The buffer is written to the file (one ``os.write``) when it holds ``flush_rows`` rows, or when
  its oldest row is ``flush_interval_s`` old (checked on every append and by a small background
  flusher thread, so a silent link does not leave rows in memory).
- ``os.fsync`` runs at checkpoints: every ``fsync_interval_s`` while rows flow, on every event
  whose kind starts with ``kill``, when a result is written, and when an experiment or the session
  closes. Events are written one line per ``os.write`` as they happen.
- JSON documents (manifest, meta, results) are replaced atomically (temp + fsync + os.replace).
- When a write fails (disk full, media gone) the file is cut back to its last whole row, the error
  is kept and every later call on that log raises :class:`LogbookError`; what was written before
  stays readable.
"""

from __future__ import annotations

import errno
import os
import platform
import shutil
import socket
import sys
import threading
import time
from datetime import datetime, timezone
from pathlib import Path
from typing import Any

from .format import (EVENTS, FORMAT_NAME, FORMAT_VERSION, MANIFEST, META, RESULTS, TELEMETRY,
                     TELEMETRY_COMMENT, TELEMETRY_HEADER, LogbookError, atomic_write_json,
                     check_name, dumps, fsync_dir, slug)

DEFAULT_MIN_FREE_BYTES = 100 * 1024 * 1024
DEFAULT_FLUSH_INTERVAL_S = 0.1
DEFAULT_FLUSH_ROWS = 800
DEFAULT_FSYNC_INTERVAL_S = 1.0
MAX_BUFFER_ROWS = 100_000  # hard bound on rows held in memory per experiment


def default_log_dir() -> Path:
    """The log folder: ``$TETHERLOOP_LOG_DIR``, else ``$XDG_DATA_HOME/tetherloop/logs``, else
    ``~/.local/share/tetherloop/logs`` (XDG base directory convention)."""
    env = os.environ.get("TETHERLOOP_LOG_DIR")
    if env:
        return Path(env).expanduser()
    xdg = os.environ.get("XDG_DATA_HOME")
    if xdg and os.path.isabs(xdg):  # the XDG spec says relative values are to be ignored
        return Path(xdg) / "tetherloop" / "logs"
    return Path.home() / ".local" / "share" / "tetherloop" / "logs"


def _utc_iso(t: float) -> str:
    return datetime.fromtimestamp(t, timezone.utc).isoformat(timespec="milliseconds")


def _explain_os_error(exc: OSError, doing: str, path: Path) -> LogbookError:
    if exc.errno == errno.ENOSPC or exc.errno == getattr(errno, "EDQUOT", -1):
        hint = "the disk is full; free some space or choose another log folder (--log-dir)"
    elif exc.errno in (errno.EACCES, errno.EPERM, errno.EROFS):
        hint = ("the folder is not writable by this user; fix its permissions or choose another "
                "log folder (--log-dir or TETHERLOOP_LOG_DIR)")
    else:
        hint = "check the folder and the disk, or choose another log folder (--log-dir)"
    return LogbookError(f"could not {doing} {path}: {exc.strerror or exc}; {hint}.")


def _write_all(fd: int, data: bytes) -> None:
    view = memoryview(data)
    while view:
        n = os.write(fd, view)
        if n <= 0:  # pragma: no cover - os.write raises instead on POSIX
            raise OSError(errno.EIO, "short write")
        view = view[n:]


class Logbook:
    """Where session logs go, and the checks made before anything is armed.

    Parameters
    ----------
    log_dir
        Folder holding one sub-folder per session; default :func:`default_log_dir`.
    min_free_bytes
        ``open_session`` refuses to start with less free space than this.
    flush_interval_s, flush_rows, fsync_interval_s
        Telemetry write policy (see module docstring).
    """

    def __init__(self, log_dir: Path | str | None = None, *,
                 min_free_bytes: int = DEFAULT_MIN_FREE_BYTES,
                 flush_interval_s: float = DEFAULT_FLUSH_INTERVAL_S,
                 flush_rows: int = DEFAULT_FLUSH_ROWS,
                 fsync_interval_s: float = DEFAULT_FSYNC_INTERVAL_S):
        self.log_dir = Path(log_dir).expanduser() if log_dir is not None else default_log_dir()
        self.min_free_bytes = int(min_free_bytes)
        self.flush_interval_s = float(flush_interval_s)
        self.flush_rows = max(1, int(flush_rows))
        self.fsync_interval_s = float(fsync_interval_s)

    def check_ready(self) -> None:
        """Raise LogbookError unless the log folder exists (or can be made), is writable and has
        at least ``min_free_bytes`` free."""
        d = self.log_dir
        try:
            d.mkdir(parents=True, exist_ok=True)
        except FileExistsError:
            raise LogbookError(f"the log folder {d} exists but is not a folder; choose another "
                               "log folder (--log-dir or TETHERLOOP_LOG_DIR).") from None
        except OSError as exc:
            raise _explain_os_error(exc, "create the log folder", d) from None
        if not d.is_dir():
            raise LogbookError(f"the log folder {d} is not a folder; choose another log folder "
                               "(--log-dir or TETHERLOOP_LOG_DIR).")
        probe = d / f".write-probe-{os.getpid()}-{threading.get_ident()}"
        try:
            fd = os.open(probe, os.O_WRONLY | os.O_CREAT | os.O_EXCL, 0o644)
            try:
                _write_all(fd, b"probe\n")
                os.fsync(fd)
            finally:
                os.close(fd)
                os.unlink(probe)
        except OSError as exc:
            raise _explain_os_error(exc, "write in the log folder", d) from None
        free = shutil.disk_usage(d).free
        if free < self.min_free_bytes:
            raise LogbookError(
                f"only {free / 1e6:.1f} MB are free on the disk holding {d}; the logbook needs "
                f"at least {self.min_free_bytes / 1e6:.0f} MB to record a session (about 0.6 MB "
                "per second of 2 kHz four-axis telemetry). Free some space or choose another log "
                "folder (--log-dir or TETHERLOOP_LOG_DIR).")

    def open_session(self, *, device: dict, settings_before: dict, plan: dict, tool_version: str,
                     protocol_version: str, name: str | None = None,
                     confirmations: dict | None = None) -> "SessionLog":
        """Create a new session folder and its manifest and event stream.

        Raises
        ------
        LogbookError
            Folder not writable, disk (nearly) full, or the session folder exists already.
        """
        self.check_ready()
        now = time.time()
        if name is not None:
            check_name(name, "session")
            candidates = [name]
        else:
            device_id = (device or {}).get("device_id", "device") if isinstance(device, dict) \
                else getattr(device, "device_id", "device")
            base = f"{datetime.fromtimestamp(now, timezone.utc):%Y%m%dT%H%M%SZ}_{slug(device_id)}"
            candidates = [base] + [f"{base}-{k}" for k in range(2, 100)]
        for cand in candidates:
            path = self.log_dir / cand
            try:
                os.mkdir(path)
                break
            except FileExistsError:
                continue
            except OSError as exc:
                raise _explain_os_error(exc, "create the session folder", path) from None
        else:
            if name is not None:
                raise LogbookError(
                    f"the session folder {self.log_dir / name} already exists; a session log is "
                    "never overwritten. Choose another session name, or move the old folder away.")
            raise LogbookError(f"could not find a free session name in {self.log_dir}.")
        fsync_dir(self.log_dir)
        manifest = {
            "format": FORMAT_NAME,
            "format_version": FORMAT_VERSION,
            "name": path.name,
            "tool_version": tool_version,
            "protocol_version": protocol_version,
            "device": device,
            "settings_before": settings_before,
            "settings_after": None,
            "plan": plan,
            "confirmations": confirmations or {},
            "started_at": _utc_iso(now),
            "started_host_time_s": now,
            "ended_at": None,
            "ended_host_time_s": None,
            "outcome": None,
            "host": {"hostname": socket.gethostname(), "platform": platform.platform(),
                     "python": sys.version.split()[0], "pid": os.getpid()},
            "experiments": [],
        }
        try:
            atomic_write_json(path / MANIFEST, manifest)
        except OSError as exc:
            raise _explain_os_error(exc, "write the session manifest in", path) from None
        return SessionLog(self, path, manifest)


class SessionLog:
    """One session's folder: manifest, event stream and experiment sub-folders.

    Thread-safe: events may come from the link's reader thread while a workflow appends.
    """

    def __init__(self, logbook: Logbook, path: Path, manifest: dict):
        self.path = Path(path)
        self.name = self.path.name
        self._book = logbook
        self._manifest = manifest
        self._lock = threading.RLock()
        self._experiments: dict[str, ExperimentLog] = {}
        self._seq = 0
        self._closed = False
        try:
            self._events_fd = os.open(self.path / EVENTS,
                                      os.O_WRONLY | os.O_CREAT | os.O_APPEND, 0o644)
        except OSError as exc:
            raise _explain_os_error(exc, "create the event stream in", self.path) from None
        self._stop = threading.Event()
        self._flusher = threading.Thread(target=self._flush_loop, name=f"logbook-{self.name}",
                                         daemon=True)
        self._flusher.start()
        self.event("session_opened", tool_version=manifest["tool_version"],
                   protocol_version=manifest["protocol_version"])

    # ------------------------------------------------------------------ public API
    @property
    def manifest(self) -> dict:
        """A copy of the manifest as last written."""
        with self._lock:
            return dict(self._manifest)

    def event(self, kind: str, *, host_time_s: float | None = None,
              device_time_us: int | None = None, **fields: Any) -> None:
        """Append one event line. Kinds starting with ``kill`` flush every open experiment's
        telemetry and fsync it and the event stream before returning."""
        if not isinstance(kind, str) or not kind:
            raise LogbookError(f"an event needs a non-empty text kind, got {kind!r}.")
        rec = {"seq": 0, "kind": kind,
               "host_time_s": time.time() if host_time_s is None else float(host_time_s),
               "device_time_us": None if device_time_us is None else int(device_time_us)}
        for key, value in fields.items():
            if key in rec:
                raise LogbookError(f"event field {key!r} is reserved; rename it.")
            rec[key] = value
        kill = kind.lower().startswith("kill")
        with self._lock:
            if self._closed:
                raise LogbookError(f"session log {self.name} is closed; no more events.")
            self._seq += 1
            rec["seq"] = self._seq
            try:
                line = dumps(rec)
            except TypeError as exc:
                raise LogbookError(f"event {kind!r} has a field that cannot be written as JSON "
                                   f"({exc}); pass numbers, text, lists or dicts.") from None
            try:
                if kill:  # telemetry up to the kill first, then the kill line, then fsync all
                    for exp in self._experiments.values():
                        exp._flush_quietly(fsync=True)
                _write_all(self._events_fd, (line + "\n").encode("utf-8"))
                if kill:
                    os.fsync(self._events_fd)
            except OSError as exc:
                raise _explain_os_error(exc, "write an event to", self.path / EVENTS) from None

    def device_event(self, ev: Any, host_time_s: float | None = None) -> None:
        """Log a protocol ``Event`` message under a kind derived from its EventKind
        (``kill_tripped``, ``experiment_finished`` ...), with reasons named."""
        from protocol.messages import (DeviceState, EventKind, FinishReason, KillReason)

        def _name(enum_, value):
            try:
                return enum_(value).name.lower()
            except ValueError:
                return int(value)
        kind = _name(EventKind, ev.kind)
        kind = kind if isinstance(kind, str) else f"device_event_{kind}"
        reason: Any = ev.reason
        if ev.kind == EventKind.KILL_TRIPPED:
            reason = _name(KillReason, ev.reason)
        elif ev.kind == EventKind.EXPERIMENT_FINISHED:
            reason = _name(FinishReason, ev.reason)
        self.event(kind, host_time_s=host_time_s, device_time_us=ev.time_us, source="device",
                   state=_name(DeviceState, ev.state), reason=reason, axis=ev.axis,
                   value=ev.value, threshold=ev.threshold, tag=ev.tag, text=ev.text)

    def experiment(self, exp_id: str, meta: dict) -> "ExperimentLog":
        """Create the experiment's sub-folder with meta.json and an empty telemetry file."""
        check_name(exp_id, "experiment")
        if exp_id in ("manifest.json", "events.jsonl"):
            raise LogbookError(f"experiment id {exp_id!r} is reserved; choose another.")
        with self._lock:
            if self._closed:
                raise LogbookError(f"session log {self.name} is closed; no new experiments.")
            path = self.path / exp_id
            try:
                os.mkdir(path)
            except FileExistsError:
                raise LogbookError(f"experiment {exp_id!r} already exists in session "
                                   f"{self.name}; use a new experiment id.") from None
            except OSError as exc:
                raise _explain_os_error(exc, "create the experiment folder", path) from None
            now = time.time()
            doc = {"format": FORMAT_NAME, "format_version": FORMAT_VERSION, "exp_id": exp_id,
                   "created_at": _utc_iso(now), "created_host_time_s": now, "meta": meta}
            try:
                atomic_write_json(path / META, doc)
            except TypeError as exc:
                raise LogbookError(f"experiment {exp_id!r} meta cannot be written as JSON "
                                   f"({exc}).") from None
            except OSError as exc:
                raise _explain_os_error(exc, "write meta.json in", path) from None
            exp = ExperimentLog(self, path, exp_id)
            self._experiments[exp_id] = exp
            entry = {"id": exp_id, "kind": (meta or {}).get("kind"),
                     "axis_name": (meta or {}).get("axis_name"),
                     "loop_name": (meta or {}).get("loop_name"), "closed": False, "rows": 0}
            self._manifest["experiments"] = list(self._manifest["experiments"]) + [entry]
            self._write_manifest()
        self.event("experiment_opened", exp_id=exp_id, kind_of_experiment=entry["kind"])
        return exp

    def update_manifest(self, **fields: Any) -> None:
        """Merge ``fields`` into the manifest and replace it atomically."""
        reserved = {"format", "format_version", "name", "experiments"}
        bad = reserved & fields.keys()
        if bad:
            raise LogbookError(f"manifest fields {sorted(bad)} are managed by the logbook.")
        with self._lock:
            self._manifest.update(fields)
            self._write_manifest()

    def flush(self, fsync: bool = False) -> None:
        """Write every open experiment's buffered rows now (and fsync when asked)."""
        with self._lock:
            for exp in list(self._experiments.values()):
                if not exp._closed:
                    exp.flush(fsync=fsync)
            if fsync:
                os.fsync(self._events_fd)

    def close(self, outcome: str) -> None:
        """Close open experiments, record the outcome and end time, fsync everything."""
        with self._lock:
            if self._closed:
                return
            errors = []
            for exp in list(self._experiments.values()):
                try:
                    exp.close()
                except LogbookError as exc:
                    errors.append(str(exc))
            now = time.time()
            self._manifest.update(outcome=outcome, ended_at=_utc_iso(now), ended_host_time_s=now)
            try:
                self._write_manifest()
                self.event("session_closed", host_time_s=now, outcome=outcome)
                os.fsync(self._events_fd)
            finally:
                self._closed = True
                self._stop.set()
                os.close(self._events_fd)
        if self._flusher is not threading.current_thread():
            self._flusher.join(timeout=2.0)
        if errors:
            raise LogbookError("; ".join(errors))

    def __enter__(self) -> "SessionLog":
        return self

    def __exit__(self, exc_type, exc, tb) -> None:
        if exc_type is None:
            self.close("completed")
        else:
            self.close(f"aborted: {exc_type.__name__}: {exc}")

    # ------------------------------------------------------------------ internals
    def _write_manifest(self) -> None:
        try:
            atomic_write_json(self.path / MANIFEST, self._manifest)
        except TypeError as exc:
            raise LogbookError(f"a manifest field cannot be written as JSON ({exc}).") from None
        except OSError as exc:
            raise _explain_os_error(exc, "update the manifest in", self.path) from None

    def _experiment_closed(self, exp: "ExperimentLog") -> None:
        with self._lock:
            entries = []
            for e in self._manifest["experiments"]:
                if e.get("id") == exp.exp_id:
                    e = dict(e, closed=True, rows=exp.rows_written)
                entries.append(e)
            self._manifest["experiments"] = entries
            self._write_manifest()

    def _flush_loop(self) -> None:
        period = max(0.005, self._book.flush_interval_s / 2)
        while not self._stop.wait(period):
            with self._lock:
                exps = [e for e in self._experiments.values() if not e._closed]
            for exp in exps:
                exp._flush_if_due()


class ExperimentLog:
    """Telemetry and result of one experiment. ``append`` is cheap; I/O is batched."""

    def __init__(self, session: SessionLog, path: Path, exp_id: str):
        self.path = Path(path)
        self.exp_id = exp_id
        self._session = session
        book = session._book
        self._flush_rows = book.flush_rows
        self._flush_interval_s = book.flush_interval_s
        self._fsync_interval_s = book.fsync_interval_s
        self._lock = threading.Lock()
        self._buf: list[str] = []
        self._buf_since = 0.0
        self._closed = False
        self._error: LogbookError | None = None
        self.rows_written = 0
        self.rows_dropped = 0
        file = self.path / TELEMETRY
        try:
            self._fd = os.open(file, os.O_WRONLY | os.O_CREAT | os.O_APPEND, 0o644)
            head = (TELEMETRY_COMMENT + TELEMETRY_HEADER).encode("utf-8")
            _write_all(self._fd, head)
            os.fsync(self._fd)
        except OSError as exc:
            raise _explain_os_error(exc, "create the telemetry file", file) from None
        self._good_size = len(head)
        self._last_fsync = time.monotonic()

    def append(self, host_time_s: float, tel: Any) -> None:
        """Record one telemetry sample (one row per axis entry).

        Raises LogbookError if an earlier write failed (the file is intact up to that point).
        """
        pre = f"{host_time_s:.6f},{tel.time_us},{tel.counter},{tel.state},{tel.tag},"
        lines = [f"{pre}{a.axis},{a.loop},{a.setpoint:.9g},{a.measurement:.9g},"
                 f"{a.output:.9g},{a.relay}\n" for a in tel.axes]
        now = time.monotonic()
        with self._lock:
            if self._error is not None:
                raise self._error
            if self._closed:
                raise LogbookError(f"experiment {self.exp_id!r} is closed; no more telemetry.")
            if not self._buf:
                self._buf_since = now
            self._buf.extend(lines)
            if len(self._buf) > MAX_BUFFER_ROWS:  # cannot happen unless writes stall for long
                drop = len(self._buf) - MAX_BUFFER_ROWS
                del self._buf[:drop]
                self.rows_dropped += drop
            due = (len(self._buf) >= self._flush_rows
                   or now - self._buf_since >= self._flush_interval_s)
            if due:
                self._flush_locked(fsync=False)

    def flush(self, fsync: bool = False) -> None:
        """Write the buffered rows now; fsync when asked. Raises LogbookError on write errors."""
        with self._lock:
            if self._error is not None:
                raise self._error
            if not self._closed:
                self._flush_locked(fsync=fsync)

    def result(self, result: dict) -> None:
        """Write results.json atomically (a checkpoint: telemetry is flushed and fsynced)."""
        self.flush(fsync=not self._closed)
        doc = {"format": FORMAT_NAME, "format_version": FORMAT_VERSION, "exp_id": self.exp_id,
               "written_at": _utc_iso(time.time()), "result": result}
        try:
            atomic_write_json(self.path / RESULTS, doc)
        except TypeError as exc:
            raise LogbookError(f"the result of experiment {self.exp_id!r} cannot be written as "
                               f"JSON ({exc}).") from None
        except OSError as exc:
            raise _explain_os_error(exc, "write results.json in", self.path) from None

    def close(self) -> None:
        """Flush, fsync and close the telemetry file; note the row count in the manifest."""
        with self._lock:
            if self._closed:
                return
            try:
                if self._error is None:
                    self._flush_locked(fsync=True)
            finally:
                self._closed = True
                os.close(self._fd)
        self._session._experiment_closed(self)
        if self._error is not None:
            raise self._error

    # ------------------------------------------------------------------ internals
    def _flush_locked(self, fsync: bool) -> None:
        if self._buf:
            data = "".join(self._buf).encode("ascii")
            n = len(self._buf)
            try:
                _write_all(self._fd, data)
            except OSError as exc:
                self._fail(exc)
                raise self._error from None
            self._buf.clear()
            self._good_size += len(data)
            self.rows_written += n
        now = time.monotonic()
        if fsync or now - self._last_fsync >= self._fsync_interval_s:
            try:
                os.fsync(self._fd)
            except OSError as exc:
                self._fail(exc)
                raise self._error from None
            self._last_fsync = now

    def _fail(self, exc: OSError) -> None:
        # Cut a partly written row so the file ends on a whole row, keep the error for later.
        try:
            os.ftruncate(self._fd, self._good_size)
        except OSError:
            pass
        self.rows_dropped += len(self._buf)
        self._buf.clear()
        self._error = _explain_os_error(exc, "write telemetry to", self.path / TELEMETRY)

    def _flush_if_due(self) -> None:
        with self._lock:
            if (self._closed or self._error is not None or not self._buf
                    or time.monotonic() - self._buf_since < self._flush_interval_s):
                return
            try:
                self._flush_locked(fsync=False)
            except LogbookError:
                pass  # kept in self._error, raised on the next append/flush/close

    def _flush_quietly(self, fsync: bool) -> None:
        with self._lock:
            if self._closed or self._error is not None:
                return
            try:
                self._flush_locked(fsync=fsync)
            except LogbookError:
                pass
