"""benchctl: bench automation and measurement logging for switching power converters.

The public names load lazily (on first use), so ``benchctl --help`` and ``import benchctl``
stay fast::

    from benchctl import Store, load_procedure, load_station, execute
"""

from __future__ import annotations

from importlib import import_module
from typing import TYPE_CHECKING, Any

__version__ = "0.1.0"

_PUBLIC: dict[str, str] = {
    # running procedures
    "Bench": "benchctl.bench",
    "Parameter": "benchctl.procedure",
    "Parameters": "benchctl.procedure",
    "Procedure": "benchctl.procedure",
    "Result": "benchctl.procedure",
    "load_procedure": "benchctl.procedure",
    "execute": "benchctl.runner",
    "DutInfo": "benchctl.runner",
    "RunOutcome": "benchctl.runner",
    "Station": "benchctl.station",
    "load_station": "benchctl.station",
    "parse_station": "benchctl.station",
    "SettleResult": "benchctl.settle",
    # the store
    "Store": "benchctl.store",
    "RunStart": "benchctl.store",
    # statuses, exit codes, errors
    "RunStatus": "benchctl.run_status",
    "ExitCode": "benchctl.exit_codes",
    "BenchctlError": "benchctl.errors",
    # what procedures may call on each kind of instrument
    "DcSourceLike": "benchctl.instrument_types",
    "ElectronicLoadLike": "benchctl.instrument_types",
    "PowerMeterLike": "benchctl.instrument_types",
    "LoopAnalyzerLike": "benchctl.instrument_types",
    "OscilloscopeLike": "benchctl.instrument_types",
}

__all__ = ["__version__", *_PUBLIC]


def __getattr__(name: str) -> Any:
    module = _PUBLIC.get(name)
    if module is None:
        raise AttributeError(f"module 'benchctl' has no attribute {name!r}")
    value = getattr(import_module(module), name)
    globals()[name] = value
    return value


def __dir__() -> list[str]:
    return sorted(__all__)


if TYPE_CHECKING:  # for type checkers and editors: the same names, imported eagerly
    from benchctl.bench import Bench
    from benchctl.errors import BenchctlError
    from benchctl.exit_codes import ExitCode
    from benchctl.instrument_types import (DcSourceLike, ElectronicLoadLike, LoopAnalyzerLike, OscilloscopeLike,
                                           PowerMeterLike)
    from benchctl.procedure import Parameter, Parameters, Procedure, Result, load_procedure
    from benchctl.run_status import RunStatus
    from benchctl.runner import DutInfo, RunOutcome, execute
    from benchctl.settle import SettleResult
    from benchctl.station import Station, load_station, parse_station
    from benchctl.store import RunStart, Store
