"""``benchctl analyze loop-gain FILE.csv``: crossovers and margins of a measured loop, a fitted
plant model and a proposed type 2/3 compensator.

::

    benchctl analyze loop-gain bode.csv [--json] [--phase-convention loop|inverted]
        [--fit [--fit-max-order N] [--origin-poles K]]
        [--propose --crossover-hz F [--phase-margin-deg P] [--type auto|2|3] [--r1-ohm R]]
        [--fsw-hz F] [--smooth-points N] [--merge-decades D] [--unwrap-step-limit-deg A]

``--smooth-points`` / ``--merge-decades`` are the noise remedies of
:func:`~benchctl.analysis.margins.loop_margins` (off by default: every crossing in the
data is reported). A warning is printed when neighbouring samples lie too far apart in
phase to unwrap without ambiguity (``--unwrap-step-limit-deg``, default 90): the phase
crossings from there up are marked and may be spurious.

Margins: :func:`benchctl.analysis.margins.loop_margins` (Erickson & Maksimović 2nd ed.,
ch. 9). Fit: :func:`benchctl.analysis.plant_fit.fit_plant_auto` (Levy 1959, Sanathanan &
Koerner 1963) on s^K·H when ``--origin-poles K`` says the data hold K poles at the origin.
Proposal: K-factor design (Venable 1983, :mod:`benchctl.analysis.compensator`) for the
response in the file taken as the path to be compensated (the plant: everything in the
loop but the error amplifier) — measured data, or the fitted model with ``--fit``.

Sub-commands of ``analyze`` set ``analyze_handler`` ("module:function") with
``set_defaults``; :func:`cmd_analyze` imports and calls it. This module imports nothing
heavy at import time, so ``benchctl --help`` stays fast.
"""

from __future__ import annotations

import argparse
import importlib
import json
import math
import sys
from typing import Any

from benchctl.exit_codes import EXIT_BAD_INPUT, EXIT_OK


def add_analyze_arguments(subparsers: Any) -> argparse.ArgumentParser:
    """Add ``analyze`` (with ``loop-gain`` and, when installed, the waveform analyses) to ``subparsers``."""
    analyze = subparsers.add_parser("analyze", help="analyse data files: loop gain (and waveforms)",
                                    description="Analyse a measured data file without an instrument or a database.")
    analyze_sub = analyze.add_subparsers(dest="analysis", metavar="ANALYSIS")
    p = analyze_sub.add_parser(
        "loop-gain", help="crossovers, phase/gain margins, plant fit and compensator proposal from a CSV",
        description="Loop-gain CSV: a header row with freq_hz and gain_db,phase_deg (or re,im); "
                    "'#' lines are comments ('# phase_convention: inverted' marks -T data).")
    p.add_argument("file", help="CSV file with freq_hz and gain_db/phase_deg or re/im columns")
    p.add_argument("--json", action="store_true", help="print JSON instead of tables")
    p.add_argument("--phase-convention", choices=("loop", "inverted"), default=None,
                   help="the data are T (loop) or -T (inverted); default: the file's comment, else loop")
    p.add_argument("--fit", action="store_true", help="fit a rational model: DC gain, poles, zeros, RHP zeros, Q")
    p.add_argument("--fit-max-order", type=int, default=4, metavar="N", help="highest denominator order tried")
    p.add_argument("--origin-poles", type=int, default=0, choices=(0, 1, 2),
                   help="poles at the origin in the data (an integrating loop); fitted as s^K times the data")
    p.add_argument("--propose", action="store_true", help="propose a type 2/3 compensator for the data as plant")
    p.add_argument("--crossover-hz", type=float, default=None, metavar="F", help="target crossover for --propose")
    p.add_argument("--phase-margin-deg", type=float, default=60.0, metavar="P",
                   help="target phase margin for --propose (default 60)")
    p.add_argument("--type", dest="comp_type", choices=("auto", "2", "3"), default="auto",
                   help="compensator type (auto: type 2 when its boost suffices, else type 3)")
    p.add_argument("--r1-ohm", type=float, default=10e3, metavar="R", help="upper feedback resistor R1 (default 10k)")
    p.add_argument("--fsw-hz", type=float, default=None, metavar="F",
                   help="switching frequency: warns when the crossover is above fsw/5")
    p.add_argument("--smooth-points", type=int, default=1, metavar="N",
                   help="centred moving average of log|T| and phase over N samples (odd; default 1 = none)")
    p.add_argument("--merge-decades", type=float, default=0.0, metavar="D",
                   help="crossings of one kind closer than D decades count as one (odd cluster) or none (even); "
                        "default 0 = report every crossing")
    p.add_argument("--unwrap-step-limit-deg", type=float, default=None, metavar="A",
                   help="warn when neighbouring samples differ by more than A degrees in phase (default 90)")
    p.set_defaults(analyze_handler="benchctl.commands.analyze:run_loop_gain")
    try:
        from benchctl.commands.analyze_waveforms import add_waveform_subcommands
    except ImportError:
        pass
    else:
        add_waveform_subcommands(analyze_sub)
    return analyze


