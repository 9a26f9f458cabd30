"""Plain records going into and coming out of the store (frozen dataclasses).

Times are UTC: inputs in seconds since the Unix epoch (``*_utc_s``), outputs as
timezone-aware :class:`datetime.datetime` (``*_utc``).
"""

from __future__ import annotations

import getpass
import hashlib
import os
import socket
from collections.abc import Iterator, Mapping
from dataclasses import dataclass, field
from datetime import datetime
from typing import Any

import numpy as np

import benchctl

from benchctl.run_status import FINAL_STATUSES, RUN_STATUSES, RunStatus

# Run statuses. A run is RUNNING until end_run() or recovery gives it a final one.
RUNNING = RunStatus.RUNNING
COMPLETED = RunStatus.COMPLETED
FAILED = RunStatus.FAILED
TRIPPED = RunStatus.TRIPPED
INTERRUPTED = RunStatus.INTERRUPTED

# Event kinds in common use; any short non-empty text is accepted.
EVENT_INTERLOCK_TRIP = "interlock_trip"
EVENT_ERROR = "error"
EVENT_WARNING = "warning"
EVENT_GAP = "gap"
EVENT_INFO = "info"
EVENT_INTERRUPTED = "interrupted"


def sha256_hex(data: bytes | str) -> str:
    """SHA-256 of ``data`` (text is UTF-8 encoded) as 64 lowercase hex digits (FIPS 180-4)."""
    if isinstance(data, str):
        data = data.encode("utf-8")
    return hashlib.sha256(data).hexdigest()


def _default_operator() -> str:
    try:
        return getpass.getuser()
    except (KeyError, OSError):  # no passwd entry / no login name (containers)
        return ""


@dataclass(frozen=True)
class InstrumentInfo:
    """One instrument of the station as found when a run began.

    ``identity`` is the instrument's own answer to ``*IDN?`` (maker, model, serial,
    firmware; IEEE 488.2-1992 clause 10.14).
    """

    role: str
    driver: str
    resource: str
    identity: str = ""


@dataclass(frozen=True)
class RunStart:
    """Everything known about a run when it begins (its provenance).

    ``parameters`` must be JSON-serialisable (numpy scalars and arrays are converted).
    ``station_sha256`` is computed from ``station_text`` when the text is given; give
    the hash alone when the text must not be stored. The text is stored with the
    password of any URL in it masked (``station.database``); the hash is of the file
    as given. ``job_id`` groups runs of one
    plan; it is free for the caller to assign.
    """

    procedure: str
    procedure_sha256: str
    station_name: str
    parameters: Mapping[str, Any] = field(default_factory=dict)
    station_description: str = ""
    station_text: str | None = None
    station_sha256: str | None = None
    instruments: tuple[InstrumentInfo, ...] | list[InstrumentInfo] = ()
    dut_part: str = ""
    dut_revision: str = ""
    dut_serial: str = ""
    operator: str = field(default_factory=_default_operator)
    host: str = field(default_factory=socket.gethostname)
    pid: int = field(default_factory=os.getpid)
    benchctl_version: str = benchctl.__version__
    job_id: int | None = None


@dataclass(frozen=True)
class RunInfo:
    """A run as stored, with all its provenance. ``n_points`` counts recorded points.

    ``run_id`` is the run's number in this database; ``run_uuid`` names the same run in
    every database it is copied to (RFC 4122 version 4 text).
    """

    run_id: int
    run_uuid: str
    procedure: str
    procedure_sha256: str
    parameters: Mapping[str, Any]
    station_name: str
    station_description: str
    station_sha256: str
    station_text: str | None
    instruments: tuple[InstrumentInfo, ...]
    dut_part: str
    dut_revision: str
    dut_serial: str
    operator: str
    host: str
    pid: int
    benchctl_version: str
    job_id: int | None
    status: str
    message: str
    started_utc: datetime
    ended_utc: datetime | None
    n_points: int


@dataclass(frozen=True)
class ArrayData(Mapping[str, np.ndarray]):
    """A stored array read back: behaves as ``dict[str, np.ndarray]`` of its columns,
    with ``units`` (column -> unit), ``meta`` and ``point_seq`` alongside.

    Columns come back bit-exact, in the little-endian byte order of their dtype.
    """

    name: str
    point_seq: int | None
    columns: Mapping[str, np.ndarray]
    units: Mapping[str, str]
    meta: Mapping[str, Any]

    def __getitem__(self, key: str) -> np.ndarray:
        return self.columns[key]

    def __iter__(self) -> Iterator[str]:
        return iter(self.columns)

    def __len__(self) -> int:
        return len(self.columns)
