"""What a resume compares: the station a run is resumed on against the run's own record.

A resumed run goes on adding points to the same run, so the bench must be the one the
first points were measured on. Compared, from the station text stored with the run and the
instruments recorded when it began:

* every key of ``[station]`` but ``name``, ``description`` and ``database`` (where the
  data goes changes no measurement): the watch period, the hazardous-voltage
  acknowledgement, the watch and shutdown deadlines ...;
* every key of ``[limits]``;
* for each role the run uses: driver, VISA resource and the instrument's ``*IDN?`` answer
  (maker, model, serial, firmware; IEEE 488.2-1992 clause 10.14), and every key of its
  ``[instruments.<role>]`` table (timeout, options, command overrides, accuracy);
* any other table of the file.

A difference is refused unless accepted; an accepted one is stored with the run (an event
with the differences and the previous station, and the new station as the run's
provenance). Texts are compared with their passwords masked, as stored.
"""

from __future__ import annotations

import tomllib
from dataclasses import dataclass
from typing import Any, Iterable, Mapping

_IGNORED_STATION_KEYS = frozenset({"name", "description", "database"})
_MISSING = "(absent)"


@dataclass(frozen=True)
class StationDifference:
    """One difference: ``key`` (dotted, e.g. ``limits.source_voltage_max_v``), its value in
    the run's record and now (``"(absent)"`` where a side does not have it)."""

    key: str
    recorded: Any
    now: Any

    def text(self) -> str:
        return f"{self.key}: {self.recorded!r} in the run's record, {self.now!r} now"

    def as_dict(self) -> dict[str, Any]:
        """JSON-ready (TOML dates and times become their text)."""
        return {"key": self.key, "recorded": _plain(self.recorded), "now": _plain(self.now)}


def _plain(value: Any) -> Any:
    if isinstance(value, (str, int, float, bool)) or value is None:
        return value
    if isinstance(value, (list, tuple)):
        return [_plain(v) for v in value]
    return str(value)


def _flatten(prefix: str, value: Any, out: dict[str, Any]) -> None:
    if isinstance(value, Mapping):
        for k, v in value.items():
            _flatten(f"{prefix}.{k}" if prefix else str(k), v, out)
    else:
        out[prefix] = value


def _station_keys(text: str | None, roles: Iterable[str]) -> dict[str, Any] | None:
    """Dotted keys of a station text that a resume compares (``None``: no text, or not TOML)."""
    if text is None:
        return None
    try:
        data = tomllib.loads(text)
    except tomllib.TOMLDecodeError:
        return None
    flat: dict[str, Any] = {}
    for table, value in data.items():
        if table == "station" and isinstance(value, Mapping):
            value = {k: v for k, v in value.items() if k not in _IGNORED_STATION_KEYS}
        if table == "instruments" and isinstance(value, Mapping):
            value = {role: spec for role, spec in value.items() if role in set(roles)}
        _flatten(str(table), value, flat)
    return flat


def station_differences(recorded_text: str | None, recorded_instruments: Iterable[Any],
                        now_text: str | None, now_instruments: Iterable[Any]) -> tuple[StationDifference, ...]:
    """Every difference between the run's record and the station now (empty: the same bench).

    ``*_instruments`` are :class:`~benchctl.store.InstrumentInfo` (role, driver, resource,
    identity). Texts are masked before they are compared (the record holds the masked one).
    """
    from benchctl.store.url import mask_secrets

    rec = {i.role: i for i in recorded_instruments}
    now = {i.role: i for i in now_instruments}
    roles = sorted(set(rec) | set(now))
    diffs: list[StationDifference] = []
    for role in roles:
        a, b = rec.get(role), now.get(role)
        for attr in ("driver", "resource", "identity"):
            va = _MISSING if a is None else getattr(a, attr)
            vb = _MISSING if b is None else getattr(b, attr)
            if va != vb:
                diffs.append(StationDifference(f"instruments.{role}.{attr}", va, vb))
    keys_a = _station_keys(None if recorded_text is None else mask_secrets(recorded_text), roles)
    keys_b = _station_keys(None if now_text is None else mask_secrets(now_text), roles)
    if keys_a is None or keys_b is None:
        if keys_a != keys_b or recorded_text is None:
            diffs.append(StationDifference(
                "station text", "not stored or not readable" if keys_a is None else "stored",
                "not given or not readable" if keys_b is None else "given"))
        return tuple(diffs)
    for key in sorted(set(keys_a) | set(keys_b)):
        if key.startswith("instruments.") and key.split(".")[2:3] in (["driver"], ["resource"]):
            continue  # compared above, from what the run opened
        va, vb = keys_a.get(key, _MISSING), keys_b.get(key, _MISSING)
        if va != vb:
            diffs.append(StationDifference(key, va, vb))
    return tuple(diffs)
