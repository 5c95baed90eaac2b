"""``tetherloop ui``: the stand console (textual) over the same workflows as the CLI."""

from __future__ import annotations

from . import UserError

DEFAULT_SCENARIO = "gimbal-quad"


def cmd_ui(args) -> int:
    if args.port and args.demo:
        raise UserError("choose one: --port P (a board) or --demo (the built-in simulated "
                        "stand), not both")
    speed = str(args.speed).strip().lower()
    if speed != "max":
        try:
            if not float(speed.rstrip("x")) > 0:
                raise ValueError
        except ValueError:
            raise UserError(f"--speed {args.speed!r} is not a clock factor; expected a number "
                            "above 0 (times real time) or 'max'") from None
        speed = speed.rstrip("x")
    if args.scenario != DEFAULT_SCENARIO and not args.demo:
        raise UserError("--scenario only applies to the simulated stand; add --demo")
    try:
        from mock_device.scenarios import list_scenarios
        names = [n for n, _ in list_scenarios()]
    except Exception:
        names = []
    if args.demo and names and args.scenario not in names and not args.scenario.endswith(".toml"):
        raise UserError(f"no scenario {args.scenario!r}; known: {', '.join(names)} (or a path to "
                        "a .toml file)")
    try:
        from agent.ui.app import ConsoleOptions, StandConsole
    except ImportError as exc:
        raise UserError(f"the console needs textual and textual-plotext ({exc}); install "
                        "tetherloop with its dependencies") from None
    app = StandConsole(ConsoleOptions(port=args.port, demo=args.demo, log_dir=args.log_dir,
                                      scenario=args.scenario, speed=speed, seed=args.seed,
                                      baud=args.baud))
    app.run()
    return int(app.return_code or 0)


def register(subparsers) -> None:
    from . import validate
    p = subparsers.add_parser(
        "ui", help="the stand console: connect, watch, plan, run, results, logbook",
        description="Full-screen console for the stand. Ctrl+K (or F12) kills on every tab; "
        "F2-F7 switch tabs; Ctrl+Q quits (disarming first).")
    src = p.add_mutually_exclusive_group()
    src.add_argument("--port", help="connect to this serial device or URL at start")
    src.add_argument("--demo", action="store_true",
                     help="connect to the built-in simulated stand (invented; no hardware)")
    p.add_argument("--log-dir", default=None, help="log folder (default: $TETHERLOOP_LOG_DIR "
                   "or the per-user data folder)")
    p.add_argument("--scenario", default=DEFAULT_SCENARIO,
                   help=f"simulated stand for --demo (default {DEFAULT_SCENARIO})")
    p.add_argument("--speed", type=validate.speed, default="5",
                   help="simulation clock for --demo: times real time, or max (default 5)")
    p.add_argument("--seed", type=validate.seed, default=1, help="simulation seed for --demo")
    p.add_argument("--baud", type=validate.baud, default=921600, help="baud rate (default 921600)")
    p.set_defaults(func=cmd_ui)
