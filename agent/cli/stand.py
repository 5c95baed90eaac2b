"""Stand commands: ports, tune, autotune, demo, settings. Thin shells over agent.operations:
they parse, confirm with the operator, render progress and results, and map outcomes to exit
codes; every action on the board is an operations call."""

from __future__ import annotations

import json
import math
import sys
from pathlib import Path

from rich.console import Console
from rich.progress import BarColumn, Progress as RichProgress, TextColumn, TimeElapsedColumn
from rich.table import Table

from agent.errors import DeviceError, ExitCode, LinkError, LogbookError, PlanError
from protocol.messages import Capability, KillReason

from . import UserError

DEFAULT_DEMO_SCENARIO = "gimbal-quad"


def _console(args) -> Console:
    # with --json, human output goes to stderr so stdout holds exactly one JSON object
    return Console(stderr=bool(getattr(args, "json", False)), highlight=False)


# ------------------------------------------------------------------------------ ports


def cmd_ports(args) -> int:
    from agent.link import list_ports
    ports = list_ports()
    con = Console(highlight=False)
    if args.json:
        print(json.dumps([{"device": d, "description": desc, "hwid": hw} for d, desc, hw in ports]))
        return 0
    if not ports:
        con.print("No serial ports found. (The built-in simulated stand needs none: "
                  "`tetherloop demo`, or `tetherloop mock --pty`.)")
        return 0
    table = Table("port", "description", "hardware id")
    for d, desc, hw in ports:
        table.add_row(d, desc, hw)
    con.print(table)
    return 0


# ------------------------------------------------------------------------------ shared runner


def _confirm(args, con: Console, simulated: bool = False):
    """Show the cautions and get the operator's confirmation; the record says truthfully how."""
    from agent.operations import Confirmation, ConfirmedBy
    from agent.safety import caution_text, confirm_cautions
    if simulated:
        con.print("[bold]SAFETY[/] — the board is the built-in simulation: no hardware is "
                  "driven, so no confirmation is asked. On a real stand, before arming:\n"
                  + caution_text())
        return Confirmation(ConfirmedBy.SIMULATED)
    if getattr(args, "confirm_safe", False):
        con.print("[bold]SAFETY[/] — confirmed with --confirm-safe (logged):\n" + caution_text())
        return Confirmation(ConfirmedBy.FLAG)
    if not sys.stdin.isatty():
        raise UserError("arming needs the operator's confirmation of the safety cautions: run "
                        "interactively, or pass --confirm-safe in a scripted run (it is logged)")
    if not confirm_cautions(lambda q: con.input(q), lambda s: con.print(s)):
        raise UserError("not confirmed: nothing was armed", code=ExitCode.DECLINED)
    return Confirmation(ConfirmedBy.TYPED)


def _connect(port, args, mock=None):
    from agent import operations
    try:
        return operations.connect(port, getattr(args, "baud", 921600), mock=mock)
    except (LinkError, DeviceError) as exc:
        raise UserError(str(exc)) from None


def _check_plan(stand, plan) -> None:
    from agent import operations
    try:
        operations.check_plan(stand, plan)
    except PlanError as exc:
        operations.close(stand, "plan rejected")
        raise UserError(f"{exc} (nothing was armed)") from None


def run_on_stand(args, stand, plan, work, con: Console, simulated: bool = False):
    """Confirm, open the session, run ``work(stand, progress, stop)`` as a background job while
    this thread watches for Ctrl-C (which kills at once). Returns (job, interrupted)."""
    import threading

    from agent import operations
    from agent.workflows import Progress, Stage
    confirmation = _confirm(args, con, simulated)
    try:
        operations.open_session(stand, plan, confirmation, getattr(args, "log_dir", None))
    except (LogbookError, OSError) as exc:
        operations.close(stand, "log could not be opened")
        raise UserError(f"{exc} (nothing was armed)") from None
    stop = threading.Event()
    bar = RichProgress(TextColumn("{task.description}"), BarColumn(), TimeElapsedColumn(),
                       console=con, transient=True, disable=getattr(args, "quiet", False))
    task = bar.add_task("starting", total=1.0)
    last = [None]
    shown = (Stage.ANALYSIS, Stage.APPLY, Stage.VERIFY, Stage.ROLLBACK, Stage.NOISE, Stage.INFO,
             Stage.DONE)

    def progress(p: Progress) -> None:
        if p.fraction is not None:
            bar.update(task, completed=p.fraction)
        bar.update(task, description=p.message[:70])
        if p.stage in shown and (p.stage, p.message) != last[0]:
            last[0] = (p.stage, p.message)
            bar.console.print(f"[dim]{p.stage:>8}[/] {p.message}")

    def on_notice(kind, payload) -> None:
        if kind == "kill":
            bar.console.print(f"[bold red]{operations.describe_kill(payload)}[/]")

    stand.listeners.append(on_notice)
    job = operations.Job(lambda: work(stand, progress, stop))
    interrupted = False
    with bar:
        job.start()
        while not job.done:
            try:
                job.wait(0.1)
            except KeyboardInterrupt:
                if not interrupted:
                    interrupted = True
                    try:
                        operations.kill(stand, KillReason.HOST_OPERATOR)
                    except LinkError as exc:
                        bar.console.print(f"[bold red]KILL could not be sent ({exc}): use the "
                                          "hardware kill now.[/]")
                    stop.set()
                    bar.console.print("[bold red]KILL sent (Ctrl-C).[/] Waiting for the board...")
    return job, interrupted


