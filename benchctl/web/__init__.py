"""The lab web view: a read-only web application over a benchctl store (``benchctl serve``).

Pages: the stations and their latest runs (with the runs in progress), a run with its
plots (the report's plot registry) and, while it runs, its live progress; the revisions
and each one's summary; a quantity's trend across revisions and serials; the pass/fail
history of the jobs. Built on Flask (routes, Jinja2 templates with autoescaping) served
by waitress; installed with the ``web`` extra (``pip install benchctl[web]``).

Read-only by construction: the store is opened read-only (SQLite ``mode=ro``,
PostgreSQL ``default_transaction_read_only``) and every route answers GET only. Every
value from the database reaches a page through Jinja2's autoescaping or
:func:`html.escape`. It binds 127.0.0.1 unless given an access token
(:mod:`benchctl.web.access`).
"""

from __future__ import annotations

__all__ = ["create_app"]


def create_app(*args, **kwargs):  # type: ignore[no-untyped-def]
    """See :func:`benchctl.web.app.create_app` (imported on first use: Flask is an extra)."""
    from .app import create_app as make

    return make(*args, **kwargs)
