"""Statistics across the units of a revision, per quantity and operating point, as DataFrames.

The values are those a limits file covers (each limit's quantity, filtered by its
``where``), taken from the run that stands for each unit (:mod:`benchctl.revision_runs`:
the latest completed run of the limit's procedure on that unit); more result names
without a limit may be asked for by name. Values at one operating point (the scope
without ``seq``) are gathered over the units, one per unit (a unit that measured a point
twice gives the mean of its values). Per group: n, mean, standard deviation, min and max
with the serials they belong to, and the indices of :mod:`benchctl.analysis.capability`
against the limit's bounds (Cp/Cpk, Pp/Ppk per ISO 22514-2, a normality note, Grubbs'
outlier test). Values from unsettled or unverified points or flagged results are used
and counted (``n_flagged``); values that do not exist (``not_exist``) are left out and
counted (``n_not_exist``).

    from benchctl.unit_statistics import revision_statistics
    stats = revision_statistics(store, "FB-48S05", "B", limits=["limits.toml"])
    stats.table        # one row per (limit, operating point)
    stats.per_serial   # one row per (limit, operating point, serial), with z and outlier
"""

from __future__ import annotations

import math
from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from benchctl.analysis.capability import capability
from benchctl.limits import LimitsFile, RunData, load_limits
from benchctl.limits.evaluate import covered_values
from benchctl.revision_runs import RevisionRuns, revision_runs

#: Scope keys that say which record a value came from, not where the converter was operated.
_RECORD_KEYS = {"seq", "plan_index"}

VALUE_COLUMNS = ("limit", "quantity", "unit", "point", "serial", "run_id", "procedure", "value",
                 "expanded_uncertainty", "flags", "lsl", "usl", "started_utc")
TABLE_COLUMNS = ("limit", "quantity", "unit", "point", "n", "mean", "sd", "sd_within", "min", "min_serial", "max",
                 "max_serial", "lsl", "usl", "cp", "cpk", "pp", "ppk", "pp_low", "pp_high", "normality_p",
                 "normality_note", "outlier_serial", "n_flagged", "n_not_exist", "note")
PER_SERIAL_COLUMNS = ("limit", "quantity", "unit", "point", "serial", "run_id", "value", "expanded_uncertainty",
                      "z", "outlier", "flags")


def limit_run_data(store: Any, run_id: int) -> RunData:
    """What a limit evaluation sees of a stored run (see :func:`benchctl.limits.outcomes.run_data_from_store`)."""
    from benchctl.limits.outcomes import run_data_from_store

    return run_data_from_store(store, run_id)


def point_text(scope: Mapping[str, Any]) -> str:
    """An operating point as text, from a value's scope without its record keys
    (``iout_set_a=2.5 vin_set_v=48``; keys sorted, numbers in 6 significant digits)."""
    parts = []
    for key in sorted(k for k in scope if k not in _RECORD_KEYS):
        v = scope[key]
        if isinstance(v, bool) or v is None:
            text = str(v)
        elif isinstance(v, (int, float, np.number)):
            text = f"{float(v):.6g}"
        else:
            text = str(v)
        if text in ("", "nan"):
            continue
        parts.append(f"{key}={text}")
    return " ".join(parts) or "(whole run)"


@dataclass(frozen=True)
class RevisionStatistics:
    """Statistics of a revision: ``values`` (long: one row per covered value,
    :data:`VALUE_COLUMNS`), ``table`` (:data:`TABLE_COLUMNS`, one row per limit and
    operating point), ``per_serial`` (:data:`PER_SERIAL_COLUMNS`) and the ``runs`` used."""

    part: str
    revision: str
    runs: RevisionRuns
    values: pd.DataFrame
    table: pd.DataFrame
    per_serial: pd.DataFrame
    limits: tuple[LimitsFile, ...]


def _as_limits(limits: Iterable[LimitsFile | str | Path]) -> tuple[LimitsFile, ...]:
    return tuple(x if isinstance(x, LimitsFile) else load_limits(x) for x in limits)


