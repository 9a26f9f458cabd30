"""Loop gain, crossover and margins at the corners of the line x load envelope.

At each operating point (by default the four corners — lowest and highest line of
``vin_v`` with the lightest and heaviest of ``load_pct`` — and the nominal point) the
source and load are set, the output is settled, the analyzer sweeps, and the Bode trace
is stored as the array ``bode`` (freq_hz, gain_db, phase_deg, re, im; meta: operating
point, injection, phase convention) linked to a point holding the operating point and
its margins. Margins follow Erickson & Maksimović, *Fundamentals of Power Electronics*,
2nd ed., ch. 9 (see :mod:`benchctl.analysis.margins`).

Phase convention: ``loop`` — the analyzer reports T; ``inverted`` — it reports −T (the
inverting error amplifier's 180° included, so the displayed phase at crossover reads as
the phase margin). The stored trace is what the analyzer reported; ``meta`` and the point
value ``phase_inverted`` say which, and margins are taken on T.

Injection check (``injection_check = true``): at one point the sweep is repeated with half
and double the injection. The rule of thumb (common practice) is that an injection small
enough to be linear and large enough to beat the noise changes nothing when halved or
doubled. A change with a systematic loss of gain at the larger amplitude means the loop
is compressed (injection too large); a change without one, or a rough trace near
crossover, means the measurement is noise-limited (injection too small).
"""

from __future__ import annotations

import math
from typing import Any, Mapping

import numpy as np

from benchctl.analysis.injection_check import (
    CheckTolerances,
    TraceSummary,
    compression_db,
    injection_verdict,
    scatter_db,
    summarize,
)
from benchctl.analysis.injection_check import number_or_none as _num
from benchctl.errors import AnalysisInputError
from benchctl.procedure import Parameter, Parameters, Result, power_parameters

NAME = "loop_gain"
DESCRIPTION = "loop gain, crossover, phase and gain margin over the line x load corners"
ROLES = ("source", "load", "analyzer")

MAIN_TAGS = ("corner", "nominal", "point")
CHECK_TAGS = {"injection_half": 0.5, "injection_double": 2.0}

