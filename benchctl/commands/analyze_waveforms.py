"""``benchctl analyze transient|ripple|mode|ringing FILE.csv``: waveform analyses of scope exports.

::

    benchctl analyze transient step.csv [--vout-column C] [--iout-column C] [--step-time-s T]
                                        (--band-v B | --band-pct P) [--fsw-hz F] [--json]
    benchctl analyze ripple vout.csv [--column C] [--fsw-hz F] [--bandwidth-limit-hz F] [--json]
    benchctl analyze mode isw.csv [--column C] [--gate-column C] [--fsw-hz F] [--threshold-ratio R] [--json]
    benchctl analyze ringing drain.csv [--column C] [--start-time-s T] [--json]
    benchctl analyze turn-on start.csv [--vout-column C] [--vin-column C] [--vin-level-v V]
                                       [--band-v B] [--final-v V] [--turn-off] [--json]
    benchctl analyze inrush iin.csv [--column C] [--source-limit-a A] [--json]
    benchctl analyze line-step step.csv [--vout-column C] [--step-time-s T] --band-v B [--fsw-hz F] [--json]
    benchctl analyze hold-up dropout.csv --vin-column C --vout-column C --band-v B
                                        [--capacitance-f C --power-w P] [--json]
    benchctl analyze warm-up log.csv [--column C] [--ambient-column C] [--json]
    benchctl analyze hiccup short.csv [--column C] [--skip-s S] [--json]

The files hold a time column in seconds and value columns (:mod:`benchctl.analysis.waveform_csv`);
a bad file is reported with its row and column and exit code 2. With ``--fsw-hz`` the
transient metrics are taken on the output averaged over one switching period (a boxcar with
nulls at fsw and its harmonics: the ripple does not count as deviation), as the
``load_transient`` procedure does. Methods:
:mod:`benchctl.analysis.turn_on`, :mod:`~benchctl.analysis.inrush`, :mod:`~benchctl.analysis.line_response`,
:mod:`~benchctl.analysis.hold_up`, :mod:`~benchctl.analysis.thermal`, :mod:`~benchctl.analysis.protection`,
:mod:`benchctl.analysis.transient`, :mod:`~benchctl.analysis.ripple`,
:mod:`~benchctl.analysis.conduction_mode`, :mod:`~benchctl.analysis.ringing`.
"""

from __future__ import annotations

import argparse
import dataclasses
import json
import math
from typing import Any

from benchctl.exit_codes import EXIT_OK

_HANDLERS = "benchctl.commands.analyze_waveforms"


