"""``benchctl probe RESOURCE``: how does an unknown instrument speak, and what station table fits it?

Three parts, kept apart so the decisions can be tested without an instrument:

* :func:`observe` — the I/O: opens the resource with pyvisa directly (not through a driver,
  whose defaults may be what does not work), sends the IEEE 488.2 common queries, ``SYST:ERR?``
  (SCPI-1999 Vol. 2 §21.8, from memory), a compound message, and records every answer raw;
* :func:`decide` — pure: :class:`Observations` -> :class:`Proposal` (what works, the options);
* :func:`fragment` — pure: the ``[instruments.ROLE]`` station-file text.

After an exchange that got no answer the probe sends a device clear and opens the
connection again (a raw socket has no device clear; a reconnect is its resynchronisation).
"""

from __future__ import annotations

import argparse
import json
import math
import re
import statistics
import time
from dataclasses import asdict, dataclass, field
from pathlib import Path
from typing import Any

#: The terminations tried, in order: (write, read). The first pair that gets ``*IDN?`` answered wins.
TERMINATION_PAIRS = (("\n", "\n"), ("\n", "\r"), ("\r\n", "\n"), ("\r\n", "\r"))
#: *IDN? round trips timed for the latency.
LATENCY_SAMPLES = 5
#: timeout_s proposed: max(TIMEOUT_FLOOR_S, TIMEOUT_LATENCY_FACTOR * median, 3 * slowest).
TIMEOUT_FLOOR_S = 2.0
TIMEOUT_LATENCY_FACTOR = 10.0
#: The fixed wait proposed when neither *OPC? nor *ESR? answers.
FIXED_WAIT_S = 1.0
COMPOUND_MESSAGE = "*ESR?;*IDN?"

NO_ANSWER = None  # an exchange that timed out


@dataclass(frozen=True)
class Exchange:
    """One query and what came back: ``answer`` raw (a trailing CR kept), None if nothing came."""

    check: str
    sent: str
    answer: str | None
    error: str = ""
    seconds: float = math.nan


@dataclass(frozen=True)
class Observations:
    """What the probe saw (the input of :func:`decide`)."""

    resource: str
    opened: bool
    open_error: str = ""
    write_termination: str | None = None  # the pair that got *IDN? answered
    read_termination: str | None = None
    exchanges: tuple[Exchange, ...] = ()
    latencies_s: tuple[float, ...] = ()
    reset_tried: bool = False
    visa_library: str | None = None

    def answer(self, check: str) -> str | None:
        for ex in self.exchanges:
            if ex.check == check:
                return ex.answer
        return None

    def tried(self, check: str) -> bool:
        return any(ex.check == check for ex in self.exchanges)


@dataclass(frozen=True)
class Finding:
    check: str
    sent: str
    answer: str
    works: bool | None  # None: not tried
    note: str = ""


@dataclass
class Proposal:
    """What :func:`decide` concludes: the findings, the station options, the timeout, cautions."""

    resource: str
    identity: str | None
    findings: list[Finding]
    timeout_s: float | None
    options: dict[str, Any] = field(default_factory=dict)
    cautions: list[str] = field(default_factory=list)
    usable: bool = False


# ---------------------------------------------------------------------------------- decisions
_ERROR_ENTRY = re.compile(r'^[+-]?\d+\s*,\s*".*"$', re.S)


def _clean(answer: str | None) -> str | None:
    return None if answer is None else answer.rstrip("\r\n")


def is_one(answer: str | None) -> bool:
    """Whether an ``*OPC?`` answer is a form of 1 (``1``, ``+1``, ``1.0``, ``+1.000E+00``; 488.2 §12.5.3
    asks for the ASCII character 1, from memory; the others are what real instruments send)."""
    text = _clean(answer)
    if not text:
        return False
    try:
        return float(text) == 1.0
    except ValueError:
        return False


def is_register(answer: str | None) -> bool:
    """An 8-bit status register as <NR1> (``*ESR?``, ``*STB?``: 0-255, IEEE 488.2-1992 §11, from memory)."""
    text = _clean(answer)
    if not text:
        return False
    try:
        value = float(text.strip())
    except ValueError:
        return False
    return value.is_integer() and 0 <= value <= 255


