"""Station files: which instrument plays which role, and the limits of the bench.

A station file is TOML (read with the standard library's ``tomllib``; nothing in it is
evaluated as code). Loading validates the whole file and reports every problem with its
key, so one edit fixes them all. The format is documented in the README::

    [station]
    name = "bench-3"
    watch_period_s = 0.1                     # interlock background watch period
    hazardous_voltage_acknowledged = false   # must be true when a limit exceeds 60 V DC
    dut_time_constant_s = 0.02               # optional: the DUT's slowest settling time constant

    [limits]
    source_voltage_max_v = 60.0
    source_current_max_a = 3.0
    dut_output_voltage_max_v = 6.0
    load_current_max_a = 6.0
    load_power_max_w = 35.0

    [instruments.source]
    driver = "dc_source"
    resource = "TCPIP::192.0.2.10::5025::SOCKET"
    timeout_s = 2.0
    [instruments.source.commands]            # dialect overrides, optional
    set_voltage = "SOUR:VOLT {value:.4f}"

    [instruments.input_meter.accuracy]       # optional: the instrument's specification
    voltage = { pct_of_reading = 0.05, offset = 0.005 }          # ±(0.05 % of reading + 5 mV)
    current = [ { range_max = 1.0, pct_of_reading = 0.1, offset = 0.0002 },   # per range: the
                { range_max = 10.0, pct_of_reading = 0.1, offset = 0.002 } ]  # smallest >= |reading|
    power = { pct_of_reading = 0.1, offset = 0.002, distribution = "rectangular" }

Roles: any name (a letter, then letters, digits or ``_``). ``source``, ``load``,
``input_meter``, ``output_meter``, ``analyzer`` and ``scope`` imply their kind
(:data:`ROLE_KINDS`); another role takes its driver's kind or states it with
``kind = "power_meter"`` (checked against the driver). Every role of kind ``dc_source`` or
``electronic_load`` is protected, watched and switched off by the interlock.

VISA library: ``visa_library`` in ``[station]`` (default ``"@py"``, pyvisa-py) and per
instrument (overrides it): ``"@py"``, ``"@ivi"`` (a vendor VISA found by pyvisa), another
pyvisa backend ``"@name"`` (package ``pyvisa-name``), or the path of a vendor library.
Interface options (``read_termination``, ``baud_rate`` ...) are driver options, checked
with the rest; the serial ones only on ``ASRL`` resources.

Calibration: ``calibration_due = 2027-03-31`` (a TOML date) and ``calibration_certificate
= "..."`` per instrument; ``[station] calibration_overdue = "warn"`` (default: a caution
and a stored event) or ``"refuse"`` (the run is refused before anything is opened) says
what a run does with an instrument past its due date.

Accuracy: per measured quantity (``voltage``, ``current``, ``power``: what the driver's
measure_voltage / measure_current / measure_power return), ``±(pct_of_reading % of
reading + offset)`` with the offset and ``range_max`` in SI units (V, A, W), one table or
one per range (ascending ``range_max``). ``distribution`` says how the error is spread
over that bound: ``"rectangular"`` (the default, u = a/√3), ``"triangular"`` (a/√6) or
``"normal"`` with ``coverage_factor`` (default 2: the bound is an expanded uncertainty,
u = a/k); JCGM 100:2008 4.3.3, 4.3.7, 4.3.9. It is stored with the run (the station text)
and re-read by analysis (:func:`station_accuracy_from_text`) to give every figure its
uncertainty (:mod:`benchctl.analysis.uncertainty`).
"""

from __future__ import annotations

import datetime as _dt
import math
import re
import tomllib
from dataclasses import dataclass, field, fields
from functools import lru_cache
from importlib.metadata import entry_points
from pathlib import Path
from typing import Any, Mapping

from benchctl.analysis.uncertainty import (
    DISTRIBUTIONS,
    MEASURED_QUANTITIES,
    NORMAL,
    RECTANGULAR,
    AccuracyTerm,
    InstrumentAccuracy,
    QuantityAccuracy,
)
from benchctl.errors import StationFileError
from benchctl.config_file import read_config_text

#: DC voltage above which a station must acknowledge hazardous voltage: the SELV / ES1
#: boundary of 60 V DC (IEC 62368-1 Table 4; IEC 60950-1 §1.2.8.8 — from memory).
HAZARDOUS_DC_VOLTAGE_V = 60.0

#: The classic roles and the driver kind each name implies. A station may name any other
#: role (``[instruments.load2]``, ``[instruments.temp_logger]``); its kind is then its
#: ``kind`` key, or its driver's kind.
ROLE_KINDS: dict[str, str] = {
    "source": "dc_source",
    "load": "electronic_load",
    "input_meter": "power_meter",
    "output_meter": "power_meter",
    "analyzer": "loop_analyzer",
    "scope": "oscilloscope",
}

#: Kinds that put energy into the DUT or take it out: every instrument of these kinds is
#: switched off by the interlock's shutdown (sources first, then loads) and must answer its watch.
SOURCE_KIND = "dc_source"
LOAD_KIND = "electronic_load"
ENERGY_KINDS = (SOURCE_KIND, LOAD_KIND)
#: A kind the interlock reads on every run once the station declares
#: ``limits.hot_spot_temperature_max_c``: the station's thermocouples guard every procedure,
#: not only the ones that ask for temperatures.
TEMPERATURE_METER_KIND = "temperature_meter"

