"""A driver's command table and station options, and their validation (run when a station loads).

A driver class declares ``COMMANDS`` (name -> SCPI template, ``str.format`` fields such as
``{value:.6g}``, ``{state}``) and ``OPTIONS`` (name -> :class:`OptionSpec`); both are merged
along the class hierarchy, so a subclass adds to its base's. A station may override any
template and set any declared option:

    [instruments.source.commands]
    set_voltage = "SOUR1:VOLT {value:.4f}"
    [instruments.source]
    options = { retries = 3 }

:func:`check_configuration` finds every problem with such an entry (unknown or empty
override, a field the driver does not fill, a format that cannot take the driver's value,
an unknown option, an option out of range) and is called by ``benchctl.station`` when the
file is loaded, before any instrument is opened. Station files are data: template fields
may only name a value (no attribute or index access).
"""

from __future__ import annotations

import string
from dataclasses import dataclass
from typing import Any, Mapping

from benchctl.errors import StationFileError


@dataclass(frozen=True)
class OptionSpec:
    """One station option of a driver.

    A number in ``[low, high]`` (whole when ``whole``) by default; ``kind="choice"``: one of
    ``choices`` (words, or numbers such as stop bits 1 | 1.5 | 2); ``kind="text"``: one of
    ``choices`` spelled as text, where ``aliases`` maps other spellings to it (a termination
    written ``'\\r\\n'`` in a TOML literal string means CR LF). ``default`` None: the option has
    no default value (its absence means something). Build the last two with :func:`choice_option`
    and :func:`text_option`.
    """

    default: Any
    low: float = 0.0
    high: float = 0.0
    whole: bool = False
    help: str = ""
    kind: str = "number"
    choices: tuple[Any, ...] = ()
    aliases: tuple[tuple[str, str], ...] = ()

    def value(self, given: Any) -> Any:
        """``given`` (valid: see :meth:`problem`) in its canonical form (an alias resolved)."""
        if self.kind == "text" and isinstance(given, str):
            return dict(self.aliases).get(given, given)
        if self.kind == "choice" and isinstance(given, (int, float)) and not isinstance(given, bool):
            return next((c for c in self.choices if c == given), given)
        return given

    def problem(self, key: str, value: Any) -> str | None:
        if self.kind in ("choice", "text"):
            return self._choice_problem(key, value)
        ok = isinstance(value, (int, float)) and not isinstance(value, bool) and self.low <= value <= self.high
        if ok and self.whole:
            ok = float(value) == int(value)
        if ok:
            return None
        kind = "a whole number" if self.whole else "a number"
        about = f" ({self.help})" if self.help else ""
        default = "leave it out for none" if self.default is None else f"default {self.default:g}"
        return (f"options.{key} = {value!r} must be {kind} in [{self.low:g}, {self.high:g}]{about}; "
                f"fix it in the station file ({default})")

    def _choice_problem(self, key: str, value: Any) -> str | None:
        if self.kind == "text":
            if isinstance(value, str) and self.value(value) in self.choices:
                return None
        elif not isinstance(value, bool) and isinstance(value, (str, int, float)) and value in self.choices:
            return None
        about = f" ({self.help})" if self.help else ""
        shown = ", ".join(_show(c) for c in self.choices)
        default = "leave it out for none" if self.default is None else f"default {_show(self.default)}"
        return (f"options.{key} = {_show(value)} must be one of {shown}{about}; fix it in the station file "
                f"({default})")


def _show(value: Any) -> str:
    """A value as a station file writes it (text in double quotes with its escapes)."""
    if isinstance(value, str):
        return '"' + value.encode("unicode_escape").decode("ascii").replace('"', '\\"') + '"'
    return repr(value)


def choice_option(default: Any, choices: tuple[Any, ...], *, help: str = "") -> OptionSpec:
    """An option that is one of ``choices`` (words, or numbers)."""
    return OptionSpec(default, help=help, kind="choice", choices=tuple(choices))


def text_option(default: str | None, choices: tuple[str, ...], *, aliases: Mapping[str, str] | None = None,
                help: str = "") -> OptionSpec:
    """An option of text that is one of ``choices``, or an alias of one (``aliases``: spelling -> choice)."""
    return OptionSpec(default, help=help, kind="text", choices=tuple(choices),
                      aliases=tuple((aliases or {}).items()))


def merged(cls: type, attribute: str) -> dict[str, Any]:
    """``attribute`` (a dict class variable) merged from the base classes down to ``cls``."""
    table: dict[str, Any] = {}
    for klass in reversed(cls.__mro__):
        table.update(getattr(klass, attribute, None) or {})
    return table


