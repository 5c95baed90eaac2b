"""The ``tetherloop`` command: argparse subcommands over the shared workflows.

Each subcommand group lives in its own module exposing ``register(subparsers)``; the handler it
sets as ``func`` returns the process exit code. The CLI computes nothing itself.
"""

from __future__ import annotations

import argparse
import sys

from agent import __version__


from agent.errors import UserError  # noqa: E402  (re-exported: agent.cli.UserError)


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
        try:
            mod = __import__(modname, fromlist=["register"])
        except ModuleNotFoundError as exc:
            if exc.name == modname:
                continue  # group not built yet
            raise
        mod.register(sub)
    return parser


_GROUPS = ("mock_device.cli", "agent.cli.stand", "agent.cli.logbook_cmds", "agent.cli.ui_cmd")


def main(argv: list[str] | None = None) -> int:
    parser = build_parser()
    args = parser.parse_args(argv)
    if not getattr(args, "func", None):
        parser.print_help()
        return 2
    try:
        return int(args.func(args) or 0)
    except UserError as exc:
        print(f"tetherloop: error: {exc}", file=sys.stderr)
        return exc.code
    except KeyboardInterrupt:
        print("tetherloop: interrupted", file=sys.stderr)
        return 130


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
