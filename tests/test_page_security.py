"""The participant's page refuses everyone but the browser ``lethe open`` started.

A real server (uvicorn on a loopback socket) is driven over HTTP with httpx.
Each refusal is its own test: no token, a wrong token, a used token, a wrong
Host (DNS rebinding), a POST without or with a wrong CSRF token, a request from
another origin.  The checks follow the OWASP cheat sheets on CSRF prevention
and on DNS rebinding (common practice for local web apps, from memory).
"""

from __future__ import annotations

import re

import httpx
import pytest

from page_home import make_page_home


@pytest.fixture(scope="module")
def server(tmp_path_factory):
    from agent.participant.web import PageServer

    root = make_page_home(tmp_path_factory.mktemp("sec"))
    s = PageServer(root).start()
    yield s
    s.stop()


def client(server) -> httpx.Client:
    return httpx.Client(base_url=f"http://127.0.0.1:{server.port}", follow_redirects=False, timeout=60)


@pytest.fixture
def logged_in(server):
    c = client(server)
    r = c.get(server.url().split(f":{server.port}", 1)[1])
    assert r.status_code == 303 and r.headers["location"] == "/"
    page = c.get("/pause")
    assert page.status_code == 200
    csrf = re.search(r'name="csrf" value="([^"]+)"', page.text).group(1)
    return c, csrf


def test_bound_to_loopback_only(server):
    assert server.sock.getsockname()[0] == "127.0.0.1"


def test_no_token_is_refused(server):
    for path in ("/", "/places", "/test", "/feel", "/leaves", "/pause", "/static/page.css"):
        r = client(server).get(path)
        assert r.status_code == 403, path
        assert "lethe open" in r.text


def test_wrong_token_is_refused(server):
    r = client(server).get("/login?t=" + "A" * 43)
    assert r.status_code == 403 and "set-cookie" not in r.headers


def test_a_token_works_once(server):
    url = server.url().split(f":{server.port}", 1)[1]
    assert client(server).get(url).status_code == 303
    r = client(server).get(url)
    assert r.status_code == 403 and "already used" in r.text


def test_expired_token_is_refused(server):
    from agent.participant.web import auth

    token = auth.mint_login(server.home, ttl_s=1.0, now=1_000_000.0)  # expired long ago
    assert client(server).get(f"/login?t={token}").status_code == 403


def test_forged_session_cookie_is_refused(server):
    c = client(server)
    c.cookies.set(f"lethe_page_{server.port}", "not-a-session")
    assert c.get("/").status_code == 403


def test_wrong_host_is_refused(server, logged_in):
    c, _ = logged_in
    r = c.get("/", headers={"Host": f"attacker.example:{server.port}"})
    assert r.status_code == 400
    r = c.get("/", headers={"Host": "127.0.0.1:1"})  # right address, wrong port
    assert r.status_code == 400


def test_post_without_csrf_is_refused(server, logged_in):
    from agent.pause import is_paused

    c, _ = logged_in
    r = c.post("/pause", data={"duration": "2h"})
    assert r.status_code == 403 and not is_paused(server.home)


def test_post_with_wrong_csrf_is_refused(server, logged_in):
    from agent.pause import is_paused

    c, csrf = logged_in
    r = c.post("/pause", data={"duration": "2h", "csrf": csrf[::-1]})
    assert r.status_code == 403 and not is_paused(server.home)


def test_csrf_of_another_session_is_refused(server, logged_in):
    from agent.pause import is_paused

    c, _ = logged_in
    other = client(server)
    other.get(server.url().split(f":{server.port}", 1)[1])
    other_csrf = re.search(r'name="csrf" value="([^"]+)"', other.get("/pause").text).group(1)
    r = c.post("/pause", data={"duration": "2h", "csrf": other_csrf})
    assert r.status_code == 403 and not is_paused(server.home)


def test_request_from_another_origin_is_refused(server, logged_in):
    from agent.pause import is_paused

    c, csrf = logged_in
    r = c.post("/pause", data={"duration": "2h", "csrf": csrf}, headers={"Origin": "http://attacker.example"})
    assert r.status_code == 403 and not is_paused(server.home)


def test_request_a_browser_marks_cross_site_is_refused(server, logged_in):
    c, csrf = logged_in
    r = c.get("/", headers={"Sec-Fetch-Site": "cross-site"})
    assert r.status_code == 403


def test_a_good_post_is_accepted(server, logged_in):
    # the positive control: the refusals above are not refusing everything
    from agent.pause import clear_pause, is_paused

    c, csrf = logged_in
    r = c.post("/pause", data={"duration": "2h", "csrf": csrf},
               headers={"Origin": f"http://127.0.0.1:{server.port}", "Sec-Fetch-Site": "same-origin"})
    assert r.status_code == 303 and is_paused(server.home)
    clear_pause(server.home)


def test_strict_headers_on_pages_and_refusals(server, logged_in):
    c, _ = logged_in
    for r in (c.get("/"), client(server).get("/"), c.get("/static/page.css")):
        csp = r.headers["content-security-policy"]
        assert "default-src 'none'" in csp and "script-src" not in csp and "frame-ancestors 'none'" in csp
        assert r.headers["x-content-type-options"] == "nosniff" and r.headers["cache-control"] == "no-store"


def test_session_cookie_is_httponly_and_strict(server):
    r = client(server).get(server.url().split(f":{server.port}", 1)[1])
    cookie = r.headers["set-cookie"].lower()
    assert "httponly" in cookie and "samesite=strict" in cookie


def test_page_text_is_escaped(server, logged_in):
    c, csrf = logged_in
    r = c.post("/places", data={"csrf": csrf, "place": "P3", "action": "name", "name": "<b>café</b>"})
    assert r.status_code == 303
    page = c.get("/places").text
    assert "&lt;b&gt;café&lt;/b&gt;" in page and "<b>café</b>" not in page


def test_no_resource_from_the_network(server, logged_in):
    c, _ = logged_in
    for path in ("/", "/places", "/test", "/feel", "/leaves", "/pause", "/static/page.css"):
        text = c.get(path).text
        assert not re.search(r"(src|href)=\"(https?:)?//", text), path
        assert "@import" not in text and "url(http" not in text


def test_bundle_state_says_sent_only_after_the_server_acknowledged():
    # the shape documented by agent.uploader.queue_status
    from agent.participant.web.views import bundle_state

    up = {"server": "https://study.example:8443",
          "prepared": [{"kind": "bundle", "name": "b2.lethe", "attempts": 2, "last_error": "timed out"}],
          "sent": [{"kind": "bundle", "name": "b1.lethe", "sent_at": 1.0}],
          "failed": [{"kind": "bundle", "name": "b3.lethe", "message": "unknown device"}]}
    assert bundle_state("b1.lethe", up).startswith("sent")
    assert bundle_state("b2.lethe", up) == "prepared, waiting to be sent (tried 2 times: timed out)"
    assert bundle_state("b3.lethe", up) == "refused by the study server: unknown device"
    assert bundle_state("b4.lethe", up).startswith("prepared")
    assert bundle_state("b1.lethe", {"server": None}).startswith("prepared")
