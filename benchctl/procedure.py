"""Procedures: plain Python scripts that say what to measure.

A procedure file defines, at module level::

    NAME = "efficiency_map"
    DESCRIPTION = "one line"
    ROLES = ("source", "load", "input_meter", "output_meter")
    PARAMETERS = [Parameter("vin_v", "V", [36.0, 48.0], minimum=0, maximum=1000, help="..."), ...]

    def plan(p) -> list[dict]:        # every operating point, without touching an instrument
    def run(bench, p) -> None:        # drives the bench; calls bench.record(...) per point
    def analyse(points, p) -> list[Result]   # optional: derived results from the stored points
    # analyse(points, p, accuracy=...) also receives the station's instrument accuracy by role
    # (benchctl.analysis.uncertainty.StationAccuracy, re-read from the run's stored station file)

Roles: each item of ``ROLES`` is a role name or a :class:`Role`. A classic name
(``source``, ``load``, ``input_meter``, ``output_meter``, ``analyzer``, ``scope``) implies
its kind; any other role is declared with its kind, and optional ones say so::

    ROLES = ("source", "load", "output_meter",
             Role("load2", "electronic_load"),               # a second load, required
             Role("temp_logger", "temperature_meter", optional=True))

A required role the station lacks, or a role of the wrong kind, stops the run before any
instrument is opened; an optional role is opened when the station has it
(``bench.has_role("temp_logger")``). ``bench.role(name)`` returns it behind the interlock,
guarded by its kind; ``bench.roles_of_kind("electronic_load")`` lists the station's roles
of one kind that the procedure declared. Every role of kind ``dc_source`` or
``electronic_load`` is switched off by the interlock at every end (sources first).

Procedures are found by name in the ``procedures`` package or loaded from any path. The
parameters are validated (names, types, ranges) before any instrument is opened.

A procedure file is Python: loading one runs its module code with the rights of the user
who runs benchctl - it can read, change or delete any file that user may. Load only
procedures you trust as you would trust any program. Listing the bundled procedures
(``benchctl procedures``) reads their names and parameters from the source without running
it (:mod:`benchctl.procedure_summary`); ``run --list`` imports only the one procedure it
plans.
"""

from __future__ import annotations

import hashlib
import importlib.util
import math
import sys
import tomllib
from dataclasses import dataclass, field
from pathlib import Path
from types import ModuleType
from typing import Any, Callable, Iterable, Mapping, Sequence

from benchctl.errors import ParameterError, ProcedureError

_KINDS = ("float", "int", "bool", "str", "float_list")


class Role(str):
    """A role a procedure needs: its name (this string), the driver ``kind`` it must have and
    whether it is ``optional``. ``Role("load2", "electronic_load")``. A plain string in
    ``ROLES`` is a required role whose kind the classic role name implies (any kind for
    another name). It compares and hashes as its name."""

    kind: str
    optional: bool

    def __new__(cls, name: str, kind: str = "", optional: bool = False) -> "Role":
        from benchctl.station import ROLE_KINDS

        if not isinstance(name, str) or not name:
            raise ProcedureError(f"Role: the name must be a non-empty string, not {name!r}")
        implied = ROLE_KINDS.get(name, "")
        if kind and implied and kind != implied:
            raise ProcedureError(f"Role({name!r}, {kind!r}): role {name!r} is a {implied} by its name; give the "
                                 f"{kind} another role name")
        self = super().__new__(cls, name)
        self.kind = kind or implied
        self.optional = bool(optional)
        return self

    def __repr__(self) -> str:
        extra = ", optional=True" if self.optional else ""
        return f"Role({str(self)!r}, {self.kind!r}{extra})"

    def __reduce__(self) -> Any:
        return (Role, (str(self), self.kind, self.optional))


def declared_roles(items: Iterable[Any], where: str = "ROLES") -> tuple[Role, ...]:
    """``ROLES`` as :class:`Role` objects (names become required roles); duplicates are refused."""
    if isinstance(items, (str, bytes)) or not isinstance(items, Iterable):
        raise ProcedureError(f"{where} must be a tuple of role names or Role(...) items, not {items!r}")
    out: list[Role] = []
    for item in items:
        if isinstance(item, Role):
            role = item
        elif isinstance(item, str):
            role = Role(item)
        else:
            raise ProcedureError(f"{where}: item {item!r} is neither a role name nor Role(name, kind)")
        if role in out:
            raise ProcedureError(f"{where}: role {str(role)!r} is declared twice")
        out.append(role)
    return tuple(out)