def unit_values(store: Any, runs: RevisionRuns, limits: Sequence[LimitsFile], *,
                quantities: Sequence[str] = ()) -> pd.DataFrame:
    """Every value the limits cover in the runs that stand for the units (plus every value
    of the result names ``quantities``, without bounds); :data:`VALUE_COLUMNS`."""
    rows: list[dict[str, Any]] = []
    cache: dict[int, RunData] = {}
    for item in runs.latest.itertuples(index=False):
        data = cache.setdefault(item.run_id, limit_run_data(store, item.run_id))
        for lf in limits:
            for spec in lf.limits:
                if not spec.applies_to(item.procedure):
                    continue
                values, unit, _source = covered_values(spec, data)
                for v in values:
                    rows.append({"limit": spec.name, "quantity": spec.quantity, "unit": unit,
                                 "point": point_text(v.scope), "serial": item.serial, "run_id": item.run_id,
                                 "procedure": item.procedure,
                                 "value": math.nan if v.not_exist and not math.isinf(v.value) else v.value,
                                 "expanded_uncertainty": v.expanded_uncertainty,
                                 "flags": tuple(v.flags) + (("not_exist",) if v.not_exist else ()),
                                 "lsl": spec.minimum, "usl": spec.maximum, "started_utc": item.started_utc})
        res = data.results
        for q in quantities:
            if res.empty:
                continue
            for r in res[res["name"] == q].itertuples(index=False):
                scope = r.scope if isinstance(r.scope, dict) else {}
                details = r.details if isinstance(r.details, dict) else {}
                flags = tuple(details.get("flags") or ())
                rows.append({"limit": "", "quantity": q, "unit": r.unit, "point": point_text(scope),
                             "serial": item.serial, "run_id": item.run_id, "procedure": item.procedure,
                             "value": float(r.value), "expanded_uncertainty":
                                 None if not math.isfinite(r.expanded_uncertainty) else float(r.expanded_uncertainty),
                             "flags": flags, "lsl": None, "usl": None, "started_utc": item.started_utc})
    return pd.DataFrame(rows, columns=list(VALUE_COLUMNS))


def _finite(x: Any) -> bool:
    return x is not None and isinstance(x, (int, float, np.number)) and math.isfinite(float(x))


