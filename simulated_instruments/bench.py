"""The whole simulated bench: one converter model and a SCPI server per instrument.

``SimulatedBench("flyback-48v-5v").start()`` builds the model on a scaled clock, puts
a DC source on its input, an electronic load and a power meter on its output and a
second power meter on its input, serves each on its own 127.0.0.1 port, and can write a
station file (TOML text) that reaches them with ``TCPIP::127.0.0.1::<port>::SOCKET``.
The simulator knows nothing of benchctl: it is reached only through those sockets.

Knobs (also ``benchctl sim`` options): ``time_scale`` (model s per wall s),
``thermal_drift`` (the parts warm with their loss over minutes of model time; off by
default), ``reading_time_s`` (the aperture of every meter, source and load reading, wall
s; default one 50 Hz line cycle, 20 ms), ``extra_loads`` (further electronic loads in
parallel on the same converter output, roles ``load2``, ``load3`` ...; the model draws
the sum of their currents and each reads its own share, see :mod:`.shared_output`).
The station file carries each instrument's documented accuracy
(``[instruments.<role>.accuracy]``).
"""

from __future__ import annotations

import logging
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from .converter import DESIGNS, ConverterModel, ScaledClock
from .converter.protection import ProtectionFeatures
from .instruments import SimulatedDcSource, SimulatedElectronicLoad, SimulatedPowerMeter
from .instruments.loop_analyzer import SimulatedLoopAnalyzer
from .instruments.accuracy import accuracy_toml
from .instruments.aperture import DEFAULT_APERTURE_S
from .instruments.oscilloscope import SimulatedOscilloscope
from .scpi import ScpiServer
from .shared_output import SharedOutput

logger = logging.getLogger(__name__)

#: Driver name of each role, as the benchctl drivers register them.
ROLE_DRIVERS = {
    "source": "dc_source",
    "load": "electronic_load",
    "input_meter": "power_meter",
    "output_meter": "power_meter",
    "analyzer": "loop_analyzer",
    "scope": "oscilloscope",
}


def driver_for(role: str) -> str:
    """The driver name of a role of the simulated bench (``load2`` ... are electronic loads)."""
    if role in ROLE_DRIVERS:
        return ROLE_DRIVERS[role]
    if role.startswith("load") and role[4:].isdigit():
        return ROLE_DRIVERS["load"]
    raise KeyError(f"the simulated bench has no role {role!r}")


@dataclass(frozen=True)
class BenchLimits:
    """Station limits suited to a design (a little above its ratings)."""

    source_voltage_max_v: float
    source_current_max_a: float
    dut_output_voltage_max_v: float
    load_current_max_a: float
    load_power_max_w: float


def limits_for(design: Any) -> BenchLimits:
    pout_w = design.vout_nom_v * design.iout_rated_a
    return BenchLimits(
        source_voltage_max_v=round(design.vin_max_v * 1.07, 3),
        source_current_max_a=round(max(1.0, 2.0 * pout_w / design.vin_min_v), 3),
        dut_output_voltage_max_v=round(design.vout_nom_v * 1.2, 3),
        load_current_max_a=round(design.iout_rated_a * 1.1, 3),
        load_power_max_w=round(pout_w * 1.2 * 1.1, 3),
    )


def absolute_limits_for(design: Any) -> BenchLimits:
    """The simulated bench's absolute limits: its wiring and instruments, well above the DUT's ratings
    (twice the rated output current and voltage; the source as in operation, 1.5 × its current)."""
    op = limits_for(design)
    return BenchLimits(
        source_voltage_max_v=op.source_voltage_max_v,
        source_current_max_a=round(1.5 * op.source_current_max_a, 3),
        dut_output_voltage_max_v=round(2.0 * design.vout_nom_v, 3),
        load_current_max_a=round(2.0 * design.iout_rated_a, 3),
        load_power_max_w=round(4.0 * design.vout_nom_v * design.iout_rated_a, 3),
    )