@dataclass(frozen=True)
class Parameter:
    """One declared procedure parameter: name, unit, default, allowed range."""

    name: str
    unit: str
    default: Any
    minimum: float | None = None
    maximum: float | None = None
    kind: str = "float"
    choices: tuple[str, ...] = ()
    help: str = ""
    optional: bool = False  # None is allowed as a value

    def __post_init__(self) -> None:
        if self.kind not in _KINDS:
            raise ProcedureError(f"parameter {self.name!r}: kind must be one of {_KINDS}, not {self.kind!r}")

    def parse_text(self, text: str) -> Any:
        """Parse a command-line value (``--set name=value``)."""
        t = text.strip()
        if self.optional and t.lower() in ("none", ""):
            return None
        try:
            if self.kind == "float":
                return float(t)
            if self.kind == "int":
                return int(t)
            if self.kind == "bool":
                if t.lower() in ("1", "true", "yes", "on"):
                    return True
                if t.lower() in ("0", "false", "no", "off"):
                    return False
                raise ValueError(t)
            if self.kind == "float_list":
                return [float(x) for x in t.strip("[]").split(",") if x.strip()]
            return t
        except ValueError:
            raise ParameterError(
                f"parameter {self.name}: {text!r} is not a valid {self.kind.replace('_', ' ')}"
                + (" (give comma-separated numbers, e.g. 36,48,75)" if self.kind == "float_list" else "")
            ) from None

    def validate(self, value: Any) -> Any:
        """Return the value in canonical form, or raise ParameterError saying why not."""
        if value is None:
            if self.optional:
                return None
            raise ParameterError(f"parameter {self.name}: a value is required")
        name = f"parameter {self.name}"
        if self.kind in ("float", "int"):
            if isinstance(value, bool) or not isinstance(value, (int, float)):
                raise ParameterError(f"{name}: {value!r} is not a number")
            if self.kind == "int" and float(value) != int(value):
                raise ParameterError(f"{name}: {value!r} is not a whole number")
            value = int(value) if self.kind == "int" else float(value)
            self._check_range(value)
            return value
        if self.kind == "bool":
            if not isinstance(value, bool):
                raise ParameterError(f"{name}: {value!r} is not true/false")
            return value
        if self.kind == "float_list":
            if isinstance(value, (int, float)) and not isinstance(value, bool):
                value = [value]
            if not isinstance(value, (list, tuple)) or not value:
                raise ParameterError(f"{name}: {value!r} is not a non-empty list of numbers")
            out = []
            for v in value:
                if isinstance(v, bool) or not isinstance(v, (int, float)):
                    raise ParameterError(f"{name}: list item {v!r} is not a number")
                self._check_range(float(v))
                out.append(float(v))
            return out
        if not isinstance(value, str):
            raise ParameterError(f"{name}: {value!r} is not text")
        if self.choices and value not in self.choices:
            raise ParameterError(f"{name}: {value!r} is not one of {', '.join(self.choices)}")
        return value

    def _check_range(self, value: float) -> None:
        if not math.isfinite(value):
            raise ParameterError(f"parameter {self.name}: {value!r} is not finite")
        if self.minimum is not None and value < self.minimum:
            raise ParameterError(f"parameter {self.name}: {value:g} {self.unit} is below the allowed minimum {self.minimum:g} {self.unit}")
        if self.maximum is not None and value > self.maximum:
            raise ParameterError(f"parameter {self.name}: {value:g} {self.unit} is above the allowed maximum {self.maximum:g} {self.unit}")


class Parameters(Mapping[str, Any]):
    """Validated parameter values; read as ``p.vin_v`` or ``p["vin_v"]``."""

    def __init__(self, values: Mapping[str, Any]) -> None:
        self._values = dict(values)

    def __getattr__(self, name: str) -> Any:
        try:
            return self._values[name]
        except KeyError:
            raise AttributeError(f"no parameter named {name!r}") from None

    def __getitem__(self, key: str) -> Any:
        return self._values[key]

    def __iter__(self):
        return iter(self._values)

    def __len__(self) -> int:
        return len(self._values)

    def as_dict(self) -> dict[str, Any]:
        return dict(self._values)


