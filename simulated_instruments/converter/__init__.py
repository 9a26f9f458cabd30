"""Physical model of a switching converter under test, shared by all simulated instruments.

Never imports ``benchctl``: instruments reach the model in-process, the framework
reaches the instruments only through sockets.
"""

from __future__ import annotations

from .clock import ManualClock, ModelClock, ScaledClock
from .design import (BenchWiring, Control, ConverterDesign, FaultSettings, LossCoefficients, Parasitics,
                     PowerStage, Protection, ThermalPath, Type3Network)
from .designs import BUCK_12V_1V2, DESIGNS, FLYBACK_48V_5V
from .dynamics import QUANTITIES, RegulatedTransient, Relaxation, settling_time
from .errors import ConverterModelError, DesignError, NotRegulatingError, SettingError
from .losses import LossBreakdown
from .margins import LoopTruth, loop_margins
from .load_response import ImpedanceExcess, LoadRamp
from .model import DEFAULT_LOAD_SLEW_A_PER_S, DERIVED_QUANTITIES, ConverterModel, TerminalMeans, Terminals
from .operating_point import FAULT_NAMES, LoadSetting, OperatingPoint, SourceSetting, solve_dut
from .power_stage import LoadLine, StagePoint, stage_point
from .small_signal import (RationalTF, buck_ccm_gvd, buck_dcm_gvd, closed_loop_output_impedance, control_chain,
                           flyback_ccm_gvd, flyback_ccm_parameters, flyback_dcm_gvd, output_impedance_open,
                           plant_gvd, plant_zout_open, type3_compensator)

__all__ = [
    "BUCK_12V_1V2", "DEFAULT_LOAD_SLEW_A_PER_S", "DERIVED_QUANTITIES", "DESIGNS", "FAULT_NAMES", "QUANTITIES",
    "ImpedanceExcess", "LoadRamp", "RegulatedTransient", "TerminalMeans", "ThermalPath",
    "FLYBACK_48V_5V", "BenchWiring", "Control", "ConverterDesign",
    "ConverterModel", "ConverterModelError", "DesignError", "FaultSettings", "LoadLine", "LoadSetting",
    "LoopTruth", "LossBreakdown", "LossCoefficients", "ManualClock", "ModelClock", "NotRegulatingError",
    "OperatingPoint", "Parasitics", "PowerStage", "Protection", "RationalTF", "Relaxation", "ScaledClock",
    "SettingError", "SourceSetting", "StagePoint", "Terminals", "Type3Network", "buck_ccm_gvd", "buck_dcm_gvd",
    "closed_loop_output_impedance", "control_chain", "flyback_ccm_gvd", "flyback_ccm_parameters",
    "flyback_dcm_gvd", "loop_margins", "output_impedance_open", "plant_gvd", "plant_zout_open", "settling_time",
    "solve_dut", "stage_point", "type3_compensator",
]
