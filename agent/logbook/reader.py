"""Reading session logs, tolerant of crashes: a cut-off last line or row is dropped and reported,
a damaged line is skipped and reported, an unknown major format version is refused."""

from __future__ import annotations

import io
import json
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from .format import (COLUMNS, EVENTS, F32_COLUMNS, FORMAT_NAME, INT_COLUMNS, MANIFEST, META,
                     RESULTS, TELEMETRY, TELEMETRY_COMMENT, TELEMETRY_HEADER, LogbookError,
                     LogbookVersionError, check_version)

_TELEMETRY_MAGIC = f"# {FORMAT_NAME} telemetry "


@dataclass(frozen=True)
class ExperimentRecord:
    """One experiment as read from disk.

    Attributes
    ----------
    exp_id, path
        Experiment id (its folder name) and folder.
    meta
        What the workflow wrote when the experiment began (kind, axis, loop, relay settings ...).
    result
        The ``result`` dict of results.json, or None when no result was written.
    columns
        Telemetry columns (see ``format.COLUMNS``): float64 for host_time_s and for the f32 wire
        values (exactly the f32 values), int64 for the rest. One row per (sample, axis entry).
    recovered_rows
        Rows read back.
    notes
        What the reader had to drop or could not read, in words.
    """

    exp_id: str
    path: Path
    meta: dict
    result: dict | None
    columns: dict[str, np.ndarray]
    recovered_rows: int
    notes: list[str] = field(default_factory=list)
    created_host_time_s: float | None = None

    def axis(self, axis: int) -> dict[str, np.ndarray]:
        """The columns restricted to the rows of one axis."""
        mask = self.columns["axis"] == int(axis)
        return {k: v[mask] for k, v in self.columns.items()}

    @property
    def kind(self) -> str | None:
        return self.meta.get("kind")


@dataclass(frozen=True)
class SessionRecord:
    """A whole session read from disk; ``notes`` lists everything the reader had to recover."""

    path: Path
    name: str
    manifest: dict
    events: list[dict]
    experiments: dict[str, ExperimentRecord]
    notes: list[str] = field(default_factory=list)

    @property
    def closed(self) -> bool:
        return self.manifest.get("outcome") is not None


@dataclass(frozen=True)
class SessionSummary:
    """One line of ``tetherloop sessions``."""

    name: str
    path: Path
    started_at: str | None
    device: str
    tuned: list[str]
    outcome: str
    experiments: int
    kills: int
    problem: str | None = None


def empty_columns() -> dict[str, np.ndarray]:
    return {c: np.zeros(0, dtype=np.int64 if c in INT_COLUMNS else np.float64) for c in COLUMNS}


# ---------------------------------------------------------------------------- JSON documents

def _read_json(path: Path, what: str) -> Any:
    try:
        text = path.read_text(encoding="utf-8")
    except FileNotFoundError:
        raise
    except OSError as exc:
        raise LogbookError(f"cannot read {what} {path}: {exc.strerror or exc}.") from None
    except UnicodeDecodeError:
        raise LogbookError(f"{what} {path} is damaged (not UTF-8 text).") from None
    try:
        return json.loads(text)
    except json.JSONDecodeError as exc:
        raise LogbookError(f"{what} {path} is damaged (not valid JSON: {exc.msg} at line "
                           f"{exc.lineno}, column {exc.colno}).") from None


def _read_doc(path: Path, what: str) -> tuple[dict, list[str]]:
    doc = _read_json(path, what)
    if not isinstance(doc, dict):
        raise LogbookError(f"{what} {path} is damaged (expected a JSON object).")
    if doc.get("format") != FORMAT_NAME:
        raise LogbookError(f"{what} {path} is not a tetherloop logbook file (format is "
                           f"{doc.get('format')!r}, expected {FORMAT_NAME!r}).")
    notes = check_version(doc.get("format_version"), f"{what} {path}")
    return doc, notes


# ---------------------------------------------------------------------------- events

