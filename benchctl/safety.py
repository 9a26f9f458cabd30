"""The safety caution every command that drives a bench shows (and ``--help`` ends with)."""

from __future__ import annotations

CAUTION = (
    "CAUTION: a power bench can carry hazardous voltages (above 60 V DC) and stored energy in "
    "capacitors that stays after the source is off. The interlock is a second line of defence, "
    "not a substitute for hardware protection, guarding and licensed practice; follow your local "
    "electrical-safety codes and your lab's rules."
)