def is_error_entry(answer: str | None) -> bool:
    """``<code>,"<text>"`` as SYST:ERR? answers (SCPI-1999 Vol. 2 §21.8.8, from memory)."""
    text = _clean(answer)
    return bool(text) and bool(_ERROR_ENTRY.match(text.strip()))  # type: ignore[arg-type]


def compound_result(answer: str | None, identity: str | None) -> str:
    """``both`` (two answers joined with ``;``), ``first_only`` (one field: the rest was dropped), ``none``."""
    text = _clean(answer)
    if not text:
        return "none"
    head, sep, rest = text.partition(";")
    if sep and is_register(head) and (identity is None or rest.strip() == identity):
        return "both"
    if is_register(text):
        return "first_only"
    return "none"


def proposed_timeout_s(latencies_s: tuple[float, ...]) -> float | None:
    """max(2 s, 10 x median, 3 x slowest) of the ``*IDN?`` round trips, rounded up to 0.1 s.

    ``*IDN?`` is the quickest answer an instrument gives; a reading, a range change or a
    capture read-out takes several times longer, and a shared or ageing instrument varies.
    Ten times the median (and three times the slowest seen) leaves that room; the 2 s floor
    is the order of the usual VISA default timeout (common practice), below which a loaded
    PC or network alone causes timeouts.
    """
    if not latencies_s:
        return None
    value = max(TIMEOUT_FLOOR_S, TIMEOUT_LATENCY_FACTOR * statistics.median(latencies_s), 3.0 * max(latencies_s))
    return math.ceil(value * 10.0 - 1e-9) / 10.0