def read_events(path: Path) -> tuple[list[dict], list[str]]:
    """Events of a session's events.jsonl; a cut-off last line is dropped, damaged lines skipped."""
    notes: list[str] = []
    try:
        data = path.read_bytes()
    except FileNotFoundError:
        return [], [f"{path.name} is missing: no events were recorded."]
    except OSError as exc:
        return [], [f"cannot read {path}: {exc.strerror or exc}; no events recovered."]
    events: list[dict] = []
    lines = data.split(b"\n")
    tail = lines.pop()  # b"" when the file ends with a newline
    bad = []
    for i, raw in enumerate(lines, start=1):
        if not raw.strip():
            continue
        try:
            ev = json.loads(raw.decode("utf-8"))
            if not isinstance(ev, dict):
                raise ValueError
        except (ValueError, UnicodeDecodeError):
            bad.append(i)
            continue
        events.append(ev)
    if tail.strip(b"\x00 \t\r"):
        try:
            ev = json.loads(tail.decode("utf-8"))
            if isinstance(ev, dict):
                events.append(ev)  # complete but unterminated: keep it
            else:
                raise ValueError
        except (ValueError, UnicodeDecodeError):
            notes.append(f"events: the last line was cut off ({len(tail)} bytes, written when the "
                         "program stopped); dropped.")
    if bad:
        shown = ", ".join(map(str, bad[:10])) + (" ..." if len(bad) > 10 else "")
        notes.append(f"events: {len(bad)} damaged line(s) skipped (line {shown}).")
    return events, notes


# ---------------------------------------------------------------------------- telemetry

def read_telemetry(path: Path) -> tuple[dict[str, np.ndarray], list[str]]:
    """Telemetry columns of a telemetry.csv; never raises for damage, only for a refused version.

    Returns the columns and notes describing anything dropped.
    """
    notes: list[str] = []
    try:
        data = path.read_bytes()
    except FileNotFoundError:
        return empty_columns(), [f"{path.parent.name}: {path.name} is missing; no telemetry."]
    except OSError as exc:
        return empty_columns(), [f"cannot read {path}: {exc.strerror or exc}; no telemetry."]
    where = f"{path.parent.name}/{path.name}"
    first_nl = data.find(b"\n")
    if not data.strip(b"\x00"):
        return empty_columns(), [f"{where} is empty (the program stopped before its header)."]
    if (TELEMETRY_COMMENT + TELEMETRY_HEADER).encode("utf-8").startswith(data.rstrip(b"\x00")):
        return empty_columns(), [f"{where}: the header was cut off (the program stopped as the "
                                 "experiment began); no rows."]
    first = data[:first_nl if first_nl >= 0 else len(data)].decode("utf-8", "replace")
    if not first.startswith(_TELEMETRY_MAGIC):
        raise LogbookError(f"{path} is not a tetherloop telemetry file (its first line should "
                           f"start with {_TELEMETRY_MAGIC.strip()!r}).")
    version = first[len(_TELEMETRY_MAGIC):].split(";")[0].strip()
    notes += check_version(version, str(path))
    second_nl = data.find(b"\n", first_nl + 1) if first_nl >= 0 else -1
    if second_nl < 0:
        return empty_columns(), [f"{where}: the column header was cut off; no rows."]
    header = data[first_nl + 1:second_nl].decode("utf-8", "replace").strip().split(",")
    missing = [c for c in COLUMNS if c not in header]
    if missing:
        raise LogbookError(f"{path} lacks the column(s) {missing}; its header is {header}. "
                           "The file is damaged or was edited.")
    idx = [header.index(c) for c in COLUMNS]
    body = data[second_nl + 1:]
    last_nl = body.rfind(b"\n")
    tail = body[last_nl + 1:]
    body = body[:last_nl + 1]
    if tail.strip(b"\x00"):
        notes.append(f"{where}: the last row was cut off ({len(tail)} bytes, written when the "
                     "program stopped); dropped.")
    text = body.decode("ascii", "replace")
    table = None
    if text.strip():
        try:
            table = np.loadtxt(io.StringIO(text), delimiter=",", dtype=np.float64, ndmin=2,
                               comments="#")
            if table.shape[1] != len(header):
                table = None
        except ValueError:
            table = None
        if table is None:
            table, bad = _parse_slowly(text, len(header))
            if bad:
                shown = ", ".join(str(b + 2) for b in bad[:10]) + (" ..." if len(bad) > 10 else "")
                notes.append(f"{where}: {len(bad)} damaged row(s) skipped (file line {shown}).")
    if table is None or table.size == 0:
        return empty_columns(), notes
    cols: dict[str, np.ndarray] = {}
    for name, j in zip(COLUMNS, idx):
        col = table[:, j]
        if name in INT_COLUMNS:
            cols[name] = col.astype(np.int64)
        elif name in F32_COLUMNS:
            cols[name] = col.astype(np.float32).astype(np.float64)
        else:
            cols[name] = np.ascontiguousarray(col)
    return cols, notes


