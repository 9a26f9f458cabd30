"""The statuses of a run: ``running`` until it ends, then one of the final four."""

from __future__ import annotations

from enum import StrEnum


class RunStatus(StrEnum):
    RUNNING = "running"
    COMPLETED = "completed"
    FAILED = "failed"
    TRIPPED = "tripped"
    INTERRUPTED = "interrupted"


RUN_STATUSES = frozenset(RunStatus)
FINAL_STATUSES = RUN_STATUSES - {RunStatus.RUNNING}
