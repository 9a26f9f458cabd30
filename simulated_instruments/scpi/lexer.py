"""Split a program message into units and each unit into a header and data.

Grammar after IEEE 488.2-1992 ch. 7 (from memory): units separated by ``;``
(§7.3.2); a header, then white space, then data elements separated by ``,``
(§7.4); data are decimal numbers with an optional suffix (§7.7.2, §7.7.3),
non-decimal numbers ``#H1F``/``#Q17``/``#B101`` (§7.7.4), character data (§7.7.1),
strings in single or double quotes with the quote doubled inside (§7.7.5) and
definite-length arbitrary blocks ``#<n><len><bytes>`` (§7.7.6). The text is the
message decoded as Latin-1, so every byte maps to one character and block bytes
survive unchanged.
"""

from __future__ import annotations

import math
import re
from dataclasses import dataclass

from .errors import ScpiError
from .mnemonics import MAX_MNEMONIC_LENGTH


@dataclass(frozen=True)
class NumberToken:
    """Decimal or non-decimal numeric data; ``suffix`` upper case or ``None``."""

    text: str
    value: float
    suffix: str | None = None


@dataclass(frozen=True)
class WordToken:
    """Character program data, upper case (``MAX``, ``ON``, ``CURR``)."""

    text: str


@dataclass(frozen=True)
class StringToken:
    """String program data with the quotes removed and doubled quotes undone."""

    value: str


@dataclass(frozen=True)
class BlockToken:
    """Definite-length arbitrary block data."""

    data: bytes


Token = NumberToken | WordToken | StringToken | BlockToken


@dataclass(frozen=True)
class Header:
    """A parsed command or query header."""

    text: str
    common: bool
    mnemonics: tuple[str, ...]
    absolute: bool
    query: bool


@dataclass(frozen=True)
class ParsedUnit:
    header: Header
    params: tuple[Token, ...]


_SPECIAL_RE = re.compile(r"[;\"'#]")
_COMMON_RE = re.compile(r"\*([A-Za-z][A-Za-z0-9_]*)(\?)?")
_HEADER_RE = re.compile(r"(:)?([A-Za-z][A-Za-z0-9_]*(?::[A-Za-z][A-Za-z0-9_]*)*)(\?)?")
_NUMBER_RE = re.compile(r"[+-]?(?:\d+(?:\.\d*)?|\.\d+)(?:[eE][+-]?\d+)?")
_SUFFIX_RE = re.compile(r"[ \t]*([A-Za-z][A-Za-z0-9/.]*)")
_WORD_RE = re.compile(r"[A-Za-z][A-Za-z0-9_]*")
_NONDECIMAL_RE = re.compile(r"#([HhQqBb])([0-9A-Za-z]+)")
_NONDECIMAL_BASE = {"H": 16, "Q": 8, "B": 2}


def is_white(c: str) -> bool:
    """White space per IEEE 488.2-1992 §7.4.1.2: bytes 0x00-0x09 and 0x0B-0x20 (NL is framing)."""
    return ord(c) <= 0x20


def is_invalid_char(c: str) -> bool:
    """Bytes above 0x7E are not allowed outside strings and blocks (§7.4, from memory)."""
    return ord(c) > 0x7E


def split_units(message: str) -> list[str]:
    """Split at ``;`` outside strings and blocks; a never-closed string runs to the end."""
    units: list[str] = []
    start = pos = 0
    n = len(message)
    while True:
        m = _SPECIAL_RE.search(message, pos)
        if m is None:
            break
        c, i = m.group(), m.start()
        if c == ";":
            units.append(message[start:i])
            start = pos = i + 1
        elif c in "\"'":
            k = i + 1
            while True:
                k = message.find(c, k)
                if k < 0:
                    pos = n
                    break
                if message.startswith(c, k + 1):
                    k += 2
                    continue
                pos = k + 1
                break
        else:  # '#': skip a definite-length block so its bytes are never split
            pos = i + 1
            if i + 1 < n and message[i + 1] in "123456789":
                width = int(message[i + 1])
                digits = message[i + 2:i + 2 + width]
                if len(digits) == width and digits.isdigit():
                    pos = min(n, i + 2 + width + int(digits))
    units.append(message[start:])
    return units


def _skip_white(s: str, i: int) -> int:
    while i < len(s) and is_white(s[i]):
        i += 1
    return i


def parse_header(unit: str) -> tuple[Header, int]:
    """Parse the header at the start of ``unit`` (no leading white space).

    Returns the header and the index just after it.
    """
    if unit.startswith("*"):
        m = _COMMON_RE.match(unit)
        if m is None:
            raise ScpiError(-102, f"'{unit[:20]}': '*' must be followed by a common command mnemonic such as *IDN?")
        names = (m.group(1).upper(),)
        header = Header(text=m.group(0), common=True, mnemonics=names, absolute=True, query=bool(m.group(2)))
    else:
        m = _HEADER_RE.match(unit)
        if m is None:
            c = unit[0]
            if is_invalid_char(c):
                raise ScpiError(-101, f"byte 0x{ord(c):02X} at the start of a header; headers are ASCII mnemonics")
            raise ScpiError(-102, f"'{unit[:20]}' does not start with a header mnemonic")
        names = tuple(part.upper() for part in m.group(2).split(":"))
        header = Header(text=m.group(0), common=False, mnemonics=names, absolute=bool(m.group(1)),
                        query=bool(m.group(3)))
    for name in names:
        if len(name) > MAX_MNEMONIC_LENGTH:
            raise ScpiError(-112, f"'{name}' has {len(name)} characters; at most {MAX_MNEMONIC_LENGTH} are allowed")
    end = m.end()
    if end < len(unit) and not is_white(unit[end]):
        c = unit[end]
        if is_invalid_char(c):
            raise ScpiError(-101, f"byte 0x{ord(c):02X} after header '{header.text}'")
        if c in ":?*":
            raise ScpiError(-102, f"'{c}' cannot follow '{header.text}'")
        raise ScpiError(-111, f"'{c}' after header '{header.text}'; put a space between the header and its data")
    return header, end


