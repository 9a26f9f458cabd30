"""The lab web view in a real headless Chromium (Debian's chromium and chromium-driver, driven
with selenium): pages load, plots appear, live progress follows a run on the simulated bench,
and what the database holds stays text.

Skipped with the reason where Chromium, its driver or selenium is absent, except under
CI=true, where a missing browser fails the tests (.ci/run installs it).
"""

from __future__ import annotations

import base64
import os
import shutil
import threading
import time

import pytest

pytest.importorskip("flask", reason="the web view needs the web extra (pip install 'benchctl[web]')")

from benchctl.store import RunStart, Store  # noqa: E402
from benchctl.web.app import create_app  # noqa: E402
from benchctl.web.server import start_in_thread  # noqa: E402

CHROMIUM_FLAGS = ("--headless", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
                  "--disable-background-networking", "--disable-component-update", "--disable-sync",
                  "--window-size=1200,1600")
PNG_SIGNATURE = b"\x89PNG\r\n\x1a\n"


def _in_ci() -> bool:
    return os.environ.get("CI", "").strip().lower() in ("1", "true", "yes")


def _absent(reason: str) -> None:
    if _in_ci():
        pytest.fail(f"CI=true but {reason}; .ci/run must install chromium and chromium-driver", pytrace=False)
    pytest.skip(f"no headless browser for the web view tests: {reason} (apt-get install chromium chromium-driver)")


@pytest.fixture(scope="module")
def browser(tmp_path_factory):
    try:
        from selenium import webdriver
        from selenium.webdriver.chrome.service import Service
    except ImportError:
        _absent("selenium is not installed (it is in the test extra)")
    chromium = shutil.which("chromium") or ("/usr/bin/chromium" if os.path.exists("/usr/bin/chromium") else None)
    driver_path = shutil.which("chromedriver") or (
        "/usr/bin/chromedriver" if os.path.exists("/usr/bin/chromedriver") else None)
    if not chromium or not driver_path:
        _absent(f"chromium ({chromium or 'missing'}) or chromedriver ({driver_path or 'missing'}) not found")
    options = webdriver.ChromeOptions()
    options.binary_location = chromium
    for flag in CHROMIUM_FLAGS:
        options.add_argument(flag)
    options.add_argument(f"--user-data-dir={tmp_path_factory.mktemp('chromium-profile')}")  # a fresh profile
    # the local driver, named explicitly: nothing is looked up or downloaded
    driver = webdriver.Chrome(service=Service(executable_path=driver_path), options=options)
    driver.set_page_load_timeout(120)
    try:
        yield driver
    finally:
        driver.quit()


def _wait(predicate, timeout_s: float, what: str, poll_s: float = 0.1):
    deadline = time.monotonic() + timeout_s
    while time.monotonic() < deadline:
        value = predicate()
        if value:
            return value
        time.sleep(poll_s)
    raise AssertionError(f"timed out after {timeout_s:.0f} s waiting for {what}")


def _run_efficiency_map(bench, station, store, *, serial="W1", values=None, on_begin=None):
    from benchctl.procedure import load_procedure
    from benchctl.runner import DutInfo, execute

    emap = load_procedure("efficiency_map")
    params = emap.resolve_parameters(values={**bench.procedure_parameters(), **(values or {})})
    return execute(emap, params, station, store, dut=DutInfo("FB-48S05", "B", serial), on_begin=on_begin)


def _png_images(driver):
    imgs = driver.find_elements("css selector", "img.plot")
    out = []
    for img in imgs:
        src = img.get_attribute("src")
        natural = driver.execute_script("return arguments[0].complete ? arguments[0].naturalWidth : 0;", img)
        out.append((src, natural))
    return out


