"""The id the database gave a row that one ``INSERT ... VALUES`` added."""

from __future__ import annotations

from typing import Any

from sqlalchemy.engine import CursorResult

from benchctl.errors import StoreError


def inserted_id(result: CursorResult[Any], table: str) -> int:
    """Return the integer primary key of the single row ``result``'s INSERT added to ``table``.

    SQLAlchemy's ``inserted_primary_key`` is ``None`` when the statement reported no
    inserted row, and holds ``None`` for a key the database made without handing it back.
    """
    key = result.inserted_primary_key
    if key is None or key[0] is None:
        raise StoreError(
            f"the database returned no id for the row just added to table {table!r}; "
            "the store expects one single-row INSERT here (a programming error: please report it)"
        )
    return int(key[0])
