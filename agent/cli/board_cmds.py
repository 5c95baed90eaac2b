"""Operator commands on the board outside a tuning run: status, disarm, kill-clear, restore,
gains --export. Thin shells over agent.operations (settings --apply is in the settings command)."""

from __future__ import annotations

import json
from pathlib import Path

from rich.table import Table

from agent.errors import DeviceError, ExitCode, LinkError, LogbookError

from . import UserError
from .stand import _confirm, _connect, _console, _g


def _board(args):
    return _connect(args.port, args)


def cmd_status(args) -> int:
    from agent import operations
    con = _console(args)
    stand = _board(args)
    try:
        try:
            st = operations.board_status(stand)
        except (DeviceError, LinkError) as exc:
            raise UserError(str(exc), code=ExitCode.FAILED) from None
    finally:
        operations.close(stand, "status")
    if args.json:
        print(json.dumps(st.__dict__, indent=2, default=str))
        return 0
    con.print(f"board [bold]{st.device_id}[/] firmware {st.firmware_version}, protocol "
              f"{st.protocol}, loop {st.loop_rate_hz} Hz")
    con.print(f"state: [bold]{st.state.upper()}[/]"
              + ("  (latched: `tetherloop kill-clear` after finding the cause)"
                 if st.state == "killed" else ""))
    t = Table("loop", "kp", "ki", "kd", "tf [s]", "b", "i_limit", title="gains (read back)",
              title_justify="left")
    for loop, g in st.gains.items():
        t.add_row(loop, *(_g(g.get(k)) for k in ("kp", "ki", "kd", "tf", "b", "i_limit")))
    con.print(t)
    return 0


def cmd_disarm(args) -> int:
    from agent import operations
    con = _console(args)
    stand = _board(args)
    try:
        try:
            operations.disarm(stand)
        except (DeviceError, LinkError) as exc:
            raise UserError(f"not disarmed: {exc}. Use the hardware kill if anything moves.",
                            code=ExitCode.FAILED) from None
        con.print(f"{stand.info.device_id}: disarmed (state {stand.state.name.lower()})")
    finally:
        operations.close(stand, "disarm")
    return 0


def cmd_kill_clear(args) -> int:
    from agent import operations
    con = _console(args)
    stand = _board(args)
    try:
        operations.board_status(stand)
        if not stand.killed:
            con.print(f"{stand.info.device_id} is not killed (state "
                      f"{stand.state.name.lower()}): nothing to clear")
            return 0
        con.print("Clearing the kill lets the board be armed again. Find out why it was "
                  "killed first.")
        _confirm(args, con)
        try:
            operations.clear_kill(stand)
        except (DeviceError, LinkError) as exc:
            raise UserError(f"the kill was not cleared: {exc}", code=ExitCode.FAILED) from None
        con.print(f"{stand.info.device_id}: kill cleared, state "
                  f"{stand.state.name.lower()}")
    finally:
        operations.close(stand, "kill-clear")
    return 0


def cmd_restore(args) -> int:
    from agent import operations

    from .logbook_cmds import _log_dir, resolve_session
    con = _console(args)
    path = resolve_session(args.session, _log_dir(args))  # before any port is opened
    stand = _board(args)
    try:
        try:
            written = operations.restore_session(stand, path, force=args.force)
        except LogbookError as exc:
            raise UserError(str(exc)) from None
        except (DeviceError, LinkError) as exc:
            raise UserError(f"not restored: {exc}", code=ExitCode.FAILED) from None
    finally:
        operations.close(stand, "restore")
    if args.json:
        print(json.dumps({"session": str(path), "written": written}, indent=2))
    elif not written:
        con.print(f"the board already holds the gains session {path.name} started from")
    else:
        for n, v in written.items():
            con.print(f"restored {n} = {v:.6g} (read back)")
    return 0


def cmd_gains(args) -> int:
    from agent import operations
    con = _console(args)
    out = Path(args.export).expanduser() if args.export else None
    if out is not None and out.exists() and not args.overwrite:
        raise UserError(f"{out} exists: choose another file or pass --overwrite")
    stand = _board(args)
    try:
        try:
            text = operations.export_gains(stand)
        except (DeviceError, LinkError) as exc:
            raise UserError(str(exc), code=ExitCode.FAILED) from None
    finally:
        operations.close(stand, "gains")
    if out is None:
        print(text, end="")
        return 0
    tmp = out.with_name(out.name + ".part")
    try:
        tmp.write_text(text, encoding="utf-8")
        tmp.replace(out)  # never half a file under the name asked for
    except OSError as exc:
        raise UserError(f"cannot write {out}: {exc.strerror or exc}") from None
    con.print(f"wrote the board's gains to {out}")
    return 0


def register(sub) -> None:
    from . import validate

    def common(p):
        p.add_argument("--port", required=True, help="serial device path or pyserial URL")
        p.add_argument("--baud", type=validate.baud, default=921600,
                       help="baud rate (default 921600)")
        p.add_argument("--json", action="store_true", help="print one JSON object on stdout")

    p = sub.add_parser("status", help="the board's identity, state and gains (read back)")
    common(p)
    p.set_defaults(func=cmd_status)
    p = sub.add_parser("disarm", help="stop any experiment and disarm the board")
    common(p)
    p.set_defaults(func=cmd_disarm)
    p = sub.add_parser("kill-clear", help="clear a latched kill (shows the cautions first)")
    common(p)
    p.add_argument("--confirm-safe", action="store_true",
                   help="confirm the safety cautions without a prompt (scripted runs; logged)")
    p.set_defaults(func=cmd_kill_clear)
    p = sub.add_parser("restore", help="write back the gains a logged session started from")
    p.add_argument("session", help="session folder or name (`tetherloop sessions`)")
    common(p)
    p.add_argument("--log-dir", default=None, help="log folder to find the session in")
    p.add_argument("--force", action="store_true",
                   help="also when the session was recorded on another board")
    p.set_defaults(func=cmd_restore)
    p = sub.add_parser("gains", help="the board's gains as a settings file (--export FILE)")
    common(p)
    p.add_argument("--export", metavar="FILE", help="write them to FILE (default: stdout)")
    p.add_argument("--overwrite", action="store_true", help="replace FILE if it exists")
    p.set_defaults(func=cmd_gains)