def decide(obs: Observations) -> Proposal:
    """The findings and the station options for what was observed (no I/O)."""
    if not obs.opened:
        return Proposal(obs.resource, None, [Finding("connect", "", obs.open_error, False)], None,
                        cautions=[f"could not open {obs.resource}: {obs.open_error}"])
    idn = _clean(obs.answer("idn"))
    findings: list[Finding] = []
    if idn is None:
        findings.append(Finding("*IDN?", "*IDN?", "(no answer)", False,
                                "no answer with any termination pair (LF, CR, CR LF): check the resource, "
                                "the interface settings and that the instrument is in remote SCPI mode"))
        return Proposal(obs.resource, None, findings, None, usable=False,
                        cautions=["the instrument answered nothing: no station table can be proposed"])
    read_term = obs.read_termination or "\n"
    raw_idn = obs.answer("idn") or ""
    trailing_cr = read_term == "\n" and raw_idn.endswith("\r")
    if trailing_cr:
        read_term = "\r\n"
    term_note = {"\n": "answers end with LF", "\r\n": "answers end with CR LF (a CR before the LF)",
                 "\r": "answers end with CR"}[read_term]
    findings.append(Finding("*IDN?", "*IDN?", idn, True, term_note))

    esr, stb, opc = obs.answer("esr"), obs.answer("stb"), obs.answer("opc")
    esr_ok, stb_ok = is_register(esr), is_register(stb)
    findings.append(Finding("*CLS", "*CLS", "(no answer expected)", None if not obs.tried("cls") else True))
    findings.append(Finding("*ESR?", "*ESR?", _show(esr), esr_ok))
    findings.append(Finding("*STB?", "*STB?", _show(stb), stb_ok))
    opc_ok = is_one(opc)
    opc_note = ""
    if opc_ok and _clean(opc) != "1":
        opc_note = f"answers {_clean(opc)!r}, not the bare 1 of IEEE 488.2: needs a driver that takes the usual forms"
    findings.append(Finding("*OPC?", "*OPC?", _show(opc), opc_ok, opc_note))
    if obs.reset_tried:
        rst_ok = is_one(obs.answer("rst"))
        findings.append(Finding("*RST", "*RST;*OPC?", _show(obs.answer("rst")), rst_ok))
    else:
        findings.append(Finding("*RST", "*RST", "(not tried: give --allow-reset)", None))

    syst = obs.answer("syst_err")
    syst_ok = is_error_entry(syst)
    syst_note = ""
    after = obs.answer("esr_after_syst_err")
    if not syst_ok and is_register(after) and int(float(_clean(after) or 0)) & 0x20:
        syst_note = "refused: *ESR? then showed a command error (bit 5), so SYST:ERR? is not a command here"
    findings.append(Finding("SYST:ERR?", "SYST:ERR?", _show(syst), syst_ok, syst_note))

    compound = compound_result(obs.answer("compound"), idn)
    findings.append(Finding("compound", COMPOUND_MESSAGE, _show(obs.answer("compound")), compound == "both",
                            {"both": "both answers came", "first_only": "only the first answer came: one command "
                             "per message", "none": "no answer to a compound message"}[compound]))

    timeout_s = proposed_timeout_s(obs.latencies_s)
    median_s = statistics.median(obs.latencies_s) if obs.latencies_s else math.nan
    findings.append(Finding("latency", f"*IDN? x{len(obs.latencies_s)}",
                            f"median {median_s * 1e3:.1f} ms, slowest {max(obs.latencies_s or (math.nan,)) * 1e3:.1f} ms",
                            True if obs.latencies_s else None, f"timeout_s {timeout_s:g} proposed" if timeout_s else ""))

    cautions: list[str] = []
    options: dict[str, Any] = {"read_termination": read_term, "write_termination": obs.write_termination or "\n"}
    if syst_ok and compound == "both" and esr_ok:
        options["error_check"] = "compound"
    elif syst_ok:
        options["error_check"] = "separate"
    elif stb_ok:
        options["error_check"] = "status_byte"
    else:
        options["error_check"] = "none"
        cautions.append("error_check = \"none\": the instrument answers neither SYST:ERR? nor *STB?, so a refused "
                        "setting goes unseen; check each setting's read-back in the procedure")
    if opc_ok:
        options["completion"] = "opc_query"
    elif esr_ok:
        options["completion"] = "esr_poll"
    else:
        options["completion"] = "fixed_wait"
        options["completion_wait_s"] = FIXED_WAIT_S
        cautions.append(f"completion = \"fixed_wait\" ({FIXED_WAIT_S:g} s): neither *OPC? nor *ESR? answers; "
                        f"lengthen completion_wait_s if settings take longer to apply")
    return Proposal(obs.resource, idn, findings, timeout_s, options, cautions, usable=True)


def _show(answer: str | None) -> str:
    if answer is None:
        return "(no answer)"
    return answer.rstrip("\n").replace("\r", "\\r")


def _toml_value(value: Any) -> str:
    if isinstance(value, str):
        return json.dumps(value)  # JSON string escapes (\n, \r, \", \\) are TOML basic-string escapes
    if isinstance(value, bool):
        return "true" if value else "false"
    return repr(value)


def fragment(proposal: Proposal, *, role: str, driver: str | None = None, visa_library: str | None = None) -> str:
    """The ``[instruments.ROLE]`` station-file table for a proposal (TOML text)."""
    lines = [f"# proposed by benchctl probe for {proposal.identity or 'an instrument that did not answer'}",
             f"[instruments.{role}]"]
    lines.append(f"driver = {_toml_value(driver)}" if driver else
                 '# driver = "..."  # the driver of this instrument\'s kind (see benchctl procedures / DEVELOPERS.md)')
    lines.append(f"resource = {_toml_value(proposal.resource)}")
    if visa_library:
        lines.append(f"visa_library = {_toml_value(visa_library)}")
    if proposal.timeout_s is not None:
        lines.append(f"timeout_s = {proposal.timeout_s!r}")
    if proposal.options:
        lines += ["", f"[instruments.{role}.options]"]
        lines += [f"{key} = {_toml_value(value)}" for key, value in proposal.options.items()]
    for caution in proposal.cautions:
        lines.append(f"# caution: {caution}")
    return "\n".join(lines) + "\n"


# ---------------------------------------------------------------------------------------- I/O
class _LinkLost(Exception):
    """The connection failed outright (refused, reset): probing stops."""


