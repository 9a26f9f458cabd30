"""Command header patterns and how received headers match them.

Pattern syntax (SCPI-1999 Vol. 1 §6.2, from memory): nodes separated by ``:``;
each node written with its short form in capitals (``VOLTage`` -> ``VOLT``);
optional nodes in brackets (``[SOURce:]VOLTage[:LEVel]``); a numeric suffix
where the pattern says ``<name>`` (``OUTPut<n>``) or ``<name:1-4>`` with a range.
A received mnemonic matches a node only in its exact short or long form, in any
case (SCPI-1999 Vol. 1 §6.2.1, from memory); ``VOLTA`` matches nothing.
"""

from __future__ import annotations

import logging
import re
from dataclasses import dataclass

logger = logging.getLogger(__name__)

_VOWELS = frozenset("AEIOU")
_NODE_RE = re.compile(r"([A-Za-z][A-Za-z0-9_]*)(?:<([A-Za-z_][A-Za-z0-9_]*)(?::(\d+)-(\d+))?>)?")
_TRAILING_DIGITS_RE = re.compile(r"^(.*?)(\d+)$")
#: Longest program mnemonic IEEE 488.2-1992 §7.6.1.4.1 allows (from memory).
MAX_MNEMONIC_LENGTH = 12


def short_form_rule(long_form: str) -> str:
    """The short form SCPI's rule derives from a long form.

    First four letters, or three when the fourth is a vowel; a long form of four
    letters or fewer is its own short form (SCPI-1999 Vol. 1 §6.2.1, from memory).
    """
    word = long_form.upper()
    if len(word) <= 4:
        return word
    return word[:3] if word[3] in _VOWELS else word[:4]


@dataclass(frozen=True)
class Node:
    """One node of a header pattern."""

    short: str
    long: str
    optional: bool = False
    suffix_name: str | None = None
    suffix_min: int = 1
    suffix_max: int | None = None

    def match(self, received: str) -> tuple[bool, int | None]:
        """Whether ``received`` (upper case) names this node, and its suffix value.

        The suffix value is ``None`` when the node takes none or none was given.
        """
        if received in (self.short, self.long):
            return True, None
        if self.suffix_name is None:
            return False, None
        m = _TRAILING_DIGITS_RE.match(received)
        if m is None or m.group(1) not in (self.short, self.long):
            return False, None
        return True, int(m.group(2))

    def text(self) -> str:
        core = self.short + self.long[len(self.short):].lower()
        if self.suffix_name:
            core += f"<{self.suffix_name}>"
        return f"[{core}]" if self.optional else core


def _parse_node(text: str, optional: bool, pattern: str) -> Node:
    m = _NODE_RE.fullmatch(text)
    if m is None:
        raise ValueError(f"header pattern {pattern!r}: node {text!r} is not a mnemonic like 'VOLTage' or 'OUTPut<n>'")
    word = m.group(1)
    cut = 0
    while cut < len(word) and (word[cut].isupper() or word[cut].isdigit()):
        cut += 1
    rest = word[cut:]
    if cut == 0 or not all(c.islower() or c.isdigit() for c in rest):
        raise ValueError(
            f"header pattern {pattern!r}: node {word!r} must write its short form in capitals "
            f"followed by the rest in lower case, e.g. 'VOLTage'"
        )
    long_form = word.upper()
    short = word[:cut]
    if len(long_form) > MAX_MNEMONIC_LENGTH:
        raise ValueError(f"header pattern {pattern!r}: node {word!r} is longer than {MAX_MNEMONIC_LENGTH} characters")
    if short != short_form_rule(long_form) and short != long_form:
        logger.warning(
            "header pattern %r: short form %r of %r differs from SCPI's rule (%r)",
            pattern, short, long_form, short_form_rule(long_form),
        )
    suffix_name = m.group(2)
    lo = int(m.group(3)) if m.group(3) else 1
    hi = int(m.group(4)) if m.group(4) else None
    if hi is not None and hi < lo:
        raise ValueError(f"header pattern {pattern!r}: suffix range {lo}-{hi} is empty")
    return Node(short=short, long=long_form, optional=optional, suffix_name=suffix_name, suffix_min=lo, suffix_max=hi)


def parse_pattern(pattern: str) -> tuple[Node, ...]:
    """Parse a header pattern such as ``[SOURce:]VOLTage[:LEVel]`` into nodes.

    Raises ``ValueError`` naming the pattern when it is malformed.
    """
    text = pattern.strip()
    if text.startswith(":"):
        text = text[1:]
    nodes: list[Node] = []
    i = 0
    while i < len(text):
        c = text[i]
        if c == ":":
            i += 1
        elif c == "[":
            j = text.find("]", i)
            if j < 0:
                raise ValueError(f"header pattern {pattern!r}: '[' at position {i} is never closed")
            inner = text[i + 1:j].strip(":")
            if ":" in re.sub(r"<[^>]*>", "", inner) or "[" in inner:
                raise ValueError(f"header pattern {pattern!r}: put one node in each pair of brackets")
            nodes.append(_parse_node(inner, True, pattern))
            i = j + 1
        else:
            j = i
            while j < len(text) and text[j] not in ":[":
                if text[j] == "<":
                    close = text.find(">", j)
                    j = len(text) if close < 0 else close
                j += 1
            nodes.append(_parse_node(text[i:j], False, pattern))
            i = j
    if not nodes or all(n.optional for n in nodes):
        raise ValueError(f"header pattern {pattern!r}: needs at least one node that is not optional")
    names = [n.suffix_name for n in nodes if n.suffix_name]
    if len(names) != len(set(names)):
        raise ValueError(f"header pattern {pattern!r}: each suffix placeholder needs its own name")
    return tuple(nodes)


def match_nodes(nodes: tuple[Node, ...], received: list[str]) -> dict[str, int] | None:
    """Match upper-case received mnemonics against a pattern.

    Returns the numeric suffixes by placeholder name (where the header gave none,
    the lowest value of the node's range, 1 unless the pattern says otherwise;
    SCPI-1999 Vol. 1 §6.2.5 from memory), or ``None`` when it does not match.
    Range checks are left to the caller so it can report -114.
    """

    def walk(i: int, j: int, found: dict[str, int]) -> dict[str, int] | None:
        if j == len(received):
            if all(n.optional for n in nodes[i:]):
                rest = {n.suffix_name: n.suffix_min for n in nodes[i:] if n.suffix_name}
                return {**found, **rest}
            return None
        if i == len(nodes):
            return None
        node = nodes[i]
        ok, value = node.match(received[j])
        if ok:
            here = dict(found)
            if node.suffix_name:
                here[node.suffix_name] = node.suffix_min if value is None else value
            result = walk(i + 1, j + 1, here)
            if result is not None:
                return result
        if node.optional:
            skipped = dict(found)
            if node.suffix_name:
                skipped[node.suffix_name] = node.suffix_min
            return walk(i + 1, j, skipped)
        return None

    return walk(0, 0, {})
