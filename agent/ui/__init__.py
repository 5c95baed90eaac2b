"""The stand console: a textual terminal UI over the same operations the CLI uses.

app         StandConsole: the layout (tabs, bindings, screens) and the routing of the panes'
            messages to the controller; ``tetherloop ui`` starts it
controller  Controller: the console's state, the connection, the kill key, the stand worker
actions     the work on the board (run, stop, clear a kill; apply, roll back, verify), all
            through agent.operations
state       the messages, records and display interface the controller and the app share
panes/      one module per tab; caution (the safety check), widgets (strip, checklist, plots)
"""

from __future__ import annotations

__all__ = ["StandConsole", "ConsoleOptions"]


def __getattr__(name):  # late import: `tetherloop --help` must not pay for textual
    if name in __all__:
        from . import app
        return getattr(app, name)
    raise AttributeError(name)
