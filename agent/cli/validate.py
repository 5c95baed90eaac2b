"""Command-line values, checked while the arguments are parsed: before any port is opened.

Each function here is an argparse ``type=``: it takes the text the user typed and returns the
value, or raises ``argparse.ArgumentTypeError`` with a message that says what the value is and
what is expected. argparse puts the option's name in front ("argument --baud: ...") and exits
with status 2 (``ExitCode.USAGE``), so a bad value never reaches the link, the board or a log.

Where an option sets a plan key (``tune --ms`` is the plan's ``ms_target``), its range, unit and
default come from the plan schema (:data:`agent.plan.SCHEMA`), the same row that validates plan
files and builds the console's Plan tab.
"""

from __future__ import annotations

import argparse
import math
from typing import Callable

#: Lowest and highest baud rates accepted. The low end is the slowest standard rate; the high
#: end is above what USB-serial bridges offer. Any rate a serial driver accepts lies between.
BAUD_RANGE = (50, 20_000_000)


def _bad(text: str, kind: str, expected: str) -> argparse.ArgumentTypeError:
    return argparse.ArgumentTypeError(f"{text!r} is not {kind}; expected {expected}")


def integer(lo: int | None = None, hi: int | None = None, what: str = "a whole number",
            note: str = "") -> Callable[[str], int]:
    """A ``type=`` accepting a whole number in ``[lo, hi]`` (either end may be open); ``what``
    names the kind of number and ``note`` adds a hint to the message."""
    if lo is not None and hi is not None:
        expected = f"{what} from {lo} to {hi}"
    elif lo is not None:
        expected = f"{what} of at least {lo}"
    elif hi is not None:
        expected = f"{what} of at most {hi}"
    else:
        expected = what
    if note:
        expected += f" ({note})"

    def parse(text: str) -> int:
        try:
            value = int(str(text).strip(), 10)
        except ValueError:
            raise _bad(text, "a whole number", expected) from None
        if (lo is not None and value < lo) or (hi is not None and value > hi):
            raise argparse.ArgumentTypeError(f"{value} is out of range; expected {expected}")
        return value

    parse.__name__ = "integer"
    return parse


def number(lo: float | None = None, hi: float | None = None, unit: str = "",
           lo_open: bool = False, allow_inf: bool = False) -> Callable[[str], float]:
    """A ``type=`` accepting a finite number in ``[lo, hi]`` (``(lo, hi]`` with ``lo_open``);
    ``allow_inf`` also accepts 'inf' (an event that never happens)."""
    unit_text = f" {unit}" if unit else ""
    if lo is not None and hi is not None:
        expected = (f"a number above {lo:g} and up to {hi:g}{unit_text}" if lo_open else
                    f"a number from {lo:g} to {hi:g}{unit_text}")
    elif lo is not None:
        expected = (f"a number above {lo:g}{unit_text}" if lo_open else
                    f"a number of at least {lo:g}{unit_text}")
    elif hi is not None:
        expected = f"a number of at most {hi:g}{unit_text}"
    else:
        expected = f"a number{unit_text}"
    if allow_inf:
        expected += " (or inf: never)"

    def parse(text: str) -> float:
        try:
            value = float(str(text).strip())
        except ValueError:
            raise _bad(text, "a number", expected) from None
        if math.isnan(value) or (math.isinf(value) and not (allow_inf and value > 0)):
            raise _bad(text, "a finite number", expected)
        low_fails = lo is not None and (value <= lo if lo_open else value < lo)
        if low_fails or (hi is not None and value > hi):
            raise argparse.ArgumentTypeError(f"{value:g} is out of range; expected {expected}")
        return value

    parse.__name__ = "number"
    return parse


baud = integer(*BAUD_RANGE, what="a baud rate", note="bits per second, e.g. 115200 or 921600")
baud.__doc__ = "A baud rate: a whole number of bits per second in BAUD_RANGE."

tcp_port = integer(0, 65535, what="a TCP port number", note="0: any free port")
tcp_port.__doc__ = "A TCP port number, 0 (any free port) to 65535."

seed = integer(0, 2**32 - 1, what="a whole number")
seed.__doc__ = "A simulation seed: a whole number from 0 to 2**32 - 1."

probability = number(0.0, 1.0, "(a probability)")
probability.__doc__ = "A probability from 0 to 1."

milliseconds = number(0.0, 60_000.0, "ms")
milliseconds.__doc__ = "A duration in milliseconds from 0 to one minute."


def speed(text: str) -> str:
    """A simulation clock: 'max', 'realtime' or a factor above 0 (times real time, '10' or
    '10x'). Returns the canonical text ('max' or the factor as a plain number) that the mock's
    ``parse_speed`` and ``operations.start_builtin_board`` accept."""
    s = str(text).strip().lower()
    if s in ("max", "inf", "fast"):
        return "max"
    if s in ("realtime", "real", "rt"):
        return "1"
    expected = "a number above 0 (times real time), 'realtime' or 'max'"
    try:
        value = float(s[:-1] if s.endswith("x") else s)
    except ValueError:
        raise argparse.ArgumentTypeError(f"{text!r} is not a clock factor; expected "
                                         f"{expected}") from None
    if not (value > 0 and math.isfinite(value)):
        raise argparse.ArgumentTypeError(f"{text!r} is not a clock factor; expected {expected}")
    return f"{value:g}"


def plan_number(key: str, section: str = "loop") -> Callable[[str], float]:
    """A ``type=`` for an option that sets the plan key ``key`` of ``section``: its range and
    unit are the schema's (:func:`agent.plan.field`)."""
    from agent.plan import field
    f = field(key, section)
    parse = number(f.minimum, f.maximum, f.unit)
    parse.__name__ = key
    return parse


def plan_default(key: str, section: str = "loop"):
    """The schema's default of a plan key, for an option's ``default=``."""
    from agent.plan import field
    return field(key, section).default


def plan_help(key: str, section: str = "loop") -> str:
    """An option's help text from the schema: the key's help, range, unit and default."""
    from agent.plan import field
    f = field(key, section)
    unit = f" {f.unit}" if f.unit else ""
    return (f"{f.help} (plan key {key}; {f.minimum:g} to {f.maximum:g}{unit}, "
            f"default {f.default:g})")