def _parse_slowly(text: str, ncols: int) -> tuple[np.ndarray, list[int]]:
    rows = []
    bad = []
    for i, line in enumerate(text.split("\n")[:-1], start=1):
        if not line.strip() or line.startswith("#"):
            continue
        parts = line.split(",")
        if len(parts) != ncols:
            bad.append(i)
            continue
        try:
            rows.append([float(p) for p in parts])
        except ValueError:
            bad.append(i)
    return (np.array(rows, dtype=np.float64).reshape(-1, ncols), bad)


# ---------------------------------------------------------------------------- experiments

def read_experiment(folder: Path) -> ExperimentRecord:
    """One experiment folder."""
    folder = Path(folder)
    notes: list[str] = []
    meta: dict = {}
    created = None
    try:
        doc, n = _read_doc(folder / META, "experiment meta")
        notes += n
        meta = doc.get("meta") or {}
        created = doc.get("created_host_time_s")
    except FileNotFoundError:
        notes.append(f"{folder.name}: meta.json is missing (the program stopped while creating "
                     "the experiment); its kind and parameters are unknown.")
    except LogbookVersionError:
        raise
    except LogbookError as exc:
        notes.append(str(exc))
    result = None
    try:
        rdoc, n = _read_doc(folder / RESULTS, "experiment result")
        notes += n
        result = rdoc.get("result")
    except FileNotFoundError:
        pass
    except LogbookVersionError:
        raise
    except LogbookError as exc:
        notes.append(str(exc))
    columns, n = read_telemetry(folder / TELEMETRY)
    notes += n
    return ExperimentRecord(exp_id=folder.name, path=folder, meta=meta, result=result,
                            columns=columns, recovered_rows=int(columns["time_us"].size),
                            notes=notes, created_host_time_s=created)