def cmd_analyze(args: argparse.Namespace) -> int:
    """Run the chosen analysis; bad input prints one error line and returns exit code 2."""
    from benchctl.commands.console import error_console
    from benchctl.errors import AnalysisInputError, ConfigurationError

    handler = getattr(args, "analyze_handler", None)
    if handler is None:
        error_console().print("[bold red]error:[/] choose an analysis, e.g. `benchctl analyze loop-gain FILE.csv` "
                              "(see `benchctl analyze --help`)", markup=True, highlight=False)
        return EXIT_BAD_INPUT
    if isinstance(handler, str):
        module_name, _, func = handler.partition(":")
        handler = getattr(importlib.import_module(module_name), func)
    try:
        return int(handler(args))
    except (AnalysisInputError, ConfigurationError) as exc:
        from rich.markup import escape

        error_console().print(f"[bold red]error:[/] {escape(str(exc))}", markup=True, highlight=False, soft_wrap=True)
        return EXIT_BAD_INPUT


# ------------------------------------------------------------------------ loop gain

def _c(z: complex) -> dict[str, float]:
    return {"re": float(z.real), "im": float(z.imag), "freq_hz": abs(z) / (2.0 * math.pi)}


def _margins_dict(m: Any) -> dict[str, Any]:
    return m.to_dict()


def _fit_dict(fit: Any, origin_poles: int) -> dict[str, Any]:
    return {
        "num_order": fit.num_order, "den_order": fit.den_order, "origin_poles": origin_poles,
        "dc_gain": fit.dc_gain,
        "dc_gain_db": 20.0 * math.log10(abs(fit.dc_gain)) if fit.dc_gain else None,
        "num": list(fit.num), "den": list(fit.den),
        "poles": [_c(p) for p in fit.poles_rad_s],
        "zeros": [_c(z) for z in fit.zeros_rad_s],
        "rhp_zeros_hz": list(fit.rhp_zero_freqs_hz),
        "resonances": [{"f0_hz": r.f0_hz, "q": r.q} for r in fit.resonances],
        "fit_error": {"rms_relative": fit.fit_error.rms_relative,
                      "max_gain_error_db": fit.fit_error.max_gain_error_db,
                      "max_phase_error_deg": fit.fit_error.max_phase_error_deg},
        "notes": list(fit.notes),
        "convention": "num/den in descending powers of s (rad/s); poles and zeros in rad/s with |p|/2pi in Hz; "
                      "the model is of s^K times the data when origin_poles = K",
    }


def _parts_dict(parts: Any) -> dict[str, Any]:
    out = {"r1_ohm": parts.r1_ohm, "r2_ohm": parts.r2_ohm, "c1_f": parts.c1_f, "c2_f": parts.c2_f}
    if parts.kind == 3:
        out.update(r3_ohm=parts.r3_ohm, c3_f=parts.c3_f)
    return out


def _proposal_dict(d: Any) -> dict[str, Any]:
    return {
        "type": d.kind, "crossover_hz": d.crossover_hz, "target_phase_margin_deg": d.target_phase_margin_deg,
        "plant_gain_db": d.plant_gain_db, "plant_phase_deg": d.plant_phase_deg,
        "boost_required_deg": d.boost_required_deg, "boost_deg": d.boost_deg, "k_factor": d.k_factor,
        "zero_hz": d.zero_hz, "pole_hz": d.pole_hz,
        "ideal_parts": _parts_dict(d.ideal_parts), "eseries_parts": _parts_dict(d.rounded_parts),
        "series": "resistors E96, capacitors E12 (IEC 60063)",
        "predicted_crossover_hz": d.predicted_crossover_hz,
        "predicted_phase_margin_deg": d.predicted_phase_margin_deg,
        "predicted_gain_margin_db": d.predicted_gain_margin_db,
        "warnings": list(d.warnings),
        "method": "K factor (Venable 1983)",
    }


