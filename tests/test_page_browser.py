"""The participant's page driven in a real headless Chromium (selenium + Debian's chromium-driver).

The page is served by a real running agent (``lethe run`` in a subprocess),
opened with the link ``lethe open --print-url`` prints, as a volunteer would.
Every step checks what the page says *and* what happened on disk (vault, inbox,
outbox, ledger).  Screenshots of every page go to a temporary folder; with
``LETHE_UPDATE_SCREENSHOTS=1`` they replace ``docs/figures/page-*.png`` for
``docs/participant.md`` (a plain test run leaves the work tree untouched).
"""

from __future__ import annotations

import os
import shutil
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import pytest

from page_home import STUDY_ID, make_page_home

REPO = Path(__file__).resolve().parent.parent
FIGURES = (REPO / "docs" / "figures" if os.environ.get("LETHE_UPDATE_SCREENSHOTS") == "1"
           else Path(tempfile.gettempdir()) / "lethe-page-screenshots")
CHROMIUM, CHROMEDRIVER = "/usr/bin/chromium", "/usr/bin/chromedriver"

pytestmark = [
    pytest.mark.slow,
    pytest.mark.skipif(not (os.path.exists(CHROMIUM) and os.path.exists(CHROMEDRIVER))
                       and os.environ.get("LETHE_CI_SERVICES") != "1",
                       reason="Debian chromium and chromium-driver are not installed (.ci/services installs them)"),
]


def lethe(*args, home=None, **kw):
    cmd = [sys.executable, "-m", "agent.cli"] + (["--home", str(home)] if home else []) + list(args)
    return subprocess.run(cmd, capture_output=True, text=True, cwd=REPO, **kw)


