"""The points of a run as a spreadsheet user expects them (CSV and JSON export).

- Times in one form, ISO 8601 UTC with a ``Z`` (``2026-12-02T04:28:16.123456Z``).
- Integer columns (``seq``, ``plan_index``, ``n_readings``) as integers, not ``0.0``.
- Derived per-point columns where the point has what they need: ``efficiency_pct``
  (100·Pout/Pin, common practice) and ``loss_w`` (Pin − Pout).
- The settle details stay in the store (``benchctl show``); ``settled`` and
  ``settle_reason`` are exported.
- A header of ``# `` comment lines with the run's provenance (``pandas.read_csv(...,
  comment="#")`` skips them).
"""

from __future__ import annotations

from typing import Any

import numpy as np
import pandas as pd

INTEGER_COLUMNS = ("seq", "plan_index", "n_readings")


def iso_utc(t: Any) -> str:
    """``pandas.Timestamp``/``datetime`` (UTC) -> ``YYYY-MM-DDTHH:MM:SS.ffffffZ``; "" for none."""
    if t is None or (isinstance(t, float) and np.isnan(t)) or t is pd.NaT:
        return ""
    ts = pd.Timestamp(t)
    ts = ts.tz_localize("UTC") if ts.tzinfo is None else ts.tz_convert("UTC")
    return ts.strftime("%Y-%m-%dT%H:%M:%S.%fZ")


def export_points(points: pd.DataFrame) -> pd.DataFrame:
    """The export form of ``store.points(run_id)`` (see the module docstring)."""
    frame = points.drop(columns=[c for c in ("settle_info",) if c in points.columns]).copy()
    if "t_utc" in frame.columns:
        frame["t_utc"] = [iso_utc(t) for t in frame["t_utc"]]
    for name in INTEGER_COLUMNS:
        if name in frame.columns:
            values = pd.to_numeric(frame[name], errors="coerce")
            finite = values.dropna()
            if (finite == np.round(finite)).all():
                frame[name] = values.round().astype("Int64")
    if {"pin_w", "pout_w"} <= set(frame.columns):
        pin = frame["pin_w"].to_numpy(float)
        pout = frame["pout_w"].to_numpy(float)
        with np.errstate(divide="ignore", invalid="ignore"):
            eff = np.where((pin > 0) & (pout > 0), 100.0 * pout / pin, np.nan)
        if "efficiency_pct" not in frame.columns:
            frame["efficiency_pct"] = eff
        if "loss_w" not in frame.columns:
            frame["loss_w"] = pin - pout
    return frame


def provenance_lines(info: Any) -> list[str]:
    """The run's provenance as short lines (for a CSV header or a JSON ``provenance`` list)."""
    lines = [
        f"benchctl run {info.run_id} (uuid {info.run_uuid}): {info.procedure} on station {info.station_name}",
        f"status {info.status}" + (f": {info.message}" if info.message else ""),
        f"DUT part {info.dut_part or '-'} revision {info.dut_revision or '-'} serial {info.dut_serial or '-'}",
        f"started {iso_utc(info.started_utc)} ended {iso_utc(info.ended_utc) or '-'}",
        f"operator {info.operator or '-'} on {info.host}; benchctl {info.benchctl_version}",
        f"procedure sha256 {info.procedure_sha256}",
    ]
    lines += [f"instrument {i.role}: {i.driver} at {i.resource}, {i.identity}" for i in info.instruments]
    return lines


def points_csv(points: pd.DataFrame, info: Any) -> str:
    """CSV text: the provenance header, then one row per point (column names carry their units)."""
    header = "".join(f"# {line}\n" for line in provenance_lines(info))
    return header + export_points(points).to_csv(index=False)


def json_records(frame: pd.DataFrame) -> list[dict[str, Any]]:
    """``frame`` as JSON-ready records, every time column in the one ISO 8601 UTC form."""
    import json

    out = frame.copy()
    for name in out.columns:
        if pd.api.types.is_datetime64_any_dtype(out[name]):
            out[name] = [iso_utc(t) if not pd.isna(t) else None for t in out[name]]
    return json.loads(out.to_json(orient="records"))
