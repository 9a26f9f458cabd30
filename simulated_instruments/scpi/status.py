"""IEEE 488.2 status registers: Standard Event Status and Status Byte.

Bit values (IEEE 488.2-1992 §11.5.1.1 and §11.2; SCPI-1999 Vol. 1 §9.1; from memory):

* Standard Event Status Register (``*ESR?``): OPC 1, RQC 2, QYE 4, DDE 8,
  EXE 16, CME 32, URQ 64, PON 128.
* Status Byte (``*STB?``): bit 2 (4) error/event queue not empty (SCPI-1999),
  bit 3 (8) questionable summary, bit 4 (16) MAV message available, bit 5 (32)
  ESB = (ESR AND ESE) != 0, bit 6 (64) MSS = (STB AND SRE, bit 6 excluded) != 0,
  bit 7 (128) operation summary. This core drives bits 2, 4, 5 and 6.
"""

from __future__ import annotations

ESR_OPC = 1
ESR_RQC = 2
ESR_QYE = 4
ESR_DDE = 8
ESR_EXE = 16
ESR_CME = 32
ESR_URQ = 64
ESR_PON = 128

STB_ERROR_QUEUE = 4
STB_QUESTIONABLE = 8
STB_MAV = 16
STB_ESB = 32
STB_MSS = 64
STB_OPERATION = 128


def esr_bit_for_error(code: int) -> int:
    """The ESR bit an error sets: CME for -1xx, EXE for -2xx, DDE for -3xx and
    device-specific (positive) codes, QYE for -4xx (IEEE 488.2-1992 §11.5.1.1, from memory)."""
    if -199 <= code <= -100:
        return ESR_CME
    if -299 <= code <= -200:
        return ESR_EXE
    if -499 <= code <= -400:
        return ESR_QYE
    if code == 0:
        return 0
    return ESR_DDE


def status_byte(*, error_queue_not_empty: bool, message_available: bool, esr: int, ese: int, sre: int) -> int:
    """Compose the Status Byte as ``*STB?`` reports it (MSS in bit 6)."""
    stb = 0
    if error_queue_not_empty:
        stb |= STB_ERROR_QUEUE
    if message_available:
        stb |= STB_MAV
    if esr & ese:
        stb |= STB_ESB
    if stb & sre & ~STB_MSS:
        stb |= STB_MSS
    return stb
