"""Constants and small file helpers shared by the logbook writer and reader.

The on-disk layout is documented in FORMAT.md beside this module; keep the two in step.
"""

from __future__ import annotations

import json
import math
import os
import re
from pathlib import Path
from typing import Any

FORMAT_NAME = "tetherloop-logbook"
FORMAT_MAJOR = 1
FORMAT_MINOR = 0
FORMAT_VERSION = f"{FORMAT_MAJOR}.{FORMAT_MINOR}"

MANIFEST = "manifest.json"
EVENTS = "events.jsonl"
META = "meta.json"
TELEMETRY = "telemetry.csv"
RESULTS = "results.json"

# Telemetry columns, in file order, with the numpy dtype the reader returns.
COLUMNS: tuple[str, ...] = ("host_time_s", "time_us", "counter", "state", "tag", "axis", "loop",
                            "setpoint", "measurement", "output", "relay")
INT_COLUMNS = frozenset({"time_us", "counter", "state", "tag", "axis", "loop", "relay"})
F32_COLUMNS = frozenset({"setpoint", "measurement", "output"})  # f32 on the wire, exact in CSV

TELEMETRY_COMMENT = (
    f"# {FORMAT_NAME} telemetry {FORMAT_VERSION}; one row per (sample, axis); "
    "units: host_time_s = s (Unix time of the host), time_us = us (device clock since boot), "
    "setpoint and measurement in SI units of the row's loop (loop 0 rate: rad/s, on axis 3 heave: "
    "m/s; loop 1 angle: rad; loop 2 heave: m), output in the loop's output units, "
    "relay: +1 high / -1 low / 0 none\n")
TELEMETRY_HEADER = ",".join(COLUMNS) + "\n"

_SAFE_NAME = re.compile(r"^[A-Za-z0-9][A-Za-z0-9._-]{0,99}$")


from ..errors import LogbookError  # noqa: E402  (re-exported)


class LogbookVersionError(LogbookError):
    """A file uses a logbook format major version this reader does not know."""


def check_name(name: str, what: str) -> str:
    """Return ``name`` if it is safe as a folder name, else raise LogbookError."""
    if not isinstance(name, str) or not _SAFE_NAME.match(name) or name in (".", ".."):
        raise LogbookError(
            f"{what} name {name!r} cannot be used as a folder name: use 1-100 letters, digits, "
            "'.', '_' or '-', starting with a letter or digit.")
    return name


def is_kill(kind: object) -> bool:
    """True for event kinds that record a kill (``kill*``), not for ``kill_cleared``."""
    k = str(kind).lower()
    return k.startswith("kill") and not k.startswith("kill_clear")


def slug(text: str) -> str:
    """A folder-safe version of free text (device ids in default session names)."""
    s = re.sub(r"[^A-Za-z0-9._-]+", "-", str(text)).strip("-._")
    return s[:40] or "device"


def _to_jsonable(obj: Any) -> Any:
    """``json.dumps`` default: numpy scalars/arrays, tuples, paths, enums, dataclasses."""
    try:
        import numpy as np
        if isinstance(obj, np.ndarray):
            return obj.tolist()
        if isinstance(obj, np.generic):
            return obj.item()
    except ImportError:  # pragma: no cover - numpy is a dependency
        pass
    if isinstance(obj, Path):
        return str(obj)
    if isinstance(obj, (set, frozenset)):
        return sorted(obj)
    if hasattr(obj, "to_dict"):
        return obj.to_dict()
    if hasattr(obj, "__dataclass_fields__"):
        from dataclasses import asdict
        return asdict(obj)
    raise TypeError(f"{type(obj).__name__} is not JSON-serialisable")


def dumps(obj: Any, *, indent: int | None = None) -> str:
    """JSON text as the logbook writes it (NaN/Infinity kept as Python's json writes them)."""
    return json.dumps(obj, default=_to_jsonable, indent=indent, ensure_ascii=False,
                      allow_nan=True)


def fsync_dir(path: Path) -> None:
    """fsync a directory so a new or renamed entry in it survives a power cut."""
    try:
        fd = os.open(path, os.O_RDONLY)
    except OSError:  # pragma: no cover - platforms without directory fds
        return
    try:
        os.fsync(fd)
    except OSError:  # pragma: no cover
        pass
    finally:
        os.close(fd)


def atomic_write_json(path: Path, obj: Any) -> None:
    """Write JSON atomically: temp file in the same folder, fsync, os.replace, fsync folder.

    A crash at any moment leaves either the old file or the new one, never a mix.
    """
    path = Path(path)
    text = dumps(obj, indent=2) + "\n"
    tmp = path.with_name(f".{path.name}.tmp")
    data = text.encode("utf-8")
    fd = os.open(tmp, os.O_WRONLY | os.O_CREAT | os.O_TRUNC, 0o644)
    try:
        view = memoryview(data)
        while view:
            n = os.write(fd, view)
            view = view[n:]
        os.fsync(fd)
    except BaseException:
        os.close(fd)
        try:
            os.unlink(tmp)
        except OSError:
            pass
        raise
    os.close(fd)
    os.replace(tmp, path)
    fsync_dir(path.parent)


def parse_version(text: Any) -> tuple[int, int] | None:
    """``"1.0"`` -> (1, 0); None when the text is not a version."""
    if not isinstance(text, str):
        return None
    m = re.fullmatch(r"(\d+)\.(\d+)", text.strip())
    return (int(m.group(1)), int(m.group(2))) if m else None


def check_version(version: Any, where: str) -> list[str]:
    """Refuse an unknown major format version; return notes for a newer minor."""
    parsed = parse_version(version)
    if parsed is None:
        raise LogbookError(
            f"{where} has no readable format version (found {version!r}, expected text like "
            f"'{FORMAT_VERSION}'); it was not written by tetherloop's logbook or is damaged.")
    major, minor = parsed
    if major != FORMAT_MAJOR:
        raise LogbookVersionError(
            f"{where} uses logbook format {major}.{minor}, but this tetherloop reads format "
            f"{FORMAT_MAJOR}.x only; open it with a tetherloop version that supports format "
            f"{major}.x.")
    if minor > FORMAT_MINOR:
        return [f"{where} uses format {major}.{minor}, newer than this reader's "
                f"{FORMAT_VERSION}; fields added since are ignored."]
    return []


def finite_or_none(x: Any) -> Any:
    """Small helper for tables: NaN/inf become None."""
    if isinstance(x, float) and not math.isfinite(x):
        return None
    return x
