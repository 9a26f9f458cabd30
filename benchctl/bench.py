"""The Bench a procedure receives: instruments by role behind the interlock, and helpers.

``bench.source``, ``bench.load``, ``bench.input_meter``, ``bench.output_meter`` (and any
role by ``bench.role(name)``) are guarded drivers; ``bench.record(...)`` stores one
point durably before it returns; ``bench.settle(...)`` and ``bench.wait(...)`` wait for
the DUT (and are cut short by an interlock trip); ``bench.sweep(plan)`` walks the
planned points with progress reporting; ``bench.log`` is the procedure's logger.
"""

from __future__ import annotations

import logging
import time
from typing import Any, Callable, Iterable, Iterator, Mapping

from benchctl.errors import ProcedureError
from benchctl.interlock import Interlock
from benchctl.settle import SettleResult, settle_adaptive
from benchctl.units import unit_from_name

class Bench:
    """What a procedure's ``run(bench, p)`` works with."""

    def __init__(
        self,
        *,
        instruments: Mapping[str, Any],
        interlock: Interlock,
        recorder: Callable[..., int],
        array_recorder: Callable[..., None] | None = None,
        event_recorder: Callable[[str, str, Mapping[str, Any]], None] | None = None,
        settle_enabled: bool = True,
        progress: Callable[[int, int, Mapping[str, float]], None] | None = None,
        clock: Callable[[], float] = time.monotonic,
        log: logging.Logger | None = None,
        skip_points: int = 0,
    ) -> None:
        self._instruments = dict(instruments)
        self.interlock = interlock
        self._recorder = recorder
        self._array_recorder = array_recorder
        self._event_recorder = event_recorder
        self.settle_enabled = settle_enabled
        self._progress = progress
        self.clock = clock
        self.log = log or logging.getLogger("benchctl.procedure")
        self.skip_points = skip_points
        self.points_recorded = 0
        self._done = 0
        self._total = 0
        self._last_values: Mapping[str, float] = {}
        self._plan_index: int | None = None

    @property
    def limits(self) -> Any:
        """The station limits (read-only) the interlock enforces."""
        return self.interlock.limits

    # -- instruments ---------------------------------------------------------------

    def role(self, name: str) -> Any:
        try:
            return self._instruments[name]
        except KeyError:
            raise ProcedureError(
                f"the procedure used role {name!r}, which it did not declare in ROLES or the station lacks; "
                f"roles available: {', '.join(sorted(self._instruments))}"
            ) from None

    def has_role(self, name: str) -> bool:
        return name in self._instruments

    @property
    def source(self) -> Any:
        return self.role("source")

    @property
    def load(self) -> Any:
        return self.role("load")

    @property
    def input_meter(self) -> Any:
        return self.role("input_meter")

    @property
    def output_meter(self) -> Any:
        return self.role("output_meter")

    # -- operating points -------------------------------------------------------

    def power_up(self, vin_v: float, iout_a: float, *, source_current_limit_a: float | None = None,
                 startup_delay_s: float = 0.05) -> None:
        """Bring the DUT up in the usual order: source limit and voltage, load CC level, source
        on, a fixed wait for the start-up, then the load on. ``source_current_limit_a`` None
        uses the station's ``source_current_max_a``."""
        source, load = self.source, self.load
        limit = self.limits.source_current_max_a if source_current_limit_a is None else source_current_limit_a
        source.set_current_limit(limit)
        source.set_voltage(vin_v)
        load.set_mode("CC")
        load.set_current(iout_a)
        source.set_output(True)
        self.wait(startup_delay_s)
        load.set_input(True)
        self._vin_set_v, self._iout_set_a = vin_v, iout_a

    def set_operating_point(self, vin_v: float, iout_a: float) -> None:
        """Move to (line, load), sending only the setpoint that changed."""
        if vin_v != getattr(self, "_vin_set_v", None):
            self.source.set_voltage(vin_v)
            self._vin_set_v = vin_v
        if iout_a != getattr(self, "_iout_set_a", None):
            self.load.set_current(iout_a)
            self._iout_set_a = iout_a

    # -- waiting -------------------------------------------------------------------

    def wait(self, seconds: float) -> None:
        """A fixed delay, cut short by an interlock trip (which then raises)."""
        if self.settle_enabled:
            self.interlock.wait(seconds)
        else:
            self.interlock.raise_if_tripped()

    def settle(
        self,
        read: Callable[[], float],
        *,
        rel_tol: float = 1e-3,
        abs_tol: float = 1e-3,
        window: int = 4,
        window_s: float = 0.0,
        interval_s: float = 0.0,
        timeout_s: float = 10.0,
    ) -> SettleResult:
        """Adaptive settle (see :func:`benchctl.settle.settle_adaptive`); one reading when settling is disabled."""
        if not self.settle_enabled:
            value = read()
            return SettleResult(True, 0.0, 0.0, value, max(abs_tol, rel_tol * abs(value)), 1, "settling disabled")
        return settle_adaptive(
            read, rel_tol=rel_tol, abs_tol=abs_tol, window=window, window_s=window_s, interval_s=interval_s,
            timeout_s=timeout_s, clock=self.clock, sleep=self.interlock.wait,
        )

    # -- walking a plan ------------------------------------------------------------

    def sweep(self, points: Iterable[Mapping[str, Any]]) -> Iterator[Mapping[str, Any]]:
        """Yield the planned points in order, reporting progress; skips points already done (resume).

        Points recorded while a planned point is current carry its index as ``plan_index``,
        so a resumed run knows which planned points are done even when a procedure records
        more than one point per planned point.
        """
        points = list(points)
        self._total = len(points)
        self._done = min(self.skip_points, self._total)
        self._report()
        try:
            for k, point in enumerate(points):
                if k < self.skip_points:
                    continue
                self.interlock.raise_if_tripped()
                self._plan_index = k
                yield point
                self._done = k + 1  # progress counts planned points, however many records each makes
                self._report()
        finally:
            self._plan_index = None

    def _report(self) -> None:
        if self._progress is not None:
            self._progress(self._done, self._total, self._last_values)

    # -- recording -----------------------------------------------------------------

    def record(
        self,
        values: Mapping[str, float],
        *,
        units: Mapping[str, str] | None = None,
        settle: SettleResult | None = None,
        tag: str | None = None,
    ) -> int:
        """Store one point durably (committed before this returns); returns its sequence number.

        Units come from the names' suffixes (``vin_v`` → V) unless ``units`` says otherwise.
        """
        self.interlock.raise_if_tripped()
        values = dict(values)
        if self._plan_index is not None:
            values.setdefault("plan_index", self._plan_index)
        all_units = {name: unit_from_name(name) for name in values}
        all_units.update(units or {})
        seq = self._recorder(
            values, all_units, tag=tag,
            settled=None if settle is None else settle.settled,
            settle_time_s=None if settle is None else settle.settling_time_s,
        )
        self.points_recorded += 1
        if self._plan_index is None:  # outside a sweep each record is a step of its own
            self._done += 1
        self._last_values = dict(values)
        self._report()
        return seq

    def record_array(
        self,
        name: str,
        columns: Mapping[str, Any],
        *,
        units: Mapping[str, str] | None = None,
        point_seq: int | None = None,
        meta: Mapping[str, Any] | None = None,
    ) -> None:
        """Store an array record (a Bode sweep, a waveform) with the run."""
        if self._array_recorder is None:
            raise ProcedureError("this bench has no array store")
        all_units = {c: unit_from_name(c) for c in columns}
        all_units.update(units or {})
        self._array_recorder(name, dict(columns), all_units, point_seq=point_seq, meta=dict(meta or {}))

    def event(self, kind: str, message: str, **details: Any) -> None:
        """Store an event (``info``, ``warning`` ...) with the run."""
        self.log.info("%s: %s", kind, message)
        if self._event_recorder is not None:
            self._event_recorder(kind, message, details)