def read_session(path: Path | str) -> SessionRecord:
    """Read a whole session folder.

    Raises
    ------
    LogbookError
        The folder is not a session, its manifest is damaged, or a file uses a logbook format
        major version this reader does not know. Damage elsewhere is recovered and listed in
        ``notes``.
    """
    path = Path(path)
    if not path.is_dir():
        raise LogbookError(f"no session folder at {path}.")
    try:
        manifest, notes = _read_doc(path / MANIFEST, "session manifest")
    except FileNotFoundError:
        raise LogbookError(f"{path} is not a tetherloop session: it has no {MANIFEST}.") from None
    except LogbookVersionError:
        raise
    except LogbookError as exc:
        if "damaged" in str(exc):
            raise LogbookError(f"{exc} The experiment folders inside still hold plain CSV "
                               "telemetry that can be opened by hand.") from None
        raise
    events, n = read_events(path / EVENTS)
    notes += n
    order = [e.get("id") for e in manifest.get("experiments") or [] if isinstance(e, dict)]
    folders = {p.name: p for p in path.iterdir()
               if p.is_dir() and ((p / META).exists() or (p / TELEMETRY).exists())}
    ids = [i for i in order if i in folders] + sorted(set(folders) - set(order))
    missing = [i for i in order if i not in folders]
    if missing:
        notes.append(f"experiment folder(s) {missing} named in the manifest are missing.")
    experiments: dict[str, ExperimentRecord] = {}
    written = {e.get("id"): e for e in manifest.get("experiments") or [] if isinstance(e, dict)}
    for exp_id in ids:
        rec = read_experiment(folders[exp_id])
        entry = written.get(exp_id) or {}
        if entry.get("closed") and isinstance(entry.get("rows"), int) \
                and rec.recovered_rows < entry["rows"]:
            rec.notes.append(f"{exp_id}: the manifest says {entry['rows']} rows were written but "
                             f"only {rec.recovered_rows} were recovered.")
        experiments[exp_id] = rec
        notes += [n if n.startswith(exp_id) else f"{exp_id}: {n}" for n in rec.notes]
    if manifest.get("outcome") is None:
        notes.insert(0, "the session was not closed: the program stopped (crash, kill or pulled "
                        "cable) or is still running; everything flushed before that is here.")
    return SessionRecord(path=path, name=path.name, manifest=manifest, events=events,
                         experiments=experiments, notes=notes)


# ---------------------------------------------------------------------------- listing

def _device_text(device: Any) -> str:
    if isinstance(device, dict):
        dev = device.get("device_id") or "?"
        fw = device.get("firmware_version")
        return f"{dev} ({fw})" if fw else str(dev)
    return str(device) if device else "?"


def summarize_manifest(path: Path, manifest: dict) -> SessionSummary:
    """One listing line from a manifest (plus a quick look at results and events)."""
    tuned = []
    for e in manifest.get("experiments") or []:
        if not (isinstance(e, dict) and e.get("kind") == "relay"):
            continue
        label = f"{e.get('axis_name') or '?'}.{e.get('loop_name') or '?'}"
        chosen = False
        try:
            doc = json.loads((path / str(e.get("id")) / RESULTS).read_text(encoding="utf-8"))
            chosen = bool((doc.get("result") or {}).get("chosen"))
        except (OSError, ValueError, AttributeError):
            pass
        label = label if chosen else f"{label} (no gains)"
        if label not in tuned:
            tuned.append(label)
    kills = 0
    try:
        with open(path / EVENTS, "rb") as fh:
            for line in fh:
                if b'"kind": "kill' in line and b'"kind": "kill_clear' not in line:
                    kills += 1
    except OSError:
        pass
    outcome = manifest.get("outcome") or "not closed (crashed or running)"
    return SessionSummary(name=path.name, path=path, started_at=manifest.get("started_at"),
                          device=_device_text(manifest.get("device")), tuned=tuned,
                          outcome=str(outcome), experiments=len(manifest.get("experiments") or []),
                          kills=kills)


def list_sessions(log_dir: Path | str) -> list[SessionSummary]:
    """Every session folder directly inside ``log_dir``, oldest first. Folders whose manifest
    cannot be read are listed with ``problem`` set instead of raising."""
    log_dir = Path(log_dir)
    if not log_dir.is_dir():
        raise LogbookError(f"the log folder {log_dir} does not exist; no sessions recorded there "
                           "(choose the folder with --log-dir or TETHERLOOP_LOG_DIR).")
    out = []
    for p in sorted(log_dir.iterdir()):
        if not p.is_dir() or p.name.startswith("."):
            continue
        if not (p / MANIFEST).exists():
            continue
        try:
            manifest, _ = _read_doc(p / MANIFEST, "session manifest")
            out.append(summarize_manifest(p, manifest))
        except LogbookError as exc:
            out.append(SessionSummary(name=p.name, path=p, started_at=None, device="?", tuned=[],
                                      outcome="unreadable", experiments=0, kills=0,
                                      problem=str(exc)))
    out.sort(key=lambda s: (s.started_at or "", s.name))
    return out
