"""The command line sits on top: nothing in the package imports benchctl.cli (no import cycle)."""

from __future__ import annotations

import ast
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]


def _imports(path: Path) -> set[str]:
    tree = ast.parse(path.read_text(encoding="utf-8"))
    names = set()
    for node in ast.walk(tree):
        if isinstance(node, ast.Import):
            names |= {a.name for a in node.names}
        elif isinstance(node, ast.ImportFrom) and node.module:
            names.add(node.module)
            names |= {f"{node.module}.{a.name}" for a in node.names}
    return names


def test_nothing_imports_the_command_line():
    offenders = []
    for folder in ("benchctl", "drivers", "procedures", "simulated_instruments"):
        for path in (ROOT / folder).rglob("*.py"):
            if path == ROOT / "benchctl" / "cli.py":
                continue
            if {"benchctl.cli"} & _imports(path) or "benchctl.cli" in {i.rsplit(".", 1)[0] for i in _imports(path)}:
                offenders.append(str(path.relative_to(ROOT)))
    assert not offenders, offenders


def test_the_simulator_never_imports_benchctl():
    """The simulator is installed as benchctl.simulated_instruments but uses nothing else of benchctl:
    it is reached through sockets only, like hardware."""
    for path in (ROOT / "simulated_instruments").rglob("*.py"):
        outside = [i for i in _imports(path) if (i == "benchctl" or i.startswith("benchctl."))
                   and not i.startswith("benchctl.simulated_instruments")]
        assert not outside, (path, outside)


def test_bundled_folders_are_imported_in_benchctl_namespace():
    """drivers/, procedures/ and simulated_instruments/ install as benchctl.drivers, ... (no top-level
    packages that could collide with another distribution's): nothing imports them by the old names."""
    old = ("drivers", "procedures", "simulated_instruments")
    for folder in ("benchctl", "drivers", "procedures", "simulated_instruments", "tests", "benchmarks"):
        for path in (ROOT / folder).rglob("*.py"):
            bad = [i for i in _imports(path) if i.split(".")[0] in old]
            assert not bad, (path, bad)
