"""Simulated instruments: SCPI front panels over one shared converter model."""

from .dc_source import SimulatedDcSource
from .electronic_load import SimulatedElectronicLoad
from .loop_analyzer import SimulatedLoopAnalyzer
from .oscilloscope import SimulatedOscilloscope
from .power_meter import SimulatedPowerMeter

__all__ = ["SimulatedDcSource", "SimulatedElectronicLoad", "SimulatedLoopAnalyzer", "SimulatedOscilloscope",
           "SimulatedPowerMeter"]