#: What ``[station] calibration_overdue`` may say: print a caution and store an event, or
#: refuse the run before any instrument is opened.
CALIBRATION_POLICIES = ("warn", "refuse")

_ROLE_NAME = re.compile(r"^[A-Za-z][A-Za-z0-9_]{0,63}$")

DRIVER_ENTRY_POINT_GROUP = "benchctl.drivers"


@lru_cache(maxsize=1)
def _driver_entry_points() -> dict[str, Any]:
    return {ep.name: ep for ep in entry_points(group=DRIVER_ENTRY_POINT_GROUP)}


def driver_names() -> list[str]:
    """Names of every installed driver (entry-point group ``benchctl.drivers``)."""
    return sorted(_driver_entry_points())


def load_driver_class(name: str) -> type:
    """The driver class registered under ``name``; a lab adds its own through the entry-point group."""
    eps = _driver_entry_points()
    if name not in eps:
        raise StationFileError(
            f"unknown driver {name!r}; installed drivers: {', '.join(driver_names()) or 'none'}. "
            f"A lab's own driver registers under the entry-point group {DRIVER_ENTRY_POINT_GROUP!r}"
        )
    return eps[name].load()


@dataclass(frozen=True)
class StationLimits:
    """The bench's safety limits, SI units. The interlock enforces every one."""

    source_voltage_max_v: float
    source_current_max_a: float
    dut_output_voltage_max_v: float
    load_current_max_a: float
    load_power_max_w: float
    # Optional limits of a thermal bench (°C, K/min): the chamber setpoints allowed, its ramp
    # rate, and the hot-spot temperature that trips the run. None: not declared (a chamber's
    # setpoint is then refused; a temperature reading is not checked).
    chamber_temperature_min_c: float | None = None
    chamber_temperature_max_c: float | None = None
    chamber_ramp_max_k_per_min: float | None = None
    hot_spot_temperature_max_c: float | None = None

    @property
    def hazardous(self) -> bool:
        return max(self.source_voltage_max_v, self.dut_output_voltage_max_v) > HAZARDOUS_DC_VOLTAGE_V


@dataclass(frozen=True)
class InstrumentConfig:
    role: str
    driver: str
    resource: str
    timeout_s: float = 2.0
    options: Mapping[str, Any] = field(default_factory=dict)
    commands: Mapping[str, str] = field(default_factory=dict)
    accuracy: Mapping[str, QuantityAccuracy] = field(default_factory=dict)
    kind: str = ""  # the driver kind of this role ("" only for configs built in code: see effective_kind)
    calibration_due: _dt.date | None = None  # the date the instrument's calibration expires
    calibration_certificate: str = ""  # the certificate (report) id of its last calibration
    visa_library: str = "@py"  # the VISA library that reaches it (the instrument's, else [station]'s)

    @property
    def effective_kind(self) -> str:
        """The role's kind: as given, implied by a classic role name, or the driver's kind."""
        if self.kind:
            return self.kind
        if self.role in ROLE_KINDS:
            return ROLE_KINDS[self.role]
        return str(getattr(load_driver_class(self.driver), "kind", ""))

    def calibration_overdue_days(self, today: _dt.date) -> int | None:
        """Days past the calibration due date on ``today`` (0 on the due date itself is not
        overdue: None), or None when the instrument is in date or states no due date."""
        if self.calibration_due is None or today <= self.calibration_due:
            return None
        return (today - self.calibration_due).days

    def create(self) -> Any:
        """A driver object for this instrument (not yet opened)."""
        cls = load_driver_class(self.driver)
        extra = {} if self.visa_library == DEFAULT_VISA_LIBRARY else {"visa_library": self.visa_library}
        return cls(
            self.resource,
            name=self.role,
            timeout_s=self.timeout_s,
            commands=dict(self.commands),
            options=dict(self.options),
            **extra,
        )


