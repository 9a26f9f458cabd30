"""How a job over several units gets the next unit connected: the per-unit hook.

A job runs all its steps on unit 1, then on unit 2, ... Before a unit's first step the job
calls ``change.select(index, count, serial)`` on its :class:`UnitChange`; every run of the
previous unit has ended by then, so every output is off (each run ends through the
interlock's shutdown). ``change.close()`` is called once at the end of the job.

Kinds (``unit_change`` in the job file, ``--unit-change`` on the command line):

* ``"fixed"`` - nothing changes between units (:class:`FixedUnit`): a simulated bench, or a
  fixture that is changed by means outside benchctl. The serial still names each run.
* ``"operator"`` - someone swaps the unit (:class:`OperatorSwap`): the job says which
  serial to connect and waits for the answer; ``stop`` ends the job there.

* ``"switch_matrix"`` - the station's switch matrix connects each unit in turn
  (:class:`SwitchMatrixUnits`): ``select`` checks that every source's output reads off (it
  never switches hot), opens every relay, closes the unit's channel and reads it back;
  ``close`` opens every relay. Chosen by default when the station has a role of kind
  ``switch_matrix`` and the job runs several units. Unit k is on channel k unless the job
  file gives ``switch_channels = [...]`` (one channel per serial, in order).
"""

from __future__ import annotations

import logging
from collections.abc import Callable, Sequence
from typing import Any, Protocol

from benchctl.errors import ConfigurationError

log = logging.getLogger(__name__)

FIXED = "fixed"
OPERATOR = "operator"
SWITCH_MATRIX = "switch_matrix"
UNIT_CHANGES = {FIXED: "nothing changes between units (a simulated bench, or a fixture changed outside benchctl)",
                OPERATOR: "someone swaps the unit when the job asks, with every output off",
                SWITCH_MATRIX: "the station's switch matrix connects each unit in turn, with every source off"}


class JobStopped(Exception):
    """The operator ended the job at a change of unit (nothing was running)."""


class UnitChange(Protocol):
    """The per-unit hook of a job (module docstring)."""

    kind: str

    def select(self, index: int, count: int, serial: str) -> None:
        """Make unit ``index`` (0-based, of ``count``) with ``serial`` the one the station measures."""

    def close(self) -> None:
        """End of the job (release what ``select`` holds); safe to call twice."""


class FixedUnit:
    """Nothing to change: the serial only names the runs."""

    kind = FIXED

    def select(self, index: int, count: int, serial: str) -> None:
        log.info("unit %d/%d: %s (no change of connection)", index + 1, count, serial)

    def close(self) -> None:
        return None


class OperatorSwap:
    """Asks the operator to connect each unit; ``ask(prompt) -> answer`` and ``tell(text)``
    are the console's (injectable for tests). An answer ``stop`` raises :class:`JobStopped`."""

    kind = OPERATOR

    def __init__(self, ask: Callable[[str], str], tell: Callable[[str], None], *, hazardous: bool = False) -> None:
        self._ask = ask
        self._tell = tell
        self._hazardous = hazardous

    def select(self, index: int, count: int, serial: str) -> None:
        if index > 0:
            self._tell(f"unit {index}/{count} done: every output is off.")
        if self._hazardous:
            self._tell("CAUTION: hazardous voltage station - wait until the DUT's capacitors are discharged "
                       "before touching it.")
        answer = self._ask(f"connect unit {serial or '(no serial)'} ({index + 1}/{count}), then press Enter "
                           "(or type stop to end the job): ")
        if answer.strip().lower() == "stop":
            raise JobStopped(f"the operator ended the job before unit {serial} ({index + 1}/{count})")

    def close(self) -> None:
        return None


