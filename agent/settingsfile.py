"""Settings files: a board's settings written out and read back in (``gains --export``,
``settings --apply``, ``restore``).

The format is tetherloop's own TOML document::

    # written by tetherloop ... (comment lines say what and when)
    format = "tetherloop-settings"
    format_version = 1
    device_id = "mock-gimbal-quad"      # the board the values were read from

    [settings]
    "roll.rate.kp" = 0.0912             # SI units, as the board's table declares them

Pure: text in, values out. Checking against a board's table (names, bounds, read-only) is
:func:`check_against_table`, before anything is written.
"""

from __future__ import annotations

import math
import time
import tomllib
from dataclasses import dataclass
from typing import Mapping

from protocol.messages import SettingFlags

from .errors import UserError

FORMAT_NAME = "tetherloop-settings"
FORMAT_VERSION = 1


@dataclass(frozen=True)
class SettingsFile:
    """What a settings file holds: the board it came from and the values (SI units)."""

    device_id: str
    values: dict[str, float]


def format_settings(device_id: str, values: Mapping[str, float], what: str = "") -> str:
    """The TOML text of a settings file (names sorted; full float precision)."""
    stamp = time.strftime("%Y-%m-%d %H:%M:%S %Z", time.localtime())
    lines = [f"# tetherloop settings file{': ' + what if what else ''}",
             f"# read back from board {device_id} on {stamp}; SI units",
             f'format = "{FORMAT_NAME}"', f"format_version = {FORMAT_VERSION}",
             f"device_id = {_quote(device_id)}", "", "[settings]"]
    lines += [f"{_quote(name)} = {float(values[name])!r}" for name in sorted(values)]
    return "\n".join(lines) + "\n"


def _quote(text: str) -> str:
    return '"' + text.replace("\\", "\\\\").replace('"', '\\"') + '"'


def parse_settings(text: str, source: str = "settings file") -> SettingsFile:
    """Read a settings file.

    Raises
    ------
    UserError
        Not TOML, not a tetherloop settings file, an unknown format version, or a value that is
        not a finite number.
    """
    try:
        doc = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise UserError(f"{source} is not valid TOML: {exc}") from None
    if doc.get("format") != FORMAT_NAME:
        raise UserError(f"{source} is not a tetherloop settings file (format = "
                        f"{doc.get('format')!r}, expected {FORMAT_NAME!r}); write one with "
                        "`tetherloop gains --port P --export FILE`")
    if doc.get("format_version") != FORMAT_VERSION:
        raise UserError(f"{source} has format_version {doc.get('format_version')!r}; this "
                        f"tool reads version {FORMAT_VERSION}")
    table = doc.get("settings")
    if not isinstance(table, dict) or not table:
        raise UserError(f"{source} has no [settings] table with values")
    values: dict[str, float] = {}
    for name, value in table.items():
        if isinstance(value, bool) or not isinstance(value, (int, float)) \
                or not math.isfinite(float(value)):
            raise UserError(f"{source}: {name} = {value!r} is not a finite number")
        values[name] = float(value)
    return SettingsFile(str(doc.get("device_id", "")), values)


def check_against_table(values: Mapping[str, float], table: Mapping, source: str) -> None:
    """Every name must be in the board's table, writable and within its bounds.

    ``table`` maps names to the board's setting descriptions (``minimum``, ``maximum``,
    ``flags``, ``unit``). All problems are listed in one UserError; nothing is written.
    """
    problems = []
    for name, value in values.items():
        s = table.get(name)
        if s is None:
            problems.append(f"{name}: the board has no such setting")
        elif s.flags & SettingFlags.READ_ONLY:
            problems.append(f"{name}: read-only on the board")
        elif not s.minimum <= value <= s.maximum:
            problems.append(f"{name} = {value:g} is outside the board's bounds "
                            f"[{s.minimum:g}, {s.maximum:g}] {s.unit}".rstrip())
    if problems:
        raise UserError(f"{source}: nothing was written: " + "; ".join(problems))
