"""Offline logbook commands: ``sessions``, ``analyze``, ``export``, ``report``.

Thin shells over :mod:`agent.logbook`; they compute nothing themselves.
"""

from __future__ import annotations

import json
import os
from pathlib import Path

from agent.cli import UserError

LOG_DIR_HELP = ("folder holding the session logs (default: $TETHERLOOP_LOG_DIR, else "
                "$XDG_DATA_HOME/tetherloop/logs, else ~/.local/share/tetherloop/logs)")
SESSION_HELP = "session folder path, or the name of a session inside the log folder"


def _console():
    from rich.console import Console
    return Console()


def _log_dir(args) -> Path:
    from agent.logbook import default_log_dir
    return Path(args.log_dir).expanduser() if getattr(args, "log_dir", None) else default_log_dir()


def resolve_session(arg: str, log_dir: Path) -> Path:
    """A session folder from a path or a session name inside ``log_dir``."""
    p = Path(arg).expanduser()
    if p.is_dir():
        return p
    cand = log_dir / arg
    if os.sep not in arg and cand.is_dir():
        return cand
    names = []
    if log_dir.is_dir():
        names = sorted((d.name for d in log_dir.iterdir()
                        if d.is_dir() and (d / "manifest.json").exists()), reverse=True)
    hint = (f" Recent sessions in {log_dir}: {', '.join(names[:5])}." if names
            else f" The log folder {log_dir} holds no sessions.")
    raise UserError(f"no session {arg!r}: it is neither a folder nor a session name in the log "
                    f"folder.{hint} Use `tetherloop sessions` to list them, or --log-dir.")


def _wrap(fn):
    def handler(args) -> int:
        from agent.logbook import LogbookError
        try:
            return fn(args)
        except LogbookError as exc:
            raise UserError(str(exc)) from None
    return handler


# ---------------------------------------------------------------------------- sessions

def _cmd_sessions(args) -> int:
    from rich.table import Table

    from agent.logbook import list_sessions
    log_dir = Path(args.dir).expanduser() if args.dir else _log_dir(args)
    sessions = list_sessions(log_dir)
    if args.json:
        print(json.dumps([{**s.__dict__, "path": str(s.path)} for s in sessions], indent=2))
        return 0
    con = _console()
    if not sessions:
        con.print(f"No sessions in {log_dir}.")
        return 0
    table = Table(title=f"Sessions in {log_dir}")
    for col in ("session", "started (UTC)", "device", "tuned", "exp.", "kills", "outcome"):
        table.add_column(col, overflow="fold")
    for s in sessions:
        outcome = s.problem or s.outcome
        style = "red" if (s.problem or s.kills) else ("yellow" if "not closed" in s.outcome
                                                      else None)
        table.add_row(s.name, (s.started_at or "?").replace("T", " ")[:19], s.device,
                      ", ".join(s.tuned) or "-", str(s.experiments), str(s.kills), outcome,
                      style=style)
    con.print(table)
    return 0


# ---------------------------------------------------------------------------- analyze

def _cmd_analyze(args) -> int:
    from rich.table import Table

    from agent.logbook import analyze_session
    path = resolve_session(args.session, _log_dir(args))
    con = _console()
    if args.json:
        results = analyze_session(path, args.experiment)
        print(json.dumps([r.to_dict() for r in results], indent=2, default=str))
    else:
        with con.status(f"Re-analysing {path.name} ..."):
            results = analyze_session(path, args.experiment)
        table = Table(title=f"Re-analysis of {path.name} with the current code")
        for col in ("experiment", "status", "what"):
            table.add_column(col, overflow="fold")
        colours = {"reproduced": "green", "new": "cyan", "skipped": "dim", "differs": "yellow",
                   "error": "red"}
        for r in results:
            table.add_row(r.exp_id, f"[{colours.get(r.status, '')}]{r.status}[/]", r.message)
        con.print(table)
        for r in results:
            if r.differences:
                con.print(f"[yellow]{r.exp_id}: what differs (logged -> now)[/]")
                for d in r.differences:
                    con.print(f"  {d}", markup=False)
    if not results:
        if not args.json:
            con.print("The session holds no experiments.")
        return 0
    return 1 if any(r.status in ("differs", "error") for r in results) else 0


# ---------------------------------------------------------------------------- export

def _cmd_export(args) -> int:
    from agent.logbook import export_session
    path = resolve_session(args.session, _log_dir(args))
    out = Path(args.out).expanduser() if args.out else Path.cwd() / f"{path.name}-export"
    con = _console()
    with con.status(f"Exporting {path.name} as {args.format} ..."):
        files = export_session(path, args.format, out)
    if not files:
        con.print(f"Session {path.name} holds no experiments; nothing exported.")
    for f in files:
        con.print(f"wrote {f}")
    return 0


# ---------------------------------------------------------------------------- report

def _cmd_report(args) -> int:
    from agent.logbook import report_session
    path = resolve_session(args.session, _log_dir(args))
    out = Path(args.out).expanduser() if args.out else Path.cwd() / f"{path.name}-report.html"
    con = _console()
    with con.status(f"Rendering the report of {path.name} ..."):
        written = report_session(path, out)
    con.print(f"wrote {written}")
    return 0


# ---------------------------------------------------------------------------- registration

def register(subparsers) -> None:
    """Add the logbook subcommands to the ``tetherloop`` parser."""
    p = subparsers.add_parser("sessions", help="list logged sessions",
                              description="List the sessions in the log folder with date, "
                              "device, what was tuned and the outcome.")
    p.add_argument("dir", nargs="?", help="log folder to list (overrides --log-dir)")
    p.add_argument("--log-dir", help=LOG_DIR_HELP)
    p.add_argument("--json", action="store_true", help="print JSON instead of a table")
    p.set_defaults(func=_wrap(_cmd_sessions))

    p = subparsers.add_parser(
        "analyze", help="re-run identification and tuning on a logged session",
        description="Re-run identification and tuning from a session's logged telemetry with the "
        "current code and compare with what was logged. Exit code 0 when everything was "
        "reproduced (or skipped), 1 when something differs or fails.")
    p.add_argument("session", help=SESSION_HELP)
    p.add_argument("--experiment", help="only this experiment id")
    p.add_argument("--json", action="store_true", help="print the results as JSON")
    p.add_argument("--log-dir", help=LOG_DIR_HELP)
    p.set_defaults(func=_wrap(_cmd_analyze))

    p = subparsers.add_parser("export", help="export a session's telemetry, one file per "
                              "experiment",
                              description="Write one CSV or NPZ file per experiment for other "
                              "tools.")
    p.add_argument("session", help=SESSION_HELP)
    p.add_argument("--format", required=True, choices=("csv", "npz"), help="file format")
    p.add_argument("--out", help="output folder (default ./SESSION-export)")
    p.add_argument("--log-dir", help=LOG_DIR_HELP)
    p.set_defaults(func=_wrap(_cmd_export))

    p = subparsers.add_parser("report", help="write a self-contained HTML report with plots",
                              description="Render a session as one HTML file with embedded "
                              "plots and tables.")
    p.add_argument("session", help=SESSION_HELP)
    p.add_argument("--out", help="output HTML file (default ./SESSION-report.html)")
    p.add_argument("--log-dir", help=LOG_DIR_HELP)
    p.set_defaults(func=_wrap(_cmd_report))