class _Link:
    """A pyvisa resource that can be reopened after an exchange got no answer."""

    def __init__(self, resource: str, visa_library: str | None, timeout_s: float) -> None:
        import pyvisa

        self.pyvisa = pyvisa
        self.resource = resource
        self.timeout_ms = int(timeout_s * 1000)
        self.rm = pyvisa.ResourceManager(visa_library or "@py")
        self.res: Any = None
        self.write_term, self.read_term = "\n", "\n"
        self.open()

    def open(self) -> None:
        self.res = self.rm.open_resource(self.resource, timeout=self.timeout_ms)
        self.res.write_termination = self.write_term
        self.res.read_termination = self.read_term

    def resync(self) -> None:
        """Device clear and a fresh connection (a late answer must not be read as the next one)."""
        try:
            self.res.clear()
        except Exception:  # noqa: BLE001  (a clear that fails is replaced by the reconnect)
            pass
        try:
            self.res.close()
        except Exception:  # noqa: BLE001
            pass
        self.open()

    def set_terminations(self, write: str, read: str) -> None:
        self.write_term, self.read_term = write, read
        self.res.write_termination = write
        self.res.read_termination = read

    def query(self, check: str, text: str) -> Exchange:
        t0 = time.perf_counter()
        try:
            answer = self.res.query(text)
        except self.pyvisa.VisaIOError as exc:
            if exc.error_code != self.pyvisa.constants.StatusCode.error_timeout:
                raise _LinkLost(f"{text}: {str(exc).splitlines()[0]}") from None
            self._resync_or_lost(text)
            return Exchange(check, text, NO_ANSWER, error=str(exc).splitlines()[0])
        except OSError as exc:
            raise _LinkLost(f"{text}: {type(exc).__name__}: {exc}") from None
        return Exchange(check, text, answer, seconds=time.perf_counter() - t0)

    def write(self, check: str, text: str) -> Exchange:
        try:
            self.res.write(text)
        except (self.pyvisa.VisaIOError, OSError) as exc:
            raise _LinkLost(f"{text}: {type(exc).__name__}: {exc}") from None
        return Exchange(check, text, "")

    def _resync_or_lost(self, text: str) -> None:
        try:
            self.resync()
        except Exception as exc:  # noqa: BLE001
            raise _LinkLost(f"reopening after no answer to {text}: {type(exc).__name__}: {exc}") from None

    def close(self) -> None:
        try:
            self.res.close()
        finally:
            self.rm.close()


def observe(resource: str, *, visa_library: str | None = None, timeout_s: float = 2.0,
            allow_reset: bool = False) -> Observations:
    """Talk to the instrument and record what it does (see the module docstring)."""
    try:
        link = _Link(resource, visa_library, timeout_s)
    except Exception as exc:  # noqa: BLE001  (any open failure is reported, with its type)
        return Observations(resource, False, f"{type(exc).__name__}: {str(exc).splitlines()[0] if str(exc) else ''}",
                            visa_library=visa_library)
    exchanges: list[Exchange] = []
    try:
        idn = None
        for write, read in TERMINATION_PAIRS:
            link.set_terminations(write, read)
            idn = link.query("idn", "*IDN?")
            if idn.answer is not None:
                break
        assert idn is not None
        exchanges.append(idn)
        if idn.answer is None:
            return Observations(resource, True, exchanges=tuple(exchanges), visa_library=visa_library)
        exchanges.append(link.write("cls", "*CLS"))
        exchanges.append(link.query("esr", "*ESR?"))
        exchanges.append(link.query("stb", "*STB?"))
        exchanges.append(link.query("opc", "*OPC?"))
        if allow_reset:
            link.write("rst_write", "*RST")
            exchanges.append(link.query("rst", "*OPC?"))
        exchanges.append(link.query("syst_err", "SYST:ERR?"))
        exchanges.append(link.query("esr_after_syst_err", "*ESR?"))
        exchanges.append(link.query("compound", COMPOUND_MESSAGE))
        latencies = []
        for _ in range(LATENCY_SAMPLES):
            ex = link.query("latency", "*IDN?")
            if ex.answer is not None:
                latencies.append(ex.seconds)
        link.write("cls_end", "*CLS")  # leave the error queue and ESR as they were found: empty
        link.query("sync_end", "*ESR?")  # and know that the *CLS was done before the connection closes
        return Observations(resource, True, write_termination=link.write_term, read_termination=link.read_term,
                            exchanges=tuple(exchanges), latencies_s=tuple(latencies), reset_tried=allow_reset,
                            visa_library=visa_library)
    except _LinkLost as lost:
        done = f" after {len(exchanges)} exchange(s)" if exchanges else ""
        return Observations(resource, False, f"the connection failed{done}: {lost}", visa_library=visa_library)
    finally:
        try:
            link.close()
        except Exception:  # noqa: BLE001
            pass