def parse_unit(unit: str) -> ParsedUnit:
    """Parse one program message unit (already stripped of surrounding white space)."""
    header, i = parse_header(unit)
    return ParsedUnit(header=header, params=tuple(tokenize_data(unit, i)))


def tokenize_data(s: str, i: int = 0) -> list[Token]:
    """Tokenize the data elements of a unit starting at index ``i``."""
    tokens: list[Token] = []
    i = _skip_white(s, i)
    if i >= len(s):
        return tokens
    while True:
        token, i = _parse_element(s, i)
        tokens.append(token)
        i = _skip_white(s, i)
        if i >= len(s):
            return tokens
        c = s[i]
        if c != ",":
            if is_invalid_char(c):
                raise ScpiError(-101, f"byte 0x{ord(c):02X} in the data")
            raise ScpiError(-103, f"found '{c}' where ',' should separate parameters")
        i = _skip_white(s, i + 1)
        if i >= len(s):
            raise ScpiError(-102, "a ',' at the end of the data; remove it or add the parameter")


def _parse_element(s: str, i: int) -> tuple[Token, int]:
    c = s[i]
    if c in "\"'":
        return _parse_string(s, i)
    if c == "#":
        return _parse_hash(s, i)
    if c.isdigit() or c in "+-.":
        return _parse_number(s, i)
    if c.isascii() and c.isalpha():
        m = _WORD_RE.match(s, i)
        assert m is not None
        return WordToken(m.group(0).upper()), m.end()
    if c == "(":
        raise ScpiError(-104, "expression data '(...)' is not accepted here")
    if c == ",":
        raise ScpiError(-102, "an empty parameter between commas")
    if is_invalid_char(c):
        raise ScpiError(-101, f"byte 0x{ord(c):02X} in the data")
    raise ScpiError(-102, f"'{c}' cannot start a parameter")


def _parse_string(s: str, i: int) -> tuple[StringToken, int]:
    quote = s[i]
    parts: list[str] = []
    k = i + 1
    while True:
        j = s.find(quote, k)
        if j < 0:
            raise ScpiError(-102, f"string starting with {quote} is never closed")
        parts.append(s[k:j])
        if s.startswith(quote, j + 1):
            parts.append(quote)
            k = j + 2
            continue
        raw = "".join(parts)
        try:
            value = raw.encode("latin-1").decode("utf-8")
        except UnicodeDecodeError as exc:
            raise ScpiError(-101, f"string data is not valid UTF-8 at byte {exc.start}") from None
        return StringToken(value), j + 1


def _parse_hash(s: str, i: int) -> tuple[Token, int]:
    nxt = s[i + 1:i + 2]
    if nxt == "0":
        raise ScpiError(-161, "indefinite-length block '#0' is not accepted on a socket; "
                              "send a definite-length block #<n><length><bytes>")
    if nxt and nxt in "123456789":
        width = int(nxt)
        digits = s[i + 2:i + 2 + width]
        if len(digits) != width or not digits.isdigit():
            raise ScpiError(-161, f"block header '#{nxt}' must be followed by {width} length digits")
        length = int(digits)
        start = i + 2 + width
        data = s[start:start + length]
        if len(data) != length:
            raise ScpiError(-161, f"block declares {length} bytes but only {len(data)} arrived")
        return BlockToken(data.encode("latin-1")), start + length
    m = _NONDECIMAL_RE.match(s, i)
    if m is not None:
        base = _NONDECIMAL_BASE[m.group(1).upper()]
        try:
            value = int(m.group(2), base)
        except ValueError:
            raise ScpiError(-120, f"'{m.group(0)}' is not a valid base-{base} number") from None
        return NumberToken(m.group(0), float(value)), m.end()
    raise ScpiError(-102, "'#' must start a block (#<n><length><bytes>) or a number (#H, #Q, #B)")


def _parse_number(s: str, i: int) -> tuple[NumberToken, int]:
    m = _NUMBER_RE.match(s, i)
    if m is None:
        raise ScpiError(-120, f"'{s[i:i + 12]}' is not a number")
    text, end = m.group(0), m.end()
    value = float(text)
    if not math.isfinite(value):
        raise ScpiError(-120, f"'{text}' is too large")
    suffix = None
    sm = _SUFFIX_RE.match(s, end)
    if sm is not None:
        suffix, end = sm.group(1).upper(), sm.end()
    elif end < len(s) and (s[end].isdigit() or s[end] in ".+-"):
        raise ScpiError(-120, f"malformed number '{s[i:end + 1]}'")
    return NumberToken(text, value, suffix), end
