"""The ``db``, ``query``, ``export-runs`` and ``import-runs`` commands, on SQLite and
PostgreSQL (``store_url``), through their argparse parsers. Passwords never reach the output."""

from __future__ import annotations

import json

import pytest
from sqlalchemy.engine import make_url

from benchctl.cli import main
from benchctl.errors import SchemaVersionError
from benchctl.store import RunStart, Store, upgrade


def _run(argv: list[str], capsys) -> tuple[int, str]:
    code = main(argv)  # the real command line: parser, dispatch and error mapping
    return code, capsys.readouterr().out


def _password(url: str) -> str | None:
    return str(make_url(url).password) if "://" in url and make_url(url).password else None


def _station(path, revision: str) -> None:
    with Store.open(path, recover=False) as st:
        run_id = st.begin_run(RunStart(procedure="efficiency_map", procedure_sha256="e" * 64, station_name=path.stem,
                                       dut_part="FB-48S05", dut_revision=revision))
        st.record_point(run_id, {"vin_set_v": 48.0, "iout_set_a": 1.0, "pin_w": 5.6, "pout_w": 5.0})
        st.end_run(run_id, "completed")


def test_db_version_and_upgrade(store_url, capsys):
    upgrade(store_url, to_version=1)
    code, out = _run(["db", "version", "--db", store_url, "--json"], capsys)
    state = json.loads(out)
    assert code == 1 and state["status"] == "behind" and state["schema_version"] == 1
    with pytest.raises(SchemaVersionError, match="benchctl db upgrade"):
        Store.open(store_url)
    code, out = _run(["db", "upgrade", "--db", store_url, "--json"], capsys)
    result = json.loads(out)
    assert code == 0 and result["from_version"] == 1 and result["revisions_applied"] == ["0002", "0003"]
    code, out = _run(["db", "upgrade", "--db", store_url], capsys)
    assert code == 0 and "nothing to do" in out
    code, out = _run(["db", "version", "--db", store_url], capsys)
    assert code == 0 and "current" in out
    if (pw := _password(store_url)) is not None:
        assert pw not in out and "***" in out


def test_import_query_and_export_through_the_commands(tmp_path, store_url, capsys):
    for name, revision in (("bench-1", "A"), ("bench-2", "B")):
        _station(tmp_path / f"{name}.db", revision)
    for _ in range(2):  # the second import copies nothing
        for name in ("bench-1", "bench-2"):
            code, out = _run(["import-runs", str(tmp_path / f"{name}.db"), "--db", store_url, "--json"], capsys)
            assert code == 0
            actions = [r["action"] for r in json.loads(out)["runs"]]
            assert actions == (["copied"] if _ == 0 else ["already present"])
    code, out = _run(["query", "part", "FB-48S05", "--db", store_url, "--json"], capsys)
    assert [r["station"] for r in json.loads(out)] == ["bench-1", "bench-2"]
    code, out = _run(["query", "efficiency", "FB-48S05", "--vin", "48", "--iout", "1", "--db", store_url, "--json"],
                     capsys)
    rows = json.loads(out)
    assert [r["dut_revision"] for r in rows] == ["A", "B"]
    assert rows[0]["efficiency_mean"] == pytest.approx(5.0 / 5.6, rel=1e-12)  # η = Pout/Pin
    code, out = _run(["query", "efficiency", "FB-48S05", "--vin", "48", "--iout", "1", "--db", store_url], capsys)
    assert code == 0 and "FB-48S05" in out
    exported = tmp_path / "out" / "moved.db"
    code, out = _run(["export-runs", "--db", store_url, "--out", str(exported)], capsys)
    assert code == 0 and "2 copied" in out
    with Store.open(exported) as moved:
        assert sorted(moved.runs()["station"]) == ["bench-1", "bench-2"]
    if (pw := _password(store_url)) is not None:
        assert pw not in out


def test_database_from_the_station_file(tmp_path, store_url, capsys):
    station = tmp_path / "station.toml"
    station.write_text(
        "[station]\n"
        'name = "bench-9"\n'
        f"database = {json.dumps(store_url if '://' in store_url else 'sqlite:///' + store_url)}\n"
        "[limits]\n"
        "source_voltage_max_v = 15.0\nsource_current_max_a = 5.0\ndut_output_voltage_max_v = 6.0\n"
        "load_current_max_a = 3.0\nload_power_max_w = 20.0\n"
        "[instruments.source]\n"
        'driver = "dc_source"\nresource = "TCPIP::127.0.0.1::5025::SOCKET"\n',
        encoding="utf-8",
    )
    code, out = _run(["db", "upgrade", "--station", str(station), "--json"], capsys)
    assert code == 0 and json.loads(out)["revisions_applied"] == ["0001", "0002", "0003"]
    code, out = _run(["db", "version", "--station", str(station), "--json"], capsys)
    assert json.loads(out)["status"] == "current"
    with Store.open(store_url) as store:  # the station's database is the one upgraded
        assert store.runs().empty
    # --db wins over the station file
    other = tmp_path / "other.db"
    code, out = _run(["db", "upgrade", "--station", str(station), "--db", str(other), "--json"], capsys)
    assert json.loads(out)["url"] == f"sqlite:///{other}"
