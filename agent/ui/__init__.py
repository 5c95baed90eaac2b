"""The stand console: a textual terminal UI over the same workflows the CLI uses.

``StandConsole`` (in :mod:`agent.ui.app`) is the application; ``tetherloop ui`` starts it.
"""

from __future__ import annotations

__all__ = ["StandConsole", "ConsoleOptions"]


def __getattr__(name):  # late import: `tetherloop --help` must not pay for textual
    if name in __all__:
        from . import app
        return getattr(app, name)
    raise AttributeError(name)
