"""The revision summary states each instrument's calibration and marks one overdue at a run's start."""

from __future__ import annotations

from datetime import datetime, timezone

from benchctl.report.revision_data import _calibration_text

STATION = """
[station]
name = "bench-3"
[instruments.input_meter]
driver = "power_meter"
resource = "TCPIP::127.0.0.1::5025::SOCKET"
calibration_due = 2026-11-30
calibration_certificate = "CAL-2025-0117"
[instruments.source]
driver = "dc_source"
resource = "TCPIP::127.0.0.1::5026::SOCKET"
"""


def _at(day: int) -> datetime:
    return datetime(2026, 12, day, 3, 0, tzinfo=timezone.utc)


def test_in_date_overdue_and_not_stated():
    assert _calibration_text(STATION, "input_meter", [(1, datetime(2026, 11, 29, tzinfo=timezone.utc))]) == \
        "due 2026-11-30 (certificate CAL-2025-0117)"
    text = _calibration_text(STATION, "input_meter", [(4, _at(1)), (7, _at(2))])
    assert text.endswith("OVERDUE by 2 days at run 7")  # 2 Dec is two days after 30 Nov
    assert _calibration_text(STATION, "source", [(4, _at(1))]) == ""
    assert _calibration_text(None, "source", [(4, _at(1))]) == ""
