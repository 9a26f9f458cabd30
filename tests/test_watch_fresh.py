"""The watch counts the procedure's own checked readings and does not queue in front of them.

A quantity checked through the guards (same instrument, same station limit) less than half a
period before a watch period starts is not read again in that period; one that was not is read.
"""

from __future__ import annotations

import threading

from benchctl.interlock import Interlock, WatchSource, _Worker
from benchctl.station import StationLimits

LIMITS = StationLimits(80.0, 2.0, 6.0, 5.0, 30.0)


def _interlock_with_one_watched(key):
    interlock = Interlock(LIMITS, watch_period_s=0.05, watch_deadline_s=0.5)
    reads = []
    seen = threading.Event()

    def read(deadline_s):
        reads.append(deadline_s)
        seen.set()
        return interlock.check_reading("source_voltage_max_v", 48.0, "input_meter", "measured voltage (V)")

    interlock.watch("input voltage", [WatchSource("input_meter", read, fresh_key=key)])
    interlock._workers["input_meter"] = _Worker("input_meter")
    return interlock, reads, seen


def test_a_fresh_procedure_reading_is_not_read_again():
    interlock, reads, _ = _interlock_with_one_watched(("input_meter", "source_voltage_max_v"))
    try:
        interlock.check_reading("source_voltage_max_v", 48.0, "input_meter", "measured voltage (V)")  # the procedure's
        now = interlock.clock()
        interlock._watch_period(now, now + 0.5)
        assert reads == []
        assert interlock._watched[0].misses == 0
    finally:
        interlock._workers["input_meter"].stop()


def test_a_stale_or_unkeyed_quantity_is_read():
    for key in (("input_meter", "source_voltage_max_v"), None):
        interlock, reads, seen = _interlock_with_one_watched(key)
        try:
            now = interlock.clock()
            # The last check was more than half a period before this period: the watch reads it.
            interlock._checked_at[("input_meter", "source_voltage_max_v")] = now - interlock.watch_period_s
            interlock._watch_period(now, now + 0.5)
            assert seen.wait(2.0) and len(reads) == 1
        finally:
            interlock._workers["input_meter"].stop()