def _finish(stand, job, interrupted):
    """Close the stand with the run's outcome; re-raise what is not an Exception."""
    from agent import operations
    err = job.error
    result = job.result
    outcome = "killed" if interrupted else (str(getattr(result, "outcome", "")) or
                                            ("error" if err else "ok"))
    operations.close(stand, outcome)
    if err is not None and not isinstance(err, Exception):
        raise err
    return result, err


def _summary_tables(loops) -> list[Table]:
    """Two narrow tables (identification, gains) so an 80-column terminal shows them whole."""
    ident = Table("loop", "status", "Ku", "Tu [s]", "model", "method", title="identification",
                  title_justify="left")
    gains = Table("loop", "rule", "kp", "ki", "kd", "Ms", "step", "os",
                  title="gains (step: verification step test; os: its overshoot)",
                  title_justify="left")
    gains.columns[1].no_wrap = True
    for lr in loops:
        d = lr.to_dict()
        ver = d.get("verification") or {}
        meas = ver.get("measured") or {}
        vtext = ("pass" if ver.get("passed") else "FAIL") if ver else "-"
        os_text = f"{meas['overshoot']:.0%}" if meas.get("overshoot") is not None else "-"
        ch = lr.chosen
        ident.add_row(lr.key, str(lr.status), _g(d.get("ultimate_gain")),
                      _g(d.get("ultimate_period_s")), (d.get("model") or {}).get("kind", "-"),
                      d.get("ultimate_method", "-"))
        gains.add_row(lr.key, ch.rule if ch else "-", _g(ch.kp if ch else None),
                      _g(ch.ki if ch else None), _g(ch.kd if ch else None),
                      _g(ch.ms if ch else None), vtext, os_text)
    return [ident, gains]


def _g(x) -> str:
    if x is None or (isinstance(x, float) and not math.isfinite(x)):
        return "-"
    return f"{x:.4g}"


def _failure_code(err: BaseException, interrupted: bool = False) -> int:
    """Exit code of a run that ended in an error: KILLED after the operator's Ctrl-C (whatever
    the interrupted step then raised) or a kill, else FAILED."""
    from agent.stand import KillTripped
    if interrupted or isinstance(err, KillTripped):
        return int(ExitCode.KILLED)
    return int(ExitCode.FAILED)


# ------------------------------------------------------------------------------ tune / autotune


def cmd_tune(args) -> int:
    from agent import operations
    from agent.plan import LoopPlan, Plan, known_rules
    from agent.workflows import LoopStatus
    con = _console(args)
    if args.rule != "recommended" and args.rule not in known_rules():
        raise UserError(f"--rule {args.rule!r}: unknown rule; expected recommended or one of "
                        f"{', '.join(known_rules())}")
    if (args.axis == "heave" and args.loop == "angle") or (args.axis != "heave" and args.loop == "heave"):
        raise UserError(f"axis {args.axis!r} has no {args.loop!r} loop: rotation axes have rate "
                        "and angle loops, the heave axis has rate and heave")
    try:
        lp = LoopPlan(args.axis, args.loop, args.controller, args.rule, args.ms)
        plan = Plan(loops=(lp,), apply=args.apply or args.verify, verify=args.verify)
    except PlanError as exc:
        raise UserError(str(exc)) from None
    stand = _connect(args.port, args)
    _check_plan(stand, plan)
    job, interrupted = run_on_stand(
        args, stand, plan, lambda s, progress, stop: operations.tune_one(s, lp, plan, progress,
                                                                         stop), con)
    result, err = _finish(stand, job, interrupted)
    session_path = str(stand.log.path) if stand.log else None
    if err is not None:
        con.print(f"[bold red]tune {'killed' if interrupted else 'failed'}:[/] {err}")
        if args.json:
            print(json.dumps({"error": str(err), "kills": stand.kills, "session": session_path}))
        return _failure_code(err, interrupted)
    if result is None:
        return int(ExitCode.KILLED)
    if args.json:
        d = result.to_dict(session_path)
        d["kills"] = stand.kills
        print(json.dumps(d, indent=2))
    else:
        for t in _summary_tables([result]):
            con.print(t)
        con.print(f"log: {session_path}")
    if result.status == LoopStatus.ROLLBACK_FAILED:
        return int(ExitCode.ROLLBACK_FAILED)
    return int(ExitCode.OK if LoopStatus(result.status).good else ExitCode.PARTIAL)