def loop_gain_report(args: argparse.Namespace) -> dict[str, Any]:
    """Everything ``analyze loop-gain`` reports, as a JSON-ready dict (raises AnalysisInputError)."""
    import numpy as np

    from benchctl.analysis.compensator import MeasuredPlant, design_type2, design_type3
    from benchctl.analysis.loop_csv import read_loop_csv
    from benchctl.analysis.margin_uncertainty import margin_uncertainty
    from benchctl.analysis.margins import loop_margins
    from benchctl.analysis.plant_fit import fit_plant_auto
    from benchctl.errors import AnalysisInputError

    data = read_loop_csv(args.file)
    convention = args.phase_convention or data.phase_convention or "loop"
    smooth = int(getattr(args, "smooth_points", 1) or 1)
    merge = float(getattr(args, "merge_decades", 0.0) or 0.0)
    limit = getattr(args, "unwrap_step_limit_deg", None)
    kwargs_m: dict[str, Any] = {"smooth_points": smooth, "merge_decades": merge}
    if limit is not None:
        kwargs_m["unwrap_step_limit_deg"] = float(limit)
    m = loop_margins(data.freq_hz, data.response, phase_convention=convention, **kwargs_m)
    t_data = -data.response if convention == "inverted" else data.response
    spread = margin_uncertainty(data.freq_hz, t_data, m)
    report: dict[str, Any] = {
        "file": data.path, "points": int(data.freq_hz.size), "form": data.form, "columns": list(data.columns),
        "band_hz": [float(data.freq_hz[0]), float(data.freq_hz[-1])], "phase_convention": convention,
        "smooth_points": smooth, "merge_decades": merge,
        **_margins_dict(m), "warnings": [],
        # U = k·u from the trace's own scatter (benchctl.analysis.margin_uncertainty), None where unknown
        "expanded_uncertainty": {name: None if u is None else u.expanded for name, u in (
            ("crossover_hz", spread.crossover_hz), ("phase_margin_deg", spread.phase_margin_deg),
            ("gain_margin_db", spread.gain_margin_db))},
    }
    report["notes"] = list(report["notes"]) + list(spread.notes)
    if smooth > 1:
        report["notes"].append("the margins' uncertainty is taken from the raw samples, before the smoothing")
    if m.unwrap_ambiguous_from_hz is not None:
        n_amb = sum(1 for c in m.phase_crossovers if c.unwrap_ambiguous)
        report["warnings"].append(
            f"neighbouring samples are too far apart in phase to unwrap without ambiguity from "
            f"{m.unwrap_ambiguous_from_hz:g} Hz up; {n_amb} phase crossover(s) there may be spurious or missing "
            "(the note says the sweep density needed)")
    if args.fsw_hz is not None:
        if not (math.isfinite(args.fsw_hz) and args.fsw_hz > 0):
            raise AnalysisInputError(f"--fsw-hz {args.fsw_hz!r} must be a frequency > 0 Hz")
        fc = m.crossover_hz
        if fc is not None and fc > args.fsw_hz / 5.0:
            report["warnings"].append(f"crossover {fc:g} Hz is above fsw/5 = {args.fsw_hz / 5.0:g} Hz "
                                      "(common practice: fc <= fsw/5 .. fsw/10)")
    t = -data.response if convention == "inverted" else data.response
    fit = None
    if args.fit:
        s = 2j * math.pi * data.freq_hz
        fit = fit_plant_auto(data.freq_hz, t * s ** args.origin_poles, max_order=args.fit_max_order)
        report["fit"] = _fit_dict(fit, args.origin_poles)
    if args.propose:
        if args.crossover_hz is None:
            raise AnalysisInputError("--propose needs --crossover-hz F (the target crossover in Hz)")
        if args.origin_poles and fit is not None:
            raise AnalysisInputError("--propose designs for a plant without poles at the origin; drop --origin-poles")
        plant: Any = fit if fit is not None else MeasuredPlant(np.asarray(data.freq_hz), np.asarray(t))
        kwargs = dict(crossover_hz=args.crossover_hz, phase_margin_deg=args.phase_margin_deg, r1_ohm=args.r1_ohm,
                      fsw_hz=args.fsw_hz)
        if args.comp_type == "3":
            design = design_type3(plant, **kwargs)
        else:
            design = design_type2(plant, **kwargs)
            if args.comp_type == "auto" and design.boost_required_deg > 85.0:
                design = design_type3(plant, **kwargs)
        report["proposal"] = _proposal_dict(design)
        report["proposal"]["plant"] = "fitted model" if fit is not None else "measured data"
    return report


