"""The agent's uploader against a real study server on loopback: queue, pin, back-off, restarts, kills."""

from __future__ import annotations

import json
import os
import random
import signal
import subprocess
import sys
import time

import pytest

from agent.export import export_bundle
from agent.home import Home
from agent.study.card import load_card, write_card
from agent.uploader import Uploader, pinned_context, queue_status

from _bundle_fixtures import NOW, PASS
from _server_fixtures import PASSWORD, ThreadServer, free_port
from test_bundle_export import make_world


def with_server_card(home, study, url, pin, tmp_path):
    """Rewrite the home's study card as version 2 naming the server and its pin."""
    from agent.policy import bundled_policy_path

    src = tmp_path / "policy.toml"
    if not src.exists():
        src.write_text(bundled_policy_path("default").read_text())
    card = write_card(study, [src], "desk", tmp_path / "card2.json", server_url=url, server_pin=pin)
    (home.root / "study-card.json").write_bytes(card.read_bytes())
    return load_card(card)


def enrolment_file(home, study):
    from agent.keystore import Keystore
    from agent.study.card import make_enrolment

    from agent.export import home_card

    doc = make_enrolment(home_card(home), home.load_policy(), home.read_config()["pseudonym"],
                         Keystore(home).device_key())
    (home.root / "enrolment.json").write_text(json.dumps(doc))


@pytest.fixture
def setup(tmp_path):
    home, study = make_world(tmp_path)
    srv = ThreadServer(study, f"sqlite:///{tmp_path / 'server.db'}")
    with_server_card(home, study, srv.url, srv.pin, tmp_path)
    enrolment_file(home, study)
    yield home, study, srv
    srv.stop()


def test_card_v2_names_server_and_pin(setup):
    home, _, srv = setup
    from agent.uploader import server_of

    assert server_of(home) == (srv.url, srv.pin)


def test_no_server_on_card_means_files_only(tmp_path):
    home, _ = make_world(tmp_path)
    up = Uploader(home)
    assert up.server is None
    export_bundle(home, now=NOW)
    assert up.enqueue_outbox() == 0 and up.run_once() == {"sent": 0, "waiting": 0, "failed": 0, "error": None}
    assert queue_status(home)["server"] is None and [p.name for p in home.outbox.iterdir()]


def test_enrolment_then_bundles_are_sent_once(setup):
    home, _, srv = setup
    up = Uploader(home)
    assert up.enqueue_enrolment(srv.ctx.store.invite(1)[0])
    export_bundle(home, now=NOW)
    export_bundle(home, now=NOW + 86400)
    assert up.enqueue_outbox() == 2
    st = queue_status(home)
    assert [i["kind"] for i in st["prepared"]] == ["enrolment", "bundle", "bundle"] and st["sent"] == []
    res = up.run_once()
    assert res["sent"] == 3 and res["waiting"] == 0
    assert srv.ctx.store.counts()["bundles"] == 2 and srv.ctx.store.counts()["enrolled"] == 1
    # no resend after the acknowledgement, even when the outbox is scanned again
    assert up.enqueue_outbox() == 0 and up.run_once()["sent"] == 0
    st = queue_status(home)
    assert st["prepared"] == [] and len(st["sent"]) == 3 and st["last_contact"] is not None


def test_bundles_wait_for_the_enrolment(setup):
    home, _, srv = setup
    up = Uploader(home)
    export_bundle(home, now=NOW)
    up.enqueue_outbox()
    assert up.run_once()["sent"] == 0  # not enrolled on the server yet: nothing is tried
    assert srv.ctx.store.counts()["bundles"] == 0
    (item,) = queue_status(home)["prepared"]  # still prepared, never given up
    assert item["attempts"] == 0 and "waiting for the enrolment" in item["last_error"]
    assert queue_status(home)["failed"] == []
    up.enqueue_enrolment(srv.ctx.store.invite(1)[0])  # the code arrives later: everything goes
    assert up.run_once()["sent"] == 2 and srv.ctx.store.counts()["bundles"] == 1


def test_refused_upload_is_kept_with_its_reason(setup):
    home, _, srv = setup
    up = Uploader(home)
    up.enqueue_enrolment("0000-0000-0000")  # not an invitation the study issued
    res = up.run_once()
    assert res["failed"] == 1
    (f,) = queue_status(home)["failed"]
    assert f["kind"] == "enrolment" and "invitation code is not one this study issued" in f["message"]


def test_wrong_pin_sends_nothing(setup):
    home, _, srv = setup
    up = Uploader(home, server=(srv.url, "0" * 64))
    up._add("x", "enrolment", "enrolment.json", body={"invitation": "a", "enrolment": {}})
    res = up.run_once(now=0)
    assert "not the one the study card pins" in res["error"] and srv.ctx.store.counts()["enrolled"] == 0
    assert queue_status(home)["prepared"][0]["attempts"] == 1