@dataclass(frozen=True)
class Station:
    name: str
    limits: StationLimits
    instruments: Mapping[str, InstrumentConfig]
    description: str = ""
    watch_period_s: float = 0.1
    watch_deadline_s: float | None = None  # None: the period, at least 0.5 s (benchctl.interlock)
    watch_missed_periods: int = 3  # a watched quantity unread this many periods in a row trips the run
    shutdown_deadline_s: float = 0.5  # each output's off at every end, no retries (s)
    hazardous_voltage_acknowledged: bool = False
    database: str | None = None
    path: Path | None = None
    text: str = ""
    dut_time_constant_s: float | None = None  # the DUT's dominant settling time constant, s (settling)
    calibration_overdue: str = "warn"  # an overdue instrument: "warn" (caution + event) or "refuse" the run
    # [limits.absolute]: the most the bench takes; a procedure's test envelope may widen the
    # operating limits up to these and no further (None: no envelope is allowed)
    absolute_limits: StationLimits | None = None
    visa_library: str = "@py"  # the VISA library of instruments that name none

    @property
    def accuracy(self) -> dict[str, InstrumentAccuracy]:
        """The accuracy of every instrument that states one, by role (the resource string
        identifies the instrument, so two roles of one instrument share their gain errors)."""
        return {role: InstrumentAccuracy(cfg.resource, dict(cfg.accuracy))
                for role, cfg in self.instruments.items() if cfg.accuracy}

    def kind_of(self, role: str) -> str:
        """The driver kind of ``role`` (KeyError when the station has no such role)."""
        return self.instruments[role].effective_kind

    def roles_of_kind(self, kind: str) -> list[str]:
        """The station's roles of ``kind``, in the order of the station file."""
        return [role for role in self.instruments if self.kind_of(role) == kind]

    def require_roles(self, roles: Any, *, needed_by: str = "") -> None:
        """Check the station has every role of ``roles`` with the kind it needs.

        ``roles`` are names (a classic role name implies its kind; another name accepts any
        kind) or :class:`benchctl.procedure.Role` objects (with ``kind`` and ``optional``);
        an optional role may be missing, but when present it must have its kind.
        """
        who = f" needed by {needed_by}" if needed_by else ""
        missing, wrong = [], []
        for r in roles:
            name = str(r)
            kind = getattr(r, "kind", None) or ROLE_KINDS.get(name)
            if name not in self.instruments:
                if not getattr(r, "optional", False):
                    missing.append(f"{name} ({kind})" if kind else name)
                continue
            have = self.kind_of(name)
            if kind and have != kind:
                wrong.append(f"{name} is a {have}, but a {kind} is needed")
        if missing:
            raise StationFileError(
                f"station {self.name!r} ({self.path or 'in memory'}) has no instrument for role(s) "
                f"{', '.join(missing)}{who}; add [instruments.<role>] tables for them"
            )
        if wrong:
            raise StationFileError(
                f"station {self.name!r} ({self.path or 'in memory'}): {'; '.join(wrong)}{who}; give the role an "
                "instrument of that kind (its driver, or its kind key)"
            )

    def overdue_calibrations(self, roles: Any, today: _dt.date) -> list[tuple[str, InstrumentConfig, int]]:
        """(role, config, days overdue) of each of ``roles`` whose calibration is past due on ``today``."""
        out = []
        for r in roles:
            cfg = self.instruments.get(str(r))
            days = None if cfg is None else cfg.calibration_overdue_days(today)
            if cfg is not None and days is not None:
                out.append((str(r), cfg, days))
        return out


#: The optional ``[limits]`` keys of a thermal bench (see :class:`StationLimits`).
OPTIONAL_LIMIT_KEYS = ("chamber_temperature_min_c", "chamber_temperature_max_c", "chamber_ramp_max_k_per_min",
                       "hot_spot_temperature_max_c")
_LIMIT_KEYS = [f.name for f in fields(StationLimits) if f.name not in OPTIONAL_LIMIT_KEYS]
_STATION_KEYS = {"name", "description", "watch_period_s", "hazardous_voltage_acknowledged", "database",
                 "dut_time_constant_s", "calibration_overdue"}
_STATION_KEYS |= {"watch_deadline_s", "watch_missed_periods", "shutdown_deadline_s"}
_STATION_KEYS |= {"visa_library"}
_INSTRUMENT_KEYS = {"driver", "resource", "timeout_s", "options", "commands", "accuracy", "kind",
                    "calibration_due", "calibration_certificate"}
_INSTRUMENT_KEYS |= {"visa_library"}
DEFAULT_VISA_LIBRARY = "@py"
#: Options of a serial line, refused on resources that are not ASRL.
SERIAL_OPTIONS = ("baud_rate", "data_bits", "parity", "stop_bits", "flow_control")


def _visa_library_problem(key: str, value: Any) -> str | None:
    """Why ``value`` cannot be a VISA library (checked at load, without loading it), or None."""
    if not isinstance(value, str) or not value.strip():
        return (f"{key}: {value!r} must be \"@py\" (pyvisa-py), \"@ivi\" (a vendor VISA), \"@name\" (the pyvisa "
                "backend package pyvisa-name) or the path of a vendor VISA library")
    if value in (DEFAULT_VISA_LIBRARY, "@ivi"):
        return None
    if value.startswith("@"):
        from importlib.util import find_spec

        name = value[1:]
        if not name.isidentifier() or find_spec(f"pyvisa_{name}") is None:
            return (f"{key}: {value!r} names the pyvisa backend pyvisa-{name}, which is not installed; install it "
                    "(pip install pyvisa-" + name + "), or use \"@py\", \"@ivi\" or the path of a vendor VISA library")
        return None
    if not Path(value).expanduser().is_file():
        return (f"{key}: {value!r} is not a file; give the path of an installed vendor VISA library (such as "
                "/usr/lib/x86_64-linux-gnu/libvisa.so), or \"@ivi\" to let pyvisa find it, or \"@py\"")
    return None


def _serial_option_problems(key: str, resource: Any, options: Any) -> list[str]:
    """Serial-line options given for a resource that is not a serial (ASRL) one."""
    if not isinstance(options, dict) or not isinstance(resource, str):
        return []
    given = [name for name in SERIAL_OPTIONS if name in options]
    if not given or resource.strip().upper().startswith("ASRL"):
        return []
    return [f"{key}.options.{name}: applies to serial (ASRL) resources only, and {resource!r} is not one; remove "
            "it, or give the serial resource (ASRL/dev/ttyUSB0::INSTR, ASRL3::INSTR)" for name in given]
_TERM_KEYS = {"pct_of_reading", "offset", "range_max", "distribution", "coverage_factor"}


def _positive_number(value: Any) -> bool:
    return isinstance(value, (int, float)) and not isinstance(value, bool) and math.isfinite(value) and value > 0