@dataclass(frozen=True)
class Result:
    """A derived result of a run, stored with it: a value with its unit, or text/JSON details."""

    name: str
    value: float | None
    unit: str = ""
    details: Mapping[str, Any] = field(default_factory=dict)
    scope: Mapping[str, Any] = field(default_factory=dict)
    uncertainty: float | None = None           # standard uncertainty u, in ``unit`` (JCGM 100:2008 2.3.1)
    expanded_uncertainty: float | None = None  # U = k·u with k = 2 (JCGM 100:2008 6.2.1)


@dataclass(frozen=True)
class Procedure:
    """A loaded procedure script."""

    name: str
    description: str
    roles: tuple[Role, ...]  # each a str (its name) with .kind and .optional
    parameters: tuple[Parameter, ...]
    plan: Callable[[Parameters], list[dict[str, Any]]]
    run: Callable[..., None]
    analyse: Callable[..., list[Result]] | None
    path: Path
    source_sha256: str
    module: ModuleType
    # optional ``test_envelope(p) -> {limit: value}``: limits widened for this run (benchctl.test_envelope)
    test_envelope: Callable[[Parameters], Mapping[str, float]] | None = None

    @property
    def required_roles(self) -> tuple[Role, ...]:
        return tuple(r for r in self.roles if not getattr(r, "optional", False))

    def roles_on(self, station: Any) -> tuple[Role, ...]:
        """The declared roles the station has (every required one, the optional ones present)."""
        return tuple(r for r in declared_roles(self.roles) if str(r) in station.instruments)

    def planned(self, params: Parameters) -> list[dict[str, Any]]:
        """``plan(params)``; an exception in it becomes a :class:`~benchctl.errors.ProcedureError`
        naming the procedure file and the line where it was raised (one line, no traceback)."""
        try:
            return list(self.plan(params))
        except Exception as exc:
            raise ProcedureError(
                f"{where_in_file(self.path, exc)}: plan() raised {type(exc).__name__}: {' '.join(str(exc).split())}; "
                "fix the procedure file (or its parameters)") from exc

    def parameter(self, name: str) -> Parameter:
        for p in self.parameters:
            if p.name == name:
                return p
        raise ParameterError(
            f"procedure {self.name} has no parameter {name!r}; its parameters are: "
            + ", ".join(p.name for p in self.parameters)
        )

    def resolve_parameters(
        self,
        *,
        file_values: Mapping[str, Any] | None = None,
        cli_values: Sequence[str] = (),
        values: Mapping[str, Any] | None = None,
    ) -> Parameters:
        """Defaults, then a TOML file's values, then ``name=value`` overrides; all validated.

        Every problem is reported at once (ParameterError lists them).
        """
        merged: dict[str, Any] = {p.name: p.default for p in self.parameters}
        problems: list[str] = []
        for source, items in (("parameter file", file_values or {}), ("values", values or {})):
            for key, value in items.items():
                try:
                    self.parameter(key)
                    merged[key] = value
                except ParameterError as exc:
                    problems.append(f"{source}: {exc}")
        for item in cli_values:
            key, sep, text = item.partition("=")
            key = key.strip()
            if not sep or not key:
                problems.append(f"--set {item!r}: write name=value, e.g. --set vin_v=36,48,75")
                continue
            try:
                merged[key] = self.parameter(key).parse_text(text)
            except ParameterError as exc:
                problems.append(f"--set {item}: {exc}")
        out: dict[str, Any] = {}
        for p in self.parameters:
            try:
                out[p.name] = p.validate(merged[p.name])
            except ParameterError as exc:
                problems.append(str(exc))
        if problems:
            raise ParameterError(f"procedure {self.name}: {len(problems)} parameter problem(s)", problems)
        return Parameters(out)


def load_parameter_file(path: str | Path) -> dict[str, Any]:
    """Read a TOML file of parameter values (top-level keys, or a [parameters] table)."""
    from benchctl.config_file import read_config_text

    path = Path(path)
    text = read_config_text(path, "parameter file", ParameterError)
    try:
        data = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise ParameterError(f"parameter file {path}: not valid TOML: {exc}") from exc
    return dict(data.get("parameters", data))


def procedures_dir() -> Path:
    """The folder of the procedures that come with benchctl."""
    import benchctl.procedures as bundled

    return Path(bundled.__file__).resolve().parent


def available_procedures() -> list[str]:
    return sorted(p.stem for p in procedures_dir().glob("*.py") if not p.stem.startswith("_"))