def add_waveform_subcommands(analyze_sub: Any) -> None:
    """Add the ``transient``, ``ripple``, ``mode`` and ``ringing`` sub-commands to ``benchctl analyze``."""
    p = analyze_sub.add_parser("transient", help="load-step response: peak deviation, recovery, settling",
                               description="CSV: time in s, the output voltage and optionally the load current.")
    p.add_argument("file", help="waveform CSV (time column first)")
    p.add_argument("--vout-column", default=None, help="output-voltage column (default: the first value column)")
    p.add_argument("--iout-column", default=None,
                   help="load-current column used to find the step edge (default: the second value column, if any)")
    p.add_argument("--step-time-s", type=float, default=None, help="step edge time, s (instead of a current column)")
    band = p.add_mutually_exclusive_group()
    band.add_argument("--band-v", type=float, default=None, help="half-width of the recovery band, V")
    band.add_argument("--band-pct", type=float, default=None,
                      help="half-width of the band in %% of the final value (default 1 %%)")
    p.add_argument("--load-step", choices=("increase", "decrease"), default=None,
                   help="direction of the load step (default: from the current, else the largest deviation)")
    p.add_argument("--fsw-hz", type=float, default=None, metavar="F",
                   help="switching frequency: average the output over one period before the metrics, so the "
                        "ripple does not count as deviation (default: no averaging)")
    p.add_argument("--json", action="store_true", help="print JSON instead of a table")
    p.set_defaults(analyze_handler=f"{_HANDLERS}:run_transient")

    p = analyze_sub.add_parser("ripple", help="output ripple pk-pk and RMS over whole switching periods",
                               description="CSV: time in s (uniform sampling) and the output voltage.")
    p.add_argument("file", help="waveform CSV (time column first)")
    p.add_argument("--column", default=None, help="voltage column (default: the first value column)")
    p.add_argument("--fsw-hz", type=float, default=None, help="switching frequency: use whole periods")
    p.add_argument("--bandwidth-limit-hz", type=float, default=None,
                   help="apply a first-order low-pass here (20e6 emulates a scope's 20 MHz limit)")
    p.add_argument("--json", action="store_true", help="print JSON instead of a table")
    p.set_defaults(analyze_handler=f"{_HANDLERS}:run_ripple")

    p = analyze_sub.add_parser("mode", help="CCM/DCM from a switch-current waveform",
                               description="CSV: time in s and the switch current (optionally the gate drive).")
    p.add_argument("file", help="waveform CSV (time column first)")
    p.add_argument("--column", default=None, help="switch-current column (default: the first value column)")
    p.add_argument("--gate-column", default=None, help="gate-drive column marking the on-times")
    p.add_argument("--fsw-hz", type=float, default=None, help="switching frequency (rejects spurious edges)")
    p.add_argument("--threshold-ratio", type=float, default=None,
                   help="start/peak current above which the mode is CCM (biased near the boundary); default: CCM "
                        "when the start current is above zero by 3 standard uncertainties")
    p.add_argument("--json", action="store_true", help="print JSON instead of a table")
    p.set_defaults(analyze_handler=f"{_HANDLERS}:run_mode")

    p = analyze_sub.add_parser("ringing", help="damped-sinusoid fit of a switch-node ring",
                               description="CSV: time in s and the drain / switch-node voltage.")
    p.add_argument("file", help="waveform CSV (time column first)")
    p.add_argument("--column", default=None, help="voltage column (default: the first value column)")
    p.add_argument("--start-time-s", type=float, default=None,
                   help="where the ring starts (default: where it falls from its peak)")
    p.add_argument("--json", action="store_true", help="print JSON instead of a table")
    p.set_defaults(analyze_handler=f"{_HANDLERS}:run_ringing")

    p = analyze_sub.add_parser("turn-on", help="turn-on delay, rise time, overshoot, monotonicity (or turn-off)",
                               description="CSV: time in s, the output voltage and optionally the input voltage.")
    p.add_argument("file", help="waveform CSV (time column first)")
    p.add_argument("--vout-column", default=None, help="output-voltage column (default: the first value column)")
    p.add_argument("--vin-column", default=None, help="input-voltage column: the delay counts from its edge")
    p.add_argument("--vin-level-v", type=float, default=None,
                   help="input level the delay counts from, V (default: 90 %% of the input's final value)")
    p.add_argument("--band-v", type=float, default=None, help="regulation band half-width, V (default 1 %%)")
    p.add_argument("--final-v", type=float, default=None, help="final output level, V (default: the record's tail)")
    p.add_argument("--turn-off", action="store_true", help="measure a turn-off (fall time, undershoot) instead")
    p.add_argument("--json", action="store_true", help="print JSON instead of a table")
    p.set_defaults(analyze_handler=f"{_HANDLERS}:run_turn_on")

    p = analyze_sub.add_parser("inrush", help="inrush peak current and I2t at switch-on",
                               description="CSV: time in s and the input current.")
    p.add_argument("file", help="waveform CSV (time column first)")
    p.add_argument("--column", default=None, help="input-current column (default: the first value column)")
    p.add_argument("--source-limit-a", type=float, default=None, help="the source's current limit, A")
    p.add_argument("--json", action="store_true", help="print JSON instead of a table")
    p.set_defaults(analyze_handler=f"{_HANDLERS}:run_inrush")

    p = analyze_sub.add_parser("line-step", help="line-step response: peak deviation, static shift, recovery",
                               description="CSV: time in s (0 at the step, or give --step-time-s) and the output.")
    p.add_argument("file", help="waveform CSV (time column first)")
    p.add_argument("--vout-column", default=None, help="output-voltage column (default: the first value column)")
    p.add_argument("--step-time-s", type=float, default=0.0, help="time of the line step in the file, s (default 0)")
    p.add_argument("--band-v", type=float, required=True, help="recovery band half-width around the pre-step value, V")
    p.add_argument("--fsw-hz", type=float, default=None,
                   help="switching frequency: metrics on the output averaged over one switching period")
    p.add_argument("--json", action="store_true", help="print JSON instead of a table")
    p.set_defaults(analyze_handler=f"{_HANDLERS}:run_line_step")

    p = analyze_sub.add_parser("hold-up", help="hold-up time after an input dropout (and the energy estimate)",
                               description="CSV: time in s, the DUT input voltage and the output voltage, the record "
                                           "beginning before the dropout.")
    p.add_argument("file", help="waveform CSV (time column first)")
    p.add_argument("--vin-column", required=True, help="input-voltage column")
    p.add_argument("--vout-column", required=True, help="output-voltage column")
    p.add_argument("--band-v", type=float, required=True, help="regulation band half-width, V")
    p.add_argument("--capacitance-f", type=float, default=None, help="bulk capacitance on the input, F")
    p.add_argument("--power-w", type=float, default=None, help="input power before the dropout, W")
    p.add_argument("--json", action="store_true", help="print JSON instead of a table")
    p.set_defaults(analyze_handler=f"{_HANDLERS}:run_hold_up")

    p = analyze_sub.add_parser("warm-up", help="first-order fit of a temperature log: final value, time constant",
                               description="CSV: time in s from a load step and a temperature column (°C).")
    p.add_argument("file", help="logger CSV (time column first)")
    p.add_argument("--column", default=None, help="temperature column (default: the first value column)")
    p.add_argument("--ambient-column", default=None, help="ambient column: the rise above it is reported too")
    p.add_argument("--json", action="store_true", help="print JSON instead of a table")
    p.set_defaults(analyze_handler=f"{_HANDLERS}:run_warm_up")

    p = analyze_sub.add_parser("hiccup", help="current into a short: peak, average, hiccup period and duty",
                               description="CSV: time in s and the output (or short) current, from the short on.")
    p.add_argument("file", help="waveform CSV (time column first)")
    p.add_argument("--column", default=None, help="current column (default: the first value column)")
    p.add_argument("--skip-s", type=float, default=0.0,
                   help="leave out the first S seconds (the output capacitance's first discharge) from the cycles")
    p.add_argument("--json", action="store_true", help="print JSON instead of a table")
    p.set_defaults(analyze_handler=f"{_HANDLERS}:run_hiccup")


