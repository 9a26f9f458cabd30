"""pytest fixtures for testing procedures on a simulated bench (installed as a pytest plugin).

Fixtures:

* ``simulated_bench(model="flyback-48v-5v", time_scale=50.0, seed=1, thermal_drift=False,
  reading_time_s=FAST_READING_TIME_S)`` — a factory that starts a simulated bench on
  127.0.0.1 and stops it after the test.  Readings take a tiny aperture (0.1 ms) for
  speed; pass ``reading_time_s=0.02`` (one 50 Hz line cycle, the simulator's own default)
  and ``time_scale=1.0`` for a realistic bench, ``thermal_drift=True`` for parts that warm
  over minutes of model time.
* ``station_for(bench)`` — a factory giving the validated :class:`~benchctl.station.Station`
  for a simulated bench.
* ``benchctl_store`` — a fresh SQLite store in the test's temporary folder.
* ``hardware_station`` — the station of a real bench, from ``--station FILE`` or the
  ``BENCHCTL_STATION`` environment variable; tests using it are skipped, with the reason,
  when neither is given.
"""

from __future__ import annotations

import os
from typing import Any, Callable

import pytest


def pytest_addoption(parser: Any) -> None:
    group = parser.getgroup("benchctl")
    group.addoption("--station", action="store", default=None, metavar="FILE",
                    help="station file of a real bench for tests marked 'hardware'")


def pytest_configure(config: Any) -> None:
    config.addinivalue_line("markers", "hardware: needs a real station (--station FILE or BENCHCTL_STATION)")


#: Aperture of every simulated reading under the ``simulated_bench`` fixture, wall s (fast tests).
FAST_READING_TIME_S = 1e-4


@pytest.fixture
def simulated_bench() -> Any:
    from benchctl.simulated_instruments.bench import SimulatedBench

    started: list[SimulatedBench] = []

    def start(model: str = "flyback-48v-5v", *, time_scale: float = 50.0, seed: int = 1,
              thermal_drift: bool = False, reading_time_s: float = FAST_READING_TIME_S,
              **options: Any) -> SimulatedBench:
        # options: the bench's other knobs (generator=True, duts=3, thermal=True, dut_protection=True,
        # extra_loads=1, protocol="hislip", quirks={...}; see SimulatedBench)
        bench = SimulatedBench(model, time_scale=time_scale, seed=seed, thermal_drift=thermal_drift,
                               reading_time_s=reading_time_s, **options).start()
        started.append(bench)
        return bench

    yield start
    for bench in started:
        bench.stop()


@pytest.fixture
def station_for(tmp_path: Any) -> Callable[..., Any]:
    from benchctl.station import load_station

    def make(bench: Any, **kwargs: Any) -> Any:
        path = bench.write_station(tmp_path / f"station-{bench.model_name}.toml", **kwargs)
        return load_station(path)

    return make


@pytest.fixture
def benchctl_store(tmp_path: Any) -> Any:
    from benchctl.store import Store

    store = Store.open(str(tmp_path / "benchctl-test.db"))
    yield store
    store.close()


@pytest.fixture
def hardware_station(request: Any) -> Any:
    from benchctl.station import load_station

    path = request.config.getoption("--station") or os.environ.get("BENCHCTL_STATION")
    if not path:
        pytest.skip("no real bench: give --station FILE or set BENCHCTL_STATION to run hardware tests")
    return load_station(path)
