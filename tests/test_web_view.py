"""The lab web view without a browser: every page escapes what the database holds, nothing can
change data, the token guards every request, and another address than loopback needs a token."""

from __future__ import annotations

import pytest

flask = pytest.importorskip("flask", reason="the web view needs the web extra (pip install 'benchctl[web]')")

from benchctl.cli import EXIT_BAD_INPUT, main  # noqa: E402
from benchctl.store import RunStart, Store  # noqa: E402
from benchctl.web.access import check_bind, is_loopback, load_token, masked  # noqa: E402
from benchctl.web.app import create_app  # noqa: E402

EVIL_PART = "<script>window.pwned=1</script>"
EVIL_SERIAL = '"><img src=x onerror="window.pwned=2">'
EVIL_STATION = "<b>bench</b>"
TOKEN = "0123456789abcdef0123"


@pytest.fixture
def evil_store(tmp_path):
    path = str(tmp_path / "evil.db")
    with Store.open(path) as store:
        job = store.begin_job("night <i>1</i>", EVIL_STATION)
        run_id = store.begin_run(RunStart(procedure="efficiency_map", procedure_sha256="a" * 64,
                                          station_name=EVIL_STATION, dut_part=EVIL_PART, dut_revision="<rev>",
                                          dut_serial=EVIL_SERIAL, job_id=job))
        store.record_point(run_id, {"vin_set_v": 48.0, "iout_set_a": 2.5, "pin_w": 14.5, "pout_w": 12.5,
                                    "vout_v": 5.0, "iout_a": 2.5, "vin_v": 48.0})
        store.record_results(run_id, [{"name": "efficiency", "value": 12.5 / 14.5,
                                       "scope": {"vin_set_v": 48.0, "iout_set_a": 2.5, "seq": 1}}])
        store.record_event(run_id, "info", "<script>window.pwned=3</script>")
        store.end_run(run_id, "completed", message="<img src=x onerror=alert(4)>")
    ro = Store.open(path, read_only=True)
    yield ro, run_id
    ro.close()


def _pages(run_id):
    from urllib.parse import quote

    part = quote(EVIL_PART)
    return ["/", f"/runs/{run_id}", "/jobs", f"/revision?part={part}&rev={quote('<rev>')}",
            f"/trend?part={part}&quantity=efficiency"]


def test_every_page_escapes_what_the_database_holds(evil_store):
    store, run_id = evil_store
    client = create_app(store).test_client()
    for url in _pages(run_id):
        resp = client.get(url)
        assert resp.status_code == 200, url
        html = resp.get_data(as_text=True)
        for raw in (EVIL_PART, EVIL_SERIAL, EVIL_STATION, "<script>window.pwned=3", "<img src=x onerror=alert(4)>",
                    "<i>1</i>", "<rev>"):
            assert raw not in html, (url, raw)
        assert "&lt;script&gt;window.pwned=1&lt;/script&gt;" in html or "&lt;script&gt;" in html, url
        # the only scripts a page loads are our own file (CSP allows nothing else)
        assert "script-src 'self'" in resp.headers["Content-Security-Policy"]


def test_nothing_changes_data(evil_store):
    store, run_id = evil_store
    app = create_app(store)
    client = app.test_client()
    for url in _pages(run_id) + [f"/api/runs/{run_id}/progress"]:
        for method in ("post", "put", "patch", "delete"):
            assert getattr(client, method)(url.split("?")[0]).status_code == 405, (method, url)
    methods = {m for rule in app.url_map.iter_rules() for m in rule.methods}
    assert methods <= {"GET", "HEAD", "OPTIONS"}
    assert store.read_only


def test_the_token_guards_every_request_and_leaves_the_address_bar(evil_store):
    store, run_id = evil_store
    client = create_app(store, token=TOKEN).test_client()
    assert client.get("/").status_code == 401
    assert TOKEN not in client.get("/").get_data(as_text=True)
    assert client.get("/?token=wrong-token-wrong-token").status_code == 401
    resp = client.get(f"/runs/{run_id}?token={TOKEN}")
    assert resp.status_code == 303 and resp.headers["Location"].endswith(f"/runs/{run_id}")
    cookie = resp.headers["Set-Cookie"]
    assert "HttpOnly" in cookie and "SameSite=Strict" in cookie
    assert client.get(f"/runs/{run_id}").status_code == 200  # the cookie now
    other = create_app(store, token=TOKEN).test_client()
    assert other.get("/jobs", headers={"Authorization": f"Bearer {TOKEN}"}).status_code == 200


def test_another_address_needs_a_token_that_is_never_shown_in_full(tmp_path, monkeypatch, capsys):
    assert is_loopback("127.0.0.1") and is_loopback("::1") and is_loopback("localhost")
    assert not is_loopback("0.0.0.0") and not is_loopback("192.0.2.7")
    with pytest.raises(Exception, match="access token"):
        check_bind("0.0.0.0", None)
    check_bind("0.0.0.0", TOKEN)
    monkeypatch.delenv("BENCHCTL_WEB_TOKEN", raising=False)
    assert load_token(None) is None
    f = tmp_path / "token"
    f.write_text(TOKEN + "\n")
    assert load_token(str(f)) == TOKEN
    f.write_text("short\n")
    with pytest.raises(Exception, match="too short"):
        load_token(str(f))
    assert TOKEN not in masked(TOKEN) and masked(TOKEN).startswith(TOKEN[:4])
    db = tmp_path / "s.db"
    Store.open(str(db)).close()
    code = main(["serve", "--db", str(db), "--host", "0.0.0.0", "--port", "0"])
    assert code == EXIT_BAD_INPUT and "access token" in capsys.readouterr().err


def test_progress_of_a_finished_run_is_plain_json(evil_store):
    store, run_id = evil_store
    data = create_app(store).test_client().get(f"/api/runs/{run_id}/progress").get_json()
    assert data["status"] == "completed" and data["points"] == 1 and data["ended"] is True


def test_the_view_reads_sqlite_and_postgresql_read_only(store_url):
    with Store.open(store_url) as store:
        job = store.begin_job("night", "bench-1")
        for serial in ("P1", "P2"):
            run_id = store.begin_run(RunStart(procedure="efficiency_map", procedure_sha256="a" * 64,
                                              station_name="bench-1", dut_part="FB-48S05", dut_revision="B",
                                              dut_serial=serial, job_id=job))
            store.record_point(run_id, {"vin_set_v": 48.0, "iout_set_a": 2.5, "pin_w": 14.5, "pout_w": 12.5})
            store.record_results(run_id, [{"name": "efficiency", "value": 12.5 / 14.5,
                                           "scope": {"vin_set_v": 48.0, "iout_set_a": 2.5, "seq": 1}}])
            store.end_run(run_id, "completed")
    with Store.open(store_url, read_only=True) as ro:
        client = create_app(ro).test_client()
        for url in ("/", f"/runs/{run_id}", "/jobs", "/revision?part=FB-48S05&rev=B",
                    "/trend?part=FB-48S05&quantity=efficiency"):
            resp = client.get(url)
            assert resp.status_code == 200, url
        assert "P1" in client.get("/jobs").get_data(as_text=True)
        with pytest.raises(Exception):
            ro.record_event(run_id, "info", "a read-only view cannot write")
