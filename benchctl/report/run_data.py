"""Everything the report needs about one run, read from the store once."""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass
from typing import Any

import pandas as pd

from benchctl.store import ArrayData, RunInfo

from .limit_marks import LimitMark, limit_marks


@dataclass(frozen=True)
class RunData:
    """One run as the report sees it.

    ``points``, ``results``, ``events`` and ``arrays`` are the store's frames
    (:meth:`benchctl.store.Store.points` etc.; ``arrays`` lists arrays without data).
    ``load_array(name, point_seq)`` reads one array's data when a plot needs it.
    ``limits`` are the run's ``limit:<name>`` results (empty when none were stored).
    """

    run_id: int
    info: RunInfo
    points: pd.DataFrame
    results: pd.DataFrame
    events: pd.DataFrame
    arrays: pd.DataFrame
    limits: tuple[LimitMark, ...]
    load_array: Callable[[str, int | None], ArrayData]

    @property
    def parameters(self) -> dict[str, Any]:
        return dict(self.info.parameters or {})

    def has_columns(self, *names: str) -> bool:
        """True when the point frame has every named column with at least one value."""
        return not self.points.empty and all(
            n in self.points.columns and self.points[n].notna().any() for n in names
        )

    def array_rows(self, name: str) -> pd.DataFrame:
        """The listing rows of the run's arrays called ``name`` (may be empty)."""
        if self.arrays.empty:
            return self.arrays
        return self.arrays[self.arrays["name"] == name]

    def array_records(self, name: str, kind: str | None = None,
                      limit: int | None = None) -> list[tuple[int | None, dict[str, Any]]]:
        """(point seq or None, meta) of the run's arrays called ``name``, in store order; only those
        whose ``meta["kind"]`` is ``kind`` when it is given; at most ``limit``."""
        out: list[tuple[int | None, dict[str, Any]]] = []
        for _, row in self.array_rows(name).iterrows():
            meta = row["meta"] or {}
            if kind is not None and meta.get("kind") != kind:
                continue
            seq = row["point_seq"]
            out.append((None if seq is None or seq != seq else int(seq), meta))  # NaN != NaN: no point
        return out if limit is None else out[:limit]

    def float_parameter(self, name: str) -> float | None:
        """A numeric run parameter, or None when absent or not a number."""
        value = self.parameters.get(name)
        if isinstance(value, bool) or not isinstance(value, (int, float)):
            return None
        return float(value)


def load_run_data(store: Any, run_id: int) -> RunData:
    """Read a run's provenance, points, results, events and array listing from ``store``."""
    results = store.results(run_id)
    return RunData(
        run_id=run_id,
        info=store.run(run_id),
        points=store.points(run_id),
        results=results,
        events=store.events(run_id),
        arrays=store.arrays(run_id),
        limits=limit_marks(results),
        load_array=lambda name, seq: store.array(run_id, name, seq),
    )