# ---------------------------------------------------------------- output

def _jsonable(value: Any) -> Any:
    if dataclasses.is_dataclass(value) and not isinstance(value, type):
        return _jsonable(dataclasses.asdict(value))
    if isinstance(value, dict):
        return {str(k): _jsonable(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [_jsonable(v) for v in value]
    if hasattr(value, "item") and not isinstance(value, (str, bytes)):
        value = value.item()
    if isinstance(value, float) and not math.isfinite(value):
        return None
    return value


def _emit(args: argparse.Namespace, title: str, source: dict[str, Any], result: Any) -> int:
    data = {"file": args.file, **source, "result": _jsonable(result)}
    if args.json:
        print(json.dumps(data, indent=2))
        return EXIT_OK
    from rich.markup import escape
    from rich.table import Table

    from benchctl.commands.console import console

    table = Table(title=escape(f"{title}: {args.file}"))
    table.add_column("quantity")
    table.add_column("value", justify="right")
    for key, value in source.items():
        table.add_row(escape(key), escape(str(value)))
    for key, value in data["result"].items():
        text = f"{value:.6g}" if isinstance(value, float) else "—" if value is None else str(value)
        table.add_row(escape(key), escape(text))
    console().print(table)
    return EXIT_OK


def _load(args: argparse.Namespace, min_rows: int) -> Any:
    from benchctl.analysis.waveform_csv import read_waveform_csv

    return read_waveform_csv(args.file, min_rows=min_rows)


# ---------------------------------------------------------------- handlers

def run_transient(args: argparse.Namespace) -> int:
    from benchctl.analysis.transient import load_step_metrics
    from benchctl.errors import AnalysisInputError

    table = _load(args, 10)
    vname, vout = table.column(args.vout_column)
    iname, iout = None, None
    if args.step_time_s is None:
        if args.iout_column is not None:
            iname, iout = table.column(args.iout_column)
        elif len(table.columns) >= 2:
            iname, iout = table.column(position=1 if vname == list(table.columns)[0] else 0)
        else:
            raise AnalysisInputError(f"{args.file}: no load-current column to find the step in; "
                                     "add one (--iout-column) or give --step-time-s")
    band_v = args.band_v
    band_rel = None if band_v is not None else (args.band_pct if args.band_pct is not None else 1.0) / 100.0
    fsw = getattr(args, "fsw_hz", None)
    source: dict[str, Any] = {"vout_column": vname, "iout_column": iname}
    if fsw is not None:
        from benchctl.analysis.transient import switching_period_average

        if not (math.isfinite(fsw) and fsw > 0):
            raise AnalysisInputError(f"--fsw-hz {fsw!r} must be a frequency > 0 Hz")
        vout = switching_period_average(table.t_s, vout, fsw)
        source["averaged_over_switching_period_s"] = 1.0 / fsw
    else:
        source["averaged_over_switching_period_s"] = None
    m = load_step_metrics(table.t_s, vout, step_time_s=args.step_time_s, iout_a=iout, band_v=band_v,
                          band_rel=band_rel, load_step=args.load_step,
                          pre_guard_s=0.5 / fsw if fsw is not None else 0.0)
    return _emit(args, "load transient", source, m)


def run_ripple(args: argparse.Namespace) -> int:
    from benchctl.analysis.ripple import output_ripple

    table = _load(args, 8)
    name, v = table.column(args.column)
    r = output_ripple(table.t_s, v, fsw_hz=args.fsw_hz, bandwidth_limit_hz=args.bandwidth_limit_hz)
    return _emit(args, "output ripple", {"column": name}, r)


def run_mode(args: argparse.Namespace) -> int:
    from benchctl.analysis.conduction_mode import classify_conduction_mode

    table = _load(args, 16)
    name, i = table.column(args.column)
    gate = table.column(args.gate_column)[1] if args.gate_column else None
    r = classify_conduction_mode(table.t_s, i, v_gate_v=gate, fsw_hz=args.fsw_hz, threshold_ratio=args.threshold_ratio)
    return _emit(args, "conduction mode", {"column": name, "gate_column": args.gate_column}, r)


def run_ringing(args: argparse.Namespace) -> int:
    import numpy as np

    from benchctl.analysis.ringing import fit_ringing
    from benchctl.errors import AnalysisInputError

    table = _load(args, 20)
    name, v = table.column(args.column)
    if args.start_time_s is not None:
        t = table.t_s
        if not (t[0] <= args.start_time_s <= t[-1]):
            raise AnalysisInputError(f"{args.file}: --start-time-s {args.start_time_s!r} is outside the record "
                                     f"[{t[0]!r}, {t[-1]!r}] s")
        start = int(np.searchsorted(t, args.start_time_s))
    else:
        from benchctl.analysis.ringing import ring_start_index

        start = ring_start_index(v)
    fit = fit_ringing(table.t_s, v, start_index=start)
    return _emit(args, "ringing", {"column": name}, fit)


def run_turn_on(args: argparse.Namespace) -> int:
    import numpy as np

    from benchctl.analysis.turn_on import input_edge_s, turn_off_metrics, turn_on_metrics

    table = _load(args, 8)
    vname, vout = table.column(args.vout_column)
    t_in, level = None, None
    if args.vin_column is not None:
        _, vin = table.column(args.vin_column)
        tail = vin[-max(len(vin) // 20, 1):] if not args.turn_off else vin[:max(len(vin) // 20, 1)]
        level = args.vin_level_v if args.vin_level_v is not None else 0.9 * float(np.median(tail))
        t_in = input_edge_s(table.t_s, vin, level, rising=not args.turn_off)
    source: dict[str, Any] = {"vout_column": vname, "vin_column": args.vin_column, "vin_level_v": level}
    if args.turn_off:
        m_off = turn_off_metrics(table.t_s, vout, t_input_s=t_in, final_v=args.final_v)
        return _emit(args, "turn-off", source, m_off)
    m = turn_on_metrics(table.t_s, vout, t_input_s=t_in, final_v=args.final_v, band_v=args.band_v)
    return _emit(args, "turn-on", source, m)


def run_inrush(args: argparse.Namespace) -> int:
    from benchctl.analysis.inrush import inrush_metrics

    table = _load(args, 4)
    name, i = table.column(args.column)
    m = inrush_metrics(table.t_s, i, source_limit_a=args.source_limit_a)
    return _emit(args, "inrush", {"column": name}, m)


def run_line_step(args: argparse.Namespace) -> int:
    from benchctl.analysis.line_response import line_step_metrics

    table = _load(args, 8)
    name, vout = table.column(args.vout_column)
    if args.fsw_hz:
        from benchctl.analysis.transient import switching_period_average

        vout = switching_period_average(table.t_s, vout, args.fsw_hz)
    m = line_step_metrics(table.t_s, vout, step_time_s=args.step_time_s, band_v=args.band_v)
    return _emit(args, "line step", {"vout_column": name, "averaged_over_fsw": bool(args.fsw_hz)}, m)


def run_hold_up(args: argparse.Namespace) -> int:
    from benchctl.analysis.hold_up import energy_hold_up_s, hold_up_metrics

    table = _load(args, 10)
    _, vin = table.column(args.vin_column)
    _, vout = table.column(args.vout_column)
    m = hold_up_metrics(table.t_s, vin, vout, band_v=args.band_v)
    source: dict[str, Any] = {"vin_column": args.vin_column, "vout_column": args.vout_column}
    if args.capacitance_f and args.power_w and m.v2_v is not None:
        energy = energy_hold_up_s(args.capacitance_f, m.v1_v, m.v2_v, args.power_w)
        source["energy_hold_up_s"] = f"{energy:.6g}"
        if m.hold_up_s is not None:
            source["hold_up_to_energy"] = f"{m.hold_up_s / energy:.4g}"
    return _emit(args, "hold-up", source, m)


def run_warm_up(args: argparse.Namespace) -> int:
    import numpy as np

    from benchctl.analysis.thermal import fit_first_order

    table = _load(args, 4)
    name, temp = table.column(args.column)
    fit = fit_first_order(table.t_s, temp)
    source: dict[str, Any] = {"column": name}
    if args.ambient_column is not None:
        _, ambient = table.column(args.ambient_column)
        source["rise_at_end_k"] = f"{float(fit.t_final_c - np.mean(ambient)):.4g}"
    return _emit(args, "warm-up", source, fit)


def run_hiccup(args: argparse.Namespace) -> int:
    from benchctl.analysis.protection import hiccup_metrics

    table = _load(args, 8)
    name, current = table.column(args.column)
    return _emit(args, "hiccup", {"column": name}, hiccup_metrics(table.t_s, current, skip_s=args.skip_s))
