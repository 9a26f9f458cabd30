"""The switch-matrix driver against the simulated multiplexer: break before make, read-back, and the
DUT left behind unpowered."""

from __future__ import annotations

import pytest

from benchctl.errors import UsageError
from benchctl.simulated_instruments.bench import SimulatedBench
from benchctl.station import load_station


def test_select_routes_the_bench_to_one_dut_and_leaves_the_others_unpowered(tmp_path):
    bench = SimulatedBench("buck-12v-1v2", time_scale=50.0, duts=2).start()
    try:
        station = load_station(bench.write_station(tmp_path / "st.toml"))
        assert station.kind_of("mux") == "switch_matrix"
        with station.instruments["mux"].create().open() as mux:
            assert mux.closed_channel() == 1
            bench.model.set_load("CC", 2.0, True)
            bench.model.set_source(12.0, 5.0, True)
            assert bench.dut_models[0].operating_point().state == "regulating"
            bench.model.set_source(12.0, 5.0, False)
            mux.select(2)
            assert mux.closed_channel() == 2
            # DUT 1 is disconnected: its source is off whatever the source instrument programs now
            bench.model.set_source(12.0, 5.0, True)
            assert bench.dut_models[0].operating_point().state == "off"
            assert bench.dut_models[1].operating_point().state == "regulating"
            assert bench.model.operating_point() == bench.dut_models[1].operating_point()
            bench.model.set_source(12.0, 5.0, False)
            with pytest.raises(UsageError):
                mux.select(3)
            mux.open_all()
            assert mux.closed_channel() == 0
        log = [e.value for e in bench.instruments["mux"].audit.entries() if e.text == "channel"]
        assert log == [0, 2, 0]
    finally:
        bench.stop()