def test_pinned_context_refuses_another_certificate(setup, tmp_path):
    from agent.errors import IntegrityError

    _, _, srv = setup
    with pytest.raises(IntegrityError, match="not the one the study card pins"):
        pinned_context(srv.url, "ab" * 32)


def test_backoff_is_exponential_with_full_jitter(tmp_path):
    up = Uploader(Home(tmp_path / "h"), server=("https://127.0.0.1:1", "0" * 64), rng=random.Random(7),
                  backoff_base_s=2, backoff_cap_s=60)
    draws = [[up.backoff_s(a) for _ in range(400)] for a in (1, 2, 3, 10)]
    # Upper bounds min(cap, base * 2**a) = 4, 8, 16, 60; full jitter spreads draws over [0, bound].
    for d, bound in zip(draws, (4, 8, 16, 60), strict=True):
        assert max(d) <= bound and min(d) >= 0 and max(d) > 0.9 * bound and min(d) < 0.1 * bound


def test_offline_queue_survives_restart(tmp_path):
    # Nobody listens on the card's address: items stay queued with a growing back-off, across a new Uploader.
    home, study = make_world(tmp_path)
    port = free_port()
    up = Uploader(home, server=(f"https://127.0.0.1:{port}", "0" * 64))
    export_bundle(home, now=NOW)
    up.enqueue_outbox()
    r1 = up.run_once(now=1000.0)
    assert r1["sent"] == 0 and "cannot reach" in r1["error"]
    again = Uploader(home, server=(f"https://127.0.0.1:{port}", "0" * 64))
    (item,) = again.pending()
    assert item["attempts"] == 1 and 1000.0 <= item["next_try"] <= 1000.0 + 4.0
    assert again.run_once(now=1000.0)["waiting"] == 1  # not due yet: not tried
    assert again.pending()[0]["attempts"] == 1


# -- the server killed: nothing lost, nothing duplicated ---------------------------------
def start_server(study, db, port):
    env = dict(os.environ, LETHE_STUDY_PASSPHRASE=PASS.decode(), LETHE_DASHBOARD_PASSWORD=PASSWORD,
               PYTHONPATH=os.pathsep.join([os.getcwd(), os.environ.get("PYTHONPATH", "")]))
    p = subprocess.Popen([sys.executable, "-c", "import sys; from agent.cli import main; sys.exit(main())",
                          "study", "serve", "--dir", str(study), "--port", str(port), "--self-signed",
                          "--database", db], env=env, stdout=subprocess.PIPE, stderr=subprocess.PIPE)
    line = p.stdout.readline().decode()
    assert "lethe study server" in line, p.stderr.read().decode()
    return p


