"""Each driver and each guarded wrapper has the methods of its kind's Protocol."""

from __future__ import annotations

import inspect

import pytest

from benchctl import guarded
from benchctl.instrument_types import KIND_PROTOCOLS
from benchctl.drivers.dc_source import DcSource
from benchctl.drivers.electronic_load import ElectronicLoad
from benchctl.drivers.loop_analyzer import LoopAnalyzer
from benchctl.drivers.oscilloscope import Oscilloscope
from benchctl.drivers.power_meter import PowerMeter

DRIVERS = [DcSource, ElectronicLoad, PowerMeter, LoopAnalyzer, Oscilloscope]


def _protocol_methods(protocol: type) -> set[str]:
    names = set()
    for klass in protocol.__mro__:
        if klass is object or klass.__name__ in ("Protocol", "Generic"):
            continue
        names |= {n for n, v in vars(klass).items() if not n.startswith("_") and (callable(v) or isinstance(v, property))}
    return names


def _methods(protocol: type) -> set[str]:
    return {n for n in _protocol_methods(protocol) if not isinstance(inspect.getattr_static(protocol, n), property)}


@pytest.mark.parametrize("driver", DRIVERS, ids=lambda d: d.kind)
def test_driver_implements_its_kind(driver):
    protocol = KIND_PROTOCOLS[driver.kind]
    missing = sorted(n for n in _methods(protocol) if not callable(getattr(driver, n, None)))
    assert not missing, f"{driver.__name__} lacks {missing} of {protocol.__name__}"
    for name in _methods(protocol):  # keyword-only parameters have the same names, so keyword calls work
        want = inspect.signature(getattr(protocol, name))
        got = inspect.signature(getattr(driver, name))
        for p in want.parameters.values():
            if p.kind is p.KEYWORD_ONLY:
                assert p.name in got.parameters, (driver.__name__, name, p.name)


GUARDS = {"dc_source": guarded.GuardedSource, "electronic_load": guarded.GuardedLoad,
          "power_meter": guarded.GuardedMeter, "loop_analyzer": guarded.GuardedAnalyzer}


@pytest.mark.parametrize("kind", sorted(GUARDS))
def test_guarded_wrapper_offers_the_same_methods(kind):
    guard, protocol = GUARDS[kind], KIND_PROTOCOLS[kind]
    # A guard forwards what it does not check itself (__getattr__) or defines it.
    forwards = "__getattr__" in {n for k in guard.__mro__ for n in vars(k)}
    missing = sorted(n for n in _protocol_methods(protocol) if not hasattr(guard, n))
    assert {"resource", "identity"} <= set(dir(guard))
    assert forwards or not missing, f"{guard.__name__} lacks {missing}"


def test_public_names_load_lazily():
    import subprocess
    import sys

    code = ("import sys, benchctl; assert 'benchctl.store' not in sys.modules and 'pandas' not in sys.modules; "
            "from benchctl import Store, execute, load_station, RunStatus; print(RunStatus.COMPLETED)")
    done = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, timeout=120)
    assert done.returncode == 0, done.stderr
    assert done.stdout.strip() == "completed"