class SwitchMatrixUnits:
    """The station's switch matrix connects unit k (module docstring). ``station`` is a
    :class:`benchctl.station.Station`; the matrix and the sources are opened for each change
    only (between runs, when no run holds them) and closed again."""

    kind = SWITCH_MATRIX

    def __init__(self, station: Any, *, units: int, channels: Sequence[int] = ()) -> None:
        from benchctl.station import SOURCE_KIND

        matrices = station.roles_of_kind(SWITCH_MATRIX)
        if len(matrices) != 1:
            raise ConfigurationError(f"unit_change = 'switch_matrix' needs exactly one role of kind switch_matrix in "
                                     f"station {station.name!r}; it has {len(matrices)} ({', '.join(matrices) or 'none'})")
        if channels and len(channels) != units:
            raise ConfigurationError(f"job.switch_channels has {len(channels)} channel(s) for {units} unit(s); give one "
                                     "channel per serial, in order")
        self._station = station
        self.role = matrices[0]
        self.channels = tuple(int(c) for c in channels) or tuple(range(1, units + 1))
        self._sources = station.roles_of_kind(SOURCE_KIND)
        self.log: list[tuple[str, int]] = []

    def _check_sources_off(self, serial: str) -> None:
        for role in self._sources:
            with self._station.instruments[role].create().open() as source:
                if source.output_enabled():
                    raise ConfigurationError(
                        f"source {role!r} reads ON before unit {serial or '(no serial)'} is switched in; the matrix is "
                        "never switched hot. Switch it off and start the job again")

    def select(self, index: int, count: int, serial: str) -> None:
        channel = self.channels[index]
        self._check_sources_off(serial)
        with self._station.instruments[self.role].create().open() as matrix:
            matrix.select(channel)
        self.log.append((serial, channel))
        log.info("unit %d/%d: %s on %s channel %d", index + 1, count, serial, self.role, channel)

    def close(self) -> None:
        try:
            self._check_sources_off("(end of job)")
            with self._station.instruments[self.role].create().open() as matrix:
                matrix.open_all()
        except Exception as exc:  # the end of a job must not hide the job's own outcome
            log.warning("could not open every relay of %s at the end of the job: %s", self.role, exc)


def unit_change_for(kind: str, *, units: int, interactive: bool, ask: Callable[[str], str],
                    tell: Callable[[str], None], hazardous: bool = False, station: Any = None,
                    channels: Sequence[int] = ()) -> UnitChange:
    """The hook for ``kind`` (``""``: the default, ``fixed`` for one unit, the switch matrix
    for several when ``station`` has one). Several units with no kind given are refused when
    nobody can answer a prompt, so a night never measures one unit under several serials
    without being told to."""
    if not kind and units > 1 and station is not None and station.roles_of_kind(SWITCH_MATRIX):
        kind = SWITCH_MATRIX
    if kind == SWITCH_MATRIX:
        if station is None:
            raise ConfigurationError("unit_change = 'switch_matrix' needs the station (its switch_matrix role)")
        return SwitchMatrixUnits(station, units=units, channels=channels)
    if not kind:
        if units <= 1:
            return FixedUnit()
        if not interactive:
            raise ConfigurationError(
                f"the job runs {units} units but does not say how the next unit gets connected, and nobody can "
                "answer a prompt here; set unit_change in the job file or give --unit-change: "
                + "; ".join(f"{k!r}: {v}" for k, v in UNIT_CHANGES.items()))
        kind = OPERATOR
    if kind == FIXED:
        return FixedUnit()
    if kind == OPERATOR:
        if not interactive:
            raise ConfigurationError("unit_change = 'operator' needs someone at a terminal to answer; run the job "
                                     "from one, or use 'fixed' when the units need no change")
        return OperatorSwap(ask, tell, hazardous=hazardous)
    raise ConfigurationError(f"unit change {kind!r} is not known; choose {' or '.join(sorted(UNIT_CHANGES))}")


__all__ = ["FIXED", "OPERATOR", "SWITCH_MATRIX", "UNIT_CHANGES", "FixedUnit", "JobStopped", "OperatorSwap",
           "SwitchMatrixUnits", "UnitChange", "unit_change_for"]
