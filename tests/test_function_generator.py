"""The function-generator driver against the simulated line injector: settings read back, and the
model sees coupling × Vpp/2 at the DUT input (a transformer: no offset)."""

from __future__ import annotations

import pytest

from benchctl.errors import UsageError
from benchctl.simulated_instruments.bench import SimulatedBench
from benchctl.station import load_station


def test_settings_reach_the_model_through_the_declared_coupling(tmp_path):
    bench = SimulatedBench("flyback-48v-5v", time_scale=50.0, generator=True, coupling_v_per_v=0.25).start()
    try:
        station = load_station(bench.write_station(tmp_path / "st.toml"))
        with station.instruments["generator"].create().open() as gen:
            assert gen.coupling_v_per_v == 0.25
            gen.set_function("sine")
            gen.set_frequency(2500.0)
            gen.set_amplitude(4.0)
            gen.set_offset(1.0)
            assert (gen.frequency_hz(), gen.amplitude_vpp(), gen.offset_v()) == (2500.0, 4.0, 1.0)
            assert bench.model.line_injection is None          # output still off
            gen.set_output(True)
            inj = bench.model.line_injection
            assert inj is not None and inj.amplitude_v == pytest.approx(0.25 * 4.0 / 2)   # V peak at the DUT
            assert inj.frequency_hz == 2500.0
            gen.set_function("dc")
            assert bench.model.line_injection is None          # DC does not pass the transformer
            with pytest.raises(UsageError):
                gen.set_function("triangle")
            gen.set_output(False)
        states = [e.value for e in bench.instruments["generator"].audit.entries() if e.text == "output"]
        assert states == [True, False]
    finally:
        bench.stop()
