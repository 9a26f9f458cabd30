"""A procedure's test envelope: operating limits widened on purpose, never past the absolute ones.

Protection tests push a DUT past normal operation (a load above its rating to find the
over-current threshold, an output above its regulation to see the over-voltage trip). A
procedure says so with a module-level ``test_envelope(p) -> {limit: value}`` (SI units,
keys of :class:`~benchctl.station.StationLimits`). For that run the interlock enforces the
envelope instead of the station's operating ``[limits]`` — each key at most the station's
``[limits.absolute]`` value; a station without absolute limits refuses any envelope — and
the instruments' own protection is programmed to it. Before anything is opened a caution
names every widened limit; the run stores it as a ``test_envelope`` event. A key the
envelope gives below its operating limit keeps the operating one (an envelope only widens).
"""

from __future__ import annotations

from dataclasses import dataclass, fields, replace
from typing import Any, Mapping

from benchctl.errors import StationFileError, UsageError
from benchctl.station import Station, StationLimits


@dataclass(frozen=True)
class TestEnvelope:
    """The limits a run enforces and what was widened: {key: (operating, envelope)}."""

    __test__ = False            # not a pytest test class

    limits: StationLimits
    widened: Mapping[str, tuple[float, float]]

    def caution(self, procedure: str) -> str:
        """The console's caution for this envelope."""
        parts = [f"{k} {a:g} -> {b:g}" for k, (a, b) in self.widened.items()]
        return (f"CAUTION: procedure {procedure} pushes the DUT past normal operation on purpose and runs in a "
                f"test envelope beyond the station's operating limits ({'; '.join(parts)}); the interlock "
                "enforces the envelope, never beyond the station's absolute limits. Expect protection to act "
                "(current limit, hiccup, over-voltage latch), stored energy and heat; keep clear of the DUT, "
                "use the guards and follow local codes and licensed practice")


def resolve_envelope(procedure: Any, params: Any, station: Station) -> TestEnvelope | None:
    """The run's envelope, or None when the procedure declares none (or widens nothing).

    Raises :class:`UsageError` for an unknown key or a value beyond the absolute limits, and
    :class:`StationFileError` when the station gives no ``[limits.absolute]``.
    """
    declare = getattr(procedure, "test_envelope", None)
    if declare is None:
        return None
    asked = dict(declare(params) or {})
    known = {f.name for f in fields(StationLimits)}
    unknown = sorted(set(asked) - known)
    if unknown:
        raise UsageError(f"procedure {procedure.name}: test envelope names unknown limit(s) {', '.join(unknown)}; "
                         f"known: {', '.join(sorted(known))}")
    op = station.limits
    widened = {k: (float(getattr(op, k)), float(v)) for k, v in asked.items() if float(v) > float(getattr(op, k))}
    if not widened:
        return None
    absolute = station.absolute_limits
    if absolute is None:
        raise StationFileError(
            f"station {station.name!r}: procedure {procedure.name} needs a test envelope beyond the operating "
            f"limits ({', '.join(f'{k} {b:g}' for k, (_, b) in widened.items())}) and the station gives no "
            "[limits.absolute]; nothing was opened. Add [limits.absolute] with what the bench's wiring and "
            "instruments take, or lower the procedure's parameters")
    beyond = [f"{k} {b:g} > absolute {getattr(absolute, k):g}" for k, (_, b) in widened.items()
              if b > float(getattr(absolute, k))]
    if beyond:
        raise UsageError(f"procedure {procedure.name}: test envelope beyond the station's absolute limits "
                         f"({'; '.join(beyond)}); nothing was opened. Lower the procedure's parameters")
    return TestEnvelope(replace(op, **{k: b for k, (_, b) in widened.items()}), widened)