PARAMETERS = [
    Parameter("vin_v", "V", [36.0, 48.0, 75.0], minimum=0.0, maximum=1500.0, kind="float_list",
              help="line voltages; the corners use the lowest and the highest"),
    Parameter("vin_nom_v", "V", None, minimum=0.0, maximum=1500.0, optional=True,
              help="nominal line (default: the median of vin_v)"),
    Parameter("iout_rated_a", "A", 5.0, minimum=0.0, maximum=1000.0, help="rated output current"),
    Parameter("load_pct", "%", [20.0, 100.0], minimum=0.0, maximum=150.0, kind="float_list",
              help="load levels in % of rated; the corners use the lightest and the heaviest"),
    Parameter("nominal_load_pct", "%", 50.0, minimum=0.0, maximum=150.0, help="load of the nominal point"),
    Parameter("point_vin_v", "V", None, minimum=0.0, maximum=1500.0, kind="float_list", optional=True,
              help="explicit operating points (line), paired with point_iout_a; replace the corners"),
    Parameter("point_iout_a", "A", None, minimum=0.0, maximum=1000.0, kind="float_list", optional=True,
              help="explicit operating points (load current), paired with point_vin_v"),
    Parameter("vout_nom_v", "V", 5.0, minimum=0.0, maximum=1500.0, help="nominal output voltage"),
    *power_parameters(startup_delay_s=0.05),
    Parameter("settle_rel_tol", "", 1e-3, minimum=0.0, maximum=0.1, help="settle: relative agreement of Vout"),
    Parameter("settle_abs_tol_v", "V", 2e-3, minimum=0.0, maximum=1.0, help="settle: absolute agreement of Vout"),
    Parameter("settle_timeout_s", "s", 5.0, minimum=0.0, maximum=600.0, help="settle: give up after"),
    Parameter("start_hz", "Hz", 10.0, minimum=1e-3, maximum=1e8, help="sweep start frequency"),
    Parameter("stop_hz", "Hz", 100e3, minimum=1e-3, maximum=1e8, help="sweep stop frequency"),
    Parameter("points", "", 121, minimum=3, maximum=10001, kind="int", help="sweep points"),
    Parameter("spacing", "", "log", kind="str", choices=("log", "linear"), help="frequency spacing"),
    Parameter("bandwidth_hz", "Hz", 10.0, minimum=1e-3, maximum=1e6, help="analyzer measurement bandwidth"),
    Parameter("averaging", "", 1, minimum=1, maximum=1024, kind="int", help="integrations averaged per point"),
    Parameter("injection_v", "V", 0.01, minimum=0.0, maximum=100.0, help="injection amplitude, V peak"),
    Parameter("injection_profile_hz", "Hz", None, minimum=0.0, maximum=1e8, kind="float_list", optional=True,
              help="injection profile breakpoints (Hz); with injection_profile_v replaces injection_v"),
    Parameter("injection_profile_v", "V", None, minimum=0.0, maximum=100.0, kind="float_list", optional=True,
              help="injection profile amplitudes (V peak), larger where the loop gain is high"),
    Parameter("phase_convention", "", "loop", kind="str", choices=("loop", "inverted"),
              help="the analyzer reports T (loop) or -T (inverted)"),
    Parameter("wait_method", "", "opc", kind="str", choices=("opc", "poll"),
              help="wait for the sweep with *OPC? or by polling the status"),
    Parameter("injection_check", "", False, kind="bool",
              help="repeat one point with half and double injection and flag a changed result"),
    Parameter("injection_check_index", "", -1, minimum=-1000, maximum=1000, kind="int",
              help="which planned point the check repeats (Python index; -1 = the last, nominal)"),
    Parameter("check_pm_tol_deg", "deg", 2.0, minimum=0.0, maximum=90.0, help="check: allowed PM change"),
    Parameter("check_fc_tol_pct", "%", 5.0, minimum=0.0, maximum=100.0, help="check: allowed crossover change"),
    Parameter("check_gm_tol_db", "dB", 1.0, minimum=0.0, maximum=60.0, help="check: allowed GM change"),
    Parameter("noise_limit_db", "dB", 0.2, minimum=0.0, maximum=20.0,
              help="gain scatter near crossover above which a trace is called noise-limited"),
]


# --------------------------------------------------------------------------- plan

def _nominal_vin(p: Parameters) -> float:
    return float(p.vin_nom_v) if p.vin_nom_v is not None else float(np.median(p.vin_v))


def plan(p: Parameters) -> list[dict]:
    """Operating points in measurement order: four corners then nominal, or the explicit list."""
    if p.point_vin_v is not None or p.point_iout_a is not None:
        from benchctl.errors import ParameterError

        if p.point_vin_v is None or p.point_iout_a is None or len(p.point_vin_v) != len(p.point_iout_a):
            raise ParameterError("point_vin_v and point_iout_a must both be given, with the same length")
        return [{"vin_set_v": v, "iout_set_a": i, "tag": "point"} for v, i in zip(p.point_vin_v, p.point_iout_a)]
    lo_v, hi_v = min(p.vin_v), max(p.vin_v)
    loads = sorted({round(p.iout_rated_a * pct / 100.0, 9) for pct in p.load_pct})
    lo_i, hi_i = loads[0], loads[-1]
    points = []
    for vin in sorted({lo_v, hi_v}):
        for iout in sorted({lo_i, hi_i}):
            points.append({"vin_set_v": vin, "iout_set_a": iout, "tag": "corner"})
    points.append({"vin_set_v": _nominal_vin(p), "iout_set_a": round(p.iout_rated_a * p.nominal_load_pct / 100.0, 9),
                   "tag": "nominal"})
    return points


def _tolerances(p: Parameters) -> CheckTolerances:
    return CheckTolerances(crossover_rel=p.check_fc_tol_pct / 100.0, phase_margin_deg=p.check_pm_tol_deg,
                           gain_margin_db=p.check_gm_tol_db, noise_limit_db=p.noise_limit_db)


