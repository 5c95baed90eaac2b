"""The mock board's non-volatile settings store: a JSON file (optional).

A real board keeps persisted settings across power cycles. The mock does the same when it is
given a store file (``tetherloop mock --store FILE``, ``start_mock(store=...)``): at start the
values in the file are written into the settings table (with the table's bounds), and a
SettingsPersist request writes the whole table to the file. Without a file the persisted copy
lives in memory for the life of the process.

File layout (this project's own)::

    {"format": "tetherloop-mock-store", "format_version": 1,
     "device_id": "mock-gimbal-quad", "values": {"roll.rate.kp": 0.9, ...}}

The file is replaced atomically (written beside it, flushed to disk, renamed), so a crash
during a persist leaves the previous file intact.
"""

from __future__ import annotations

import json
import math
import os
import tempfile
from pathlib import Path

FORMAT = "tetherloop-mock-store"
FORMAT_VERSION = 1


class StoreError(ValueError):
    """The store file cannot be used; the message says why and what to do."""


def load_store(path: str | Path, device_id: str) -> dict[str, float]:
    """Values persisted for ``device_id``; {} when the file does not exist yet."""
    p = Path(path)
    if not p.exists():
        return {}
    try:
        doc = json.loads(p.read_text(encoding="utf-8"))
    except (OSError, UnicodeDecodeError, json.JSONDecodeError) as exc:
        raise StoreError(f"settings store {p}: cannot be read as JSON ({exc}); fix or remove "
                         "the file (the mock then starts from the scenario's settings)") from None
    if not isinstance(doc, dict) or doc.get("format") != FORMAT:
        raise StoreError(f"settings store {p}: not a tetherloop mock store (expected "
                         f'"format": "{FORMAT}"); pick another file')
    if doc.get("format_version") != FORMAT_VERSION:
        raise StoreError(f"settings store {p}: format version {doc.get('format_version')!r}, "
                         f"this mock reads version {FORMAT_VERSION}")
    if doc.get("device_id") != device_id:
        raise StoreError(f"settings store {p}: holds settings of {doc.get('device_id')!r}, not "
                         f"of {device_id!r}; use one store file per scenario")
    values = doc.get("values")
    if not isinstance(values, dict):
        raise StoreError(f"settings store {p}: 'values' must be an object of name -> number")
    out: dict[str, float] = {}
    for name, v in values.items():
        if isinstance(v, bool) or not isinstance(v, (int, float)) or not math.isfinite(v):
            raise StoreError(f"settings store {p}: {name} = {v!r} is not a finite number")
        out[str(name)] = float(v)
    return out


def save_store(path: str | Path, device_id: str, values: dict[str, float]) -> None:
    """Write the store atomically (temporary file in the same folder, fsync, rename)."""
    p = Path(path)
    doc = {"format": FORMAT, "format_version": FORMAT_VERSION, "device_id": device_id,
           "values": {k: float(v) for k, v in sorted(values.items())}}
    fd, tmp = tempfile.mkstemp(prefix=f".{p.name}.", dir=p.parent or ".")
    try:
        with os.fdopen(fd, "w", encoding="utf-8") as f:
            json.dump(doc, f, indent=1)
            f.write("\n")
            f.flush()
            os.fsync(f.fileno())
        os.replace(tmp, p)
    except BaseException:
        try:
            os.unlink(tmp)
        except OSError:
            pass
        raise