def _watch_options(station: Mapping[str, Any], problems: list[str]) -> dict[str, Any]:
    """The interlock's watch and shutdown options of [station] (see benchctl.interlock)."""
    options: dict[str, Any] = {}
    deadline = station.get("watch_deadline_s")
    if deadline is not None:
        if not _positive_number(deadline) or deadline > 10:
            problems.append(f"station.watch_deadline_s: {deadline!r} must be a number of seconds in (0, 10] "
                            "(how long the watch waits for its readings each period)")
        else:
            options["watch_deadline_s"] = float(deadline)
    missed = station.get("watch_missed_periods", 3)
    if not isinstance(missed, int) or isinstance(missed, bool) or not 1 <= missed <= 100:
        problems.append(f"station.watch_missed_periods: {missed!r} must be a whole number in [1, 100] (periods a "
                        "watched quantity may go unread before the run trips)")
    else:
        options["watch_missed_periods"] = missed
    off = station.get("shutdown_deadline_s", 0.5)
    if not _positive_number(off) or off > 10:
        problems.append(f"station.shutdown_deadline_s: {off!r} must be a number of seconds in (0, 10] (how long "
                        "each output may take to confirm its off at the end of a run)")
    else:
        options["shutdown_deadline_s"] = float(off)
    return options


def _check_resource(resource: str) -> str | None:
    """A reason the VISA resource string is malformed, or None (no connection is made)."""
    from pyvisa import rname

    try:
        rname.parse_resource_name(resource)
    except (rname.InvalidResourceName, ValueError) as exc:
        return str(exc).splitlines()[0]
    return None


def _finite_number(value: Any) -> bool:
    return isinstance(value, (int, float)) and not isinstance(value, bool) and math.isfinite(value)


def _parse_term(key: str, item: Any, problems: list[str], *, need_range: bool) -> AccuracyTerm | None:
    """One ``{ pct_of_reading = .., offset = .., range_max = .., distribution = .. }``."""
    if not isinstance(item, dict):
        problems.append(f"{key}: must be a table {{ pct_of_reading = 0.05, offset = 0.005 }}")
        return None
    before = len(problems)
    for extra in sorted(set(item) - _TERM_KEYS):
        problems.append(f"{key}.{extra}: unknown key; known keys: {', '.join(sorted(_TERM_KEYS))}")
    pct, offset = item.get("pct_of_reading"), item.get("offset")
    for name, value in (("pct_of_reading", pct), ("offset", offset)):
        if value is None:
            problems.append(f"{key}.{name}: required, a number >= 0 "
                            + ("(% of reading)" if name == "pct_of_reading" else "(SI unit of the quantity)"))
        elif not _finite_number(value) or value < 0:
            problems.append(f"{key}.{name}: {value!r} must be a finite number >= 0")
    if _finite_number(pct) and pct > 100:
        problems.append(f"{key}.pct_of_reading: {pct!r} % of reading is not an accuracy; give the percentage "
                        "(0.05 for 0.05 %)")
    if _finite_number(pct) and _finite_number(offset) and pct == 0 and offset == 0:
        problems.append(f"{key}: pct_of_reading and offset are both 0; an instrument without error has no "
                        "specification to give - leave the quantity out instead")
    rng = item.get("range_max")
    if rng is None and need_range:
        problems.append(f"{key}.range_max: required when a quantity has several ranges (SI unit, > 0)")
    elif rng is not None and not _positive_number(rng):
        problems.append(f"{key}.range_max: {rng!r} must be a positive number (SI unit of the quantity)")
    dist = item.get("distribution", RECTANGULAR)
    if dist not in DISTRIBUTIONS:
        problems.append(f"{key}.distribution: {dist!r} must be one of {', '.join(repr(d) for d in DISTRIBUTIONS)}")
    k = item.get("coverage_factor")
    if k is not None and dist != NORMAL:
        problems.append(f"{key}.coverage_factor: only meaningful with distribution = \"normal\" "
                        f"(the bound is k standard uncertainties)")
    elif k is not None and (not _positive_number(k) or k > 10):
        problems.append(f"{key}.coverage_factor: {k!r} must be a number in (0, 10], e.g. 2")
    if len(problems) > before:
        return None
    return AccuracyTerm(pct_of_reading=float(pct), offset=float(offset),
                        range_max=None if rng is None else float(rng), distribution=dist,
                        coverage_factor=2.0 if k is None else float(k))


#: What each kind measures, for its accuracy table (a kind not listed: any measured quantity).
_KIND_QUANTITIES = {TEMPERATURE_METER_KIND: ("temperature",), "thermal_chamber": ("temperature",),
                    **{k: ("voltage", "current", "power") for k in ("power_meter", "dc_source", "electronic_load",
                                                                   "oscilloscope", "function_generator")}}


def _kind_in_spec(role: str, spec: Mapping[str, Any]) -> str:
    """A role's kind as far as its raw table tells: ``kind``, a classic role name, else the driver name."""
    return str(spec.get("kind") or ROLE_KINDS.get(role) or spec.get("driver") or "")


