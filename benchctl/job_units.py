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

A station with a switch matrix steps it between DUTs with a third kind that implements the
same two methods (``select`` routes the source, load and meters to DUT ``index``, checked by
reading the matrix back; ``close`` opens every relay), chosen by the job when the station
has that role. The instrument kind does not exist yet; :func:`unit_change_for` is where it
plugs in.
"""

from __future__ import annotations

import logging
from collections.abc import Callable
from typing import Protocol

from benchctl.errors import ConfigurationError

log = logging.getLogger(__name__)

FIXED = "fixed"
OPERATOR = "operator"
UNIT_CHANGES = {FIXED: "nothing changes between units (a simulated bench, or a fixture changed outside benchctl)",
                OPERATOR: "someone swaps the unit when the job asks, with every output off"}


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


def unit_change_for(kind: str, *, units: int, interactive: bool, ask: Callable[[str], str],
                    tell: Callable[[str], None], hazardous: bool = False) -> UnitChange:
    """The hook for ``kind`` (``""``: the default, ``fixed`` for one unit). Several units with
    no kind given are refused when nobody can answer a prompt, so a night never measures one
    unit under several serials without being told to."""
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


__all__ = ["FIXED", "OPERATOR", "UNIT_CHANGES", "FixedUnit", "JobStopped", "OperatorSwap", "UnitChange",
           "unit_change_for"]