def cmd_autotune(args, *, mock=None, port=None, simulated: bool = False) -> int:
    from agent import operations
    from agent.plan import default_plan, load_plan
    con = _console(args)
    plan = None
    if getattr(args, "plan", None):
        try:
            plan = load_plan(args.plan)
        except PlanError as exc:
            if mock is not None:
                mock.stop()
            raise UserError(str(exc)) from None
    stand = _connect(port or args.port, args, mock=mock)
    if plan is None:
        plan = default_plan(stand.info.axes, stand.session.values)
    _check_plan(stand, plan)
    con.print(f"board [bold]{stand.info.device_id}[/] firmware {stand.info.firmware_version}, "
              f"protocol {stand.info.protocol}, loop {stand.info.loop_rate_hz} Hz; "
              f"{len(plan.loops)} loops: {', '.join(lp.key for lp in plan.loops)}")
    job, interrupted = run_on_stand(
        args, stand, plan, lambda s, p, stop: operations.autotune(s, plan, p, stop), con,
        simulated=simulated)
    result, err = _finish(stand, job, interrupted)
    session_path = str(stand.log.path) if stand.log else None
    report = None
    if session_path and getattr(args, "report", True):
        try:
            from agent.logbook import report_session
            report = str(report_session(session_path, Path(session_path) / "report.html"))
        except (LogbookError, OSError, ValueError) as exc:  # the result matters more
            con.print(f"[yellow]report not written: {exc}[/]")
    if err is not None:
        con.print(f"[bold red]autotune {'killed' if interrupted else 'failed'}:[/] {err}")
        if args.json:
            print(json.dumps({"outcome": "error", "error": str(err), "session": session_path,
                              "kills": stand.kills}))
        return _failure_code(err, interrupted)
    if args.json:
        d = result.to_dict()
        d["report"] = report
        print(json.dumps(d, indent=2))
    else:
        for t in _summary_tables(result.loops):
            con.print(t)
        for c in result.cascade:
            con.print(("[green]" if c["ok"] else "[yellow]") + c["message"] + "[/]")
        con.print(f"outcome: [bold]{result.outcome}[/] {result.message}")
        con.print(f"log:     {session_path}")
        if report:
            con.print(f"report:  {report}")
    return result.outcome.exit_code


def cmd_demo(args) -> int:
    from agent import operations
    con = _console(args)
    mock = operations.start_builtin_board(args.scenario, args.speed, args.seed)
    con.print(f"[bold]DEMO[/]: simulated board (invented stand '{args.scenario}') on "
              f"{mock.port}, clock x{args.speed}. No hardware is driven.")
    args.port = mock.port
    return cmd_autotune(args, mock=mock, port=mock.port, simulated=True)


# ------------------------------------------------------------------------------ settings


def _parse_assignments(items) -> dict[str, float]:
    out = {}
    for item in items or []:
        name, sep, value = item.partition("=")
        if not sep or not name:
            raise UserError(f"--set {item!r}: expected NAME=VALUE, e.g. roll.rate.kp=0.2")
        try:
            out[name.strip()] = float(value)
        except ValueError:
            raise UserError(f"--set {item!r}: {value!r} is not a number") from None
        if not math.isfinite(out[name.strip()]):
            raise UserError(f"--set {item!r}: {value!r} is not a finite number")
    return out