class SimulatedBench:
    """A converter model with a source, a load and two power meters served on loopback."""

    def __init__(self, model_name: str = "flyback-48v-5v", *, time_scale: float = 1.0, seed: int = 1,
                 base_port: int = 0, thermal_drift: bool = False, reading_time_s: float | None = None,
                 extra_loads: int = 0, dut_protection: bool = False) -> None:
        if model_name not in DESIGNS:
            raise ValueError(f"unknown converter model {model_name!r}; models: {', '.join(sorted(DESIGNS))}")
        aperture_s = DEFAULT_APERTURE_S if reading_time_s is None else float(reading_time_s)
        if not aperture_s > 0.0:
            raise ValueError(f"reading_time_s={reading_time_s!r} must be > 0 s (the aperture of each reading)")
        self.model_name = model_name
        self.design = DESIGNS[model_name]
        self.clock = ScaledClock(time_scale)
        # dut_protection: the DUT's hiccup OCP and latching OVP (converter/protection.py); off, the
        # model keeps its plain current limit and an open loop runs to its open-loop voltage
        self.model = ConverterModel(self.design, clock=self.clock, seed=seed, thermal_drift=thermal_drift,
                                    protection=ProtectionFeatures.for_design(self.design) if dut_protection else None)
        self.reading_time_s = aperture_s
        if not (isinstance(extra_loads, int) and 0 <= extra_loads <= 8):
            raise ValueError(f"extra_loads={extra_loads!r} must be a whole number from 0 to 8")
        self.extra_loads = extra_loads
        shared = SharedOutput(self.model) if extra_loads else None
        first_load_model = shared.port("load") if shared is not None else self.model
        self.instruments = {
            "source": SimulatedDcSource(self.model, serial=f"S{seed:04d}", seed=seed, aperture_s=aperture_s),
            "load": SimulatedElectronicLoad(first_load_model, serial=f"L{seed:04d}", seed=seed, aperture_s=aperture_s),
            "input_meter": SimulatedPowerMeter(self.model, "input", serial=f"MI{seed:04d}", seed=seed,
                                               aperture_s=aperture_s),
            "output_meter": SimulatedPowerMeter(self.model, "output", serial=f"MO{seed:04d}", seed=seed,
                                                aperture_s=aperture_s),
            "analyzer": SimulatedLoopAnalyzer(self.model, serial=f"A{seed:04d}", seed=seed),
            "scope": SimulatedOscilloscope(self.model, serial=f"O{seed:04d}", seed=seed),
        }
        for k in range(2, extra_loads + 2):
            assert shared is not None
            self.instruments[f"load{k}"] = SimulatedElectronicLoad(
                shared.port(f"load{k}"), serial=f"L{seed:04d}-{k}", seed=seed * 10 + k, aperture_s=aperture_s)
        self.servers = {
            role: ScpiServer(inst, port=(base_port + k if base_port else 0))
            for k, (role, inst) in enumerate(self.instruments.items())
        }
        self.limits = limits_for(self.design)

    def start(self) -> "SimulatedBench":
        try:
            for server in self.servers.values():
                server.start()
        except BaseException:
            self.stop()
            raise
        return self

    def stop(self) -> None:
        for server in self.servers.values():
            server.stop()

    def __enter__(self) -> "SimulatedBench":
        return self.start()

    def __exit__(self, *exc: object) -> None:
        self.stop()

    @property
    def resources(self) -> dict[str, str]:
        return {role: server.resource for role, server in self.servers.items()}

    @property
    def hazardous(self) -> bool:
        return max(self.limits.source_voltage_max_v, self.limits.dut_output_voltage_max_v) > 60.0

    def station_toml(self, *, name: str | None = None, watch_period_s: float = 0.05,
                     accuracy: bool = True) -> str:
        """Station file text for this bench (acknowledges > 60 V when the design needs it).

        ``accuracy`` adds each instrument's documented accuracy table.
        """
        lim = self.limits
        lines = [
            "# Station file written by the simulated bench; instruments listen on 127.0.0.1 only.",
            "[station]",
            f'name = "{name or "sim-" + self.model_name}"',
            f'description = "simulated bench: {self.design.description}"',
            f"watch_period_s = {watch_period_s!r}",
            f"hazardous_voltage_acknowledged = {'true' if self.hazardous else 'false'}",
            "",
            "[limits]",
        ]
        for key, value in lim.__dict__.items():
            lines.append(f"{key} = {value!r}")
        # what the bench's wiring and instruments take: the most a procedure's test envelope may reach
        lines += ["", "[limits.absolute]"]
        for key, value in absolute_limits_for(self.design).__dict__.items():
            lines.append(f"{key} = {value!r}")
        for role, resource in self.resources.items():
            lines += ["", f"[instruments.{role}]", f'driver = "{driver_for(role)}"', f'resource = "{resource}"',
                      "timeout_s = 2.0"]
            table = getattr(self.instruments[role], "ACCURACY", None)
            if accuracy and table:
                lines += ["", *accuracy_toml(role, table)]
        return "\n".join(lines) + "\n"

    def write_station(self, path: str | Path, **kwargs: Any) -> Path:
        path = Path(path)
        path.parent.mkdir(parents=True, exist_ok=True)
        path.write_text(self.station_toml(**kwargs), encoding="utf-8")
        return path

    def procedure_parameters(self) -> dict[str, Any]:
        """Efficiency-map parameters that fit this design's envelope (line list, ratings)."""
        d = self.design
        lines = sorted({d.vin_min_v, d.vin_nom_v, d.vin_max_v})
        return {
            "vin_v": lines,
            "iout_rated_a": d.iout_rated_a,
            "vout_nom_v": d.vout_nom_v,
            "source_current_limit_a": self.limits.source_current_max_a,
        }
