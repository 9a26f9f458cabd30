"""The bibliography is the project's own: every key that tests and docstrings use is in it."""

from __future__ import annotations

import re
from pathlib import Path

import pytest

from benchctl.references import BIBLIOGRAPHY, cite

ROOT = Path(__file__).resolve().parents[1]
KEY = re.compile(r"\b([A-Z][A-Z0-9]+(?:[-.][A-Z0-9]+)+)\b")


def test_cite_names_the_source_and_its_basis():
    assert cite("ERICKSON-2E", "ch. 9").startswith("R. W. Erickson, D. Maksimović, Fundamentals of Power Electronics")
    assert cite("ERICKSON-2E").endswith("(from memory)")
    assert cite("GUM", "5.1.2").endswith("5.1.2")  # published: no basis note
    with pytest.raises(KeyError, match="known"):
        cite("NO-SUCH-BOOK")


def test_no_pointer_outside_the_repository():
    forbidden = ("REFERENCES" + ".md", ".." + "/shared")
    for folder in ("benchctl", "drivers", "procedures", "simulated_instruments", "tests", "benchmarks"):
        for path in (ROOT / folder).rglob("*.py"):
            text = path.read_text(encoding="utf-8")
            assert not any(f in text for f in forbidden), path


def test_keys_used_in_tests_are_known():
    """A token shaped like a key whose first part starts a known key must be a known key."""
    stems = {key.split("-")[0] for key in BIBLIOGRAPHY if "-" in key}
    for path in (ROOT / "tests").glob("*.py"):
        if path.name == Path(__file__).name:
            continue
        for key in KEY.findall(path.read_text(encoding="utf-8")):
            if key.split("-")[0] in stems and key.split("-")[0] not in {"IEC", "RFC", "IEEE", "EU", "ISO"}:
                assert key in BIBLIOGRAPHY, f"{path.name}: {key} is not in benchctl.references.BIBLIOGRAPHY"
