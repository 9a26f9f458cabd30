"""Who may reach the web view: loopback by default, an access token for any other address.

The token comes from a file (``--token-file``) or the ``BENCHCTL_WEB_TOKEN`` environment
variable; it is never printed or logged in full (:func:`masked`). A browser presents it
once as ``?token=...``; the view answers with an HttpOnly, SameSite=Strict cookie and a
redirect to the same page without it, so it leaves the address bar. Scripts may send
``Authorization: Bearer <token>``. Tokens are compared in constant time
(:func:`hmac.compare_digest`).
"""

from __future__ import annotations

import hmac
import ipaddress
import os
from pathlib import Path

from benchctl.errors import ConfigurationError

TOKEN_ENV = "BENCHCTL_WEB_TOKEN"
COOKIE_NAME = "benchctl_token"
#: A token shorter than this is refused (guessable); 16 characters of a random hex string give 64 bits.
MIN_TOKEN_CHARS = 16


def is_loopback(host: str) -> bool:
    """True for ``localhost`` and the loopback addresses (127.0.0.0/8, ::1)."""
    if host.strip().lower() == "localhost":
        return True
    try:
        return ipaddress.ip_address(host.strip("[]")).is_loopback
    except ValueError:
        return False


def load_token(token_file: str | None, environ: dict[str, str] | None = None) -> str | None:
    """The access token from ``token_file`` (first line) or ``$BENCHCTL_WEB_TOKEN``; None when neither."""
    env = os.environ if environ is None else environ
    if token_file:
        path = Path(token_file).expanduser()
        try:
            text = path.read_text(encoding="utf-8")
        except OSError as exc:
            raise ConfigurationError(f"--token-file {path}: cannot be read ({exc.strerror or exc}); give a file "
                                     "holding the access token on its first line") from exc
        token = text.strip().splitlines()[0].strip() if text.strip() else ""
        where = f"--token-file {path}"
    elif env.get(TOKEN_ENV, "").strip():
        token = env[TOKEN_ENV].strip()
        where = f"${TOKEN_ENV}"
    else:
        return None
    if len(token) < MIN_TOKEN_CHARS:
        raise ConfigurationError(f"{where}: the access token is too short ({len(token)} characters; at least "
                                 f"{MIN_TOKEN_CHARS}); make one with: python -c \"import secrets; "
                                 "print(secrets.token_hex(16))\"")
    return token


def check_bind(host: str, token: str | None) -> None:
    """Refuse to bind an address other than loopback without an access token."""
    if not is_loopback(host) and not token:
        raise ConfigurationError(
            f"--host {host}: the web view binds an address other than loopback only with an access token; give "
            f"--token-file FILE or set ${TOKEN_ENV} (or bind 127.0.0.1 and reach it through an SSH tunnel)")


def masked(token: str) -> str:
    """What may be shown of a token: its first 4 characters and its length."""
    return f"{token[:4]}… ({len(token)} characters)"


def token_matches(expected: str, given: str | None) -> bool:
    return given is not None and hmac.compare_digest(expected.encode("utf-8"), given.encode("utf-8"))


__all__ = ["COOKIE_NAME", "MIN_TOKEN_CHARS", "TOKEN_ENV", "check_bind", "is_loopback", "load_token", "masked",
           "token_matches"]
