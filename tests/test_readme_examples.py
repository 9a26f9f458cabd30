"""The README's procedure and plugin examples, run as written (so the README stays true)."""

from __future__ import annotations

import re
from pathlib import Path

README = Path(__file__).resolve().parents[1] / "README.md"


def _python_blocks() -> list[str]:
    return re.findall(r"```python\n(.*?)```", README.read_text(encoding="utf-8"), flags=re.S)


def test_readme_procedure_and_plugin_example(tmp_path, simulated_bench, station_for, benchctl_store, monkeypatch):
    blocks = _python_blocks()
    procedure = next(b for b in blocks if "def run(bench, p):" in b)
    example_test = next(b for b in blocks if "def test_my_sweep_completes" in b)
    (tmp_path / "procedures").mkdir()
    (tmp_path / "procedures" / "my_sweep.py").write_text(procedure)
    monkeypatch.chdir(tmp_path)
    namespace: dict = {}
    exec(compile(example_test, "README example test", "exec"), namespace)
    namespace["test_my_sweep_completes"](simulated_bench, station_for, benchctl_store)


def test_readme_station_and_limits_examples_are_valid():
    from benchctl.limits import parse_limits
    from benchctl.station import parse_station

    text = README.read_text(encoding="utf-8")
    blocks = re.findall(r"```toml\n(.*?)```", text, flags=re.S)
    station = parse_station(next(b for b in blocks if b.startswith("[station]")))
    assert station.limits.hazardous and station.instruments["source"].commands
    limits = parse_limits(next(b for b in blocks if "[[limit]]" in b))
    assert len(limits.limits) == 3
