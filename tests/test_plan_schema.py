"""The plan schema is the one definition of every plan key: defaults, validation, the kill
limits, the console's fields, the command-line range and the example plan all come from it."""

from __future__ import annotations

import dataclasses
import math

import pytest

from agent import plan as plan_mod
from agent.plan import (SCHEMA, LoopPlan, Plan, PlanError, example_plan, field, fields,
                        load_plan, plan_from_dict)
from agent.safety import Limits

ONE_LOOP = [{"axis": "roll", "loop": "rate"}]
FLOAT_ROWS = [f for f in SCHEMA if f.type is float and f.section != "loop"]
BOOL_ROWS = [f for f in SCHEMA if f.type is bool]


def with_value(f, value) -> dict:
    return {f.section: {f.name: value}, "loop": ONE_LOOP}


def test_every_row_is_complete_and_its_default_is_valid():
    names = [(f.section, f.name) for f in SCHEMA]
    assert len(names) == len(set(names))
    for f in SCHEMA:
        assert f.section in plan_mod.SECTIONS and f.type in (bool, float, str), f
        assert f.label and f.help, f
        if f.type is float:
            assert f.range is not None and f.minimum < f.maximum, f
            if f.default is not None:
                assert f.minimum <= f.default <= f.maximum, f
        if f.type is str:
            assert f.allowed() and (f.default is None or f.default in f.allowed()), f
        if f.required:
            assert f.default is None, f


def test_every_dataclass_field_has_exactly_one_schema_row():
    # a field added to Plan, LoopPlan or Limits without a schema row (or the reverse) fails here
    rows = {"plan": {f.key_attr for f in SCHEMA if f.owner == "plan" and not f.per_loop},
            "loop": {f.key_attr for f in SCHEMA if f.owner == "loop" or f.per_loop},
            "limits": {f.key_attr for f in SCHEMA if f.owner == "limits"}}
    assert rows["plan"] == {f.name for f in dataclasses.fields(Plan)} - {"loops", "limits"}
    assert rows["loop"] == {f.name for f in dataclasses.fields(LoopPlan)}
    assert rows["limits"] == {f.name for f in dataclasses.fields(Limits)}


def test_the_defaults_of_plan_loop_and_limits_are_the_schemas():
    p = Plan(loops=(LoopPlan("roll", "rate"),))
    for f in SCHEMA:
        if f.owner == "plan" and not f.per_loop:
            assert getattr(p, f.key_attr) == f.default, f.name
        elif f.owner == "limits":
            assert getattr(p.limits, f.key_attr) == pytest.approx(f.default * f.si_scale)
        elif not f.required:
            assert getattr(p.loops[0], f.key_attr) == f.default, f.name
    # the kill limits in SI units (value from memory: 30 deg = pi/6 rad, 400 deg/s = 6.98 rad/s)
    assert Limits().angle_rad == pytest.approx(math.pi / 6)
    assert Limits().rate_rad_s == pytest.approx(6.981317, rel=1e-6)


def test_an_empty_plan_file_takes_every_default():
    assert plan_from_dict({"loop": ONE_LOOP}) == Plan(loops=(LoopPlan("roll", "rate"),))


@pytest.mark.parametrize("f", FLOAT_ROWS, ids=lambda f: f.name)
def test_every_number_is_accepted_at_its_bounds_and_refused_beyond(f):
    for edge in (f.minimum, f.maximum):
        plan_from_dict(with_value(f, edge))
    span = f.maximum - f.minimum
    for beyond in (f.minimum - 0.01 * span, f.maximum + 0.01 * span):
        with pytest.raises(PlanError) as err:
            plan_from_dict(with_value(f, beyond))
        msg = str(err.value)
        assert f.name in msg and "out of range" in msg and f"{f.maximum:g}" in msg, msg
    with pytest.raises(PlanError, match=f"{f.name} = '1' is not a number"):
        plan_from_dict(with_value(f, "1"))


@pytest.mark.parametrize("f", BOOL_ROWS, ids=lambda f: f.name)
@pytest.mark.parametrize("text", ["false", "true", "no", "yes", "0"])
def test_every_boolean_refuses_quoted_text(f, text):
    with pytest.raises(PlanError, match=f"{f.name} = '{text}' is not a boolean"):
        plan_from_dict(with_value(f, text))
    assert getattr(plan_from_dict(with_value(f, False)), f.key_attr) is False
    assert getattr(plan_from_dict(with_value(f, True)), f.key_attr) is True


def test_limits_are_converted_with_the_rows_scale():
    plan = plan_from_dict({"limits": {"angle_deg": 45, "rate_deg_s": 180, "heave_m": 0.5},
                           "loop": ONE_LOOP})
    assert plan.limits.angle_rad == pytest.approx(math.pi / 4)  # value from memory
    assert plan.limits.rate_rad_s == pytest.approx(math.pi)
    assert plan.limits.heave_m == 0.5


def test_fields_give_a_form_what_it_needs():
    stand = fields("stand")
    assert [f.name for f in stand] == [f.name for f in SCHEMA if f.section == "stand"]
    angle = field("angle_deg")
    assert (angle.label, angle.unit, angle.range, angle.default) == ("kill: angle", "deg",
                                                                     (1.0, 90.0), 30.0)
    assert field("ms_target", "loop") is field("ms_target", "stand")  # per-loop override
    with pytest.raises(KeyError):
        field("no_such_key")


def test_the_example_plan_loads_back_to_the_defaults(tmp_path):
    text = example_plan()
    p = tmp_path / "example.toml"
    p.write_text(text)
    plan = load_plan(p)
    assert plan == Plan(loops=(LoopPlan("roll", "rate"), LoopPlan("roll", "angle")))
    # every key appears, set (stand, limits, axis, loop) or commented out (the per-loop ones)
    for f in SCHEMA:
        assert f"\n{f.name} = " in text or f"\n# {f.name} = " in text, f.name


def test_plan_example_command_prints_it(tmp_path, capsys):
    from agent.cli import main
    assert main(["plan", "--example"]) == 0
    out = capsys.readouterr().out
    p = tmp_path / "printed.toml"
    p.write_text(out)
    assert out.strip() == example_plan().strip()
    assert load_plan(p) == Plan(loops=(LoopPlan("roll", "rate"), LoopPlan("roll", "angle")))


def test_plan_check_command(tmp_path, capsys):
    from agent.cli import main
    good = tmp_path / "good.toml"
    good.write_text('[[loop]]\naxis = "pitch"\nloop = "angle"\n[[loop]]\naxis = "pitch"\n'
                    'loop = "rate"\n')
    assert main(["plan", "--check", str(good)]) == 0
    assert "pitch.rate, pitch.angle" in capsys.readouterr().out
    bad = tmp_path / "bad.toml"
    bad.write_text('[stand]\npersist = "false"\n[[loop]]\naxis = "roll"\nloop = "rate"\n')
    assert main(["plan", "--check", str(bad)]) == 2
    err = capsys.readouterr().err
    assert "persist = 'false' is not a boolean" in err and "Traceback" not in err


def test_the_command_line_range_is_the_schemas(capsys):
    from agent.cli import main
    f = field("ms_target")
    code = main(["tune", "--port", "loop://", "--axis", "roll", "--loop", "rate",
                 "--ms", f"{f.maximum + 0.1:g}"])
    assert code == 2
    assert f"expected a number from {f.minimum:g} to {f.maximum:g}" in capsys.readouterr().err
