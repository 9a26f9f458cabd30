"""The project's bibliography: every outside source a method, a limit or a test relies on.

Docstrings and tests name a source by its key (``[ERICKSON-2E ch. 9]``) or in full; reports
and the command line name it in full through :func:`cite`. ``basis`` says how well the
project knows the text: ``"published"`` (checked against the document), ``"from memory"``
(the formula or number is recalled, not re-read: verify before relying on it) or
``"common practice"`` (the trade's habit, no single document).

Worked values marked ``[calc]`` in tests are the project's own: computed from the cited
formula with python-control or scipy (and re-derived in the test), never pasted alone.
"""

from __future__ import annotations

from dataclasses import dataclass


@dataclass(frozen=True)
class Source:
    """One entry of the bibliography."""

    key: str
    citation: str
    used_for: str
    basis: str = "from memory"


_ENTRIES = (
    Source("ERICKSON-2E", "R. W. Erickson, D. Maksimović, Fundamentals of Power Electronics, 2nd ed., "
           "Kluwer Academic, 2001",
           "ripple (ch. 2), CCM/DCM boundary K = 2L/(R·Ts) (ch. 5), averaged small-signal models (ch. 7-8, 11), "
           "loop gain, margins and closed-loop Q from phase margin (ch. 9, §9.4, §9.5.4 buck example)"),
    Source("MIDDLEBROOK-1975", 'R. D. Middlebrook, "Measurement of loop gain in feedback systems", '
           "Int. J. Electronics 38(4):485-512, 1975",
           "voltage injection: T = -v_y/v_x, valid where the impedance looking back is much smaller than forward"),
    Source("VENABLE-1983", 'H. D. Venable, "The K Factor: A New Mathematical Tool for Stability Analysis and '
           'Synthesis", Proc. Powercon 10, 1983',
           "type 2 and type 3 compensator design (boost, K, pole and zero placement, part values)"),
    Source("LEVY-1959", 'E. C. Levy, "Complex-curve fitting", IRE Trans. Automatic Control AC-4:37-43, 1959',
           "linear least-squares fit of a rational transfer function to frequency-response data"),
    Source("SANATHANAN-KOERNER-1963", 'C. K. Sanathanan, J. Koerner, "Transfer function synthesis as a ratio of '
           'two complex polynomials", IEEE Trans. Automatic Control AC-8(1):56-58, 1963',
           "iterated re-weighting of Levy's fit (plant fit)"),
    Source("GUSTAVSEN-SEMLYEN-1999", 'B. Gustavsen, A. Semlyen, "Rational approximation of frequency domain '
           'responses by vector fitting", IEEE Trans. Power Delivery 14(3):1052-1061, 1999',
           "pole relocation; flipping unstable poles"),
    Source("IEEE-488.2", "IEEE Std 488.2-1992, Codes, Formats, Protocols and Common Commands",
           "common commands (*IDN?, *RST, *CLS, *OPC?, *ESR?, *STB?), status bytes, definite-length blocks"),
    Source("SCPI-1999", "SCPI Consortium, Standard Commands for Programmable Instruments, 1999, Vol. 1-2",
           "mnemonics (short/long form, optional nodes), error queue and the standard error numbers, "
           "DC source and measurement nodes"),
    Source("LXI-PORTS", 'LXI Consortium, "LXI Ports, Protocols and Services"',
           "raw-socket SCPI on TCP port 5025, newline terminated"),
    Source("CFR-430-APP-Z", "10 CFR Part 430, Subpart B, Appendix Z (uniform test method for external power "
           "supplies)", "average efficiency: the mean at 25, 50, 75 and 100 % of nameplate output current"),
    Source("CFR-430.32W", "10 CFR 430.32(w), energy conservation standards for external power supplies (Level VI)",
           "average-efficiency and no-load power limits, nameplate output power up to 250 W"),
    Source("EU-2019-1782", "Commission Regulation (EU) 2019/1782, ecodesign requirements for external power "
           "supplies, Annex II", "the same efficiency formulas up to 250 W"),
    Source("IEC-62368-1", "IEC 62368-1, Audio/video, information and communication technology equipment - "
           "Safety requirements, Table 4 (electrical energy source classes)",
           "ES1 <= 60 V DC: the interlock's hazardous-voltage acknowledgement threshold"),
    Source("IEC-61010-1", "IEC 61010-1:2010, Safety requirements for electrical equipment for measurement, "
           "control and laboratory use, 6.3.1", "hazardous live levels (70 V DC normal condition)"),
    Source("IEC-60063", "IEC 60063, Preferred number series for resistors and capacitors",
           "E12/E24/E96 rounding of designed part values"),
    Source("IEC-61204", "IEC 61204, Low-voltage power supplies, d.c. output - Performance characteristics",
           "load regulation over 0-100 % load referred to the rated voltage"),
    Source("GUM", "JCGM 100:2008, Evaluation of measurement data - Guide to the expression of uncertainty in "
           "measurement (GUM)", "type A (4.2) and type B (4.3) evaluation, law of propagation (5.1.2, 5.2.2), "
           "expanded uncertainty with k = 2 (6.2-6.3)", basis="published"),
    Source("JCGM-101", "JCGM 101:2008, Evaluation of measurement data - Supplement 1 to the GUM - Propagation "
           "of distributions using a Monte Carlo method", "the Monte Carlo check of the margins' uncertainty",
           basis="published"),
    Source("ILAC-G8", "ILAC-G8:09/2019, Guidelines on Decision Rules and Statements of Conformity",
           "simple acceptance and guarded acceptance decision rules"),
    Source("ISO-22514-2", "ISO 22514-2, Statistical methods in process management - Capability and performance",
           "process capability and performance indices"),
    Source("RFC-896", "J. Nagle, RFC 896, Congestion Control in IP/TCP Internetworks, 1984",
           "why the drivers set TCP_NODELAY", basis="published"),
    Source("RFC-1122", "R. Braden (ed.), RFC 1122, Requirements for Internet Hosts, 1989, 4.2.3.2 (delayed ACK)",
           "why the drivers set TCP_NODELAY", basis="published"),
    Source("RFC-4122", "P. Leach et al., RFC 4122, A Universally Unique IDentifier (UUID) URN Namespace, 2005",
           "run and job UUIDs (version 4)", basis="published"),
    Source("SEVERNS-SNUBBERS", 'R. Severns, "Design of Snubbers for Power Circuits", Cornell Dubilier '
           "application note", "RC snubber from the ring's parasitic L and C (two-capacitor method)"),
    Source("PYTHON-CONTROL", "python-control (package 'control' on PyPI): control.margin, "
           "control.stability_margins, control.tf", "outside reference for margins in the tests",
           basis="published"),
    Source("SCIPY-SIGNAL", "SciPy, scipy.signal: freqs, bode, lsim, cont2discrete",
           "outside reference for exact frequency and time responses in the tests", basis="published"),
    Source("PRACTICE", "common practice of power-converter test benches (no single document)",
           "definitions of efficiency, line regulation, ripple pk-pk with a 20 MHz limit, recovery into a band, "
           "rules of thumb PM >= 45°, GM >= 6-10 dB, fc <= fsw/5 ... fsw/10", basis="common practice"),
)

BIBLIOGRAPHY: dict[str, Source] = {s.key: s for s in _ENTRIES}
"""Every source by key."""


def cite(key: str, where: str = "") -> str:
    """A source in full for people to read: ``cite("ERICKSON-2E", "ch. 9")``.

    Raises ``KeyError`` naming the known keys when ``key`` is not in the bibliography.
    """
    try:
        source = BIBLIOGRAPHY[key]
    except KeyError:
        raise KeyError(f"{key!r} is not in benchctl.references.BIBLIOGRAPHY; known: {', '.join(BIBLIOGRAPHY)}") \
            from None
    text = source.citation + (f", {where}" if where else "")
    return text if source.basis == "published" else f"{text} ({source.basis})"