def test_server_killed_mid_upload_loses_nothing(tmp_path):
    import socket

    from agent.study.server.store import Store
    from agent.study.server.tls import cert_pin, self_signed

    home, study = make_world(tmp_path)
    cert, _ = self_signed(study)
    port, db = free_port(), f"sqlite:///{tmp_path / 'server.db'}"
    url, pin = f"https://127.0.0.1:{port}", cert_pin(cert.read_bytes())
    with_server_card(home, study, url, pin, tmp_path)
    enrolment_file(home, study)
    store = Store(db, "harbour-days-2027")
    code = store.invite(1)[0]
    server = start_server(study, db, port)
    try:
        up = Uploader(home)
        up.enqueue_enrolment(code)
        assert up.run_once()["sent"] == 1
        paths = [export_bundle(home, now=NOW + 86400 * i) for i in range(6)]
        assert up.enqueue_outbox() == 6
        # a bundle is half-way up the wire when the server dies
        first = paths[0].read_bytes()
        ctx = pinned_context(url, pin)
        raw = socket.create_connection(("127.0.0.1", port), timeout=30)
        s = ctx.wrap_socket(raw, server_hostname="127.0.0.1")
        s.sendall(b"POST /v1/bundles HTTP/1.1\r\nHost: x\r\nContent-Type: application/octet-stream\r\n"
                  + f"Content-Length: {len(first)}\r\n\r\n".encode() + first[: len(first) // 2])
        server.send_signal(signal.SIGKILL)
        server.wait(10)
        s.close()
        r = up.run_once(now=time.time() + 10**6)
        assert r["error"]  # the server is gone: everything stays queued
        server = start_server(study, db, port)
        for _ in range(5):
            if not Uploader(home).pending():
                break
            Uploader(home).run_once(now=time.time() + 10**7)
        assert Uploader(home).pending() == []
        rows = list(store.records())
        assert sorted(seq for _, seq, _ in rows) == [1, 2, 3, 4, 5, 6]  # 0 lost, 0 duplicated
        assert len(queue_status(home)["sent"]) == 7
    finally:
        server.send_signal(signal.SIGKILL)
        server.wait(10)
        store.close()


def test_server_refuses_a_ledger_that_does_not_continue(setup):
    # The enrolment names a log origin the device's ledger does not start with (a reset ledger):
    # the bundle is refused with 422 ledger_discontinuity and stored nowhere (docs/server.md).
    from agent.export import home_card
    from agent.keystore import Keystore
    from agent.study.card import make_enrolment

    home, _, srv = setup
    doc = make_enrolment(home_card(home), home.load_policy(), home.read_config()["pseudonym"],
                         Keystore(home).device_key(), log_origin="ab" * 32)
    (home.root / "enrolment.json").write_text(json.dumps(doc))
    up = Uploader(home)
    up.enqueue_enrolment(srv.ctx.store.invite(1)[0])
    export_bundle(home, now=NOW)
    up.enqueue_outbox()
    res = up.run_once()
    assert res["sent"] == 1 and res["failed"] == 1
    (f,) = queue_status(home)["failed"]
    assert f["kind"] == "bundle" and "reset" in f["message"]
    assert srv.ctx.store.counts()["bundles"] == 0


def test_the_running_agent_uploads(setup):
    # 'lethe run' (watching) starts the upload queue when the card names a server: a confirmed bundle in the
    # outbox reaches the server without any other command.
    import threading

    from agent.intake.watcher import run_agent

    home, _, srv = setup
    up = Uploader(home)
    up.enqueue_enrolment(srv.ctx.store.invite(1)[0])
    export_bundle(home, now=NOW)
    stop, ready = threading.Event(), threading.Event()
    t = threading.Thread(target=run_agent, args=(home, home.load_policy()),
                         kwargs=dict(stop_event=stop, warm=False, on_ready=lambda s: ready.set()))
    t.start()
    try:
        assert ready.wait(60)
        deadline = time.time() + 60
        while time.time() < deadline and srv.ctx.store.counts()["bundles"] < 1:
            time.sleep(0.2)
    finally:
        stop.set()
        t.join(60)
    assert not t.is_alive()
    assert srv.ctx.store.counts()["bundles"] == 1
    assert [s["kind"] for s in queue_status(home)["sent"]] == ["enrolment", "bundle"]


def test_background_uploader_needs_a_server_on_the_card(tmp_path):
    from agent.uploader import start_background

    home, _ = make_world(tmp_path)
    assert start_background(home) is None  # files only: no thread, nothing queued


def test_withdrawal_certificate_is_delivered_and_closes_the_door(setup, tmp_path, capsys):
    from agent.cli import main
    from agent.keystore import Keystore
    from agent.study.withdrawal import make_withdrawal_certificate, write_withdrawal_certificate

    home, _, srv = setup
    up = Uploader(home)
    up.enqueue_enrolment(srv.ctx.store.invite(1)[0])
    assert up.run_once()["sent"] == 1
    cert = make_withdrawal_certificate("harbour-days-2027", home.read_config()["pseudonym"],
                                       Keystore(home).device_key(), {"seq": 3, "hash": "ab" * 32}, {"episodes": 60})
    path = write_withdrawal_certificate(tmp_path / "withdrawal-certificate.json", cert)
    assert main(["upload", "--withdrawal", str(path), "--card", str(home.root / "study-card.json"), "--json"]) == 0
    assert json.loads(capsys.readouterr().out)["status"] == "withdrawn"
    assert srv.ctx.store.counts()["withdrawn"] == 1
    export_bundle(home, now=NOW)  # sealed after the withdrawal reached the study: refused for good
    up.enqueue_outbox()
    assert up.run_once()["failed"] == 1
    assert "withdrew" in queue_status(home)["failed"][0]["message"]


def test_withdrawal_upload_refused_is_an_error(setup, tmp_path):
    from agent.errors import StateError
    from agent.study.withdrawal import make_withdrawal_certificate, write_withdrawal_certificate
    from agent.uploader import upload_withdrawal

    from cryptography.hazmat.primitives.asymmetric.ed25519 import Ed25519PrivateKey

    _, _, srv = setup
    cert = make_withdrawal_certificate("harbour-days-2027", "pNobody01", Ed25519PrivateKey.generate(),
                                       {"seq": 3, "hash": "ab" * 32}, {"episodes": 1})
    path = write_withdrawal_certificate(tmp_path / "w.json", cert)
    with pytest.raises(StateError, match="refused the withdrawal certificate.*not enrolled"):
        upload_withdrawal(path, srv.url, srv.pin, sleep=lambda s: None)
