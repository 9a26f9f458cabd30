"""Limits files: the format parses into LimitSpec, and every bad file names each problem by its key.

TOML syntax is that of TOML v1.0.0 as read by the standard library's ``tomllib``
(Python docs, "tomllib"); the key-naming of problems (``limit[2].min``, limits counted
from 1) is the project's own and mirrors the station-file validation.
"""

from __future__ import annotations

from pathlib import Path

import pytest

from benchctl.errors import ConfigurationError, LimitsFileError
from benchctl.limits import Filter, load_limits, parse_limits

REPO = Path(__file__).resolve().parents[1]

GOOD = """
[spec]
name = "FB-48S05 rev B"
description = "36-75 V telecom-input flyback"

[[limit]]
name = "efficiency at 48 V, half load and above"
quantity = "efficiency"
min = 0.86
where.vin_set_v = 48
where.load_pct = { min = 50 }

[[limit]]
name = "load regulation"
quantity = "load_regulation_pct"
min = -1
max = 1
description = "spec table 2"

[[limit]]
name = "phase margin at the corners"
quantity = "phase_margin_deg"
min = 45.0
where.vin_set_v = { at = "extremes" }
where.iout_set_a = [0.5, 5.0]
where.tag = "ascending"
where.settled = true
unit = "deg"
required = false
missing = "ignore"
source = "result"
procedure = ["loop_gain", "loop_gain_fast"]
"""


def test_good_file_parses_into_specs():
    limits = parse_limits(GOOD, path=Path("fb.toml"))
    assert limits.name == "FB-48S05 rev B"
    assert len(limits.sha256) == 64
    a, b, c = limits.limits
    assert (a.index, a.name, a.quantity, a.minimum, a.maximum) == (1, "efficiency at 48 V, half load and above",
                                                                    "efficiency", 0.86, None)
    assert a.where == (Filter("vin_set_v", equals=48.0), Filter("load_pct", minimum=50.0))
    assert isinstance(a.where[0].equals, float)       # TOML integer 48 is taken as a number
    assert a.required is True and a.missing is None and a.source is None and a.procedures == ()
    assert (b.minimum, b.maximum, b.description) == (-1.0, 1.0, "spec table 2")
    assert c.where == (Filter("vin_set_v", at="extremes"), Filter("iout_set_a", one_of=(0.5, 5.0)),
                       Filter("tag", equals="ascending"), Filter("settled", equals=True))
    assert (c.unit, c.required, c.missing, c.source) == ("deg", False, "ignore", "result")
    assert c.procedures == ("loop_gain", "loop_gain_fast")
    assert c.applies_to("loop_gain") and not c.applies_to("efficiency_map") and a.applies_to("anything")
    assert a.where_text(5.0) == "vin_set_v = 48 V; load_pct >= 50 % (of iout_rated_a = 5 A)"
    assert b.bounds_text("%") == "-1 ... 1 %"


def _limit(body: str) -> str:
    return '[[limit]]\nname = "x"\nquantity = "efficiency"\n' + body