def parse_accuracy(key: str, table: Any, problems: list[str], kind: str = "") -> dict[str, QuantityAccuracy]:
    """Validate one ``[instruments.<role>.accuracy]`` table (``key`` names it in messages) of an
    instrument of ``kind``; appends every problem to ``problems`` and returns the valid quantities."""
    if not isinstance(table, dict):
        problems.append(f"{key}: must be a table of quantity = {{ pct_of_reading = ..., offset = ... }}")
        return {}
    allowed = _KIND_QUANTITIES.get(kind, MEASURED_QUANTITIES)
    out: dict[str, QuantityAccuracy] = {}
    for quantity, spec in table.items():
        qkey = f"{key}.{quantity}"
        if quantity not in allowed:
            what = f" of a {kind}" if kind in _KIND_QUANTITIES else ""
            problems.append(f"{qkey}: unknown quantity{what}; accuracy is given for {', '.join(allowed)}")
            continue
        if isinstance(spec, dict):
            term = _parse_term(qkey, spec, problems, need_range=False)
            if term is not None:
                out[quantity] = QuantityAccuracy((term,))
            continue
        if not isinstance(spec, list) or not spec:
            problems.append(f"{qkey}: must be a table {{ pct_of_reading = ..., offset = ... }} or a non-empty "
                            "list of them, one per range with range_max")
            continue
        terms = [_parse_term(f"{qkey}[{i}]", item, problems, need_range=True) for i, item in enumerate(spec, 1)]
        if any(t is None for t in terms):
            continue
        ranges = [t.range_max for t in terms if t is not None]
        if any(b <= a for a, b in zip(ranges, ranges[1:])):  # type: ignore[operator]
            problems.append(f"{qkey}: range_max must increase from one range to the next, got "
                            f"{', '.join(f'{r:g}' for r in ranges)}")  # type: ignore[str-format]
            continue
        out[quantity] = QuantityAccuracy(tuple(t for t in terms if t is not None))
    return out


def station_accuracy_from_text(text: str | None, *, where: str = "stored station text") -> dict[str, InstrumentAccuracy]:
    """The instruments' accuracy from a station file's text (as stored with a run), by role.

    Only the ``accuracy`` tables are validated, so a run's stored station still gives its
    accuracy when a driver it named is no longer installed. Empty when there is no text
    or no accuracy; StationFileError (every problem with its key) when a table is wrong.
    """
    if not text:
        return {}
    try:
        data = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise StationFileError(f"{where}: not valid TOML: {exc}") from exc
    problems: list[str] = []
    out: dict[str, InstrumentAccuracy] = {}
    table = data.get("instruments", {})
    if isinstance(table, dict):
        for role, spec in table.items():
            if not isinstance(spec, dict) or "accuracy" not in spec:
                continue
            quantities = parse_accuracy(f"instruments.{role}.accuracy", spec["accuracy"], problems,
                                        _kind_in_spec(str(role), spec))
            if quantities:
                out[role] = InstrumentAccuracy(str(spec.get("resource", role)), quantities)
    if problems:
        raise StationFileError(f"{where}: {len(problems)} problem(s) in the accuracy tables", problems)
    return out


@dataclass(frozen=True)
class CalibrationRecord:
    """One instrument's calibration as its station file states it."""

    role: str
    due: _dt.date
    certificate: str = ""

    def overdue_days(self, on: _dt.date) -> int | None:
        """Days past due on ``on``, or None when in date."""
        return (on - self.due).days if on > self.due else None


def calibration_records_from_text(text: str | None) -> list[CalibrationRecord]:
    """The calibration records (due date, certificate) of a station file's text, as stored with
    a run; instruments with a wrong or missing date are left out. Empty when there is no text."""
    if not text:
        return []
    try:
        data = tomllib.loads(text)
    except tomllib.TOMLDecodeError:
        return []
    table = data.get("instruments", {})
    out = []
    for role, spec in (table.items() if isinstance(table, dict) else ()):
        due = spec.get("calibration_due") if isinstance(spec, dict) else None
        if isinstance(due, _dt.date) and not isinstance(due, _dt.datetime):
            cert = spec.get("calibration_certificate", "")
            out.append(CalibrationRecord(str(role), due, cert.strip() if isinstance(cert, str) else ""))
    return out


def parse_station(text: str, *, path: Path | None = None) -> Station:
    """Validate station TOML text completely; raise StationFileError listing every problem."""
    where = str(path) if path else "station text"
    try:
        data = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise StationFileError(f"{where}: not valid TOML: {exc}") from exc

    problems: list[str] = []
    for key in sorted(set(data) - {"station", "limits", "instruments"}):
        problems.append(f"[{key}]: unknown table; expected [station], [limits], [instruments.<role>]")
    settings = _station_table(data.get("station"), problems)
    limits_data = data.get("limits")
    absolute_data = limits_data.get("absolute") if isinstance(limits_data, dict) else None
    if isinstance(limits_data, dict) and "absolute" in limits_data:
        limits_data = {k: v for k, v in limits_data.items() if k != "absolute"}
    limits = _limits_table(limits_data, settings["hazardous_voltage_acknowledged"], problems)
    absolute = _absolute_limits_table(absolute_data, limits, settings["hazardous_voltage_acknowledged"], problems)
    instruments = _instruments_table(data.get("instruments", {}), problems, settings["visa_library"])
    if problems:
        raise StationFileError(f"{where}: {len(problems)} problem(s) in the station file", problems)
    assert limits is not None
    return Station(limits=limits, instruments=instruments, path=path, text=text, absolute_limits=absolute, **settings)