# ---------------------------------------------------------------------------- run

def _injection(p: Parameters):
    from benchctl.drivers.loop_analyzer import InjectionProfile

    if p.injection_profile_hz is not None or p.injection_profile_v is not None:
        from benchctl.errors import ParameterError

        if p.injection_profile_hz is None or p.injection_profile_v is None:
            raise ParameterError("give both injection_profile_hz and injection_profile_v, or neither")
        return InjectionProfile(tuple(p.injection_profile_hz), tuple(p.injection_profile_v))
    return InjectionProfile((1.0,), (p.injection_v,))


def _apply_injection(analyzer, profile, scale: float) -> float:
    """Program the injection ``scale`` × profile (capped at the guard's maximum); returns the scale used."""
    cap = analyzer.max_injection_v
    if profile.max_amplitude_v * scale > cap:
        scale = cap / profile.max_amplitude_v
    scaled = profile.scaled(scale)
    if len(scaled.freq_hz) == 1:
        analyzer.set_injection(scaled.amplitude_v[0])
    else:
        analyzer.set_injection_profile(scaled)
    return scale


def _measure(bench, p: Parameters, profile, scale: float) -> tuple[np.ndarray, np.ndarray, TraceSummary, float]:
    analyzer = bench.role("analyzer")
    used = _apply_injection(analyzer, profile, scale)
    trace = analyzer.measure(method=p.wait_method)
    f, h = np.asarray(trace.freq_hz, float), np.asarray(trace.response, complex)
    return f, h, summarize(f, h, p.phase_convention), used


def _record(bench, p: Parameters, point: Mapping[str, Any], profile, tag: str, settle, f: np.ndarray,
            h: np.ndarray, s: TraceSummary, used: float, extra: Mapping[str, float] | None = None) -> int:
    from benchctl.analysis.frequency_response import unwrapped_phase_deg

    source, load = bench.source, bench.load
    vin, vout, iout = source.measure_voltage(), load.measure_voltage(), load.measure_current()
    injection_v = profile.max_amplitude_v * used
    t = -h if p.phase_convention == "inverted" else h
    g = 20.0 * np.log10(np.abs(t))
    ph = unwrapped_phase_deg(t)
    spread = _margin_spread(f, t, s.margins)
    values = {
        "vin_set_v": point["vin_set_v"], "iout_set_a": point["iout_set_a"],
        "vin_v": vin, "vout_v": vout, "iout_a": iout,
        "injection_v": injection_v, "injection_scale": used,
        "phase_inverted": 1.0 if p.phase_convention == "inverted" else 0.0,
        "crossover_hz": s.crossover_hz, "phase_margin_deg": s.phase_margin_deg,
        "phase_crossover_hz": s.phase_crossover_hz, "gain_margin_db": s.gain_margin_db,
        "modulus_margin": s.modulus_margin, "modulus_margin_freq_hz": s.modulus_margin_freq_hz,
        "gain_crossover_count": float(s.gain_crossover_count), "phase_crossover_count": float(s.phase_crossover_count),
        "band_min_hz": float(f[0]), "band_max_hz": float(f[-1]),
        "gain_min_db": float(g.min()), "gain_max_db": float(g.max()),
        "phase_min_deg": float(ph.min()), "phase_max_deg": float(ph.max()),
        **spread,
        **dict(extra or {}),
    }
    seq = bench.record(values, settle=settle, tag=tag)
    meta = {
        "vin_set_v": point["vin_set_v"], "iout_set_a": point["iout_set_a"], "vin_v": vin, "vout_v": vout,
        "iout_a": iout, "injection_v": injection_v, "injection_scale": used,
        "injection_profile_hz": list(profile.freq_hz), "injection_profile_v": [a * used for a in profile.amplitude_v],
        "phase_convention": p.phase_convention,
        "phase_convention_note": ("data are T as the analyzer reported it" if p.phase_convention == "loop" else
                                  "data are -T as the analyzer reported it (inverting stage's 180 deg included); "
                                  "negate before taking margins"),
        "phase_deg": "unwrapped phase of the stored data, first sample in (-270, 90] deg",
        "bandwidth_hz": p.bandwidth_hz, "averaging": p.averaging, "tag": tag,
        "margin_notes": list(s.notes), "phase_margin_reason": s.pm_reason, "gain_margin_reason": s.gm_reason,
    }
    bench.record_array("bode", {"freq_hz": f, "gain_db": 20.0 * np.log10(np.abs(h)),
                                "phase_deg": unwrapped_phase_deg(h), "re": h.real.copy(), "im": h.imag.copy()},
                       units={"re": "", "im": ""}, point_seq=seq, meta=meta)
    return seq


