"""The researcher's dashboard: behind a login, withdrawn participants left out, distributions not rows.

The browser test runs a real headless Chromium through selenium and Debian's
chromedriver (installed by .ci/services).
"""

from __future__ import annotations

import os
import random
import shutil

import pytest

from _bundle_fixtures import make_payload
from _server_fixtures import PASSWORD, World, database


def build_cohort(w, n=12, seed=3):
    from agent.study.withdrawal import make_withdrawal_certificate

    rng = random.Random(seed)
    names = []
    for _ in range(n):
        _, dev, name = w.enrol()
        p = make_payload(w.study.policy)
        p["model"]["cv"]["pooled"]["agreement"] = round(rng.uniform(0.3, 0.8), 3)
        p["model"]["baselines"]["frequency"]["agreement"] = round(rng.uniform(0.3, 0.6), 3)
        p["model"]["params"]["beta"] = round(rng.uniform(0.5, 3), 3)
        assert w.post_bundle(w.study.seal(p, seq=1, device=dev)).status_code == 201
        names.append((name, dev))
    gone, dev = names[0]
    cert = make_withdrawal_certificate("harbour-days-2027", gone, dev, {"seq": 9, "hash": "ab" * 32}, {"x": 1})
    assert w.post_json("/v1/withdrawals", cert).status_code == 201
    return [n for n, _ in names], gone


@pytest.fixture
def cohort(tmp_path):
    with database("sqlite", tmp_path) as url:
        w = World(tmp_path, url)
        names, gone = build_cohort(w)
        w.store.invite(3)
        try:
            yield w, names, gone
        finally:
            w.close()


def login(w):
    r = w.http.post("/login", content=f"password={PASSWORD}".encode(),
                    headers={"Content-Type": "application/x-www-form-urlencoded"})
    assert r.status_code == 303 and r.headers["location"] == "/dashboard"
    return r


def test_dashboard_needs_login(cohort):
    w, _, _ = cohort
    r = w.http.get("/dashboard")
    assert r.status_code == 303 and r.headers["location"] == "/login"
    assert w.http.get("/dashboard/plot/model.png").status_code == 401


def test_wrong_password_is_refused(cohort):
    w, _, _ = cohort
    r = w.http.post("/login", content=b"password=guess-guess",
                    headers={"Content-Type": "application/x-www-form-urlencoded"})
    assert r.status_code == 401 and "not the one set" in r.text and "lethe_dashboard" not in r.headers.get(
        "set-cookie", "")


def test_server_never_starts_without_a_password():
    from agent.errors import LetheError
    from agent.study.server.app import ServerSettings

    with pytest.raises(LetheError, match="never served without one"):
        ServerSettings("")


def test_dashboard_counts_and_withdrawn_left_out(cohort):
    w, names, gone = cohort
    login(w)
    r = w.http.get("/dashboard")
    assert r.status_code == 200
    page = r.text
    assert 'id="n-enrolled">12<' in page and 'id="n-withdrawn">1<' in page and 'id="n-invited">15<' in page
    assert "11 reporting" in page  # the withdrawn participant is not in the analyses
    assert page.count(gone) == 1 and 'id="withdrawn"' in page  # named once: on the withdrawn list
    assert "Content-Security-Policy" in r.headers or "content-security-policy" in r.headers
    png = w.http.get("/dashboard/plot/model.png")
    assert png.status_code == 200 and png.content[:8] == b"\x89PNG\r\n\x1a\n"


def test_templates_autoescape():
    from agent.study.server.dashboard import _env

    t = _env().from_string("{{ x }}")
    assert t.render(x="<script>alert(1)</script>") == "&lt;script&gt;alert(1)&lt;/script&gt;"


def test_dashboard_in_chromium(cohort, tmp_path):
    from selenium import webdriver
    from selenium.webdriver.chrome.service import Service
    from selenium.webdriver.common.by import By
    from selenium.webdriver.support.ui import WebDriverWait

    if not (shutil.which("chromedriver") or os.path.exists("/usr/bin/chromedriver")):
        if os.environ.get("LETHE_CI_SERVICES") == "1":
            pytest.fail("chromedriver missing although LETHE_CI_SERVICES=1")
        pytest.skip("chromedriver not installed (. .ci/services installs it)")
    w, names, gone = cohort
    opts = webdriver.ChromeOptions()
    opts.binary_location = "/usr/bin/chromium"
    for a in ("--headless=new", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
              "--disable-background-networking", "--disable-component-update", "--disable-sync",
              f"--user-data-dir={tmp_path / 'chromium'}", "--window-size=1100,2600",
              # The test server's certificate is self-signed; agents pin it, the browser is told to accept it.
              "--ignore-certificate-errors"):
        opts.add_argument(a)
    drv = webdriver.Chrome(service=Service("/usr/bin/chromedriver"), options=opts)
    try:
        drv.get(w.srv.url + "/dashboard")
        assert drv.current_url.endswith("/login")
        drv.find_element(By.ID, "password").send_keys("wrong-password")
        drv.find_element(By.ID, "login").click()
        WebDriverWait(drv, 30).until(lambda d: d.find_elements(By.ID, "login-error"))
        drv.find_element(By.ID, "password").send_keys(PASSWORD)
        drv.find_element(By.ID, "login").click()
        WebDriverWait(drv, 30).until(lambda d: d.find_elements(By.ID, "n-enrolled"))
        assert drv.current_url.endswith("/dashboard")
        assert drv.find_element(By.ID, "n-enrolled").text == "12"
        assert drv.find_element(By.ID, "n-withdrawn").text == "1"
        imgs = drv.find_elements(By.TAG_NAME, "img")
        assert len(imgs) >= 3
        for img in imgs:  # every plot really loaded (decoded by the browser)
            assert drv.execute_script("return arguments[0].complete && arguments[0].naturalWidth", img) > 100
        drv.save_screenshot(str(tmp_path / "dashboard.png"))
        assert (tmp_path / "dashboard.png").read_bytes()[:4] == b"\x89PNG"
        if os.environ.get("LETHE_DOCS_SCREENSHOT"):
            shutil.copy(tmp_path / "dashboard.png", os.environ["LETHE_DOCS_SCREENSHOT"])
    finally:
        drv.quit()