def _absolute_limits_table(table: Any, limits: StationLimits | None, acknowledged: bool,
                           problems: list[str]) -> StationLimits | None:
    """``[limits.absolute]``: the bench's absolute limits; a key left out stays at its operating limit.
    Each must be at least its operating limit."""
    if table is None:
        return None
    if not isinstance(table, dict):
        problems.append("limits.absolute: must be a table ([limits.absolute])")
        return None
    for key in sorted(set(table) - set(_LIMIT_KEYS)):
        problems.append(f"limits.absolute.{key}: unknown key; known keys: {', '.join(_LIMIT_KEYS)}")
    if limits is None:
        return None
    values: dict[str, float] = {}
    for key in _LIMIT_KEYS:
        operating = float(getattr(limits, key))
        value = table.get(key, operating)
        if not _positive_number(value):
            problems.append(f"limits.absolute.{key}: {value!r} must be a positive number")
            continue
        if float(value) < operating:
            problems.append(f"limits.absolute.{key}: {value!r} is below the operating limit limits.{key} = "
                            f"{operating:g}; an absolute limit is the most the bench takes")
            continue
        values[key] = float(value)
    if len(values) != len(_LIMIT_KEYS):
        return None
    absolute = StationLimits(**values)
    if absolute.hazardous and not acknowledged:
        problems.append(
            f"station.hazardous_voltage_acknowledged: the absolute limits allow "
            f"{max(absolute.source_voltage_max_v, absolute.dut_output_voltage_max_v):g} V, above "
            f"{HAZARDOUS_DC_VOLTAGE_V:g} V DC (SELV/ES1 boundary, IEC 62368-1): read the README's "
            "safety section, then set hazardous_voltage_acknowledged = true")
    return absolute


def _station_table(station: Any, problems: list[str]) -> dict[str, Any]:
    """The ``[station]`` table checked key by key: the Station fields it gives."""
    if not isinstance(station, dict):
        problems.append("[station]: missing table with at least name = \"...\"")
        station = {}
    for key in sorted(set(station) - _STATION_KEYS):
        problems.append(f"station.{key}: unknown key; known keys: {', '.join(sorted(_STATION_KEYS))}")
    name = station.get("name")
    if not isinstance(name, str) or not name.strip():
        problems.append("station.name: required, a non-empty string")
    watch = station.get("watch_period_s", 0.1)
    if not _positive_number(watch) or watch > 10:
        problems.append(f"station.watch_period_s: {watch!r} must be a number of seconds in (0, 10]")
    watch_options = _watch_options(station, problems)
    ack = station.get("hazardous_voltage_acknowledged", False)
    if not isinstance(ack, bool):
        problems.append(f"station.hazardous_voltage_acknowledged: {ack!r} must be true or false")
    database = station.get("database")
    if database is not None and (not isinstance(database, str) or not database.strip()):
        problems.append("station.database: must be a database URL string when given")
    dut_tau = station.get("dut_time_constant_s")
    if dut_tau is not None and (not _positive_number(dut_tau) or dut_tau > 3600):
        problems.append(f"station.dut_time_constant_s: {dut_tau!r} must be a number of seconds in (0, 3600] "
                        "(the DUT's slowest settling time constant; leave it out to have it estimated)")
    overdue_policy = station.get("calibration_overdue", "warn")
    if overdue_policy not in CALIBRATION_POLICIES:
        problems.append(f"station.calibration_overdue: {overdue_policy!r} must be one of "
                        f"{', '.join(repr(p) for p in CALIBRATION_POLICIES)} (what a run does when an instrument's "
                        "calibration_due has passed)")
    library = station.get("visa_library", DEFAULT_VISA_LIBRARY)
    library_problem = _visa_library_problem("station.visa_library", library)
    if library_problem:
        problems.append(library_problem)
    return dict(
        visa_library=library if library_problem is None else DEFAULT_VISA_LIBRARY,
        name=name.strip() if isinstance(name, str) else "",
        description=str(station.get("description", "")),
        watch_period_s=float(watch) if _positive_number(watch) else 0.1,
        **watch_options,
        hazardous_voltage_acknowledged=ack is True,
        database=database,
        dut_time_constant_s=None if not _positive_number(dut_tau) else float(dut_tau),
        calibration_overdue=str(overdue_policy),
    )


def _limits_table(limits_table: Any, acknowledged: bool, problems: list[str]) -> StationLimits | None:
    """The ``[limits]`` table: every limit present and positive; above 60 V DC only when acknowledged."""
    limit_values: dict[str, float] = {}
    given = isinstance(limits_table, dict)
    if not given:
        problems.append(f"[limits]: missing table; required keys: {', '.join(_LIMIT_KEYS)}")
        limits_table = {}
    for key in sorted(set(limits_table) - set(_LIMIT_KEYS) - set(OPTIONAL_LIMIT_KEYS)):
        problems.append(f"limits.{key}: unknown key; known keys: {', '.join(_LIMIT_KEYS + list(OPTIONAL_LIMIT_KEYS))}")
    for key in _LIMIT_KEYS:
        if key not in limits_table:
            if given:
                problems.append(f"limits.{key}: required (SI units: V, A, W)")
            continue
        value = limits_table[key]
        if not _positive_number(value):
            problems.append(f"limits.{key}: {value!r} must be a positive number")
        else:
            limit_values[key] = float(value)
    optional = _optional_limits(limits_table, problems)
    limits = StationLimits(**limit_values, **optional) if len(limit_values) == len(_LIMIT_KEYS) else None
    if limits is not None and limits.hazardous and not acknowledged:
        problems.append(
            f"station.hazardous_voltage_acknowledged: the limits allow "
            f"{max(limits.source_voltage_max_v, limits.dut_output_voltage_max_v):g} V, above "
            f"{HAZARDOUS_DC_VOLTAGE_V:g} V DC (SELV/ES1 boundary, IEC 62368-1): read the README's "
            "safety section, then set hazardous_voltage_acknowledged = true"
        )
    return limits


