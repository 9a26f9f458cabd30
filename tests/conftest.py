"""PostgreSQL fixtures for the store's tests.

* ``pg_server_url`` (session) - the URL in ``BENCHCTL_TEST_PG_URL`` (``.ci/run`` starts a
  server and sets it). Without it the PostgreSQL tests are skipped, with the reason -
  except in CI (``CI=true``), where a missing or unreachable server fails them.
* ``pg_url`` - a URL of an empty schema of its own for one test (dropped afterwards), so
  tests never see each other's tables.
* ``store_url`` - parametrizes a test over ``sqlite`` (a file in ``tmp_path``) and
  ``postgresql`` (``pg_url``); ``module_store_url`` is the same, one per test module.
"""

from __future__ import annotations

import os
import uuid
from collections.abc import Iterator
from contextlib import contextmanager

import pytest

PG_URL_ENV = "BENCHCTL_TEST_PG_URL"


def _in_ci() -> bool:
    return os.environ.get("CI", "").strip().lower() in ("1", "true", "yes")


def _no_server(reason: str) -> None:
    if _in_ci():
        pytest.fail(f"CI=true but {reason}; .ci/run must start PostgreSQL and export {PG_URL_ENV}", pytrace=False)
    pytest.skip(f"no PostgreSQL for the shared-database tests: {reason} (set {PG_URL_ENV}, e.g. as .ci/run does)")


def _admin_engine(url: str):  # type: ignore[no-untyped-def]
    from sqlalchemy import create_engine
    from sqlalchemy.pool import NullPool

    return create_engine(url, poolclass=NullPool, connect_args={"connect_timeout": 10})


@pytest.fixture(scope="session")
def pg_server_url() -> str:
    from sqlalchemy import text
    from sqlalchemy.exc import SQLAlchemyError

    from benchctl.store import mask_url

    url = os.environ.get(PG_URL_ENV, "").strip()
    if not url:
        _no_server(f"{PG_URL_ENV} is not set")
    engine = _admin_engine(url)
    try:
        with engine.connect() as conn:
            conn.execute(text("SELECT 1"))
    except SQLAlchemyError as exc:
        _no_server(f"the server at {mask_url(url)} cannot be reached ({type(exc).__name__})")
    finally:
        engine.dispose()
    return url


@contextmanager
def _fresh_schema(server_url: str) -> Iterator[str]:
    from sqlalchemy import text
    from sqlalchemy.engine import make_url

    schema = f"t_{uuid.uuid4().hex[:16]}"
    engine = _admin_engine(server_url)
    with engine.begin() as conn:
        conn.execute(text(f'CREATE SCHEMA "{schema}"'))
    url = make_url(server_url).update_query_dict({"options": f"-csearch_path={schema}"})
    try:
        yield url.render_as_string(hide_password=False)
    finally:
        with engine.begin() as conn:
            conn.execute(text(f'DROP SCHEMA "{schema}" CASCADE'))
        engine.dispose()


@pytest.fixture
def pg_url(pg_server_url: str) -> Iterator[str]:
    with _fresh_schema(pg_server_url) as url:
        yield url


@pytest.fixture(params=["sqlite", "postgresql"])
def store_url(request: pytest.FixtureRequest, tmp_path) -> str:  # type: ignore[no-untyped-def]
    if request.param == "sqlite":
        return str(tmp_path / "runs.db")
    return str(request.getfixturevalue("pg_url"))


@pytest.fixture(scope="module", params=["sqlite", "postgresql"])
def module_store_url(request: pytest.FixtureRequest, tmp_path_factory) -> Iterator[str]:  # type: ignore[no-untyped-def]
    if request.param == "sqlite":
        yield str(tmp_path_factory.mktemp("store") / "runs.db")
        return
    with _fresh_schema(request.getfixturevalue("pg_server_url")) as url:
        yield url
