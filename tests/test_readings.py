"""Readings taken together: one thread per instrument, rounds started at once, means and sample sd."""

from __future__ import annotations

import statistics
import threading
import time

import pytest

from benchctl.readings import Readings, SimultaneousReader, sd_name


def test_sd_names_keep_the_unit_suffix_last():
    assert sd_name("pin_w") == "pin_sd_w"
    assert sd_name("vout_v") == "vout_sd_v"
    assert sd_name("iin_a") == "iin_sd_a"
    assert sd_name("efficiency") == "efficiency_sd"
    assert sd_name("freq_hz") == "freq_sd_hz"


def test_mean_and_sample_sd_match_the_standard_library():
    # Reference: Python's statistics.mean / statistics.stdev (sample sd, N - 1; GUM 4.2.2).
    v = (3.01, 2.99, 3.02, 2.98, 3.00, 3.005)
    r = Readings({"pin_w": v}, {"pin_w": tuple(range(6))}, 0.0, 1.0)
    assert r.mean("pin_w") == pytest.approx(statistics.mean(v), rel=1e-15)
    assert r.sd("pin_w") == pytest.approx(statistics.stdev(v), rel=1e-12)
    values = r.as_values()
    assert values == {"pin_w": pytest.approx(statistics.mean(v)), "pin_sd_w": pytest.approx(statistics.stdev(v)),
                      "n_readings": 6.0}


def test_one_reading_has_no_sd_column():
    r = Readings({"pin_w": (3.0,)}, {"pin_w": (0.0,)}, 0.0, 0.0)
    assert r.as_values() == {"pin_w": 3.0, "n_readings": 1.0}


class Instrument:
    """An instrument answering one query at a time (its own lock, as the drivers have).

    ``meet`` makes every reading wait until the partner instrument is inside a reading of the same
    round too: read one after the other, the two could never meet and the wait would time out.
    """

    def __init__(self, name, values, meet=None):
        self.name, self.values, self.meet = name, list(values), meet
        self._lock = threading.Lock()
        self.threads = set()
        self.calls = 0

    def measure(self):
        with self._lock:
            self.threads.add(threading.get_ident())
            self.calls += 1
            if self.meet is not None:
                self.meet.wait(timeout=10.0)  # raises BrokenBarrierError if the partner never comes
            return self.values.pop(0)

    def measure_other(self):
        with self._lock:
            return 0.5


def test_instruments_are_read_at_the_same_moment_each_round():
    meet = threading.Barrier(2)
    a = Instrument("input_meter", [1.0, 1.1, 1.2], meet)
    b = Instrument("output_meter", [2.0, 2.1, 2.2], meet)
    reader = SimultaneousReader()
    try:
        r = reader.read({"pin_w": a.measure, "pout_w": b.measure}, n=3)
    finally:
        reader.close()
    assert r.values == {"pin_w": (1.0, 1.1, 1.2), "pout_w": (2.0, 2.1, 2.2)}
    assert not meet.broken  # every round met: the two were inside a reading together
    assert a.threads.isdisjoint(b.threads)  # one thread per instrument


def test_quantities_of_one_instrument_share_its_thread_in_order():
    a = Instrument("input_meter", [1.0, 1.1])
    groups = SimultaneousReader.groups({"pin_w": a.measure, "vin_v": a.measure_other, "x": lambda: 0.0})
    assert [[n for n, _ in g] for g in groups] == [["pin_w", "vin_v"], ["x"]]


def test_an_error_in_one_instrument_is_raised_and_nothing_hangs():
    class Broken(Exception):
        pass

    def fail():
        raise Broken("no answer")

    b = Instrument("output_meter", [2.0] * 5)
    reader = SimultaneousReader()
    try:
        with pytest.raises(Broken, match="no answer"):
            reader.read({"pin_w": fail, "pout_w": b.measure}, n=5)
    finally:
        reader.close()
    assert b.calls <= 1  # the other instrument stopped at the next round


def test_bad_counts_are_refused():
    with pytest.raises(ValueError, match=">= 1"):
        SimultaneousReader().read({"x": lambda: 1.0}, n=0)
    with pytest.raises(ValueError, match="no quantity"):
        SimultaneousReader().read({}, n=1)


def test_meters_give_voltage_current_and_power_of_one_integration_at_the_same_moment(simulated_bench):
    """Through the real drivers and guards on a simulated bench: trigger then fetch, both meters together."""
    from benchctl.guarded import guard
    from benchctl.interlock import Interlock
    from benchctl.station import StationLimits
    from benchctl.drivers.dc_source import DcSource
    from benchctl.drivers.electronic_load import ElectronicLoad
    from benchctl.drivers.power_meter import PowerMeter

    aperture_s = 0.02
    bench = simulated_bench("flyback-48v-5v", time_scale=50.0, reading_time_s=aperture_s)
    lim = bench.limits
    interlock = Interlock(StationLimits(lim.source_voltage_max_v, lim.source_current_max_a,
                                        lim.dut_output_voltage_max_v, lim.load_current_max_a, lim.load_power_max_w))
    r = bench.resources
    with DcSource(r["source"], name="source") as src, ElectronicLoad(r["load"], name="load") as load, \
            PowerMeter(r["input_meter"], name="input_meter") as mi, PowerMeter(r["output_meter"], name="output_meter") as mo:
        src.set_current_limit(1.5)
        src.set_voltage(48.0)
        load.set_mode("CC")
        load.set_current(2.0)
        src.set_output(True)
        load.set_input(True)
        gi, go = guard(mi, interlock), guard(mo, interlock)
        assert gi.has_measure_all and go.has_measure_all
        m = bench.model  # wait on the model's own truth: input power within 1e-6 of its final value
        settled_at = m.transient_start_s + m.true_settling_time_s("input_w", rel_tol=1e-6)
        while m.clock.now_s() < settled_at:
            time.sleep(0.001)
        reader = SimultaneousReader()
        try:
            got = reader.read({("vin_v", "iin_a", "pin_w"): gi.measure_all,
                               ("vout_v", "iout_a", "pout_w"): go.measure_all}, n=3)
        finally:
            reader.close()
        src.set_output(False)
        load.set_input(False)
    # One integration: P is the mean of v·i over the same interval as V and I (settled, so
    # P = V·I within the meters' documented accuracy, 0.02 % of reading per quantity).
    for v, i, p in (("vin_v", "iin_a", "pin_w"), ("vout_v", "iout_a", "pout_w")):
        assert got.mean(p) == pytest.approx(got.mean(v) * got.mean(i), rel=1e-3)
    assert got.n == 3 and set(got.values) == {"vin_v", "iin_a", "pin_w", "vout_v", "iout_a", "pout_w"}


def test_a_stream_reading_that_fails_after_the_last_take_is_raised_when_it_stops():
    class Garbled(Exception):
        pass

    taken, failed = threading.Event(), threading.Event()
    calls = []

    def read():
        calls.append(1)
        if len(calls) >= 2:  # the second reading fails, after the consumer took the first
            assert taken.wait(timeout=10.0)
            failed.set()
            raise Garbled("expected a number, got '#?'")
        return 1.0

    stream = SimultaneousReader().stream({"pin_w": read})
    got = stream.take()
    taken.set()
    assert got["pin_w"] == [(pytest.approx(got["pin_w"][0][0]), 1.0)]
    assert failed.wait(timeout=10.0)
    with pytest.raises(Garbled, match="expected a number"):
        stream.stop()
