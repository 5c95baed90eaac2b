"""``tetherloop mock``: serve a simulated board over a pseudo-terminal or TCP.

    tetherloop mock --list
    tetherloop mock --scenario gimbal-quad --pty            # first stdout line: the device path
    tetherloop mock --scenario my_stand.toml --tcp 5760 --speed 10 --seed 3
    tetherloop mock --scenario heave-rail --pty --loss 0.001 --latency-ms 20 --stuck heave@30

Serves until interrupted (Ctrl-C / SIGTERM), then prints link statistics to stderr and exits 0.
"""

from __future__ import annotations

import argparse
import math
import signal
import sys
import threading



def _stuck(text: str) -> str:
    """``--stuck AXIS@S``: the syntax checked while parsing (the axis against the scenario when
    the board is built, before the link is opened)."""
    from .faults import parse_stuck
    try:
        parse_stuck(text)
    except ValueError as exc:
        raise argparse.ArgumentTypeError(str(exc)) from None
    return text


def register(subparsers) -> argparse.ArgumentParser:
    """Add the ``mock`` subcommand to an argparse subparsers object. Every value is checked while
    the arguments are parsed (argparse types from ``agent.cli.validate``): a bad one exits 2
    with a message naming the option, before a pty or socket is opened."""
    from agent.cli import validate
    p = subparsers.add_parser(
        "mock", help="run a simulated flight board on an invented test stand",
        description="Run a simulated flight board (invented stands) that speaks protocol v1 over "
                    "a pseudo-terminal or TCP, like hardware.")
    p.add_argument("--scenario", metavar="NAME|FILE",
                   help="bundled scenario name (see --list) or path of a scenario .toml")
    p.add_argument("--list", action="store_true", help="list bundled scenarios and exit")
    link = p.add_mutually_exclusive_group()
    link.add_argument("--pty", action="store_true",
                      help="serve on a pseudo-terminal (default); prints its path first")
    link.add_argument("--tcp", type=validate.tcp_port, metavar="PORT",
                      help="serve on 127.0.0.1:PORT (open socket://127.0.0.1:PORT); 0 = any")
    p.add_argument("--speed", type=validate.speed, default="realtime",
                   help="'realtime' (default), a factor N (N x real time) or 'max'")
    p.add_argument("--seed", type=validate.seed, default=0, help="seed for noise, tokens, faults")
    p.add_argument("--store", metavar="FILE",
                   help="keep persisted settings in this JSON file across restarts (loaded at "
                        "start, written when the host persists)")
    p.add_argument("--loss", type=validate.probability, default=0.0, metavar="P",
                   help="byte loss probability on the link (both ways)")
    p.add_argument("--flip", type=validate.probability, default=0.0, metavar="P",
                   help="probability of a bit flip per byte (both ways)")
    p.add_argument("--latency-ms", type=validate.milliseconds, default=0.0, metavar="MS",
                   help="added link latency (wall time)")
    p.add_argument("--drop-at", type=validate.number(0.0, None, "s", allow_inf=True),
                   default=math.inf, metavar="S",
                   help="the link goes dead at device time S")
    p.add_argument("--stuck", action="append", default=[], type=_stuck, metavar="AXIS@S",
                   help="freeze an axis's sensor at device time S (repeatable)")
    p.add_argument("--block", action="append", default=[], metavar="AXIS",
                   help="engage the stand lock on an axis (repeatable)")
    p.set_defaults(func=run)
    return p


def run(args) -> int:
    # heavy imports (scipy) only when the command runs: `tetherloop --help` stays fast
    from .faults import FaultConfig
    from .scenarios import ScenarioError, list_scenarios, load_scenario

    if args.list:
        for name, desc in list_scenarios():
            print(f"{name:20s} {desc}")
        return 0
    if not args.scenario:
        print("error: --scenario NAME|FILE is required (or --list to see the bundled ones)",
              file=sys.stderr)
        return 2
    try:
        sc = load_scenario(args.scenario)
        faults = FaultConfig(loss=args.loss, flip=args.flip, latency_s=args.latency_ms / 1000.0,
                             drop_at_s=args.drop_at, stuck=tuple(args.stuck),
                             block=tuple(args.block))
        from .runner import parse_speed, start_mock
        parse_speed(args.speed)
        transport = "tcp" if args.tcp is not None else "pty"
        handle = start_mock(sc, transport=transport, speed=args.speed, seed=args.seed,
                            faults=faults, tcp_port=args.tcp or 0, store=args.store)
    except (ScenarioError, ValueError, OSError) as exc:
        print(f"error: {exc}", file=sys.stderr)
        return 2
    print(handle.port, flush=True)
    print(f"mock board {sc.device_id}: scenario {sc.name} ({sc.description}); "
          f"speed {args.speed}, seed {args.seed}; Ctrl-C to stop", file=sys.stderr, flush=True)
    done = threading.Event()

    def _stop(signum, frame):
        done.set()

    old = signal.signal(signal.SIGTERM, _stop)
    try:
        while not done.is_set() and handle.running:
            done.wait(0.2)
    except KeyboardInterrupt:
        pass
    finally:
        signal.signal(signal.SIGTERM, old)
        handle.stop()
    if handle.error is not None:
        print(f"error: the mock stopped: {handle.error!r}", file=sys.stderr)
        return 1
    st = handle.stats
    print(f"stopped after {st['ticks']} ticks; bytes in {st['bytes_in']}, out {st['bytes_out']}, "
          f"dropped (link full) {st['bytes_dropped']}", file=sys.stderr)
    return 0


def main(argv=None) -> int:
    """Stand-alone entry (``python -m mock_device.cli mock ...``)."""
    parser = argparse.ArgumentParser(prog="tetherloop")
    sub = parser.add_subparsers(dest="command", required=True)
    register(sub)
    args = parser.parse_args(argv)
    return args.func(args)


if __name__ == "__main__":
    sys.exit(main())
