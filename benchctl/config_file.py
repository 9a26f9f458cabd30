"""Reading the project's configuration files (station, job, limits, parameters): text only.

Every file is UTF-8 TOML read with the standard library; nothing in it is evaluated.
Errors name the file and say what to do, as the project's error type for that kind of
file.
"""

from __future__ import annotations

from pathlib import Path

from benchctl.errors import ConfigurationError


def read_config_text(path: str | Path, kind: str, error: type[ConfigurationError], hint: str = "") -> str:
    """The text of a ``kind`` file ("station file", "job file" ...), or ``error`` saying why not."""
    path = Path(path)
    try:
        return path.read_text(encoding="utf-8")
    except FileNotFoundError:
        raise error(f"{kind} {path} does not exist" + (f"; {hint}" if hint else "")) from None
    except (OSError, UnicodeDecodeError) as exc:
        raise error(f"{kind} {path} cannot be read: {exc}") from exc
