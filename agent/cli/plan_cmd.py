"""``tetherloop plan``: the plan file format, offline (nothing is connected).

``--example`` prints a commented plan holding every key at its default (from the plan schema,
:func:`agent.plan.example_plan`); ``--check FILE`` validates a plan file as ``autotune --plan``
would before connecting, and prints what it would run.
"""

from __future__ import annotations

from . import UserError


def cmd_plan(args) -> int:
    from agent.plan import example_plan, load_plan
    if args.example:
        print(example_plan())
        return 0
    if args.check:
        plan = load_plan(args.check)  # PlanError: exit 2 with the key, the value, the range
        print(f"{args.check}: valid; {len(plan.loops)} loop(s) in cascade order: "
              f"{', '.join(lp.key for lp in plan.loops)}")
        return 0
    raise UserError("use: tetherloop plan --example (print a commented plan with every key) "
                    "or tetherloop plan --check FILE (validate a plan file)")


def register(subparsers) -> None:
    p = subparsers.add_parser(
        "plan", help="print an example plan, or check a plan file (offline)",
        description="Plan files (TOML) say which loops to tune, how, and within which limits. "
        "--example prints every key with its default, range and meaning.")
    what = p.add_mutually_exclusive_group()
    what.add_argument("--example", action="store_true",
                      help="print a commented plan with every key at its default")
    what.add_argument("--check", metavar="FILE",
                      help="validate a plan file (nothing is connected)")
    p.set_defaults(func=cmd_plan)
