"""The one exception tree of benchctl.

Every error a user can meet is one of these; messages say what was wrong, where
(file and key, instrument and command) and what to do about it. Errors of the
libraries underneath (pyvisa, sockets, SQLAlchemy, tomllib) are translated once, at
the boundary where they happen, and chained with ``raise ... from exc``.

::

    BenchctlError
    ├── ConfigurationError          station, plan, limits, parameter files and values
    │   ├── StationFileError
    │   ├── ParameterError
    │   ├── LimitsFileError
    │   ├── StationChangedError     a resume on a station other than the run's record
    │   └── CalibrationOverdueError an instrument past its calibration due date (station refuses)
    ├── UsageError                  a caller's bad argument to benchctl's API (also a ValueError)
    ├── InstrumentError             anything an instrument did or failed to do; ``instrument``,
    │   │                           ``command`` and ``detail`` are attributes, the message is made of them
    │   ├── InstrumentConnectionError   resource unreachable, connection dropped
    │   ├── InstrumentTimeout           no answer within the timeout
    │   ├── InstrumentResponseError     an answer that cannot be parsed
    │   ├── InstrumentStateError        identity or state not what was programmed (reset)
    │   └── ScpiError                   the instrument queued a SCPI error
    ├── InterlockError
    │   ├── SetpointRefused             a setpoint outside the station limits (not sent)
    │   └── InterlockTrip               a reading crossed a limit; outputs were turned off
    ├── StoreError
    │   ├── SchemaVersionError
    │   ├── StoreFullError          the disk (or the database's size limit) is full
    │   └── StoreReadOnlyError      a write to a store opened read-only
    ├── StationBusyError            the station is held by another run (nothing was opened)
    ├── StationLockLost             the station's database lock went with its session mid-run
    ├── ProcedureError              a procedure script that cannot be loaded or run
    └── AnalysisInputError          data given to analysis that cannot be used (CSV files)
"""

from __future__ import annotations


class BenchctlError(Exception):
    """Base of every benchctl error."""


class ConfigurationError(BenchctlError):
    """A configuration file or value is wrong; ``problems`` lists every one found."""

    def __init__(self, message: str, problems: list[str] | None = None) -> None:
        self.problems = list(problems or [])
        if self.problems:
            message = message + "\n" + "\n".join(f"  - {p}" for p in self.problems)
        super().__init__(message)


class StationFileError(ConfigurationError):
    """The station file cannot be used."""


class ParameterError(ConfigurationError):
    """A procedure parameter is unknown, of the wrong type or out of its range."""


class LimitsFileError(ConfigurationError):
    """A spec-limits file cannot be used."""


class StationChangedError(ConfigurationError):
    """A resume was asked on a station whose limits or instruments differ from the run's record."""


class CalibrationOverdueError(ConfigurationError):
    """An instrument's calibration is past due and the station says ``calibration_overdue = "refuse"``."""


class UsageError(BenchctlError, ValueError):
    """A caller passed an argument the API does not accept (a negative scale, an unknown mode).

    The fault is the calling code's (a procedure, a script), not the bench's: nothing was
    sent. It is also a :class:`ValueError`, so code written against the standard library's
    convention for a bad value still catches it.
    """


class InstrumentError(BenchctlError):
    """An instrument failed: ``detail`` says what, ``instrument`` and ``command`` where (when known).

    The message is built from the three attributes each time it is shown, so context added
    later (:meth:`located`) never has to be cut out of a text again.
    """

    def __init__(self, detail: str, *, instrument: str = "", command: str = "") -> None:
        self.detail = detail
        self.instrument = instrument
        self.command = command
        super().__init__(detail)

    def __str__(self) -> str:
        where = []
        if self.instrument:
            where.append(f"instrument {self.instrument}")
        if self.command:
            where.append(f"command {self.command!r}")
        return f"{', '.join(where)}: {self.detail}" if where else self.detail

    def located(self, *, detail: str | None = None, instrument: str | None = None,
                command: str | None = None) -> "InstrumentError":
        """A copy of this error (same class and extra attributes) with the given fields replaced."""
        new = self.__class__.__new__(self.__class__)
        new.__dict__.update(self.__dict__)
        new.detail = self.detail if detail is None else detail
        new.instrument = self.instrument if instrument is None else instrument
        new.command = self.command if command is None else command
        Exception.__init__(new, new.detail)
        return new

    def __reduce__(self) -> tuple[object, ...]:  # picklable although the extra fields are keywords
        return (_rebuild_instrument_error, (self.__class__, dict(self.__dict__)))


def _rebuild_instrument_error(cls: type[InstrumentError], state: dict[str, object]) -> InstrumentError:
    new = cls.__new__(cls)
    new.__dict__.update(state)
    Exception.__init__(new, state.get("detail", ""))
    return new


class InstrumentConnectionError(InstrumentError):
    """The instrument cannot be reached or dropped its connection."""


class InstrumentTimeout(InstrumentError):
    """The instrument did not answer within its timeout."""


class InstrumentResponseError(InstrumentError):
    """The instrument answered something that cannot be parsed."""


class InstrumentStateError(InstrumentError):
    """The instrument's identity or state differs from what was programmed."""


class ScpiError(InstrumentError):
    """The instrument reported an error in its SCPI error queue."""

    def __init__(self, message: str, *, code: int, instrument: str = "", command: str = "") -> None:
        self.code = code
        super().__init__(message, instrument=instrument, command=command)


class InterlockError(BenchctlError):
    """Base of interlock refusals and trips."""


class SetpointRefused(InterlockError):
    """A setpoint is outside the station limits; nothing was sent to the instrument."""

    def __init__(self, message: str, *, limit: str, value: float, instrument: str) -> None:
        self.limit = limit
        self.value = value
        self.instrument = instrument
        super().__init__(message)


class InterlockTrip(InterlockError):
    """A reading crossed a station limit; the outputs have been turned off."""

    def __init__(self, message: str, *, limit: str, value: float, instrument: str) -> None:
        self.limit = limit
        self.value = value
        self.instrument = instrument
        super().__init__(message)


class StoreError(BenchctlError):
    """The measurement store cannot be opened, read or written."""


class SchemaVersionError(StoreError):
    """The database was written by a different schema version."""


class StoreFullError(StoreError):
    """A write failed because the disk holding the database (or its size limit) is full."""


class StoreReadOnlyError(StoreError):
    """A write was asked of a store opened read-only (a read-only medium or file)."""


class StationBusyError(BenchctlError):
    """Another run (or job) holds the station; ``holder`` says who. Nothing was opened or switched."""

    def __init__(self, message: str, *, holder: object = None) -> None:
        self.holder = holder
        super().__init__(message)


class StationLockLost(BenchctlError):
    """The station's lock in the shared database was lost during a run (its session ended) and
    could not be taken again: another run may hold the station now, so this one stops."""


class ProcedureError(BenchctlError):
    """A procedure cannot be found, loaded or run."""


class AnalysisInputError(BenchctlError):
    """Data handed to an analysis (for instance a CSV file) cannot be used."""