def probe(resource: str, **kwargs: Any) -> Proposal:
    """:func:`observe` then :func:`decide`."""
    return decide(observe(resource, **kwargs))


# ------------------------------------------------------------------------------------ command
def cmd_probe(args: argparse.Namespace) -> int:
    from benchctl.commands.console import Column, error_console, fitted_table, print_caution, print_fitted
    from benchctl.exit_codes import EXIT_BAD_INPUT, EXIT_INSTRUMENT, EXIT_OK
    from rich.markup import escape

    if not (math.isfinite(args.timeout_s) and 0.05 <= args.timeout_s <= 600.0):
        error_console().print(f"[bold red]error:[/] --timeout-s {args.timeout_s!r} must be 0.05 ... 600 s")
        return EXIT_BAD_INPUT
    if not re.fullmatch(r"[A-Za-z_][A-Za-z0-9_]*", args.role):
        error_console().print(f"[bold red]error:[/] --role {args.role!r}: use letters, digits and _ (a TOML key)")
        return EXIT_BAD_INPUT
    from pyvisa import rname

    try:
        rname.parse_resource_name(args.resource)
    except (rname.InvalidResourceName, ValueError) as exc:
        error_console().print(f"[bold red]error:[/] {escape(args.resource)} is not a VISA resource string: "
                              f"{escape(str(exc).splitlines()[0])}", soft_wrap=True)
        return EXIT_BAD_INPUT
    if args.allow_reset:
        print_caution("--allow-reset sends *RST: a source or load returns to its reset state (its output may "
                      "switch). Probe with the DUT disconnected.")
    obs = observe(args.resource, visa_library=args.visa_library, timeout_s=args.timeout_s,
                  allow_reset=args.allow_reset)
    proposal = decide(obs)
    text = fragment(proposal, role=args.role, driver=args.driver, visa_library=args.visa_library)
    if args.out and proposal.usable:
        Path(args.out).write_text(text, encoding="utf-8")
    if args.json:
        print(json.dumps({"resource": proposal.resource, "identity": proposal.identity, "usable": proposal.usable,
                          "findings": [asdict(f) for f in proposal.findings],
                          "timeout_s": proposal.timeout_s, "options": proposal.options,
                          "latencies_s": list(obs.latencies_s), "cautions": proposal.cautions,
                          "fragment": text if proposal.usable else None}, indent=2))
    else:
        def verdict(works: bool | None) -> str:
            return "not tried" if works is None else ("works" if works else "no")

        rows = [[f.check, f.sent, f.answer, verdict(f.works), f.note] for f in proposal.findings]
        table, hidden = fitted_table(f"probe {proposal.resource}",
                                     [Column("check"), Column("sent", 2), Column("answer", 1), Column("result"),
                                      Column("note", 3)],
                                     rows, style=lambda i, t: t if i != 3 else (
                                         "[green]works[/]" if t == "works" else ("[red]no[/]" if t == "no" else t)))
        print_fitted(table, hidden, [f"caution: {c}" for c in proposal.cautions])
        if proposal.usable:
            from benchctl.commands.console import console

            console().print("\nstation-file fragment:", markup=False)
            console().print(text, markup=False, soft_wrap=True)
            if args.out:
                console().print(f"written to {args.out}", markup=False)
    if not proposal.usable:
        return EXIT_INSTRUMENT
    return EXIT_OK