#: Per margin: the point columns of its standard uncertainty and coverage factor.
_SPREAD_COLUMNS = {"crossover_hz": ("crossover_u_hz", "crossover_k"),
                   "phase_margin_deg": ("phase_margin_u_deg", "phase_margin_k"),
                   "gain_margin_db": ("gain_margin_u_db", "gain_margin_k")}
UNCERTAINTY_METHOD = ("type A from the trace's own scatter about a local quadratic in log f (JCGM 100:2008 4.2), "
                      "propagated through the linear interpolation and the crossing's shift (5.1.2), k = t(nu_eff) "
                      "at 95.45 % (G.3, G.4); checked against a Monte Carlo of analyzer noise (JCGM 101:2008)")


def _margin_spread(f: np.ndarray, t: np.ndarray, margins: Any) -> dict[str, float]:
    """The uncertainty of ``margins`` (the trace's LoopMargins; ``t`` in the convention they were taken
    in) from the trace's scatter (benchctl.analysis.margin_uncertainty); NaN where a margin was not found
    or too few samples lie near it."""
    from benchctl.analysis.margin_uncertainty import margin_uncertainty

    try:
        mu = margin_uncertainty(f, t, margins)
    except AnalysisInputError:
        return {col: math.nan for cols in _SPREAD_COLUMNS.values() for col in cols}
    out = {}
    for name, (u_col, k_col) in _SPREAD_COLUMNS.items():
        u = getattr(mu, name)
        out[u_col], out[k_col] = (math.nan, math.nan) if u is None else (u.u, u.k)
    return out


def _summary_values(s: TraceSummary) -> dict[str, Any]:
    return {"crossover_hz": s.crossover_hz, "phase_margin_deg": s.phase_margin_deg,
            "gain_margin_db": s.gain_margin_db}


def run(bench, p: Parameters) -> None:
    source, load, analyzer = bench.source, bench.load, bench.role("analyzer")
    points = plan(p)
    profile = _injection(p)
    analyzer.set_sweep(p.start_hz, p.stop_hz, p.points, p.spacing)
    analyzer.set_bandwidth(p.bandwidth_hz)
    analyzer.set_averaging(p.averaging)
    analyzer.set_polarity(p.phase_convention == "inverted")
    bench.power_up(points[0]["vin_set_v"], points[0]["iout_set_a"],
                   source_current_limit_a=p.source_current_limit_a, startup_delay_s=p.startup_delay_s)
    check_at = points[p.injection_check_index] if p.injection_check and points else None
    for point in bench.sweep(points):
        source.set_voltage(point["vin_set_v"])
        load.set_current(point["iout_set_a"])
        settled = bench.settle(load.measure_voltage, rel_tol=p.settle_rel_tol, abs_tol=p.settle_abs_tol_v,
                               timeout_s=p.settle_timeout_s)
        f, h, s, used = _measure(bench, p, profile, 1.0)
        _record(bench, p, point, profile, point["tag"], settled, f, h, s, used)
        if point is not check_at:
            continue
        others: dict[str, dict] = {}
        for tag, scale in CHECK_TAGS.items():
            f2, h2, s2, used2 = _measure(bench, p, profile, scale)
            if f2.shape == f.shape and np.allclose(f2, f):
                small, large = (h2, h) if scale < 1.0 else (h, h2)
                shift, at_hz = compression_db(f, small, large)
                noise = scatter_db(f, small, large, s.crossover_hz)
            else:
                shift, at_hz, noise = 0.0, float("nan"), float("nan")
            extra = {"gain_shift_db": shift, "gain_shift_freq_hz": at_hz, "gain_noise_db": noise}
            _record(bench, p, point, profile, tag, settled, f2, h2, s2, used2, extra)
            others[tag] = {**_summary_values(s2), **extra}
        base = {**_summary_values(s), "gain_noise_db": others.get("injection_half", {}).get("gain_noise_db")}
        verdict = injection_verdict(base, others.get("injection_half"), others.get("injection_double"), _tolerances(p))
        where = f"{point['vin_set_v']:g} V, {point['iout_set_a']:g} A"
        if verdict.flagged:
            bench.event("warning", f"injection check at {where}: {verdict.verdict}: {verdict.reason}",
                        verdict=verdict.verdict, changes=list(verdict.changes))
        else:
            bench.event("info", f"injection check at {where}: ok", verdict="ok")
    bench.power_down()


