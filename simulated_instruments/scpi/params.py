"""Parameter specifications: what a command accepts and how a token becomes a value.

Types after SCPI-1999 Vol. 1 ch. 7 (from memory): <numeric_value> with MINimum,
MAXimum, DEFault (§7.2), <Boolean> ON|OFF|1|0 where numbers are rounded and any
non-zero value is ON (§7.3), character data with short and long forms (§7.4),
<string> (§7.5) and <block> definite-length arbitrary block data (§7.7).

Errors: -104 wrong data type, -131 suffix not matching the unit, -138 suffix
where none is allowed, -141 unknown word for a number, -222 number outside the
range, -224 word not among the choices.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

from .errors import ScpiError
from .lexer import BlockToken, NumberToken, StringToken, Token, WordToken
from .mnemonics import parse_pattern
from .suffixes import suffix_scale

_MIN_WORDS = ("MIN", "MINIMUM")
_MAX_WORDS = ("MAX", "MAXIMUM")
_DEF_WORDS = ("DEF", "DEFAULT")


def _show(value: float) -> str:
    return f"{value:g}"


def _kind(token: Token) -> str:
    return {NumberToken: "a number", WordToken: "a word", StringToken: "a string", BlockToken: "a block"}[type(token)]


@dataclass(frozen=True)
class Numeric:
    """A number in ``unit`` (SI base unit such as ``"V"``, ``"A"``, ``"HZ"``, ``"OHM"``, ``"S"``; ``None`` = no unit).

    ``minimum``/``maximum`` bound the value (-222 outside) and answer ``MIN``/``MAX``;
    ``default`` answers ``DEF`` and is the value of an omitted ``optional`` parameter.
    ``integer`` rounds to the nearest integer (half away from zero) and answers NR1.
    """

    unit: str | None = None
    minimum: float | None = None
    maximum: float | None = None
    default: float | None = None
    integer: bool = False
    optional: bool = False

    def __post_init__(self) -> None:
        if self.unit is not None and not self.unit.isalpha():
            raise ValueError(f"Numeric unit must be letters such as 'V' or 'HZ'; got {self.unit!r}")
        if self.minimum is not None and self.maximum is not None and self.minimum > self.maximum:
            raise ValueError(f"Numeric minimum {self.minimum} is above maximum {self.maximum}")
        if self.default is not None and not self._in_range(self.default):
            raise ValueError(f"Numeric default {self.default} is outside [{self.minimum}, {self.maximum}]")

    def _in_range(self, value: float) -> bool:
        return not ((self.minimum is not None and value < self.minimum)
                    or (self.maximum is not None and value > self.maximum))

    def _finish(self, value: float) -> float | int:
        return int(math.copysign(math.floor(abs(value) + 0.5), value)) if self.integer else float(value)

    def special(self, word: str, where: str) -> float | int | None:
        """The value of ``MIN``/``MAX``/``DEF`` (any form), or ``None`` if ``word`` is none of them."""
        for words, limit, name in ((_MIN_WORDS, self.minimum, "minimum"), (_MAX_WORDS, self.maximum, "maximum"),
                                   (_DEF_WORDS, self.default, "default")):
            if word in words:
                if limit is None:
                    raise ScpiError(-224, f"{where} {word}: this parameter has no {name}")
                return self._finish(limit)
        return None

    def convert(self, token: Token, where: str) -> float | int:
        if isinstance(token, WordToken):
            value = self.special(token.text, where)
            if value is None:
                raise ScpiError(-141, f"{where} {token.text}: expected a number, MIN, MAX or DEF")
            return value
        if not isinstance(token, NumberToken):
            raise ScpiError(-104, f"{where}: expected a number, got {_kind(token)}")
        scale = 1.0
        if token.suffix is not None:
            if self.unit is None:
                raise ScpiError(-138, f"{where} {token.text} {token.suffix}: this parameter takes no unit")
            found = suffix_scale(token.suffix, self.unit)
            if found is None:
                raise ScpiError(-131, f"{where} {token.text} {token.suffix}: the unit is {self.unit}")
            scale = found
        value = self._finish(token.value * scale)
        unit = f" {self.unit}" if self.unit else ""
        if self.maximum is not None and value > self.maximum:
            raise ScpiError(-222, f"{where} {_show(value)}{unit} exceeds the maximum {_show(self.maximum)}{unit}")
        if self.minimum is not None and value < self.minimum:
            raise ScpiError(-222, f"{where} {_show(value)}{unit} is below the minimum {_show(self.minimum)}{unit}")
        return value


@dataclass(frozen=True)
class Boolean:
    """ON|OFF|1|0; other numbers are rounded and non-zero means ON (SCPI-1999 Vol. 1 §7.3, from memory)."""

    default: bool | None = None
    optional: bool = False

    def convert(self, token: Token, where: str) -> bool:
        if isinstance(token, WordToken):
            if token.text == "ON":
                return True
            if token.text == "OFF":
                return False
            raise ScpiError(-224, f"{where} {token.text}: expected ON, OFF, 1 or 0")
        if isinstance(token, NumberToken):
            if token.suffix is not None:
                raise ScpiError(-138, f"{where} {token.text} {token.suffix}: a Boolean takes no unit")
            return math.floor(abs(token.value) + 0.5) != 0
        raise ScpiError(-104, f"{where}: expected ON or OFF, got {_kind(token)}")


@dataclass(frozen=True)
class Choice:
    """One of several words given as patterns (``Choice("CURRent", "RESistance")``).

    The handler receives the short form in upper case (``"CURR"``), the form a
    query answers with (SCPI-1999 Vol. 1 §7.4, from memory).
    """

    options: tuple[str, ...]
    default: str | None = None
    optional: bool = False
    _forms: tuple[tuple[str, str], ...] = field(init=False, repr=False, compare=False)

    def __init__(self, *options: str, default: str | None = None, optional: bool = False) -> None:
        if not options:
            raise ValueError("Choice needs at least one option, e.g. Choice('CURRent', 'RESistance')")
        forms = []
        for opt in options:
            nodes = parse_pattern(opt)
            if len(nodes) != 1 or nodes[0].optional or nodes[0].suffix_name:
                raise ValueError(f"Choice option {opt!r} must be one word such as 'CURRent'")
            forms.append((nodes[0].short, nodes[0].long))
        object.__setattr__(self, "options", tuple(options))
        object.__setattr__(self, "default", default)
        object.__setattr__(self, "optional", optional)
        object.__setattr__(self, "_forms", tuple(forms))

    def convert(self, token: Token, where: str) -> str:
        if not isinstance(token, WordToken):
            raise ScpiError(-104, f"{where}: expected one of {self._list()}, got {_kind(token)}")
        for short, long in self._forms:
            if token.text in (short, long):
                return short
        raise ScpiError(-224, f"{where} {token.text}: expected one of {self._list()}")

    def _list(self) -> str:
        return "|".join(self.options)


@dataclass(frozen=True)
class Text:
    """A quoted string; the handler receives it without quotes."""

    default: str | None = None
    optional: bool = False

    def convert(self, token: Token, where: str) -> str:
        if not isinstance(token, StringToken):
            raise ScpiError(-104, f"{where}: expected a quoted string, got {_kind(token)}")
        return token.value


@dataclass(frozen=True)
class Block:
    """Definite-length arbitrary block data ``#<n><len><bytes>``; the handler receives ``bytes``."""

    default: bytes | None = None
    optional: bool = False

    def convert(self, token: Token, where: str) -> bytes:
        if not isinstance(token, BlockToken):
            raise ScpiError(-104, f"{where}: expected a block #<n><length><bytes>, got {_kind(token)}")
        return token.data


ParamSpec = Numeric | Boolean | Choice | Text | Block


def convert_params(specs: tuple[ParamSpec, ...], tokens: tuple[Token, ...], where: str) -> list[object]:
    """Convert tokens by their specs: -108 for too many, -109 for a missing required one."""
    if len(tokens) > len(specs):
        raise ScpiError(-108, f"{where} takes {len(specs)} parameter(s); {len(tokens)} were sent")
    values: list[object] = []
    for index, spec in enumerate(specs):
        if index < len(tokens):
            values.append(spec.convert(tokens[index], where))
        elif spec.optional:
            values.append(spec.default)
        else:
            raise ScpiError(-109, f"{where} needs parameter {index + 1} of {len(specs)}")
    return values