def template_fields(template: str) -> list[tuple[str, str]]:
    """``(name, format_spec)`` of each field of ``template``; ValueError when it does not parse."""
    return [(name, spec or "") for _, name, spec, _ in string.Formatter().parse(template) if name is not None]


def _sample(spec: str) -> Any:
    """A value of the kind a default template's field takes, for a trial fill of an override."""
    kind = spec[-1:] if spec else ""
    if kind in ("d", "n", "x", "X", "o", "b", "c"):
        return 1
    if kind in ("e", "E", "f", "F", "g", "G", "%"):
        return 1.0
    return "ON"


def template_problem(key: str, template: Any, default: str) -> str | None:
    """Why override ``template`` cannot replace ``default`` (the driver's own), or None."""
    if not isinstance(template, str) or not template.strip():
        return f"command override {key!r} must be a non-empty string"
    try:
        fields = template_fields(template)
    except ValueError as exc:
        return f"command override {key!r} = {template!r} is not a valid template: {exc}"
    wanted = dict(template_fields(default))
    for name, _ in fields:
        if not name.isidentifier():
            return (f"command override {key!r} = {template!r}: field {{{name}}} must be a plain name such as "
                    "{value} or {state} (no attribute, index or positional fields); fix it in the station file")
        if name not in wanted:
            known = ", ".join("{" + n + "}" for n in wanted) or "none"
            return (f"command override {key!r} = {template!r}: the driver fills no field {{{name}}} for this "
                    f"command (it fills {known}); fix it in the station file")
    try:
        template.format(**{name: _sample(spec) for name, spec in wanted.items()})
    except (ValueError, TypeError) as exc:
        return (f"command override {key!r} = {template!r} cannot format the value the driver sends "
                f"(as in its own {default!r}): {exc}; fix it in the station file")
    return None


def command_table(cls: type, overrides: Mapping[str, Any] | None = None) -> dict[str, str]:
    """``cls``'s merged command table with ``overrides``; StationFileError on the first problem."""
    table = merged(cls, "COMMANDS")
    problems = override_problems(cls, table, overrides or {})
    if problems:
        raise StationFileError(problems[0] if len(problems) == 1 else f"{len(problems)} problems with "
                               "the command overrides", problems if len(problems) > 1 else None)
    table.update(overrides or {})
    return table


def override_problems(cls: type, table: Mapping[str, str], overrides: Mapping[str, Any]) -> list[str]:
    unknown = sorted(set(overrides) - set(table))
    problems = []
    if unknown:
        problems.append(f"driver {getattr(cls, 'kind', cls.__name__)!r} has no command named {', '.join(unknown)}; "
                        f"the names that can be overridden are: {', '.join(sorted(table))}")
    for key, template in overrides.items():
        if key in table:
            problem = template_problem(key, template, table[key])
            if problem:
                problems.append(problem)
    return problems


def option_values(cls: type, name: str, options: Mapping[str, Any]) -> dict[str, Any]:
    """Every declared option of ``cls`` (the station's value or the default); StationFileError
    naming ``instruments.<name>.options.<key>`` for each problem."""
    problems = option_problems(cls, options)
    if problems:
        where = [f"instruments.{name}.{p}" for p in problems]
        raise StationFileError(where[0] if len(where) == 1 else f"{len(where)} problems with the options of "
                               f"instrument {name}", where if len(where) > 1 else None)
    specs: dict[str, OptionSpec] = merged(cls, "OPTIONS")
    return {key: spec.value(options[key]) if key in options else spec.default for key, spec in specs.items()}


def option_problems(cls: type, options: Mapping[str, Any]) -> list[str]:
    specs: dict[str, OptionSpec] = merged(cls, "OPTIONS")
    problems = []
    for key in sorted(set(options) - set(specs)):
        problems.append(f"options.{key}: unknown option of driver {getattr(cls, 'kind', cls.__name__)!r}; "
                        f"known options: {', '.join(sorted(specs)) or 'none'}")
    for key, spec in specs.items():
        if key in options:
            problem = spec.problem(key, options[key])
            if problem:
                problems.append(problem)
    return problems


def check_configuration(cls: type, commands: Mapping[str, Any], options: Mapping[str, Any]) -> list[str]:
    """Every problem of a station entry for driver ``cls``: ``commands.<key>: ...`` and
    ``options.<key> ...`` texts (the caller prefixes ``instruments.<role>.``); empty when usable."""
    table = merged(cls, "COMMANDS")
    problems = [f"commands: {p}" for p in override_problems(cls, table, commands)]
    return problems + option_problems(cls, options)
