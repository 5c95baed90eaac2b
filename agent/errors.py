"""Every error tetherloop raises on purpose, in one tree, and the exit code each one means.

Rules: an error says what was wrong, what was expected and what to do. Local errors (the host's
own port, disk or input) and remote ones (the board refused or did not answer) are separate
branches so that a caller can tell "fix your command" from "look at the board".

::

    TetherloopError                  root: catch this to catch everything the tool means to raise
    ├── UserError                    bad command-line value, plan or file (exit 2)
    │   └── PlanError                a plan that fails validation (also a ValueError)
    ├── LinkError                    the host's side of the link: port, I/O, lost link (exit 3)
    │   └── LinkTimeout              no matching reply after every retry
    ├── DeviceError                  the board's side (exit 3)
    │   └── SessionError             (agent.session) handshake, settings, arming
    │       └── DeviceRefused        the board answered with a refusal (code, detail)
    ├── WorkflowError                a step could not complete (exit 3)
    │   ├── Cancelled                the operator stopped the run gently (exit 130)
    │   └── KillTripped              (agent.stand) a kill ended the run (exit 5)
    ├── RecordError                  an experiment record that cannot be analysed (also ValueError)
    └── LogbookError                 a session log that cannot be written or read (exit 3; 2 for
        └── LogbookVersionError      (agent.logbook) a log of an unknown format version)

The roots are defined here; the classes whose constructor belongs to one module (KillTripped,
SessionError, DeviceRefused, LogbookVersionError) are defined there on these bases. Modules
re-export what they raise (``agent.link.LinkError``, ...), so existing imports keep working.
"""

from __future__ import annotations

import enum


class TetherloopError(Exception):
    """Root of every error tetherloop raises on purpose."""


class UserError(TetherloopError):
    """A problem the user can fix: a bad option, plan or file. Printed without a traceback.

    Parameters
    ----------
    message : str
        What was wrong, what was expected, what to do.
    code : int, optional
        The process exit code (``ExitCode.USAGE`` unless said otherwise).
    """

    def __init__(self, message: str, code: int = 2):
        super().__init__(message)
        self.code = int(code)


class PlanError(UserError, ValueError):
    """A plan (file, command-line options or console fields) that fails validation."""


class LinkError(TetherloopError):
    """The serial link failed on the host's side (port, I/O, link lost)."""


class LinkTimeout(LinkError):
    """No matching reply to a request after every retry."""


class DeviceError(TetherloopError):
    """The board did something the host cannot accept (wrong protocol, state, settings)."""



class WorkflowError(TetherloopError):
    """A workflow step could not complete; the text says why and what to try."""


class Cancelled(WorkflowError):
    """The operator stopped the run (not a kill)."""



class RecordError(TetherloopError, ValueError):
    """An experiment record that cannot be analysed (too short, no oscillation, bad columns)."""


class LogbookError(TetherloopError):
    """A session log that cannot be written or read."""



class ExitCode(enum.IntEnum):
    """The exit codes every ``tetherloop`` command follows (the README's table)."""

    OK = 0             # done; every loop asked for reached the state asked for
    DECLINED = 1       # the operator did not confirm the cautions: nothing was armed
    USAGE = 2          # bad option, plan or file: nothing was sent to the board
    FAILED = 3         # link, board or workflow error (the board was made safe)
    PARTIAL = 4        # the run finished but a loop failed or was rolled back
    KILLED = 5         # a kill ended the run (operator, host monitor, board)
    ROLLBACK_FAILED = 6  # gains could not be restored: the board's values are reported
    INTERRUPTED = 130  # stopped by the operator (Ctrl-C outside a run, or a gentle stop)
