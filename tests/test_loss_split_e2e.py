"""loss_split end to end on the simulated bench against the model's own losses."""

from __future__ import annotations

import numpy as np

from benchctl.analysis.loss_split import fit_loss_split
from benchctl.exit_codes import EXIT_OK
from benchctl.limits import check_limits, load_limits
from benchctl.procedure import load_procedure, procedures_dir
from benchctl.commands.check import load_run_data
from benchctl.report import build_report
from benchctl.runner import execute


def test_loss_split_matches_the_models_losses_and_predicts_between_points(simulated_bench, station_for,
                                                                           benchctl_store, tmp_path):
    bench = simulated_bench("flyback-48v-5v")
    proc = load_procedure("loss_split")
    params = proc.resolve_parameters(values={"vin_v": [48.0], "source_current_limit_a": bench.limits.source_current_max_a,
                                             "iout_a": [1.5, 2.5, 3.5, 4.5, 5.0], "n_readings": 4})
    out = execute(proc, params, station_for(bench), benchctl_store)
    assert out.status == "completed", out.message
    res = benchctl_store.results(out.run_id).set_index("name")
    got = [res.loc[n] for n in ("loss_fixed_w", "loss_linear_w_per_a", "loss_quadratic_w_per_a2")]
    # truth: the same fit on the model's noise-free losses at the same currents
    # (simulated_instruments/converter/losses.py via ConverterModel.steady_state)
    currents = [1.5, 2.5, 3.5, 4.5, 5.0]
    truth = fit_loss_split(currents, [bench.model.steady_state(48.0, "CC", i, was_running=True).loss_w
                                      for i in currents])
    # Tolerance: 3 expanded uncertainties plus the meters' stated accuracy on P_in − P_out
    # (0.1 % of 29 W ≈ 30 mW on a, its share on b and c: 15 mW/A and 3 mW/A²; station accuracy tables).
    for row, t, floor in zip(got, truth.coefficients, (0.03, 0.015, 0.003)):
        assert abs(row["value"] - t) <= 3 * row["expanded_uncertainty"] + floor
    # the check points: the interpolation error is stated, and small (well inside 0.5 % of efficiency)
    err = res.loc["loss_fit_efficiency_error"]
    assert err["value"] < 5e-3
    pred = benchctl_store.results(out.run_id)
    pred = pred[pred["name"] == "predicted_efficiency"]
    assert len(pred) == 4 and np.all(pred["uncertainty"] > 0)
    report = build_report(benchctl_store, out.run_id, tmp_path / "report")
    assert sum("loss-split" in p.name for p in report.png_paths) == 1, (report.png_paths, report.notes)
    # the bundled flyback limits pass the bundled flyback model
    limits = load_limits(procedures_dir() / "limits" / "flyback-48v-5v-start-up.toml")
    checked = check_limits(limits, load_run_data(benchctl_store, out.run_id))
    assert len({o.limit.quantity for o in checked.outcomes}) == 2
    assert checked.exit_code == EXIT_OK, checked.summary + "\n" + "\n".join(o.reason for o in checked.outcomes)