def statistics_tables(values: pd.DataFrame) -> tuple[pd.DataFrame, pd.DataFrame]:
    """The per-group table and the per-serial table of a :func:`unit_values` frame."""
    table_rows: list[dict[str, Any]] = []
    serial_rows: list[dict[str, Any]] = []
    if values.empty:
        return pd.DataFrame(columns=list(TABLE_COLUMNS)), pd.DataFrame(columns=list(PER_SERIAL_COLUMNS))
    for (limit, quantity, point), grp in values.groupby(["limit", "quantity", "point"], sort=False):
        unit = next((u for u in grp["unit"] if u), "")
        lsl = grp["lsl"].iloc[0]
        usl = grp["usl"].iloc[0]
        lsl = float(lsl) if _finite(lsl) else None
        usl = float(usl) if _finite(usl) else None
        n_not_exist = int(sum("not_exist" in f for f in grp["flags"]))
        # one value per unit, in the order the units were measured
        per_unit = []
        for serial, g in grp.sort_values("started_utc", kind="stable").groupby("serial", sort=False):
            vals = [float(v) for v in g["value"] if _finite(v)]
            us = [float(u) for u in g["expanded_uncertainty"] if _finite(u)]
            flags = tuple(dict.fromkeys(f for fl in g["flags"] for f in fl if f != "not_exist"))
            if not vals:
                continue
            per_unit.append((serial, int(g["run_id"].iloc[0]), float(np.mean(vals)),
                             float(np.max(us)) if us else None, flags, len(vals)))
        x = [p[2] for p in per_unit]
        cap = capability(x, lsl, usl)
        outlier = per_unit[cap.outliers.index][0] if cap.outliers.is_outlier and cap.outliers.index is not None else ""
        n_flagged = sum(1 for p in per_unit if p[4])
        notes = [cap.note] if cap.note else []
        if n_flagged:
            notes.append(f"{n_flagged} unit(s) gave a flagged value (unsettled, unverified or a bound): "
                         "the statistics include them")
        if any(p[5] > 1 for p in per_unit):
            notes.append("a unit measured this point more than once: its mean is used")
        if outlier:
            odd = per_unit[cap.outliers.index]
            if odd[3] is not None and cap.mean is not None and abs(odd[2] - cap.mean) <= odd[3]:
                notes.append(f"{outlier} stands apart statistically (Grubbs) but lies within its measurement "
                             f"uncertainty U = {odd[3]:.3g} of the mean")
        us = [p[3] for p in per_unit if p[3] is not None]
        if cap.sd is not None and us and cap.sd < 0.5 * float(np.median(us)):
            notes.append(f"the spread between units (s = {cap.sd:.3g}) is below the measurement's standard "
                         f"uncertainty (U/2 = {0.5 * float(np.median(us)):.3g}): the indices say more about the "
                         "bench's repeatability than about the units")
        if any(math.isinf(v) for v in x):
            notes.append("a value is unbounded (does not exist there): no statistics")
        imin = int(np.argmin(x)) if x else None
        imax = int(np.argmax(x)) if x else None
        table_rows.append({
            "limit": limit, "quantity": quantity, "unit": unit, "point": point, "n": cap.n, "mean": cap.mean,
            "sd": cap.sd, "sd_within": cap.sd_within, "min": cap.minimum,
            "min_serial": per_unit[imin][0] if imin is not None else "", "max": cap.maximum,
            "max_serial": per_unit[imax][0] if imax is not None else "", "lsl": lsl, "usl": usl,
            "cp": cap.cp, "cpk": cap.cpk, "pp": cap.pp, "ppk": cap.ppk,
            "pp_low": cap.pp_interval[0] if cap.pp_interval else None,
            "pp_high": cap.pp_interval[1] if cap.pp_interval else None,
            "normality_p": cap.normality_p, "normality_note": cap.normality_note, "outlier_serial": outlier,
            "n_flagged": n_flagged, "n_not_exist": n_not_exist, "note": "; ".join(notes),
        })
        for serial, run_id, value, u, flags, _n in per_unit:
            z = (value - cap.mean) / cap.sd if cap.sd and cap.mean is not None and math.isfinite(value) else None
            serial_rows.append({"limit": limit, "quantity": quantity, "unit": unit, "point": point, "serial": serial,
                                "run_id": run_id, "value": value, "expanded_uncertainty": u, "z": z,
                                "outlier": serial == outlier, "flags": flags})
    table = pd.DataFrame(table_rows, columns=list(TABLE_COLUMNS))
    per_serial = pd.DataFrame(serial_rows, columns=list(PER_SERIAL_COLUMNS))
    for frame, cols in ((table, ("mean", "sd", "sd_within", "min", "max", "lsl", "usl", "cp", "cpk", "pp", "ppk",
                                 "pp_low", "pp_high", "normality_p")),
                        (per_serial, ("value", "expanded_uncertainty", "z"))):
        for c in cols:
            frame[c] = pd.to_numeric(frame[c], errors="coerce").astype("float64")
    return table, per_serial


def revision_statistics(store: Any, part: str, revision: str, *,
                        limits: Iterable[LimitsFile | str | Path] = (),
                        quantities: Sequence[str] = ()) -> RevisionStatistics:
    """Statistics across the units of ``part`` revision ``revision`` (module docstring)."""
    files = _as_limits(limits)
    expected = [p for lf in files for spec in lf.limits for p in spec.procedures]
    runs = revision_runs(store, part, revision, expected=expected)
    values = unit_values(store, runs, files, quantities=quantities)
    table, per_serial = statistics_tables(values)
    return RevisionStatistics(part, revision, runs, values, table, per_serial, files)


__all__ = ["PER_SERIAL_COLUMNS", "TABLE_COLUMNS", "VALUE_COLUMNS", "RevisionStatistics", "limit_run_data",
           "point_text", "revision_statistics", "statistics_tables", "unit_values"]