# (file text, a key-named problem the error must contain)
BAD_FILES = [
    ("this is not toml", "not valid TOML"),
    ("", "limit: no [[limit]] tables"),
    ("limit = 3\n", "limit: must be an array of tables"),
    ("limit = []\n", "limit: no [[limit]] tables"),
    ('title = "x"\n' + _limit("min = 1\n"), "title: unknown top-level key"),
    ('spec = 5\n' + _limit("min = 1\n"), "spec: must be a table"),
    ('[spec]\nowner = "me"\n' + _limit("min = 1\n"), "spec.owner: unknown key"),
    ('[spec]\nname = 3\n' + _limit("min = 1\n"), "spec.name: must be a string"),
    ('[[limit]]\nquantity = "efficiency"\nmin = 1\n', "limit[1].name: required"),
    ('[[limit]]\nname = "  "\nquantity = "efficiency"\nmin = 1\n', "limit[1].name: required"),
    (_limit("min = 1\n") + _limit("min = 2\n"), "limit[2].name: 'x' is already the name of limit[1]"),
    ('[[limit]]\nname = "x"\nmin = 1\n', "limit[1].quantity: required"),
    ('[[limit]]\nname = "x"\nquantity = 5\nmin = 1\n', "limit[1].quantity: required"),
    ('[[limit]]\nname = "x"\nquantity = " efficiency"\nmin = 1\n', "limit[1].quantity: required"),
    (_limit(""), "limit[1]: give min and/or max"),
    (_limit('min = "0.86"\n'), "limit[1].min: must be a finite number"),
    (_limit("min = true\n"), "limit[1].min: must be a finite number"),
    (_limit("max = nan\n"), "limit[1].max: must be a finite number"),
    (_limit("max = inf\n"), "limit[1].max: must be a finite number"),
    (_limit("min = 2\nmax = 1\n"), "limit[1].min: 2 is above max 1"),
    (_limit("min = 1\nmaximum = 2\n"), "limit[1].maximum: unknown key"),
    (_limit("min = 1\nwhere = 5\n"), "limit[1].where: must be a table"),
    (_limit("min = 1\nwhere.vin_set_v = []\n"), "limit[1].where.vin_set_v: a list must hold one or more finite numbers"),
    (_limit('min = 1\nwhere.vin_set_v = ["a"]\n'), "limit[1].where.vin_set_v: a list must hold"),
    (_limit("min = 1\nwhere.vin_set_v = nan\n"), "limit[1].where.vin_set_v: nan must be a finite number"),
    (_limit('min = 1\nwhere.load_pct = { min = "50" }\n'), "limit[1].where.load_pct.min: '50' must be a finite number"),
    (_limit("min = 1\nwhere.load_pct = { min = 75, max = 50 }\n"), "limit[1].where.load_pct: min 75 is above max 50"),
    (_limit("min = 1\nwhere.load_pct = {}\n"), "limit[1].where.load_pct: an empty range"),
    (_limit("min = 1\nwhere.load_pct = { above = 50 }\n"), "limit[1].where.load_pct.above: unknown key"),
    (_limit('min = 1\nwhere.vin_set_v = { at = "middle" }\n'), "limit[1].where.vin_set_v.at: 'middle' must be one of"),
    (_limit('min = 1\nwhere.vin_set_v = { at = "min", max = 5 }\n'), "limit[1].where.vin_set_v: give either at or min/max"),
    (_limit("min = 1\nwhere.t_utc = 2024-01-01T00:00:00Z\n"), "limit[1].where.t_utc: "),
    (_limit('min = 1\nrequired = "yes"\n'), "limit[1].required: 'yes' must be true or false"),
    (_limit('min = 1\nmissing = "skip"\n'), "limit[1].missing: 'skip' must be one of"),
    (_limit('min = 1\nsource = "database"\n'), "limit[1].source: 'database' must be one of"),
    (_limit("min = 1\nunit = 1\n"), "limit[1].unit: must be a string"),
    (_limit("min = 1\ndescription = 2\n"), "limit[1].description: must be a string"),
    (_limit("min = 1\nprocedure = 5\n"), "limit[1].procedure: must be a procedure name or a list"),
    (_limit('min = 1\nprocedure = ["efficiency_map", ""]\n'), "limit[1].procedure: must be a procedure name"),
    ("[limit]\nname = 'x'\n", "limit: must be an array of tables"),
]


@pytest.mark.parametrize(("text", "problem"), BAD_FILES, ids=[p for _, p in BAD_FILES])
def test_bad_file_names_the_problem_by_key(text, problem):
    with pytest.raises(LimitsFileError) as info:
        parse_limits(text, path=Path("spec.toml"))
    message = str(info.value)
    assert problem in message
    assert "spec.toml" in message                              # where: the file
    assert isinstance(info.value, ConfigurationError)          # the CLI maps these to exit code 2


def test_every_problem_is_reported_at_once():
    text = (
        _limit('min = "a"\n')                                             # limit[1]
        + '[[limit]]\nname = "y"\nquantity = "vout_v"\nmin = 5\nmax = 4\n'  # limit[2]
        + '[[limit]]\nname = "z"\nquantity = "vout_v"\nmax = 5.1\nwhere.vin_set_v = { at = "centre" }\nrequired = 1\n'
    )
    with pytest.raises(LimitsFileError) as info:
        parse_limits(text)
    problems = info.value.problems
    assert len(problems) == 4
    keys = [p.split(":")[0] for p in problems]
    assert keys == ["limit[1].min", "limit[2].min", "limit[3].where.vin_set_v.at", "limit[3].required"]
    assert "4 problem(s)" in str(info.value)


def test_toml_syntax_error_gives_the_line():
    with pytest.raises(LimitsFileError) as info:
        parse_limits('[[limit]]\nname = "x"\nmin = 0.86 0.9\n')
    assert "line 3" in str(info.value)   # tomllib reports "(at line 3, column ...)"


def test_missing_file_says_where_examples_are(tmp_path):
    with pytest.raises(LimitsFileError) as info:
        load_limits(tmp_path / "nope.toml")
    assert "nope.toml" in str(info.value) and "does not exist" in str(info.value)


def test_text_is_not_evaluated_as_code(tmp_path):
    path = tmp_path / "evil.toml"
    path.write_text(_limit('min = "__import__(\'os\').getcwd()"\n'), encoding="utf-8")
    with pytest.raises(LimitsFileError) as info:
        load_limits(path)
    assert "limit[1].min: must be a finite number" in str(info.value)


@pytest.mark.parametrize("name", ["flyback-48v-5v.toml", "buck-12v-1v2.toml"])
def test_example_limits_files_are_valid(name):
    limits = load_limits(REPO / "procedures" / "limits" / name)
    assert limits.name
    quantities = {s.quantity for s in limits.limits}
    assert {"efficiency", "load_regulation_pct", "phase_margin_deg"} <= quantities
    assert all(s.procedures for s in limits.limits)