def cmd_settings(args) -> int:
    """Show the board's settings table; with --set, write values (all checked first)."""
    from agent import operations
    con = _console(args)
    values = _parse_assignments(args.set)  # bad syntax: error before connecting
    from_file = None
    if getattr(args, "apply", None):
        from agent.settingsfile import parse_settings
        try:
            text = Path(args.apply).expanduser().read_text(encoding="utf-8")
        except OSError as exc:
            raise UserError(f"--apply {args.apply}: {exc.strerror or exc}") from None
        from_file = parse_settings(text, f"settings file {args.apply}")
        values = {**from_file.values, **values}
    stand = _connect(args.port, args)
    try:
        try:
            if from_file is not None:
                written = operations.apply_settings(stand, values, f"settings file {args.apply}",
                                                    from_file.device_id, args.force)
            else:
                for name, value in values.items():
                    stand.session.setting(name).check(value)
                written = stand.session.write_many(values) if values else {}
            if args.persist:
                if not stand.info.capabilities & Capability.PERSIST:
                    raise UserError(f"{stand.info.device_id} has no non-volatile settings store "
                                    "(it does not offer persist); the values written stay "
                                    "until it restarts")
                stand.session.persist()
        except DeviceError as exc:
            raise UserError(str(exc)) from None
        if args.json:
            print(json.dumps({"written": written, "persisted": bool(args.persist),
                              "settings": [
                {"name": s.name, "id": s.setting_id, "unit": s.unit, "min": s.minimum,
                 "max": s.maximum, "default": s.default, "value": stand.session.values.get(n)}
                for n, s in stand.session.settings.items()]}, indent=2))
        else:
            t = Table("setting", "value", "unit", "min", "max", "default",
                      title=f"{stand.info.device_id} settings")
            for n, s in stand.session.settings.items():
                if args.filter and args.filter not in n:
                    continue
                t.add_row(n, _g(stand.session.values.get(n)), s.unit, _g(s.minimum),
                          _g(s.maximum), _g(s.default))
            con.print(t)
            for n, v in written.items():
                con.print(f"wrote {n} = {v:.6g}")
            if args.persist:
                con.print("stored the settings in the board's non-volatile memory")
    finally:
        operations.close(stand, "settings")
    return 0


# ------------------------------------------------------------------------------ registration


def _common(p, port=True):
    from . import validate
    if port:
        p.add_argument("--port", required=True,
                       help="serial device path or pyserial URL (socket://host:port)")
    p.add_argument("--baud", type=validate.baud, default=921600,
                   help="baud rate (default 921600)")
    p.add_argument("--log-dir", default=None, help="log folder (default: $TETHERLOOP_LOG_DIR "
                   "or the per-user data folder)")
    p.add_argument("--json", action="store_true", help="print one JSON object on stdout")
    p.add_argument("--confirm-safe", action="store_true",
                   help="confirm the safety cautions without a prompt (scripted runs; logged)")


def register(sub) -> None:
    from agent.plan import AXES, CONTROLLERS, LOOPS

    from . import validate
    p = sub.add_parser("ports", help="list serial ports")
    p.add_argument("--json", action="store_true")
    p.set_defaults(func=cmd_ports)

    p = sub.add_parser("settings", help="show the board's settings; --set NAME=VALUE writes")
    p.add_argument("--port", required=True, help="serial device path or pyserial URL")
    p.add_argument("--baud", type=validate.baud, default=921600,
                   help="baud rate (default 921600)")
    p.add_argument("--set", action="append", metavar="NAME=VALUE",
                   help="write a setting (repeatable; every value is checked before any write)")
    p.add_argument("--apply", metavar="FILE",
                   help="write every value of a settings file (`tetherloop gains --export`); "
                   "all checked against the board's table first, then read back")
    p.add_argument("--force", action="store_true",
                   help="with --apply: also a file read from another board")
    p.add_argument("--persist", action="store_true",
                   help="then store the board's settings in its non-volatile memory")
    p.add_argument("--filter", default="", help="show only settings whose name contains this")
    p.add_argument("--json", action="store_true")
    p.set_defaults(func=cmd_settings)

    p = sub.add_parser("tune", help="tune one loop (relay experiment, identification, gains)")
    _common(p)
    p.add_argument("--axis", required=True, choices=AXES)
    p.add_argument("--loop", required=True, choices=LOOPS)
    p.add_argument("--controller", default=validate.plan_default("controller"),
                   choices=CONTROLLERS)
    p.add_argument("--rule", default="recommended", help="tuning rule (default: recommended)")
    p.add_argument("--ms", type=validate.plan_number("ms_target"),
                   default=validate.plan_default("ms_target"),
                   help=validate.plan_help("ms_target"))
    p.add_argument("--apply", action="store_true", help="write the chosen gains to the board")
    p.add_argument("--verify", action="store_true",
                   help="step-test the applied gains; roll back if it fails (implies --apply)")
    p.set_defaults(func=cmd_tune)

    p = sub.add_parser("autotune", help="tune the whole stand in cascade order from a plan")
    _common(p)
    p.add_argument("--plan", help="plan TOML (default: every loop the board offers)")
    p.set_defaults(func=cmd_autotune)

    p = sub.add_parser("demo", help="autotune the built-in simulated stand end to end")
    _common(p, port=False)
    p.add_argument("--scenario", default=DEFAULT_DEMO_SCENARIO,
                   help=f"invented stand to simulate (default {DEFAULT_DEMO_SCENARIO}; "
                   "`tetherloop mock --list`)")
    p.add_argument("--speed", type=validate.speed, default="5",
                   help="simulation clock: multiple of real time, or max (default 5)")
    p.add_argument("--seed", type=validate.seed, default=1, help="simulation seed (default 1)")
    p.add_argument("--plan", help="plan TOML (default: every loop the stand offers)")
    p.set_defaults(func=cmd_demo)