def _optional_limits(limits_table: Mapping[str, Any], problems: list[str]) -> dict[str, float]:
    """The thermal limits given (°C may be below zero; a ramp rate and the minimum below the maximum)."""
    out: dict[str, float] = {}
    for key in OPTIONAL_LIMIT_KEYS:
        if key not in limits_table:
            continue
        value = limits_table[key]
        number = isinstance(value, (int, float)) and not isinstance(value, bool) and math.isfinite(value)
        if not number or (key == "chamber_ramp_max_k_per_min" and not value > 0):
            problems.append(f"limits.{key}: {value!r} must be a {'positive ' if 'ramp' in key else ''}number "
                            f"({'K/min' if 'ramp' in key else '°C'})")
        else:
            out[key] = float(value)
    lo, hi = out.get("chamber_temperature_min_c"), out.get("chamber_temperature_max_c")
    if lo is not None and hi is not None and not lo < hi:
        problems.append(f"limits.chamber_temperature_min_c: {lo:g} °C must be below "
                        f"limits.chamber_temperature_max_c = {hi:g} °C")
    return out


def _instruments_table(table: Any, problems: list[str], visa_library: str = DEFAULT_VISA_LIBRARY,
                       ) -> dict[str, InstrumentConfig]:
    """Every ``[instruments.<role>]`` table checked, its driver's options and commands included."""
    instruments: dict[str, InstrumentConfig] = {}
    if not isinstance(table, dict) or not table:
        problems.append("[instruments]: at least one [instruments.<role>] table is required")
        table = {}
    for role, spec in table.items():
        config = _instrument(role, spec, problems, visa_library)
        if config is not None:
            instruments[role] = config
    return instruments


def _instrument(role: str, spec: Any, problems: list[str],
                visa_library: str = DEFAULT_VISA_LIBRARY) -> InstrumentConfig | None:
    """One ``[instruments.<role>]`` table, or None (with its problems added) when it is not usable."""
    key = f"instruments.{role}"
    if not _ROLE_NAME.match(role):
        problems.append(f"{key}: a role name is a letter, then letters, digits or _ (at most 64), such as "
                        "load2 or temp_logger")
        return None
    if not isinstance(spec, dict):
        problems.append(f"{key}: must be a table with driver and resource")
        return None
    for extra in sorted(set(spec) - _INSTRUMENT_KEYS):
        problems.append(f"{key}.{extra}: unknown key; known keys: {', '.join(sorted(_INSTRUMENT_KEYS))}")
    driver = spec.get("driver")
    resource = spec.get("resource")
    timeout = spec.get("timeout_s", 2.0)
    options = spec.get("options", {})
    commands = spec.get("commands", {})
    n_before = len(problems)
    accuracy = parse_accuracy(f"{key}.accuracy", spec["accuracy"], problems, _kind_in_spec(role, spec)) \
        if "accuracy" in spec else {}
    ok = len(problems) == n_before
    if not isinstance(driver, str) or not driver:
        problems.append(f"{key}.driver: required, one of {', '.join(driver_names())}")
        ok = False
    elif driver not in _driver_entry_points():
        problems.append(f"{key}.driver: unknown driver {driver!r}; installed: {', '.join(driver_names())}")
        ok = False
    else:
        ok = _check_driver(key, role, spec, load_driver_class(driver), commands, options, problems) and ok
    if not isinstance(resource, str) or not resource:
        problems.append(f"{key}.resource: required, a VISA resource string such as TCPIP::127.0.0.1::5025::SOCKET")
        ok = False
    else:
        reason = _check_resource(resource)
        if reason:
            problems.append(f"{key}.resource: {resource!r} is not a VISA resource string ({reason})")
            ok = False
    if not _positive_number(timeout) or timeout > 600:
        problems.append(f"{key}.timeout_s: {timeout!r} must be a number of seconds in (0, 600]")
        ok = False
    if not isinstance(options, dict):
        problems.append(f"{key}.options: must be a table")
        ok = False
    if not isinstance(commands, dict):
        problems.append(f"{key}.commands: must be a table of command-name = \"SCPI template\"")
        ok = False
    serial = _serial_option_problems(key, resource, options)
    problems.extend(serial)
    library = spec.get("visa_library", visa_library)
    library_problem = _visa_library_problem(f"{key}.visa_library", library) if "visa_library" in spec else None
    if library_problem:
        problems.append(library_problem)
    ok = ok and not serial and not library_problem
    calibration_due, certificate = _calibration(key, spec, problems)
    if not ok or calibration_due is False:
        return None
    assert isinstance(driver, str) and isinstance(resource, str)
    return InstrumentConfig(
        role=role,
        driver=driver,
        resource=resource,
        timeout_s=float(timeout),
        options=dict(options),
        commands=dict(commands),
        accuracy=accuracy,
        kind=str(getattr(load_driver_class(driver), "kind", "")),
        calibration_due=calibration_due or None,
        calibration_certificate=certificate,
        visa_library=str(library),
    )


