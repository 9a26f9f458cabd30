"""A simulated thermal chamber around the DUT: setpoint, ramp rate, air read-back, soak, stable flag.

The air (:class:`..converter.thermal.ChamberAir`) approaches the setpoint at the programmed
ramp rate (K/min) and follows it with a first-order lag (τ = 2 min); the converter model's
ambient is that air (``model.attach_chamber``), so the DUT's parts and their losses follow
it.  With the chamber off the air returns to the room (25 °C).  The air read-back is the
chamber's own sensor: ±0.3 °C (a Pt100 class of chamber control sensor, common practice).

Stable: the air has stayed within ±SOAK:BAND of the setpoint for SOAK:TIME (s, the model's
clock, the chamber's own time) while the chamber runs.  The stable flag is the chamber's
criterion on its own air; the DUT's parts lag behind it, which a procedure checks with its
own stability criterion on the hot spots.

Commands (our own)::

    OUTPut[:STATe] ON|OFF                 run the chamber (off: back to the room)
    [SOURce:]TEMPerature[:SETPoint] <°C>  setpoint, −70 … 180 °C
    [SOURce:]TEMPerature:RAMP <K/min>     ramp-rate limit, 0.1 … 20 K/min (default 3)
    [SOURce:]TEMPerature:SOAK:BAND <K>    stable band, 0.05 … 10 K (default 1)
    [SOURce:]TEMPerature:SOAK:TIME <s>    stable time, 0 … 36000 s (default 300)
    [SOURce:]TEMPerature:STABle?          1 when stable (above), else 0
    MEASure:TEMPerature?                  air temperature, °C
"""

from __future__ import annotations

from ..converter.thermal import ChamberAir
from ..scpi import Boolean, Identity, Numeric, ScpiInstrument
from .accuracy import InstrumentErrors, single

SETPOINT_RANGE_C = (-70.0, 180.0)
RAMP_RANGE_K_PER_MIN = (0.1, 20.0)
DEFAULT_RAMP_K_PER_MIN = 3.0
AIR_TAU_S = 120.0


class SimulatedThermalChamber(ScpiInstrument):
    """A stirred-air chamber with a ramp-limited setpoint."""

    AIR_ACCURACY = {"temperature": single("C", 400.0, 0.0, 0.3)}

    def __init__(self, model, *, serial: str = "C1001", seed: int = 0, room_c: float | None = None) -> None:
        super().__init__(Identity(maker="benchctl-sim", model="sim thermal chamber", serial=serial, firmware="1.0"))
        self.model = model
        room = model.design.thermal.ambient_c if room_c is None else float(room_c)
        self.air = ChamberAir(model.clock.now_s(), room_c=room, tau_s=AIR_TAU_S,
                              ramp_k_per_s=DEFAULT_RAMP_K_PER_MIN / 60.0)
        model.attach_chamber(self.air)
        self.errors = InstrumentErrors(self.AIR_ACCURACY, [seed, 8])
        self.band_k = 1.0
        self.soak_s = 300.0
        lo, hi = SETPOINT_RANGE_C
        self.add_command("OUTPut[:STATe]", setter=self._set_running, getter=lambda: self.air.running,
                         params=[Boolean()])
        self.add_command("[SOURce:]TEMPerature[:SETPoint]", setter=self._set_setpoint,
                         getter=lambda: self.air.setpoint_c,
                         params=[Numeric(minimum=lo, maximum=hi, default=min(max(room, lo), hi))])
        rlo, rhi = RAMP_RANGE_K_PER_MIN
        self.add_command("[SOURce:]TEMPerature:RAMP", setter=self._set_ramp,
                         getter=lambda: self.air.ramp_k_per_s * 60.0,
                         params=[Numeric(minimum=rlo, maximum=rhi, default=DEFAULT_RAMP_K_PER_MIN)])
        self.add_command("[SOURce:]TEMPerature:SOAK:BAND", setter=self._set_band, getter=lambda: self.band_k,
                         params=[Numeric(unit="K", minimum=0.05, maximum=10.0, default=1.0)])
        self.add_command("[SOURce:]TEMPerature:SOAK:TIME", setter=self._set_soak, getter=lambda: self.soak_s,
                         params=[Numeric(unit="S", minimum=0.0, maximum=36000.0, default=300.0)])
        self.add_command("[SOURce:]TEMPerature:STABle", getter=self.stable)
        self.add_command("MEASure:TEMPerature", getter=self._measure)

    def on_reset(self) -> None:
        now = self.model.clock.now_s()
        was_on = self.air.running
        self.air.set_running(now, False)
        self.air.set_setpoint(now, self.air.room_c)
        self.air.set_ramp(now, DEFAULT_RAMP_K_PER_MIN / 60.0)
        self.band_k, self.soak_s = 1.0, 300.0
        if was_on:
            self.audit_state("output", False)

    def _set_running(self, on: bool) -> None:
        changed = bool(on) != self.air.running
        self.air.set_running(self.model.clock.now_s(), bool(on))
        if changed:
            self.audit_state("output", bool(on))

    def _set_setpoint(self, value: float) -> None:
        self.air.set_setpoint(self.model.clock.now_s(), float(value))
        self.audit_state("setpoint_c", float(value))

    def _set_ramp(self, value: float) -> None:
        self.air.set_ramp(self.model.clock.now_s(), float(value) / 60.0)

    def _set_band(self, value: float) -> None:
        self.band_k = float(value)

    def _set_soak(self, value: float) -> None:
        self.soak_s = float(value)

    def stable(self) -> bool:
        """Running, and the air within ±band of the setpoint for the soak time (module docstring)."""
        if not self.air.running:
            return False
        now = self.model.clock.now_s()
        since = self.air.in_band_since_s(now, self.band_k)
        return since is not None and now - since >= self.soak_s

    def _measure(self) -> float:
        return self.errors.read("temperature", self.air.air_c(self.model.clock.now_s()))