# ------------------------------------------------------------------------ analyse

_RESULTS = (("crossover_hz", "Hz"), ("phase_margin_deg", "deg"), ("gain_margin_db", "dB"), ("modulus_margin", ""))


def _reason(name: str, row: Mapping[str, Any]) -> str:
    band = f"{_num(row.get('band_min_hz')) or 0:g}..{_num(row.get('band_max_hz')) or 0:g} Hz"
    if name in ("crossover_hz", "phase_margin_deg"):
        lo, hi = _num(row.get("gain_min_db")), _num(row.get("gain_max_db"))
        side = "above" if lo is not None and lo > 0 else "below"
        return (f"no gain crossover in the measured band {band}: |T| stays {side} 0 dB "
                f"(between {lo if lo is not None else float('nan'):.2f} and {hi if hi is not None else float('nan'):.2f} dB); "
                "extend the sweep")
    if name == "gain_margin_db":
        lo, hi = _num(row.get("phase_min_deg")), _num(row.get("phase_max_deg"))
        return (f"no phase crossover of -180 deg in the measured band {band}: the phase stays between "
                f"{lo if lo is not None else float('nan'):.1f} and {hi if hi is not None else float('nan'):.1f} deg, "
                "so the gain margin is unbounded within this band")
    return "no modulus margin: the trace could not be analysed"


def analyse(points, p: Parameters) -> list[Result]:
    """Per-point crossover and margins, the worst over the envelope, and the injection check."""
    results: list[Result] = []
    if points.empty or "phase_margin_deg" not in points.columns and "crossover_hz" not in points.columns:
        return results
    rows = [dict(r) for _, r in points.iterrows()]
    main = [r for r in rows if r.get("tag") in MAIN_TAGS]
    source = "Erickson & Maksimovic 2nd ed. ch. 9: fc at |T| = 1, PM = 180 + angle T(fc), GM = -|T| dB at -180 deg"
    for r in main:
        scope = {"vin_set_v": float(r["vin_set_v"]), "iout_set_a": float(r["iout_set_a"])}
        common = {"seq": int(r["seq"]), "phase_convention": "inverted" if _num(r.get("phase_inverted")) else "loop",
                  "injection_v": _num(r.get("injection_v")),
                  "definition": source}
        for name, unit in _RESULTS:
            v = _num(r.get(name))
            details = dict(common, found=v is not None)
            if v is None:
                details["reason"] = _reason(name, r)
            if name == "gain_margin_db" and v is None and not _num(r.get("phase_crossover_count")):
                # No -180 deg crossing: the gain margin does not exist (is unbounded above) in the
                # measured band, which is not the same as a margin that was not measured.
                details.update(flags=["not_exist"], flag_reasons=details["reason"], unbounded="above")
            if name == "gain_margin_db" and v is not None:
                details["phase_crossover_hz"] = _num(r.get("phase_crossover_hz"))
            results.append(Result(name, v, unit, details=details, scope=scope, **_spread_of(name, r, v, details)))

    for name, unit, pick, label in (("worst_phase_margin_deg", "deg", "phase_margin_deg", "smallest phase margin"),
                                    ("worst_gain_margin_db", "dB", "gain_margin_db", "smallest gain margin"),
                                    ("worst_modulus_margin", "", "modulus_margin", "smallest modulus margin"),
                                    ("min_crossover_hz", "Hz", "crossover_hz", "lowest crossover"),
                                    ("max_crossover_hz", "Hz", "crossover_hz", "highest crossover")):
        found = [(_num(r.get(pick)), r) for r in main if _num(r.get(pick)) is not None]
        if not found:
            details = {"found": False, "reason": f"{pick} was found at none of the {len(main)} operating points"}
            if pick == "gain_margin_db" and main and not any(_num(r.get("phase_crossover_count")) for r in main):
                details.update(flags=["not_exist"], unbounded="above",
                               flag_reasons="no -180 deg phase crossover at any operating point in the measured band")
            results.append(Result(name, None, unit, details=details))
            continue
        value, row = (max if name == "max_crossover_hz" else min)(found, key=lambda item: item[0])
        missing = [{"vin_set_v": float(r["vin_set_v"]), "iout_set_a": float(r["iout_set_a"]), "reason": _reason(pick, r)}
                   for r in main if _num(r.get(pick)) is None]
        details = {"found": True, "what": f"{label} over the envelope", "vin_set_v": float(row["vin_set_v"]),
                   "iout_set_a": float(row["iout_set_a"]), "points": len(main), "not_found_at": missing}
        results.append(Result(name, value, unit, details=details, **_spread_of(pick, row, value, details)))

    results.extend(_analyse_injection_check(rows, p))
    return results


