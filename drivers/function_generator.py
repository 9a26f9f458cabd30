"""Function generator for line injection and line steps, over SCPI-1999 SOURce/OUTPut commands.

Command forms from SCPI-1999 Vol. 2: [SOURce:]FUNCtion[:SHAPe], [SOURce:]FREQuency[:CW],
[SOURce:]VOLTage[:LEVel][:IMMediate][:AMPLitude] (peak-to-peak here), [SOURce:]VOLTage:OFFSet,
OUTPut[:STATe]. Override any of them per station for another dialect.

How the generator reaches the DUT is the station's to declare: ``options.coupling_v_per_v`` is
the gain from the generator's output to the DUT input (an injection transformer's turns ratio,
or a source's analog modulation input in V/V); the guard (:class:`benchctl.guarded.GuardedGenerator`)
uses it to keep the DUT input inside the station's limits.
"""

from __future__ import annotations

from typing import ClassVar

from benchctl.drivers.command_table import OptionSpec
from benchctl.drivers.scpi_driver import ScpiDriver
from benchctl.errors import UsageError

FUNCTIONS = {"sine": "SIN", "dc": "DC"}


class FunctionGenerator(ScpiDriver):
    """One generator channel: function, frequency, amplitude (Vpp), offset, output."""

    kind: ClassVar[str] = "function_generator"
    OUTPUT_SWITCH: ClassVar[tuple[str, str] | None] = ("set_output", "get_output")
    COMMANDS: ClassVar[dict[str, str]] = {
        "set_function": "FUNC {function}",
        "get_function": "FUNC?",
        "set_frequency": "FREQ {value:.9g}",
        "get_frequency": "FREQ?",
        "set_amplitude": "VOLT {value:.6g}",
        "get_amplitude": "VOLT?",
        "set_offset": "VOLT:OFFS {value:.6g}",
        "get_offset": "VOLT:OFFS?",
        "set_output": "OUTP {state}",
        "get_output": "OUTP?",
    }
    OPTIONS: ClassVar[dict[str, OptionSpec]] = {
        "coupling_v_per_v": OptionSpec(1.0, 1e-6, 1e3, help="V at the DUT input per V at the generator output "
                                       "(injection transformer ratio or modulation-input gain)"),
        "passes_dc": OptionSpec(0, 0, 1, whole=True, help="1 when the coupling passes the offset to the DUT "
                                "(a modulation input), 0 for a transformer"),
    }

    @property
    def coupling_v_per_v(self) -> float:
        return float(self.option("coupling_v_per_v"))

    @property
    def passes_dc(self) -> bool:
        return bool(self.option("passes_dc"))

    def set_function(self, function: str) -> None:
        if function not in FUNCTIONS:
            raise UsageError(f"function {function!r} is not known; choose {' or '.join(FUNCTIONS)}")
        self.write("set_function", function=FUNCTIONS[function])

    def set_frequency(self, frequency_hz: float) -> None:
        if not frequency_hz > 0:
            raise UsageError(f"frequency {frequency_hz!r} Hz must be > 0")
        self.write("set_frequency", value=frequency_hz)

    def frequency_hz(self) -> float:
        return self.query_float("get_frequency")

    def set_amplitude(self, amplitude_vpp: float) -> None:
        """Peak-to-peak amplitude at the generator's output, V."""
        if not amplitude_vpp >= 0:
            raise UsageError(f"amplitude {amplitude_vpp!r} Vpp must be >= 0")
        self.write("set_amplitude", value=amplitude_vpp)

    def amplitude_vpp(self) -> float:
        return self.query_float("get_amplitude")

    def set_offset(self, offset_v: float) -> None:
        self.write("set_offset", value=offset_v)

    def offset_v(self) -> float:
        return self.query_float("get_offset")

    def set_output(self, on: bool) -> None:
        self.write("set_output", state=self.on_off(on))

    def stop_activity(self) -> None:
        """At a run's shutdown (after the source and loads): the generator's output off, read back
        (:meth:`output_off_now`), so no sine is left on the DUT's input line however the run ended."""
        self.output_off_now()

    def output_enabled(self) -> bool:
        return self.query_bool("get_output")
