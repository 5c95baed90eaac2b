"""The ``tetherloop`` command: argparse subcommands over the shared workflows.

Each subcommand group lives in its own module exposing ``register(subparsers)``; the handler it
sets as ``func`` returns the process exit code. The CLI computes nothing itself.

Exit codes (``agent.errors.ExitCode``, the README's table): a handler returns its own; an error
that escapes a handler is printed without a traceback and mapped by :func:`exit_code_for` (a
UserError carries its code; a kill is 5; a gentle stop 130; any other TetherloopError 3). A bad
command-line value is refused by argparse while parsing (``agent.cli.validate``): exit 2, before
any port is opened.
"""

from __future__ import annotations

import argparse
import sys

from agent import __version__


from agent.errors import (Cancelled, ExitCode, TetherloopError,  # noqa: E402
                          UserError)  # UserError re-exported: agent.cli.UserError


def _cmd_version(args) -> int:
    from protocol.messages import PROTOCOL_MAJOR, PROTOCOL_MINOR
    print(f"tetherloop {__version__} (protocol {PROTOCOL_MAJOR}.{PROTOCOL_MINOR})")
    return 0


def _cmd_protocol(args) -> int:
    if args.emit_c:
        from protocol.emit_c import write
        try:
            paths = write(args.emit_c)
        except OSError as exc:
            raise UserError(f"cannot write the C files into {args.emit_c}: {exc.strerror}; "
                            "give a folder you can write to") from None
        for path in paths:
            print(f"wrote {path}")
        return 0
    from protocol.describe import describe_text
    if not args.describe:
        print("use: tetherloop protocol --describe   (prints the message table)\n"
              "     tetherloop protocol --emit-c DIR (writes the C99 tables and codec)")
        return 2
    print(describe_text(markdown=args.markdown))
    return 0


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="tetherloop",
        description="Safe, logged relay-feedback autotuning of a flight board on a tethered stand.")
    parser.add_argument("--version", action="version", version=f"tetherloop {__version__}")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND")
    p = sub.add_parser("version", help="print the tool and protocol versions")
    p.set_defaults(func=_cmd_version)
    p = sub.add_parser("protocol", help="describe the wire protocol")
    p.add_argument("--describe", action="store_true", help="print the message table")
    p.add_argument("--markdown", action="store_true", help="as Markdown tables")
    p.add_argument("--emit-c", metavar="DIR", help="write the C99 message tables and codec into "
                   "DIR (the checked-in copy is protocol/c/generated)")
    p.set_defaults(func=_cmd_protocol)
    for modname in _GROUPS:
        __import__(modname, fromlist=["register"]).register(sub)
    return parser


_GROUPS = ("mock_device.cli", "agent.cli.stand", "agent.cli.logbook_cmds", "agent.cli.ui_cmd",
           "agent.cli.board_cmds",
           "agent.cli.plan_cmd")


def exit_code_for(exc: BaseException) -> int:
    """The exit code of an error that ended a command (the README's table).

    A UserError (and so a PlanError) carries its own code (2 unless it says otherwise); a kill
    (``agent.stand.KillTripped``) is 5; the operator's gentle stop (Cancelled) and Ctrl-C are 130;
    a log of an unknown format version is 2 (a newer tool reads it); every other TetherloopError
    (link, board, workflow, logbook, record) is 3.
    """
    if isinstance(exc, UserError):
        return exc.code
    if isinstance(exc, KeyboardInterrupt | Cancelled):
        return int(ExitCode.INTERRUPTED)
    # the modules defining these were loaded if one of them was raised
    stand = sys.modules.get("agent.stand")
    if stand is not None and isinstance(exc, stand.KillTripped):
        return int(ExitCode.KILLED)
    fmt = sys.modules.get("agent.logbook.format")
    if fmt is not None and isinstance(exc, fmt.LogbookVersionError):
        return int(ExitCode.USAGE)
    return int(ExitCode.FAILED)


def main(argv: list[str] | None = None) -> int:
    parser = build_parser()
    try:
        args = parser.parse_args(argv)
    except SystemExit as exc:  # --help, --version, or a bad value (argparse printed why)
        if exc.code is None:
            return int(ExitCode.OK)
        return exc.code if isinstance(exc.code, int) else int(ExitCode.USAGE)
    if not getattr(args, "func", None):
        parser.print_help()
        return int(ExitCode.USAGE)
    try:
        return int(args.func(args) or 0)
    except TetherloopError as exc:
        print(f"tetherloop: error: {exc}", file=sys.stderr)
        return exit_code_for(exc)
    except KeyboardInterrupt:
        print("tetherloop: interrupted", file=sys.stderr)
        return int(ExitCode.INTERRUPTED)


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
