"""The bundled flyback limits pass the bundled flyback model out of the box, end to end.

Both procedures run on the simulated flyback over real sockets with the station file the
simulated bench writes (its instruments' documented accuracy included), and the shipped
procedures/limits/flyback-48v-5v.toml is checked against the stored runs. Where the
model's phase never reaches -180 deg (75 V / 1 A) the gain margin does not exist: it is
flagged ``not_exist`` (unbounded above) and meets the minimum instead of failing as a
missing value. Efficiency limits use guarded acceptance (ILAC-G8:09/2019), so they pass
only with the uncertainty the station's accuracy gives.
"""

from __future__ import annotations

import pytest

from benchctl.cli import EXIT_OK
from benchctl.commands.check import load_run_data
from benchctl.limits import BORDERLINE, SUSPECT, check_limits, load_limits
from benchctl.procedure import load_procedure, procedures_dir
from benchctl.runner import execute


@pytest.fixture(scope="module")
def limits():
    return load_limits(procedures_dir() / "limits" / "flyback-48v-5v.toml")


def test_loop_gain_limits_pass_with_an_unbounded_gain_margin(limits, simulated_bench, station_for, benchctl_store):
    bench = simulated_bench("flyback-48v-5v", time_scale=200.0)
    proc = load_procedure("loop_gain")
    outcome = execute(proc, proc.resolve_parameters(values=bench.procedure_parameters()), station_for(bench),
                      benchctl_store)
    assert outcome.status == "completed", outcome.message
    report = check_limits(limits, load_run_data(benchctl_store, outcome.run_id))
    assert report.exit_code == EXIT_OK, report.summary + "\n" + "\n".join(o.reason for o in report.outcomes)
    gm = next(o for o in report.outcomes if o.limit.quantity == "gain_margin_db")
    res = benchctl_store.results(outcome.run_id)
    absent = res[(res["name"] == "gain_margin_db") & res["value"].isna()]
    # Every absent gain margin is one that does not exist, flagged so by the procedure.
    assert all(d.get("flags") == ["not_exist"] and d.get("unbounded") == "above" for d in absent["details"])
    assert gm.n_not_exist == len(absent)


def test_efficiency_map_limits_pass_with_guarded_acceptance(limits, simulated_bench, station_for, benchctl_store):
    bench = simulated_bench("flyback-48v-5v", time_scale=200.0)
    proc = load_procedure("efficiency_map")
    # The line extremes and 48 V, the loads the limits and the four-point average need.
    values = {**bench.procedure_parameters(), "vin_v": [36.0, 48.0, 75.0], "load_pct": [0.0, 25.0, 50.0, 75.0, 100.0]}
    outcome = execute(proc, proc.resolve_parameters(values=values), station_for(bench), benchctl_store)
    assert outcome.status == "completed", outcome.message
    report = check_limits(limits, load_run_data(benchctl_store, outcome.run_id))
    text = report.summary + "\n" + "\n".join(f"{o.status} {o.limit.name}: {o.reason}" for o in report.outcomes)
    assert report.exit_code == EXIT_OK, text
    guarded = [o for o in report.outcomes if o.limit.decision == "guarded"]
    assert len(guarded) == 3 and all(o.uncertainty is not None and o.uncertainty > 0 for o in guarded), text
    assert not any(o.status in (BORDERLINE, SUSPECT) for o in report.outcomes)