def _check_driver(key: str, role: str, spec: Mapping[str, Any], cls: type, commands: Any, options: Any,
                  problems: list[str]) -> bool:
    """The driver's kind against the role's, and its command overrides and options (before anything opens)."""
    expected = _role_kind(key, role, spec.get("kind"), problems)
    if expected is None:
        return False
    if expected and getattr(cls, "kind", None) != expected:
        why = (f"role {role!r} needs a {expected}" if role in ROLE_KINDS and "kind" not in spec
               else f"{key}.kind says {expected!r}")
        problems.append(f"{key}.driver: {spec.get('driver')!r} drives a {getattr(cls, 'kind', '?')}, but {why}")
        return False
    check = getattr(cls, "check_configuration", None)
    if callable(check):
        found = check(commands if isinstance(commands, dict) else {}, options if isinstance(options, dict) else {})
        problems.extend(f"{key}.{problem}" for problem in found)
        return not found
    if isinstance(commands, dict):
        try:
            cls.command_table(commands)  # type: ignore[attr-defined]  # a driver without check_configuration
        except StationFileError as exc:
            problems.append(f"{key}.commands: {exc}")
            return False
    return True


def known_kinds() -> list[str]:
    """Every driver kind benchctl knows: the classic roles' and those of the installed drivers."""
    kinds = set(ROLE_KINDS.values())
    for name in driver_names():
        try:
            kind = getattr(load_driver_class(name), "kind", None)
        except Exception:  # a lab's broken entry point is reported where it is used
            continue
        if isinstance(kind, str) and kind:
            kinds.add(kind)
    return sorted(kinds)


def _role_kind(key: str, role: str, given: Any, problems: list[str]) -> str | None:
    """The kind role ``role`` must have: its ``kind`` key, else the one a classic name implies,
    else "" (any: the driver's own); None when the key is wrong (the problem is appended)."""
    if given is None:
        return ROLE_KINDS.get(role, "")
    if not isinstance(given, str) or given not in known_kinds():
        problems.append(f"{key}.kind: {given!r} is not a known kind; kinds: {', '.join(known_kinds())}")
        return None
    implied = ROLE_KINDS.get(role)
    if implied is not None and given != implied:
        problems.append(f"{key}.kind: role {role!r} is a {implied} by its name, not a {given}; give this "
                        f"instrument another role name (such as {role}2)")
        return None
    return given


def _calibration(key: str, spec: Mapping[str, Any], problems: list[str]) -> tuple[Any, str]:
    """(calibration_due date or None, certificate) of one instrument table; the date is False
    when it is wrong (the problem is appended)."""
    due = spec.get("calibration_due")
    certificate = spec.get("calibration_certificate", "")
    out: Any = None
    if due is not None:
        if isinstance(due, _dt.datetime) or not isinstance(due, _dt.date):
            hint = ""
            if isinstance(due, str):
                hint = f" (write it without quotes: calibration_due = {due.strip()})"
            problems.append(f"{key}.calibration_due: {due!r} must be a TOML date such as 2027-03-31, the day the "
                            f"calibration expires{hint}")
            out = False
        else:
            out = due
    if not isinstance(certificate, str) or (certificate != "" and not certificate.strip()):
        problems.append(f"{key}.calibration_certificate: {certificate!r} must be the certificate id as text")
        certificate = ""
    elif certificate and due is None:
        problems.append(f"{key}.calibration_certificate: given without calibration_due; add the date the "
                        "calibration expires (calibration_due = 2027-03-31)")
        out = False
    return out, certificate.strip() if isinstance(certificate, str) else ""


def load_station(path: str | Path) -> Station:
    """Read and validate a station file."""
    path = Path(path)
    text = read_config_text(path, "station file", StationFileError, "`benchctl sim` writes one for the simulated bench")
    return parse_station(text, path=path)


def render_station(
    *,
    name: str,
    description: str,
    limits: StationLimits,
    instruments: Mapping[str, tuple[str, str]],
    watch_period_s: float = 0.1,
    hazardous_voltage_acknowledged: bool = False,
    timeout_s: float = 2.0,
) -> str:
    """Station TOML text for ``instruments`` given as role -> (driver, resource)."""
    lines = [
        "# benchctl station file",
        "[station]",
        f"name = {_toml_str(name)}",
        f"description = {_toml_str(description)}",
        f"watch_period_s = {watch_period_s!r}",
        f"hazardous_voltage_acknowledged = {'true' if hazardous_voltage_acknowledged else 'false'}",
        "",
        "[limits]",
    ]
    for key in _LIMIT_KEYS:
        lines.append(f"{key} = {float(getattr(limits, key))!r}")
    for key in OPTIONAL_LIMIT_KEYS:
        if getattr(limits, key) is not None:
            lines.append(f"{key} = {float(getattr(limits, key))!r}")
    for role, (driver, resource) in instruments.items():
        lines += ["", f"[instruments.{role}]", f"driver = {_toml_str(driver)}",
                  f"resource = {_toml_str(resource)}", f"timeout_s = {timeout_s!r}"]
    return "\n".join(lines) + "\n"


def _toml_str(text: str) -> str:
    return '"' + text.replace("\\", "\\\\").replace('"', '\\"') + '"'