@pytest.fixture(scope="module")
def world(tmp_path_factory):
    """A home with three weeks of codes and a running agent serving the page."""
    tmp = tmp_path_factory.mktemp("page")
    root = make_page_home(tmp)
    proc = subprocess.Popen([sys.executable, "-m", "agent.cli", "--home", str(root), "run"], cwd=REPO,
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    lines = []
    deadline = time.monotonic() + 240  # first start compiles librosa's functions
    while time.monotonic() < deadline:
        line = proc.stderr.readline()
        if not line:
            break
        lines.append(line)
        if "your page is served" in line:
            break
    assert any("your page is served on 127.0.0.1:" in x for x in lines), "".join(lines)
    yield {"root": root, "proc": proc}
    if proc.poll() is None:
        proc.terminate()
        proc.wait(60)


@pytest.fixture(scope="module")
def browser():
    from selenium import webdriver
    from selenium.webdriver.chrome.service import Service

    opts = webdriver.ChromeOptions()
    opts.binary_location = CHROMIUM
    for a in ("--headless=new", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
              "--disable-background-networking", "--disable-component-update", "--disable-sync",
              "--window-size=1000,1400", "--force-device-scale-factor=1"):
        opts.add_argument(a)
    udd = Path(os.environ.get("TMPDIR", "/tmp")) / f"lethe-chromium-{os.getpid()}"
    opts.add_argument(f"--user-data-dir={udd}")
    drv = webdriver.Chrome(service=Service(CHROMEDRIVER), options=opts)
    drv.set_page_load_timeout(180)
    yield drv
    drv.quit()
    shutil.rmtree(udd, ignore_errors=True)


def open_page(world, browser, page="today"):
    r = lethe("open", "--print-url", "--page", page, home=world["root"])
    assert r.returncode == 0, r.stderr
    url = r.stdout.strip().splitlines()[-1]
    assert url.startswith("http://127.0.0.1:") and "/login?t=" in url
    browser.get(url)
    assert "/login" not in browser.current_url  # the token left the address bar
    return url


def by(browser, css):
    from selenium.webdriver.common.by import By

    return browser.find_element(By.CSS_SELECTOR, css)


def click(browser, css):
    """Click a submit button and wait until the next page has replaced this one."""
    from selenium.webdriver.support import expected_conditions as ec
    from selenium.webdriver.support.ui import WebDriverWait

    old = by(browser, "html")
    by(browser, css).click()
    WebDriverWait(browser, 180).until(ec.staleness_of(old))  # a wait for the server, not a timing check


def shot(browser, name):
    """Full-page screenshot into docs/figures (the page's height, at 1000 px wide)."""
    height = browser.execute_script("return document.documentElement.scrollHeight")
    browser.set_window_size(1000, min(max(int(height) + 120, 700), 6000))
    FIGURES.mkdir(parents=True, exist_ok=True)
    browser.save_screenshot(str(FIGURES / f"page-{name}.png"))
    browser.set_window_size(1000, 1400)


def vault_rows(root, table):
    from agent.home import Home
    from agent.vault import Vault

    with Vault.open(Home(root)) as v:
        return [obj for _, obj in v.items(table)]


def test_1_today_shows_state_and_counts(world, browser):
    open_page(world, browser)
    body = by(browser, "main").text
    assert "lethe is running" in body
    assert "What arrived and what was destroyed" in body and "sound snippets" in body
    for word in ("codebook", "featurised", "episode", "ledger", "silhouette"):  # no internal terms
        assert word not in browser.page_source.lower()
    shot(browser, "today")


def test_2_name_a_place(world, browser):
    open_page(world, browser, "places")
    body = by(browser, "main").text
    assert "unnamed place 2" in body and "weekdays, from 09:00 to 17:00" in body  # recognisable without a map
    field = by(browser, "#name-P2")
    field.clear()
    field.send_keys("the office on Rua Nova")
    click(browser, "#place-P2 form button")
    assert "Name saved." in by(browser, "main").text
    assert "the office on Rua Nova" in by(browser, "#place-P2").text
    names = {r["name"] for r in vault_rows(world["root"], "place_names")}
    assert "the office on Rua Nova" in names
    shot(browser, "places")
    # merge the weekend place into the café, then undo it; leave the café out of the test, then include it
    from selenium.webdriver.support.ui import Select

    Select(by(browser, "#into-P4")).select_by_visible_text("unnamed place 3")
    click(browser, "#place-P4 form:nth-of-type(2) button")
    assert "the two are now one place" in by(browser, "main").text
    assert "Same place as\nunnamed place 3" in by(browser, "#place-P4").text
    Select(by(browser, "#into-P4")).select_by_visible_text("(no other place)")
    click(browser, "#place-P4 form:nth-of-type(2) button")
    assert "kept as a place of its own" in by(browser, "main").text
    click(browser, "#place-P3 form:nth-of-type(3) button")
    assert "will not be asked about" in by(browser, "main").text
    assert {r.get("exclude") for r in vault_rows(world["root"], "place_names") if r.get("exclude")} == {True}
    click(browser, "#place-P3 form:nth-of-type(3) button")
    assert "may be asked about again" in by(browser, "main").text
    assert not any(r.get("exclude") or r.get("merged_into") for r in vault_rows(world["root"], "place_names"))


def test_3_memory_test_with_not_sure_and_resume(world, browser):
    open_page(world, browser, "test")
    click(browser, "form[action='/test/start'] button")
    assert "new question(s) are ready" in by(browser, "main").text
    total = len(vault_rows(world["root"], "trials"))
    assert f"Question 1 of {total}" in by(browser, "legend").text
    labels = [e.text for e in browser.find_elements("css selector", "fieldset label")]
    assert labels[-1] == "Not sure"
    assert all("place P" not in x for x in labels)  # never a bare code
    by(browser, "label[for='c1']").click()          # keyboard/label-driven choice
    click(browser, "form[action='/test/answer'] button")
    assert f"Question 2 of {total}" in by(browser, "legend").text
    shot(browser, "test")
    by(browser, "label[for='c-not-sure']").click()
    click(browser, "form[action='/test/answer'] button")
    # resumable: a fresh link in a later session carries on at question 3
    open_page(world, browser, "test")
    assert f"Question 3 of {total}" in by(browser, "legend").text
    assert f"2 of {total} questions answered" in by(browser, "main").text
    answers = vault_rows(world["root"], "answers")
    assert len(answers) == 2 and sorted(a["choice"] is None for a in answers) == [False, True]


def test_3b_keyboard_only_answers_a_question(world, browser):
    from selenium.webdriver.common.keys import Keys

    open_page(world, browser, "test")
    legend = by(browser, "legend").text
    body = by(browser, "body")
    for _ in range(40):  # Tab from the top of the page to the first answer, as a keyboard user would
        body = browser.switch_to.active_element
        if body.get_attribute("name") == "choice":
            break
        body.send_keys(Keys.TAB)
    assert browser.switch_to.active_element.get_attribute("name") == "choice"
    old = by(browser, "html")
    browser.switch_to.active_element.send_keys(Keys.SPACE)
    browser.switch_to.active_element.send_keys(Keys.ENTER)
    from selenium.webdriver.support import expected_conditions as ec
    from selenium.webdriver.support.ui import WebDriverWait

    WebDriverWait(browser, 60).until(ec.staleness_of(old))
    assert by(browser, "legend").text != legend


def test_3c_every_page_reflows_at_200_percent(world, browser):
    # WCAG 2.1 success criterion 1.4.4 (resize text to 200 %) and 1.4.10 (reflow): a 1280 px
    # window at 200 % zoom is a 640 CSS px viewport at device scale 2; nothing may need
    # horizontal scrolling.
    browser.execute_cdp_cmd("Emulation.setDeviceMetricsOverride",
                            {"width": 640, "height": 1000, "deviceScaleFactor": 2, "mobile": False})
    try:
        for page in ("today", "places", "test", "feel", "leaves", "pause"):
            open_page(world, browser, page)
            wide = browser.execute_script("return [document.documentElement.scrollWidth, "
                                          "document.documentElement.clientWidth]")
            assert wide[0] <= wide[1], (page, wide)
            for el in browser.find_elements("css selector", "input:not([type=hidden]), select"):
                assert el.get_attribute("id") and by(browser, f"label[for='{el.get_attribute('id')}']"), page
        open_page(world, browser, "places")
        browser.save_screenshot(str(FIGURES / "page-places-200.png"))
    finally:
        browser.execute_cdp_cmd("Emulation.clearDeviceMetricsOverride", {})


def test_4_mood_answer_is_taken_in_and_destroyed(world, browser):
    from agent.intake.report import intake_counts
    from agent.policy import load_policy

    root = world["root"]
    policy = load_policy(Path(root) / "policy.toml")
    before = intake_counts(root)
    open_page(world, browser, "feel")
    scale = list(range(policy.schedule.mood_scale_min, policy.schedule.mood_scale_max + 1))
    for i, emotion in enumerate(policy.schedule.emotions):
        by(browser, f"label[for='r-{emotion}-{scale[i % len(scale)]}']").click()
    shot(browser, "feel")
    click(browser, "form[action='/feel'] button")
    assert "Thank you for your answer." in by(browser, "main").text
    deadline = time.monotonic() + 120  # waiting for the agent, not a timing assertion
    while time.monotonic() < deadline:
        if "was taken in, and its file was destroyed" in by(browser, "main").text:
            break
        time.sleep(1)
        browser.refresh()
    assert "was taken in, and its file was destroyed" in by(browser, "main").text
    browser.set_window_size(1000, 700)
    browser.save_screenshot(str(FIGURES / "page-feel-taken.png"))  # the top of the page is what matters
    browser.set_window_size(1000, 1400)
    after = intake_counts(root)
    assert after["featurised"]["mood"] == before["featurised"].get("mood", 0) + 1
    assert after["destroyed"]["mood"] == before["destroyed"].get("mood", 0) + 1
    assert not [p for p in (Path(root) / "inbox").iterdir() if p.name.endswith(".mood.json")]


def test_5_export_declined_then_confirmed(world, browser):
    outbox = Path(world["root"]) / "outbox"
    open_page(world, browser, "leaves")
    click(browser, "form[action='/leaves/prepare'] button")
    assert "This export would send the study" in by(browser, "pre.preview").text
    shot(browser, "leaves-preview")
    click(browser, "button[value='decline']")
    assert "Declined. Nothing was prepared" in by(browser, "main").text
    assert not list(outbox.iterdir())
    click(browser, "form[action='/leaves/prepare'] button")
    click(browser, "button[value='confirm']")
    text = by(browser, "main").text
    assert "has not been sent yet" in text
    assert "prepared (in the outbox; this study has no server, so copy it to the study as agreed)" in text
    assert [p.name.endswith("000001.lethe") for p in outbox.iterdir()] == [True]
    shot(browser, "leaves")


def test_6_pause_and_resume(world, browser):
    from agent.ledger import Ledger
    from agent.pause import is_paused

    root = world["root"]
    open_page(world, browser, "pause")
    from selenium.webdriver.support.ui import Select

    Select(by(browser, "#duration")).select_by_visible_text("2 hours")
    click(browser, "form[action='/pause'] button")
    assert "lethe is paused until" in by(browser, "main").text
    assert is_paused(root)
    shot(browser, "pause")
    click(browser, "form[action='/resume'] button")
    assert "Resumed" in by(browser, "main").text and not is_paused(root)
    events = [e["event"] for e in Ledger(root).entries()]
    assert events.count("paused") == 1 and events.count("resumed") == 1


def test_7_withdraw_needs_typed_name_then_destroys_everything(world, browser):
    root = Path(world["root"])
    open_page(world, browser, "pause")
    text = by(browser, "main").text
    assert "1 prepared summary file(s) not yet sent to the study will be destroyed too" in text
    by(browser, "#confirm").send_keys("yes")
    click(browser, "form[action='/withdraw'] button")
    assert "Not withdrawn" in by(browser, "main").text and (root / "vault.db").exists()
    by(browser, "#confirm").send_keys(STUDY_ID)
    click(browser, "form[action='/withdraw'] button")
    assert "You have withdrawn" in by(browser, "main").text
    shot(browser, "withdrawn")
    assert world["proc"].wait(120) == 0  # the agent stopped itself to let the withdrawal run
    left = sorted(str(p.relative_to(root)) for p in root.rglob("*") if p.is_file())
    assert left == ["withdrawal-certificate.json"]
