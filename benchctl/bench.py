"""The Bench a procedure receives: instruments by role behind the interlock, and helpers.

``bench.source``, ``bench.load``, ``bench.input_meter``, ``bench.output_meter`` (and any
role by ``bench.role(name)``) are guarded drivers; ``bench.record(...)`` stores one
point durably before it returns; ``bench.settle(...)``, ``bench.settle_readings(...)``,
``bench.wait_stable(...)`` and ``bench.wait(...)`` wait for the DUT (and are cut short by
an interlock trip); ``bench.measure_together(...)`` reads several instruments at the same
moment, N times; ``bench.verify(...)`` checks setpoints against what was measured;
``bench.sweep(plan)`` walks the planned points with progress reporting; ``bench.log`` is
the procedure's logger.

A point's settle result travels with it: ``bench.record(values, settle=result,
readings=readings)`` stores the means, the standard deviations (``pin_sd_w``) and
``n_readings``, ``settled`` (False when unsettled or unverified) and the ``settle_info``
dict that says how the point was settled and verified (:meth:`SettleResult.info`).
"""

from __future__ import annotations

import logging
import time
from typing import Any, Callable, Iterable, Iterator, Mapping

from benchctl.errors import ProcedureError
from benchctl.interlock import Interlock
from benchctl.readings import Readings, SimultaneousReader
from benchctl.settle import (SettleResult, disabled_result, fitted_time_constants, settle_adaptive,
                             settle_exponential)