def find_procedure(name_or_path: str) -> Path:
    """A procedure file by bundled name (``efficiency_map``) or by path."""
    candidate = Path(name_or_path)
    if candidate.suffix == ".py" or candidate.exists() or "/" in name_or_path:
        if candidate.is_file():
            return candidate.resolve()
        raise ProcedureError(f"procedure file {name_or_path} does not exist")
    bundled = procedures_dir() / f"{name_or_path}.py"
    if bundled.is_file():
        return bundled
    raise ProcedureError(
        f"unknown procedure {name_or_path!r}; bundled procedures: {', '.join(available_procedures())}; "
        "or give the path of a procedure file"
    )


def load_procedure(name_or_path: str) -> Procedure:
    """Import a procedure script and check it declares what a procedure must."""
    path = find_procedure(name_or_path)
    source = path.read_bytes()
    module_name = f"benchctl_procedure_{path.stem}_{hashlib.sha1(str(path).encode()).hexdigest()[:8]}"
    spec = importlib.util.spec_from_file_location(module_name, path)
    if spec is None or spec.loader is None:
        raise ProcedureError(f"cannot load procedure file {path}")
    module = importlib.util.module_from_spec(spec)
    sys.modules[module_name] = module
    try:
        spec.loader.exec_module(module)
    except Exception as exc:
        sys.modules.pop(module_name, None)
        raise ProcedureError(f"procedure {where_in_file(path, exc)} failed to import: {type(exc).__name__}: "
                             f"{' '.join(str(exc).split())}") from exc
    missing = [attr for attr in ("ROLES", "PARAMETERS", "plan", "run") if not hasattr(module, attr)]
    if missing:
        raise ProcedureError(f"{path} is not a benchctl procedure: missing module-level {', '.join(missing)}")
    parameters = tuple(module.PARAMETERS)
    if not all(isinstance(p, Parameter) for p in parameters):
        raise ProcedureError(f"{path}: PARAMETERS must be a list of benchctl.procedure.Parameter")
    return Procedure(
        name=str(getattr(module, "NAME", path.stem)),
        description=str(getattr(module, "DESCRIPTION", (module.__doc__ or "").strip().splitlines()[0] if module.__doc__ else "")),
        roles=declared_roles(module.ROLES, f"{path}: ROLES"),
        parameters=parameters,
        plan=module.plan,
        run=module.run,
        analyse=getattr(module, "analyse", None),
        path=path,
        source_sha256=hashlib.sha256(source).hexdigest(),
        module=module,
        test_envelope=getattr(module, "test_envelope", None),
    )


def where_in_file(path: Path, exc: BaseException) -> str:
    """``path line N`` of the deepest traceback frame of ``exc`` in ``path`` (``path`` alone if none)."""
    import traceback

    line = getattr(exc, "lineno", None) if isinstance(exc, SyntaxError) and exc.filename == str(path) else None
    for frame in traceback.extract_tb(exc.__traceback__):
        try:
            same = Path(frame.filename).resolve() == Path(path).resolve()
        except OSError:
            same = False
        if same:
            line = frame.lineno
    return f"{path} line {line}" if line else str(path)


def power_parameters(*, startup_delay_s: float = 0.05) -> list[Parameter]:
    """The parameters of :meth:`benchctl.bench.Bench.power_up` that most procedures share."""
    return [
        Parameter("source_current_limit_a", "A", None, minimum=0.0, maximum=1000.0, optional=True,
                  help="source current limit (default: the station's source_current_max_a)"),
        Parameter("startup_delay_s", "s", startup_delay_s, minimum=0.0, maximum=60.0,
                  help="fixed wait after the source turns on, before the load is switched on"),
    ]


def frange(start: float, stop: float, step: float) -> list[float]:
    """Values from start to stop inclusive in steps of ``step`` (rounded to avoid float drift)."""
    if step <= 0:
        raise ParameterError(f"step must be positive, not {step:g}")
    n = int(math.floor((stop - start) / step + 1e-9)) + 1
    return [round(start + k * step, 12) for k in range(max(n, 0))]


def ascending_descending(values: Iterable[float], descending: bool) -> list[tuple[str, float]]:
    """``values`` ascending, then (optionally) descending again for a hysteresis check."""
    up = sorted(values)
    out = [("ascending", v) for v in up]
    if descending:
        out += [("descending", v) for v in reversed(up[:-1])]
    return out