def test_pages_load_and_plots_appear(browser, simulated_bench, station_for, tmp_path):
    bench = simulated_bench("flyback-48v-5v", time_scale=50.0)
    station = station_for(bench)
    db = str(tmp_path / "web.db")
    with Store.open(db) as store:
        outcome = _run_efficiency_map(bench, station, store, values={"vin_v": [36.0, 75.0],
                                                                     "load_pct": [0, 25, 50, 75, 100]})
    assert outcome.status == "completed"
    with Store.open(db, read_only=True) as ro:
        server = start_in_thread(create_app(ro))
        try:
            browser.get(f"{server.url}/")
            assert "sim-flyback-48v-5v" in browser.find_element("css selector", "section.station").text
            browser.get(f"{server.url}/runs/{outcome.run_id}")
            imgs = _wait(lambda: [i for i in _png_images(browser) if i[1] > 0], 60, "the run's plots")
            assert len(imgs) >= 3
            for src, natural in imgs:
                assert src.startswith("data:image/png;base64,") and natural > 100
                assert base64.b64decode(src.split(",", 1)[1])[:8] == PNG_SIGNATURE
            browser.get(f"{server.url}/trend?part=FB-48S05&quantity=efficiency")
            trend = _wait(lambda: [i for i in _png_images(browser) if i[1] > 0], 60, "the trend plot")
            assert trend[0][0].startswith(f"{server.url}/trend.png?")
            browser.get(f"{server.url}/jobs")
            assert "Jobs" in browser.find_element("tag name", "h1").text
            browser.get(f"{server.url}/revision?part=FB-48S05&rev=B")
            assert "revision B" in browser.find_element("tag name", "h1").text
            figures = browser.find_elements("css selector", "figure img")
            assert figures and all(browser.execute_script("return arguments[0].naturalWidth", f) > 0 for f in figures)
        finally:
            server.stop()


def test_stored_markup_stays_text_in_the_browser(browser, tmp_path):
    db = str(tmp_path / "evil.db")
    part = "<script>window.pwned=1</script>"
    with Store.open(db) as store:
        run_id = store.begin_run(RunStart(procedure="efficiency_map", procedure_sha256="a" * 64, station_name="b1",
                                          dut_part=part, dut_revision="A", dut_serial="<b>S</b>"))
        store.record_point(run_id, {"vin_set_v": 48.0, "iout_set_a": 2.5, "pin_w": 14.5, "pout_w": 12.5})
        store.end_run(run_id, "completed")
    with Store.open(db, read_only=True) as ro:
        server = start_in_thread(create_app(ro))
        try:
            for path in ("/", f"/runs/{run_id}"):  # every page's escaping: tests/test_web_view.py
                browser.get(server.url + path)
                assert browser.execute_script("return window.pwned === undefined")
                assert part in browser.find_element("tag name", "body").text, path
                assert not browser.find_elements("css selector", "main b:not(.beyond):not(.bad)") or \
                    "<b>S</b>" in browser.find_element("tag name", "body").text
        finally:
            server.stop()


def test_live_progress_follows_a_running_run(browser, simulated_bench, station_for, tmp_path):
    bench = simulated_bench("flyback-48v-5v", time_scale=5.0)  # slow enough to be watched for several seconds
    station = station_for(bench)
    db = str(tmp_path / "live.db")
    writer = Store.open(db)  # held open: the read-only view then reads the live write-ahead log
    ro = Store.open(db, read_only=True)
    began = threading.Event()
    run_ids: list[int] = []
    outcome: list = []

    def on_begin(run_id: int) -> None:
        run_ids.append(run_id)
        began.set()

    def work() -> None:
        outcome.append(_run_efficiency_map(bench, station, writer, on_begin=on_begin,
                                           values={"vin_v": [36.0, 48.0, 75.0],
                                                   "load_pct": [0, 10, 20, 30, 40, 50, 60, 70, 80, 90, 100]}))

    server = start_in_thread(create_app(ro))
    worker = threading.Thread(target=work, name="run-under-test")
    worker.start()
    try:
        assert began.wait(120), "the run did not begin"
        run_id = run_ids[0]
        browser.get(f"{server.url}/runs/{run_id}")
        seen: list[int] = []

        def status() -> str:
            return browser.find_element("id", "run-status").text

        deadline = time.monotonic() + 300
        while time.monotonic() < deadline:
            text = browser.find_element("id", "points-done").text
            if text.isdigit() and (not seen or int(text) != seen[-1]):
                seen.append(int(text))
            if status() != "running":
                break
            time.sleep(0.1)
        worker.join(300)
        assert outcome and outcome[0].status == "completed"
        final = _wait(lambda: status() == "completed" and browser.find_element("id", "points-done").text, 30,
                      "the page to show the run completed")
        assert int(final) == writer.run(run_id).n_points == 33
        assert seen == sorted(seen), seen  # the count only rises
        # the page rose while the run went on: at least two counts below the end, without a reload
        assert len([v for v in seen if v < 33]) >= 2, f"the page showed too few intermediate counts: {seen}"
        assert browser.find_element("id", "planned").text == "33 of 33"
    finally:
        worker.join(300)
        server.stop()
        ro.close()
        writer.close()