from benchctl.stability import StabilityResult, wait_stable
from benchctl.units import unit_from_name
from benchctl.verification import Verification, setpoint_tolerance, verify_setpoints

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
        dut_time_constant_s: float | None = None,
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
        #: The DUT's dominant settling time constant from the station (s), or None (estimated).
        self.dut_time_constant_s = dut_time_constant_s
        #: τ the settle fit resolved at earlier points, per quantity (a hint where a point's own
        #: readings do not show its transient).
        self.fitted_time_constants: dict[str, float] = {}
        self._reader = SimultaneousReader(clock)
        self._changed_at: float | None = None

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

    def roles_of_kind(self, kind: str) -> list[str]:
        """The names of this bench's roles of driver kind ``kind`` (``"electronic_load"``), in
        the station's order: a procedure that declared ``Role("load2", "electronic_load")``
        drives every load with ``for name in bench.roles_of_kind("electronic_load")``."""
        return [name for name, inst in self._instruments.items() if getattr(inst, "kind", None) == kind]

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

    def power_down(self) -> None:
        """Switch the DUT off in the one safe order every end of a run uses: the source off,
        the output discharged through the still-on load, then the load off (the interlock's
        shutdown, see :mod:`benchctl.interlock` for why). Each output off is read back, never
        retried and bounded in time; an output not confirmed off raises its instrument error."""
        self.interlock.raise_if_tripped()
        self.interlock.power_down()

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
        self._changed_at = self.clock()

    def set_operating_point(self, vin_v: float, iout_a: float) -> None:
        """Move to (line, load), sending only the setpoint that changed."""
        if vin_v != getattr(self, "_vin_set_v", None):
            self.source.set_voltage(vin_v)
            self._vin_set_v = vin_v
        if iout_a != getattr(self, "_iout_set_a", None):
            self.load.set_current(iout_a)
            self._iout_set_a = iout_a
        self._changed_at = self.clock()

    def mark_change(self) -> None:
        """Note that a setpoint just changed (a settle's minimum dwell counts from here);
        :meth:`power_up` and :meth:`set_operating_point` do it themselves."""
        self._changed_at = self.clock()

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
        method: str = "exponential_fit",
        time_constant_s: float | None = None,
        min_dwell_s: float = 0.0,
        quantity: str = "reading",
    ) -> SettleResult:
        """Settle one quantity read by ``read``; see :mod:`benchctl.settle`.

        ``method="exponential_fit"`` (default): fit the approach and stop when the predicted
        residual is within max(abs_tol, rel_tol·|x∞|); ``window`` is then the minimum number of
        readings (at least 8) and ``window_s`` the minimum span of the readings judged (s).
        ``method="window"``: the trailing-window agreement of :func:`benchctl.settle.settle_adaptive`.
        ``time_constant_s`` defaults to the station's ``dut_time_constant_s``. When settling is
        disabled (dry runs) one reading is taken and the result is not settled.
        """
        if not self.settle_enabled:
            return disabled_result(read(), quantity)
        if method == "window":
            return settle_adaptive(
                read, rel_tol=rel_tol, abs_tol=abs_tol, window=window, window_s=window_s, interval_s=interval_s,
                timeout_s=timeout_s, clock=self.clock, sleep=self.interlock.wait,
            )
        if method != "exponential_fit":
            raise ProcedureError(f"bench.settle: method {method!r} is not one of 'exponential_fit', 'window'")
        return self.settle_readings({quantity: read}, rel_tol=rel_tol, abs_tol=abs_tol,
                                    time_constant_s=time_constant_s, min_readings=max(window, 8),
                                    min_window_s=window_s, min_dwell_s=min_dwell_s, interval_s=interval_s,
                                    timeout_s=timeout_s)

    def settle_readings(
        self,
        readers: Mapping[str, Callable[[], float]],
        *,
        settle_on: Iterable[str] | None = None,
        rel_tol: float | Mapping[str, float] = 1e-3,
        abs_tol: float | Mapping[str, float] = 1e-3,
        time_constant_s: float | None = None,
        min_readings: int = 8,
        min_window_s: float = 0.0,
        min_dwell_s: float = 0.0,
        interval_s: float = 0.0,
        timeout_s: float = 10.0,
        max_tau_s: float = 10.0,
    ) -> SettleResult:
        """Settle several quantities read together (one thread per instrument) by fitting each
        one's approach (:func:`benchctl.settle.settle_exponential`).

        ``settle_on`` (default: every reader) lists the quantities that must be settled, the
        first being the one the point is for. ``time_constant_s`` defaults to the station's
        ``dut_time_constant_s``; τ fitted at earlier points is the hint when a point's own
        readings do not show a transient. ``min_dwell_s`` counts from the last setpoint change.
        Changes slower than ``max_tau_s`` are slow drift, left to :meth:`wait_stable`.
        """
        names = list(readers) if settle_on is None else list(settle_on)
        if not self.settle_enabled:
            r = self.measure_together({n: readers[n] for n in names}, n=1)
            return disabled_result(r.mean(names[0]), names[0])
        subset = {n: readers[n] for n in names}
        tau = self.dut_time_constant_s if time_constant_s is None else time_constant_s
        self.interlock.raise_if_tripped()
        # Each instrument reads continuously at its own pace (readings carry their own times),
        # so an instrument the interlock watch holds up for a moment delays only its own series.
        with self._reader.stream(subset) as stream:

            def new_readings() -> dict[str, list[tuple[float, float]]]:
                self.interlock.raise_if_tripped()
                return stream.take()

            result = settle_exponential(
                new_readings, settle_on=names, rel_tol=rel_tol, abs_tol=abs_tol, time_constant_s=tau,
                tau_memory=self.fitted_time_constants, min_readings=min_readings, min_window_s=min_window_s,
                min_dwell_s=min_dwell_s, timeout_s=timeout_s, interval_s=interval_s, max_tau_s=max_tau_s,
                clock=self.clock, sleep=self.interlock.wait, t_change_s=self._changed_at,
            )
        self.interlock.raise_if_tripped()
        self.fitted_time_constants.update(fitted_time_constants(result))
        return result

    def wait_stable(
        self,
        read: Callable[[], float],
        *,
        window_s: float,
        max_change_rel: float,
        max_change_abs: float = 0.0,
        interval_s: float = 0.0,
        timeout_s: float = 600.0,
    ) -> StabilityResult:
        """Slow drift: read until the regression change over ``window_s`` is below the limit
        (:func:`benchctl.stability.wait_stable`, after IEC 62301:2011 5.3). With settling
        disabled, returns at once as not stable."""
        if not self.settle_enabled:
            self.interlock.raise_if_tripped()
            return StabilityResult(False, 0.0, float("nan"), float("nan"), float("nan"), 0, 0.0,
                                   "settling disabled (dry run)")
        return wait_stable(read, window_s=window_s, max_change_rel=max_change_rel, max_change_abs=max_change_abs,
                           interval_s=interval_s, timeout_s=timeout_s, clock=self.clock, sleep=self.interlock.wait)

    def warm_up(self, read: Callable[[], float], *, duration_s: float, window_s: float, max_change_rel: float,
                timeout_s: float = 3600.0) -> StabilityResult:
        """Hold the present operating point ``duration_s``, then wait until ``read`` is stable."""
        self.wait(duration_s)
        result = self.wait_stable(read, window_s=window_s, max_change_rel=max_change_rel, timeout_s=timeout_s)
        self.event("warm_up", f"warm-up {duration_s:g} s, then {'stable' if result.stable else 'NOT stable'}: "
                   f"change {result.change:.4g} over {result.window_s:.3g} s (limit {result.limit:.4g})",
                   **result.info())
        return result

    # -- reading and verifying -----------------------------------------------------

    def measure_together(self, readers: Mapping[str, Callable[[], float]], *, n: int = 1) -> Readings:
        """Read every quantity ``n`` times, each instrument in its own thread, rounds started
        together (:mod:`benchctl.readings`); an interlock trip in any reading is raised here."""
        self.interlock.raise_if_tripped()
        readings = self._reader.read(readers, n)
        self.interlock.raise_if_tripped()
        return readings

    @staticmethod
    def verify(checks: Mapping[str, tuple[float, float, float]]) -> Verification:
        """``{name: (setpoint, measured, tol)}`` → a :class:`~benchctl.verification.Verification`."""
        return verify_setpoints(checks)

    @staticmethod
    def setpoint_tolerance(setpoint: float, rel_tol: float, abs_tol: float) -> float:
        return setpoint_tolerance(setpoint, rel_tol, abs_tol)

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
                if self._done < k + 1:  # a planned point that recorded nothing still counts as done
                    self._done = k + 1
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
        readings: Readings | None = None,
    ) -> int:
        """Store one point durably (committed before this returns); returns its sequence number.

        Units come from the names' suffixes (``vin_v`` → V) unless ``units`` says otherwise.
        ``readings`` adds their means, standard deviations (``<base>_sd_<unit>``) and
        ``n_readings``. With ``settle`` the point is stored as settled only when it settled
        and its setpoints were verified, with the settle's ``settle_info``.
        """
        self.interlock.raise_if_tripped()
        values = {**(readings.as_values() if readings is not None else {}), **dict(values)}
        if self._plan_index is not None:
            values.setdefault("plan_index", self._plan_index)
        all_units = {name: unit_from_name(name) for name in values}
        all_units.update(units or {})
        seq = self._recorder(
            values, all_units, tag=tag,
            settled=None if settle is None else settle.ok,
            settle_time_s=None if settle is None else settle.settling_time_s,
            settle_info=None if settle is None else settle.info(),
        )
        self.points_recorded += 1
        if self._plan_index is None:  # outside a sweep each record is a step of its own
            self._done += 1
        else:  # progress counts planned points, however many records each makes
            self._done = max(self._done, self._plan_index + 1)
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