def _spread_of(name: str, row: Mapping[str, Any], value: float | None, details: dict) -> dict[str, float]:
    """The Result uncertainty fields of margin ``name`` from its point's columns (none when unknown);
    ``details`` gets the method and the coverage factor."""
    cols = _SPREAD_COLUMNS.get(name)
    if cols is None or value is None:
        return {}
    u, k = _num(row.get(cols[0])), _num(row.get(cols[1]))
    if u is None or k is None:
        details["uncertainty_note"] = "too few samples near the crossing to judge the trace's scatter"
        return {}
    details.update(uncertainty_method=UNCERTAINTY_METHOD, coverage_factor=k)
    return {"uncertainty": u, "expanded_uncertainty": k * u}


def _analyse_injection_check(rows: list[dict], p: Parameters) -> list[Result]:
    out: list[Result] = []
    checks = [r for r in rows if r.get("tag") in CHECK_TAGS]
    if not checks:
        return out
    key = (float(checks[0]["vin_set_v"]), float(checks[0]["iout_set_a"]))
    same = [r for r in rows if (float(r["vin_set_v"]), float(r["iout_set_a"])) == key]
    base = next((r for r in same if r.get("tag") in MAIN_TAGS), None)
    if base is None:
        return out
    by_tag = {r["tag"]: {k: r.get(k) for k in ("crossover_hz", "phase_margin_deg", "gain_margin_db",
                                                "gain_noise_db", "gain_shift_db", "injection_v")}
              for r in same if r.get("tag") in CHECK_TAGS}
    base = {**base, "gain_noise_db": (by_tag.get("injection_half") or {}).get("gain_noise_db")}
    verdict = injection_verdict(base, by_tag.get("injection_half"), by_tag.get("injection_double"), _tolerances(p))
    out.append(Result(
        "injection_check", verdict.max_pm_change_deg, "deg",
        details={"verdict": verdict.verdict, "flagged": verdict.flagged, "reason": verdict.reason,
                 "changes": list(verdict.changes), "injection_v": _num(base.get("injection_v")),
                 "half": by_tag.get("injection_half"), "double": by_tag.get("injection_double"),
                 "rule": "halving or doubling the injection must change nothing (common practice)",
                 "value": "largest phase-margin change between the sweeps, deg"},
        scope={"vin_set_v": key[0], "iout_set_a": key[1]}))
    return out
