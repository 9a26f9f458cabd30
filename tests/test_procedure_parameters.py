"""Procedure loading and parameter validation (before any instrument is touched)."""

import pytest

from benchctl.errors import ParameterError, ProcedureError
from benchctl.procedure import ascending_descending, frange, load_parameter_file, load_procedure


@pytest.fixture(scope="module")
def emap():
    return load_procedure("efficiency_map")


def test_bundled_procedure_loads(emap):
    assert emap.name == "efficiency_map"
    assert set(emap.roles) == {"source", "load", "input_meter", "output_meter"}
    assert len(emap.source_sha256) == 64


def test_defaults_file_and_cli_overrides(emap, tmp_path):
    f = tmp_path / "p.toml"
    f.write_text("vin_v = [10.8, 12.0, 13.2]\niout_rated_a = 10.0\n")
    p = emap.resolve_parameters(file_values=load_parameter_file(f), cli_values=["vout_nom_v=1.2", "descending=yes"])
    assert p.vin_v == [10.8, 12.0, 13.2] and p.iout_rated_a == 10.0 and p.vout_nom_v == 1.2 and p.descending is True
    pts = emap.plan(p)
    # 10 load points ascending + 9 descending per line
    assert len(pts) == 3 * 19
    assert pts[0]["iout_set_a"] == 0.0 and pts[9]["iout_set_a"] == 10.0 and pts[10]["tag"] == "descending"


def test_every_bad_parameter_reported(emap):
    with pytest.raises(ParameterError) as info:
        emap.resolve_parameters(cli_values=["vin_v=abc", "nonsense=1", "iout_rated_a=-2", "load_pct=10,200", "noequals"])
    text = str(info.value)
    assert "vin_v" in text and "nonsense" in text and "below the allowed minimum" in text
    assert "above the allowed maximum" in text and "name=value" in text
    assert len(info.value.problems) == 5


def test_choice_and_type(emap):
    with pytest.raises(ParameterError, match="textbook"):
        emap.resolve_parameters(values={"load_regulation_convention": "percent"})
    with pytest.raises(ParameterError, match="not a number"):
        emap.resolve_parameters(values={"vout_nom_v": "5"})


def test_unknown_procedure_and_bad_file(tmp_path):
    with pytest.raises(ProcedureError, match="unknown procedure"):
        load_procedure("no_such_procedure")
    bad = tmp_path / "broken.py"
    bad.write_text("ROLES = ('source',)\n")
    with pytest.raises(ProcedureError, match="missing module-level PARAMETERS"):
        load_procedure(str(bad))
    crash = tmp_path / "crash.py"
    crash.write_text("raise RuntimeError('boom')\n")
    with pytest.raises(ProcedureError, match="boom"):
        load_procedure(str(crash))


def test_sweep_helpers():
    assert frange(0.5, 2.0, 0.5) == [0.5, 1.0, 1.5, 2.0]
    assert ascending_descending([2, 1, 3], True) == [("ascending", 1), ("ascending", 2), ("ascending", 3),
                                                     ("descending", 2), ("descending", 1)]
