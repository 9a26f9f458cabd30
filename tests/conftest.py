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


# -- the protection procedures' end-to-end tests ------------------------------------------------------


@pytest.fixture
def protected_bench(simulated_bench):  # type: ignore[no-untyped-def]
    """``start(time_scale, reading_time_s=0.002)``: the demo flyback with its protection (hiccup
    over-current, latching over-voltage), served until the test ends."""

    def start(time_scale: float, reading_time_s: float | None = 0.002):  # type: ignore[no-untyped-def]
        return simulated_bench("flyback-48v-5v", time_scale=time_scale, reading_time_s=reading_time_s,
                               dut_protection=True)

    return start


@pytest.fixture
def check_protection_run(benchctl_store, tmp_path):  # type: ignore[no-untyped-def]
    """``check(run_id, procedure_name, plot_key)``: the report draws the procedure's plot once, and the
    bundled protection limits pass the model's protection (its figures are inside them)."""

    def check(run_id: int, procedure_name: str, plot_key: str) -> None:
        from benchctl.cli import EXIT_OK
        from benchctl.commands.check import load_run_data
        from benchctl.limits import check_limits, load_limits
        from benchctl.procedure import procedures_dir
        from benchctl.report import build_report

        report = build_report(benchctl_store, run_id, tmp_path / "report")
        assert sum(plot_key in p.name for p in report.png_paths) == 1, (report.png_paths, report.notes)
        limits = load_limits(procedures_dir() / "limits" / "flyback-48v-5v-protection.toml")
        checked = check_limits(limits, load_run_data(benchctl_store, run_id))
        assert checked.exit_code == EXIT_OK, checked.summary
        assert checked.outcomes and all(o.limit.applies_to(procedure_name) for o in checked.outcomes)

    return check
