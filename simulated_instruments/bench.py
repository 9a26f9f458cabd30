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
A design with a second output (``SECOND_OUTPUTS``, e.g. ``flyback-48v-5v-3v3``) gets an
electronic load ``load2`` and a power meter ``output2_meter`` on that output
(:mod:`.converter.second_output`).
The station file carries each instrument's documented accuracy
(``[instruments.<role>.accuracy]``).

``protocol`` serves the instruments over raw sockets (``"socket"``, the default) or
HiSLIP (``"hislip"``, :mod:`.scpi.hislip`, resource ``TCPIP::127.0.0.1::hislip0,<port>::INSTR``),
for every role or per role (``{"scope": "hislip"}``); ``quirks`` makes chosen instruments
depart from textbook SCPI (``{"source": ["crlf", "opc_plus_one"]}``, see :mod:`.scpi.quirks`).
``generator=True`` adds role ``generator``: a function generator coupled into the DUT's
input line through an injection transformer of ``coupling_v_per_v`` (V/V, default 1; the
station file declares it as the generator's ``options.coupling_v_per_v``). ``duts=N`` (N > 1)
puts N DUTs of the same design on the station behind a DUT selector and adds role ``mux``:
a switch matrix whose channel n connects DUT n (channel 1 at the start; see
:mod:`.dut_selector`). ``dut_models`` lists the DUTs' models for tests.
``thermal=True`` puts the DUT in a simulated thermal chamber (role ``chamber``, its air is
the model's ambient) with a thermocouple meter on the ambient and the hot spots (role
``temp_meter``), turns ``thermal_drift`` on unless it is given as False (the losses follow
the parts' temperature; off, the parts' nodes still warm with the design's losses) and
adds the chamber and hot-spot limits to the station file.
"""

from __future__ import annotations

import logging
from dataclasses import dataclass
from pathlib import Path
from collections.abc import Iterable, Mapping
from typing import Any

from .converter import DESIGNS, ConverterModel, ScaledClock
from .converter.designs import SECOND_OUTPUTS
from .converter.second_output import SecondOutput
from .converter.protection import ProtectionFeatures
from .instruments import SimulatedDcSource, SimulatedElectronicLoad, SimulatedPowerMeter
from .instruments.loop_analyzer import SimulatedLoopAnalyzer
from .instruments.accuracy import accuracy_toml
from .instruments.aperture import DEFAULT_APERTURE_S
from .instruments.oscilloscope import SimulatedOscilloscope
from .instruments.temperature_meter import SimulatedTemperatureMeter
from .instruments.thermal_chamber import SimulatedThermalChamber
from .scpi import ScpiServer
from .scpi.hislip import HislipServer
from .scpi.quirks import Quirks, parse_quirks

#: The protocols ``SimulatedBench(protocol=...)`` serves.
PROTOCOLS = ("socket", "hislip")
from .shared_output import SharedOutput
from .dut_selector import DutSelector
from .instruments.function_generator import SimulatedFunctionGenerator
from .instruments.switch_matrix import SimulatedSwitchMatrix

logger = logging.getLogger(__name__)

#: Driver name of each role, as the benchctl drivers register them.
ROLE_DRIVERS = {
    "source": "dc_source",
    "load": "electronic_load",
    "input_meter": "power_meter",
    "output_meter": "power_meter",
    "output2_meter": "power_meter",
    "analyzer": "loop_analyzer",
    "scope": "oscilloscope",
    "generator": "function_generator",
    "mux": "switch_matrix",
    "temp_meter": "temperature_meter",
    "chamber": "thermal_chamber",
}

#: Station limits of a thermal bench (``thermal=True``): the chamber setpoints the station
#: allows (°C; the DUT's storage range of a typical telecom module, common practice) and the
#: hot-spot temperature that trips the run (°C).
THERMAL_LIMITS = {"chamber_temperature_min_c": -40.0, "chamber_temperature_max_c": 125.0,
                  "chamber_ramp_max_k_per_min": 10.0, "hot_spot_temperature_max_c": 150.0}


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
                 base_port: int = 0, thermal_drift: bool | None = None, reading_time_s: float | None = None,
                 extra_loads: int = 0, protocol: str | Mapping[str, str] = "socket",
                 quirks: Mapping[str, Iterable[str] | Quirks] | None = None, generator: bool = False,
                 coupling_v_per_v: float = 1.0, duts: int = 1, thermal: bool = False,
                 dut_protection: bool = False) -> None:
        if model_name not in DESIGNS:
            raise ValueError(f"unknown converter model {model_name!r}; models: {', '.join(sorted(DESIGNS))}")
        aperture_s = DEFAULT_APERTURE_S if reading_time_s is None else float(reading_time_s)
        if not aperture_s > 0.0:
            raise ValueError(f"reading_time_s={reading_time_s!r} must be > 0 s (the aperture of each reading)")
        self.model_name = model_name
        self.design = DESIGNS[model_name]
        self.clock = ScaledClock(time_scale)
        self.thermal = bool(thermal)
        drift = self.thermal if thermal_drift is None else bool(thermal_drift)
        if not (isinstance(duts, int) and 1 <= duts <= 16):
            raise ValueError(f"duts={duts!r} must be a whole number from 1 to 16")
        self.duts = duts
        # dut_protection: the DUT's hiccup OCP and latching OVP (converter/protection.py); off, the
        # model keeps its plain current limit and an open loop runs to its open-loop voltage
        protection = ProtectionFeatures.for_design(self.design) if dut_protection else None
        if duts > 1:   # several DUTs behind a switch matrix (dut_selector)
            self.dut_models = [ConverterModel(self.design, clock=self.clock, seed=seed + 100 * k,
                                              thermal_drift=drift, protection=protection)
                               for k in range(duts)]
            self.model = DutSelector(self.dut_models, ConverterModel(self.design, clock=self.clock, seed=seed))
        else:
            self.model = ConverterModel(self.design, clock=self.clock, seed=seed, thermal_drift=drift,
                                        protection=protection)
            self.dut_models = [self.model]
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
        # The analyzer's source drives the (first) load's modulation input, its ch1 the load's
        # current monitor: the output-impedance set-up (RATio function).
        self.instruments["analyzer"].connect_modulated_load(self.instruments["load"])
        winding = SECOND_OUTPUTS.get(model_name)
        self.second_output = SecondOutput(self.model, winding) if winding is not None else None
        if self.second_output is not None:
            if extra_loads:
                raise ValueError(f"{model_name} has a second output with its own load2; give extra_loads=0")
            port = self.second_output.port()
            self.instruments["load2"] = SimulatedElectronicLoad(port, serial=f"L{seed:04d}-2", seed=seed * 10 + 2,
                                                                aperture_s=aperture_s)
            self.instruments["output2_meter"] = SimulatedPowerMeter(port, "output", serial=f"MO{seed:04d}-2",
                                                                    seed=seed * 10 + 3, aperture_s=aperture_s)
        if self.thermal:
            self.instruments["temp_meter"] = SimulatedTemperatureMeter(self.model, serial=f"T{seed:04d}", seed=seed,
                                                                       aperture_s=aperture_s)
            self.instruments["chamber"] = SimulatedThermalChamber(self.model, serial=f"C{seed:04d}", seed=seed)
        for k in range(2, extra_loads + 2):
            assert shared is not None
            self.instruments[f"load{k}"] = SimulatedElectronicLoad(
                shared.port(f"load{k}"), serial=f"L{seed:04d}-{k}", seed=seed * 10 + k, aperture_s=aperture_s)
        self.coupling_v_per_v = float(coupling_v_per_v)
        if generator:
            self.instruments["generator"] = SimulatedFunctionGenerator(self.model, serial=f"G{seed:04d}",
                                                                       coupling_v_per_v=self.coupling_v_per_v)
        if duts > 1:
            self.instruments["mux"] = SimulatedSwitchMatrix(self.model, serial=f"X{seed:04d}", initial_channel=1)
        self.protocols = self._protocols(protocol)
        for role, wanted in (quirks or {}).items():
            if role not in self.instruments:
                raise ValueError(f"quirks for role {role!r}: the simulated bench has the roles "
                                 f"{', '.join(self.instruments)}")
            self.instruments[role].quirks = wanted if isinstance(wanted, Quirks) else parse_quirks(wanted)
        server_class = {"socket": ScpiServer, "hislip": HislipServer}
        self.servers = {
            role: server_class[self.protocols[role]](inst, port=(base_port + k if base_port else 0))
            for k, (role, inst) in enumerate(self.instruments.items())
        }
        self.limits = limits_for(self.design)

    def _protocols(self, protocol: str | Mapping[str, str]) -> dict[str, str]:
        """The protocol of every role: one for all, or per role (the others on raw sockets)."""
        if isinstance(protocol, str):
            chosen = {role: protocol for role in self.instruments}
        else:
            unknown = sorted(set(protocol) - set(self.instruments))
            if unknown:
                raise ValueError(f"protocol for role(s) {', '.join(unknown)}: the simulated bench has the roles "
                                 f"{', '.join(self.instruments)}")
            chosen = {role: protocol.get(role, "socket") for role in self.instruments}
        for role, name in chosen.items():
            if name not in PROTOCOLS:
                raise ValueError(f"protocol {name!r} for {role}: choose one of {', '.join(PROTOCOLS)}")
        return chosen

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
        if self.thermal:
            lines += [f"{key} = {value!r}" for key, value in THERMAL_LIMITS.items()]
        # what the bench's wiring and instruments take: the most a procedure's test envelope may reach
        lines += ["", "[limits.absolute]"]
        for key, value in absolute_limits_for(self.design).__dict__.items():
            lines.append(f"{key} = {value!r}")
        for role, resource in self.resources.items():
            lines += ["", f"[instruments.{role}]", f'driver = "{driver_for(role)}"', f'resource = "{resource}"',
                      "timeout_s = 2.0"]
            if role == "generator":
                lines.append(f"options = {{ coupling_v_per_v = {self.coupling_v_per_v!r} }}")
            if role == "mux":
                lines.append(f"options = {{ channels = {self.duts} }}")
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