def _jsonable(obj: Any) -> Any:
    """Plain JSON values: numpy numbers become floats, non-finite floats None."""
    if isinstance(obj, dict):
        return {str(k): _jsonable(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [_jsonable(v) for v in obj]
    if isinstance(obj, bool) or obj is None or isinstance(obj, str):
        return obj
    if isinstance(obj, int):
        return obj
    try:
        value = float(obj)
    except (TypeError, ValueError):
        return str(obj)
    return value if math.isfinite(value) else None


def _fmt(value: Any, unit: str, digits: int = 4) -> str:
    return "not found" if value is None else f"{value:.{digits}g} {unit}".strip()


def run_loop_gain(args: argparse.Namespace) -> int:
    report = loop_gain_report(args)
    if args.json:
        sys.stdout.write(json.dumps(_jsonable(report), indent=2, allow_nan=False) + "\n")
        return EXIT_OK
    from rich.markup import escape
    from rich.table import Table

    from benchctl.commands.console import console

    out = console()
    table = Table(title=f"loop gain: {escape(report['file'])} ({report['points']} points, "
                        f"{report['band_hz'][0]:g}..{report['band_hz'][1]:g} Hz, data are "
                        f"{'-T' if report['phase_convention'] == 'inverted' else 'T'})")
    table.add_column("quantity")
    table.add_column("value", justify="right")
    big_u = report["expanded_uncertainty"]

    def with_u(name: str, unit: str) -> str:
        text = _fmt(report[name], unit)
        u = big_u.get(name)
        return text if report[name] is None or u is None else f"{text} ± {u:.2g} (U)"

    table.add_row("crossover", with_u("crossover_hz", "Hz"))
    table.add_row("phase margin", with_u("phase_margin_deg", "deg"))
    table.add_row("gain margin", with_u("gain_margin_db", "dB"))
    table.add_row("phase crossover", _fmt(report["phase_crossover_hz"], "Hz"))
    table.add_row("phase crossovers found", str(len(report["phase_crossovers"]))
                  + (" (some above the unwrap limit)" if report["unwrap_ambiguous_from_hz"] is not None else ""))
    table.add_row("modulus margin min|1+T|", _fmt(report["modulus_margin"], ""))
    out.print(table)
    for key, reason in report["not_found"].items():
        if reason:
            out.print(f"[yellow]{key.replace('_', ' ')}:[/] {escape(reason)}")
    for note in report["notes"]:
        out.print(f"[yellow]note:[/] {escape(note)}")
    for warning in report["warnings"]:
        out.print(f"[bold yellow]warning:[/] {escape(warning)}")
    if "fit" in report:
        f = report["fit"]
        out.print(f"[bold]plant fit[/] order {f['num_order']}/{f['den_order']}"
                  + (f" (times s^{f['origin_poles']})" if f["origin_poles"] else "")
                  + f": DC gain {f['dc_gain']:.4g}, rms relative error {f['fit_error']['rms_relative']:.3g}")
        for p in f["poles"]:
            out.print(f"  pole  {p['re']:.4g} {p['im']:+.4g}j rad/s  ({p['freq_hz']:.4g} Hz)")
        for z in f["zeros"]:
            out.print(f"  zero  {z['re']:.4g} {z['im']:+.4g}j rad/s  ({z['freq_hz']:.4g} Hz)")
        for r in f["resonances"]:
            out.print(f"  resonance f0 {r['f0_hz']:.4g} Hz, Q {r['q']:.3g}")
        for fz in f["rhp_zeros_hz"]:
            out.print(f"  [yellow]right-half-plane zero[/] at {fz:.4g} Hz")
    if "proposal" in report:
        pr = report["proposal"]
        out.print(f"[bold]type {pr['type']} compensator[/] for fc {pr['crossover_hz']:g} Hz, PM "
                  f"{pr['target_phase_margin_deg']:g} deg (K = {pr['k_factor']:.4g}, {pr['plant']})")
        for name, value in pr["eseries_parts"].items():
            out.print(f"  {name} = {value:.4g}")
        out.print(f"  predicted: crossover {_fmt(pr['predicted_crossover_hz'], 'Hz')}, PM "
                  f"{_fmt(pr['predicted_phase_margin_deg'], 'deg')}, GM {_fmt(pr['predicted_gain_margin_db'], 'dB')}")
        for w in pr["warnings"]:
            out.print(f"  [yellow]warning:[/] {escape(w)}")
    return EXIT_OK
