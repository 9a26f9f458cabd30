"""Simulated instruments that are not textbook SCPI, on purpose.

A real bench holds instruments that bend IEEE 488.2 and SCPI-1999 in ways a framework
must tolerate; these quirks let the simulated bench (and ``benchctl probe``'s tests)
show each one, alone or together, on any simulated instrument:

* ``crlf`` — every response ends with CR LF instead of LF (the input side still takes
  LF, with or without a CR before it).
* ``opc_plus_one`` — ``*OPC?`` answers ``+1`` (an <NR1> with its sign) instead of ``1``.
* ``no_syst_err`` — the ``SYSTem:ERRor`` subsystem is missing, and with it the error queue
  (an IEEE 488.2 instrument that is not SCPI): ``SYST:ERR?`` (and ``:NEXT?``, ``:ALL?``,
  ``:COUNt?``) is an undefined header that answers nothing, so a client waiting for the
  answer times out. IEEE 488.2 status (``*ESR?``, ``*STB?``) still works: every error sets
  its ESR bit (Command Error, bit 5, for this one), and the status byte's error-queue bit
  (bit 2) never sets.
* ``no_compound`` — a program message of several units (``*ESR?;*IDN?``) is not
  supported: the FIRST unit executes and the rest is discarded with -103 Invalid
  separator (SCPI-1999 Vol. 2 §21.8.9 error list, from memory). Chosen over "none
  executes" because it is what an instrument that parses one header per line does,
  and because a client then sees a short answer (one field where it asked for two)
  instead of a silence it cannot tell from a slow instrument.
* ``slow:<s>`` (or ``slow`` = 0.3 s) — every response is held back for that many wall
  seconds before it is sent, as an instrument with a slow command processor does.

Quirks change only how the instrument speaks, never what it measures.
"""

from __future__ import annotations

from collections.abc import Iterable
from dataclasses import dataclass

#: The quirk names (``slow`` also takes ``slow:<seconds>``).
QUIRK_NAMES = ("crlf", "opc_plus_one", "no_syst_err", "no_compound", "slow")
#: The delay of ``slow`` without a value, in wall seconds.
DEFAULT_SLOW_S = 0.3
_MAX_SLOW_S = 10.0


class QuirkError(ValueError):
    """A quirk name or value that is not understood; the message lists the valid ones."""


@dataclass(frozen=True)
class Quirks:
    """How one simulated instrument departs from textbook SCPI (all off by default)."""

    crlf: bool = False
    opc_plus_one: bool = False
    no_syst_err: bool = False
    no_compound: bool = False
    answer_delay_s: float = 0.0

    @property
    def response_terminator(self) -> bytes:
        return b"\r\n" if self.crlf else b"\n"

    @property
    def any(self) -> bool:
        return self != Quirks()

    def names(self) -> list[str]:
        """The quirks in force, as :func:`parse_quirks` takes them."""
        out = [name for name in ("crlf", "opc_plus_one", "no_syst_err", "no_compound") if getattr(self, name)]
        if self.answer_delay_s:
            out.append(f"slow:{self.answer_delay_s:g}")
        return out


def parse_quirks(names: Iterable[str] | str) -> Quirks:
    """``["crlf", "slow:0.5"]`` (or ``"crlf,slow:0.5"``) -> :class:`Quirks`."""
    if isinstance(names, str):
        names = names.split(",")
    fields: dict[str, object] = {}
    for raw in names:
        text = raw.strip()
        if not text:
            continue
        name, _, value = text.partition(":")
        name = name.strip().lower()
        if name not in QUIRK_NAMES:
            raise QuirkError(f"unknown quirk {text!r}; quirks: {', '.join(QUIRK_NAMES)} (slow takes slow:<seconds>)")
        if name == "slow":
            try:
                delay_s = float(value) if value else DEFAULT_SLOW_S
            except ValueError:
                raise QuirkError(f"quirk {text!r}: give the delay in seconds, e.g. slow:0.3") from None
            if not 0.0 < delay_s <= _MAX_SLOW_S:
                raise QuirkError(f"quirk {text!r}: the delay must be above 0 and at most {_MAX_SLOW_S:g} s")
            fields["answer_delay_s"] = delay_s
        elif value:
            raise QuirkError(f"quirk {name!r} takes no value (got {text!r})")
        else:
            fields[name] = True
    return Quirks(**fields)  # type: ignore[arg-type]


def parse_quirk_spec(text: str) -> tuple[str, Quirks]:
    """``"source:crlf,opc_plus_one"`` (the ``benchctl sim --quirk`` form) -> (role, quirks)."""
    role, sep, rest = text.partition(":")
    role = role.strip()
    if not sep or not role or not rest.strip():
        raise QuirkError(f"--quirk {text!r}: write ROLE:QUIRK[,QUIRK...], e.g. source:crlf or scope:slow:0.5")
    return role, parse_quirks(rest)
